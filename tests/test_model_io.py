"""Saved-model files: written whole or not at all, with the mode the user's umask gives."""

from __future__ import annotations

import os
import stat

import numpy as np
import pytest

from objc.model_io import model_paths, save_model


@pytest.mark.parametrize("umask", [0o022, 0o077, 0o002])
def test_saved_files_get_the_mode_the_umask_gives(tmp_path, umask):
    # POSIX: a new file opened with mode 0666 gets 0666 & ~umask (open(2)); regression: mkstemp's 0600
    # leaked into every file objc wrote, whatever the umask
    old = os.umask(umask)
    try:
        out = save_model(tmp_path / "m.json", {"note": "x"}, {"w": np.arange(3.0), "b": 0.5})
    finally:
        os.umask(old)
    for path in model_paths(out):
        assert stat.S_IMODE(path.stat().st_mode) == 0o666 & ~umask
    assert sorted(p.name for p in tmp_path.iterdir()) == ["m.json", "m.npz"]  # no temporary left behind
