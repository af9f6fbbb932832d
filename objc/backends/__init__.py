"""Backends: each reads only the checked objective, the catalog and the bound data."""
