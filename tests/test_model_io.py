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


def _saved(tmp_path, name="m.json"):
    from objc.model_io import save_model
    doc = {"spec": {"text": "t", "path": "s.objc"}, "task": "margin", "verdict": "convex",
           "schema": {"inputs": ["a", "b"], "standardization": {"means": [0.5, 1.0], "scales": [2.0, 3.0]},
                      "label_map": [["yes", 1.0], ["no", -1.0]]},
           "fit": {"certificate": {"absolute": float("inf")}}}
    return save_model(tmp_path / name, doc, {"w": np.array([1.0, -2.0]), "b": 0.25})


def test_any_edit_to_the_document_is_refused(tmp_path):
    import json

    from objc.diagnostics import SpecError
    from objc.model_io import load_model
    path = _saved(tmp_path)
    assert load_model(path).params["b"] == 0.25
    original = path.read_text()
    for edit in (lambda d: d["schema"]["label_map"].reverse(),
                 lambda d: d["schema"]["standardization"]["means"].__setitem__(0, 0.0),
                 lambda d: d.__setitem__("task", "residual")):
        doc = json.loads(original)
        edit(doc)
        path.write_text(json.dumps(doc))
        with pytest.raises(SpecError) as err:
            load_model(path)
        assert err.value.diagnostics[0].code == "M506"


def test_missing_keys_are_a_located_model_error_not_a_key_error(tmp_path):
    import json

    from objc.diagnostics import SpecError
    from objc.model_io import load_model
    path = _saved(tmp_path)
    doc = json.loads(path.read_text())
    del doc["schema"]["inputs"]
    path.write_text(json.dumps(doc))
    with pytest.raises(SpecError) as err:
        load_model(path)
    d = err.value.diagnostics[0]
    assert d.code == "M503" and "schema.inputs" in d.message and d.source_name == str(path)


def test_a_renamed_pair_still_loads(tmp_path):
    from objc.model_io import load_model
    path = _saved(tmp_path)
    path.rename(tmp_path / "renamed.json")
    (tmp_path / "m.npz").rename(tmp_path / "renamed.npz")
    np.testing.assert_array_equal(load_model(tmp_path / "renamed.json").params["w"], [1.0, -2.0])


def test_saved_json_is_strict(tmp_path):
    import json
    path = _saved(tmp_path)

    def refuse(token):  # Python's parser accepts Infinity and NaN unless told otherwise (RFC 8259 has neither)
        raise ValueError(token)
    doc = json.loads(path.read_text(), parse_constant=refuse)
    assert doc["fit"]["certificate"]["absolute"] is None
