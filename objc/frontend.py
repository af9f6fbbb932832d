"""Spec text to checked objective: parse, resolve, check, in that order."""

from __future__ import annotations

from pathlib import Path

from objc.checker import CheckedObjective, check
from objc.diagnostics import Diagnostic, SpecError
from objc.resolve import resolve
from objc.source_text import SourceText, Span
from objc.spec_parser import parse


def check_text(text: str, source_name: str = "<spec>") -> CheckedObjective:
    """Parse, resolve and check a spec. Raises SpecError for a spec that cannot be read or resolved;
    a readable spec that is not convex comes back with `errors` set and `accepted` False."""
    source = SourceText(source_name, text)
    tree = parse(source)
    try:
        resolved = resolve(tree, source)
        return check(resolved, source)
    except RecursionError:
        # custom losses are inlined where used, so a long chain of them can nest deeper than the parser saw
        raise SpecError((Diagnostic("E106", "the spec nests too deeply once its custom losses are expanded",
                                    Span(1, 1, 1, 2), hint="define fewer losses in terms of each other",
                                    source_name=source_name),), source) from None


def check_file(path: str | Path) -> CheckedObjective:
    """check_text on a file; a missing or unreadable file is a SpecError too."""
    p = Path(path)
    try:
        text = p.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise SpecError((Diagnostic("E001", f"spec file not found: {p}", Span(0, 0, 0, 0),
                                    hint="check the path", source_name=str(p)),)) from None
    except (OSError, UnicodeDecodeError) as err:
        raise SpecError((Diagnostic("E002", f"cannot read spec file {p}: {err}", Span(0, 0, 0, 0),
                                    source_name=str(p)),)) from None
    return check_text(text, str(p))
