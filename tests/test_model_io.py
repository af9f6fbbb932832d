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
                      "label_map": [["yes", 1.0], ["no", -1.0]], "training_table": "t.csv"},
           "fit": {"method": "m", "certificate": {"absolute": float("inf")}}}
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


# ---------------------------------------------------------------- the document validator, on a real model

import json  # noqa: E402
import re  # noqa: E402
import shutil  # noqa: E402
import types  # noqa: E402
from pathlib import Path  # noqa: E402

from objc import model_io  # noqa: E402
from objc.cli import main  # noqa: E402
from objc.diagnostics import SpecError  # noqa: E402
from objc.model_io import DOCUMENT_KEYS, document_digest, key_steps  # noqa: E402

# a margin model with every optional part a loader reads: a label map, standardization statistics,
# a tunable, held-out rows and a convergence history (numpy backend)
REAL_SPEC = """table t from "rows.csv"
  target y: yes -> +1, no -> -1
  inputs a, b, c
  standardize
  holdout 25% seed 3
tune C = 1.0 within 0.01 .. 100
learn w over inputs, k
score s = w . x + k
goal C * mean logistic(y * s) + 0.5 * l2sq(w)
"""


def _rows(path: Path, n: int = 60) -> Path:
    rng = np.random.default_rng(4)
    X = rng.normal(size=(n, 3))
    y = np.where(X @ [1.0, -2.0, 0.5] + 0.3 * rng.normal(size=n) > 0, "yes", "no")
    path.write_text("a,b,c,y\n" + "".join(f"{r[0]:.4f},{r[1]:.4f},{r[2]:.4f},{lab}\n" for r, lab in zip(X, y)))
    return path


# a residual model: no label map, no standardization, a tunable quantile the metrics read, and a
# `fourier` map whose draws the model stores
RESIDUAL_SPEC = """table t from "rows.csv"
  target a
  inputs b, c
  fourier warm = b, c count 4 bandwidth 1 seed 2
tune q = 0.7 within 0.1 .. 0.9
learn w over inputs, k
score s = w . x + k
goal mean pinball(y - s, q) + 0.1 * l2sq(w)
"""

# a multiclass model: class labels in the schema, a weight matrix and an intercept per class
MULTICLASS_SPEC = """table t from "rows.csv"
  target kind classes p, q, r
  inputs a, b, c
learn W over inputs by classes, k by classes
score s = W . x + k
goal mean softmax_ce(s, y) + 0.1 * l2sq(W)
"""


def _class_rows(path: Path, n: int = 60) -> Path:
    rng = np.random.default_rng(5)
    X = rng.normal(size=(n, 3))
    S = X @ np.array([[1.0, -1.0, 0.0], [0.0, 1.0, -1.0], [0.5, 0.0, 0.5]]).T + 0.3 * rng.normal(size=(n, 3))
    kinds = np.array(["p", "q", "r"])[S.argmax(axis=1)]
    path.write_text("a,b,c,kind\n" + "".join(f"{r[0]:.4f},{r[1]:.4f},{r[2]:.4f},{k}\n" for r, k in zip(X, kinds)))
    return path


MODELS = {"margin": (REAL_SPEC, _rows), "residual": (RESIDUAL_SPEC, _rows), "multiclass": (MULTICLASS_SPEC, _class_rows)}


@pytest.fixture(scope="module")
def models(tmp_path_factory) -> dict[str, Path]:
    """A folder per kind of model (its spec, table and saved model m.json), fitted once."""
    out = {}
    for name, (text, rows) in MODELS.items():
        folder = tmp_path_factory.mktemp(name)
        rows(folder / "rows.csv")
        (folder / "m.objc").write_text(text)
        assert main(["fit", str(folder / "m.objc"), "-o", str(folder / "m.json"), "--json"]) == 0, name
        out[name] = folder
    return out


def _copy(folder: Path, to: Path) -> Path:
    for f in folder.iterdir():
        shutil.copy(f, to / f.name)
    return to / "m.json"


@pytest.fixture
def model_copy(models, tmp_path, capsys):
    """A fresh copy of the margin model (and its spec and table, which eval reads) to edit."""
    capsys.readouterr()
    return _copy(models["margin"], tmp_path)


def _holding(models: dict[str, Path], key, tmp_path: Path) -> Path:
    """A fresh copy of the first model whose document holds `key` (schema.classes: the multiclass one)."""
    for folder in models.values():
        doc = json.loads((folder / "m.json").read_text())
        try:
            _concrete(key.path, doc)
        except (KeyError, IndexError, StopIteration, TypeError):
            continue
        return _copy(folder, tmp_path)
    raise AssertionError(f"no test model holds {key.path}: add one that does")


def _concrete(path: str, doc: dict) -> list:
    """A DocumentKey path as the keys of one real place in `doc`: [] is item 0, {} the first entry."""
    out: list = []
    node = doc
    for step in key_steps(path):
        key = 0 if step == "[]" else next(iter(node)) if step == "{}" else step
        out.append(key)
        node = node[key]
    return out


def _holder(path: str, doc: dict) -> tuple[dict | list, str | int]:
    """(the node holding one real place of a DocumentKey path in `doc`, its key there)."""
    *parents, last = _concrete(path, doc)
    node = doc
    for p in parents:
        node = node[p]
    return node, last


def _rewrite(json_path: Path, edit) -> dict:
    """Apply `edit` to the document and store it with a fresh checksum, so what refuses it is the
    validator, not the checksum."""
    doc = json.loads(json_path.read_text())
    edit(doc)
    if isinstance(doc.get("document_sha256"), str) and doc.get("format") == model_io.MODEL_FORMAT:
        doc["document_sha256"] = document_digest(doc)
    json_path.write_text(json.dumps(doc, indent=2))
    return doc


def _run(capsys, argv: list[str]) -> tuple[int, dict, str]:
    rc = main(argv)
    out = capsys.readouterr()
    return rc, json.loads(out.out), out.err


def _refused_everywhere(capsys, json_path: Path, code: str, words: list[str]) -> None:
    """load_trained, `objc eval` and `objc predict` all refuse with `code`, naming the file and every
    one of `words`, with a fix; predict writes nothing."""
    from objc.training import load_trained
    with pytest.raises(SpecError) as info:
        load_trained(json_path)
    d = info.value.diagnostics[0]
    assert d.code == code and d.source_name == str(json_path) and d.hint, d.render()
    for w in words:
        assert w in d.message, d.message
    rows = json_path.with_name("rows.csv")
    out = json_path.with_name("out.csv")
    for argv in (["eval", str(json_path), "--json"], ["eval", str(json_path), str(rows), "--json"],
                 ["predict", str(json_path), str(rows), "-o", str(out), "--json"]):
        rc, doc, err = _run(capsys, argv)
        assert rc == 1 and "internal_error" not in doc and doc["errors"][0]["code"] == code, doc
        assert all(w in doc["errors"][0]["message"] for w in words) and doc["errors"][0]["file"] == str(json_path)
    assert not out.exists()
    rc = main(["eval", str(json_path)])  # the text report, too, is the located message, never a traceback
    err = capsys.readouterr().err
    assert rc == 1 and f"[{code}]" in err and "Traceback" not in err and "internal error" not in err


def test_each_key_is_listed_once():
    # two entries for one path would give two rules for one key (teammates add keys concurrently)
    paths = [k.path for k in DOCUMENT_KEYS]
    assert sorted(p for p in set(paths) if paths.count(p) > 1) == []


_REMOVABLE = [k for k in DOCUMENT_KEYS if not k.optional and key_steps(k.path)[-1] not in ("[]", "{}")]


@pytest.mark.parametrize("key", _REMOVABLE, ids=lambda k: k.path)
def test_each_required_key_missing_is_a_clear_refusal(models, tmp_path, capsys, key):
    # regression: a model JSON without a key ended in "internal error (KeyError)"
    model_copy = _holding(models, key, tmp_path)
    doc = json.loads(model_copy.read_text())
    where = ".".join(str(p) for p in _concrete(key.path, doc)).replace(".0.", "[0].")

    def drop(d):
        node, last = _holder(key.path, d)
        del node[last]
    _rewrite(model_copy, drop)
    if key.path == "document_sha256":
        _refused_everywhere(capsys, model_copy, "M506", ["document_sha256", str(model_copy)])
    elif key.path == "format":
        _refused_everywhere(capsys, model_copy, "M503", ["format", str(model_copy)])
    else:
        _refused_everywhere(capsys, model_copy, "M503", [f"has no '{where}'", key.expected, str(model_copy)])


def _wrong_value(key, value):
    """A value of another JSON kind than the one `key` holds in a real model."""
    return next(v for v in ("wrong", 12345, True, [], {}) if type(v) is not type(value) and not key.test(v, {}))


@pytest.mark.parametrize("key", DOCUMENT_KEYS, ids=lambda k: k.path)
def test_each_key_of_the_wrong_kind_is_a_clear_refusal(models, tmp_path, capsys, key):
    model_copy = _holding(models, key, tmp_path)
    doc = json.loads(model_copy.read_text())
    node, last = _holder(key.path, doc)
    # the two per-input tests look at the document's inputs, so they get a list of the wrong length
    per_input = key.path in ("schema.standardization.means", "schema.standardization.scales")
    wrong = [1.0] if per_input else _wrong_value(key, node[last])

    def spoil(d):
        held, at = _holder(key.path, d)
        held[at] = wrong
    _rewrite(model_copy, spoil)
    words = ["format"] if key.path == "format" else [key.expected, str(model_copy)]
    _refused_everywhere(capsys, model_copy, "M503", words)


@pytest.mark.parametrize("key", [k for k in DOCUMENT_KEYS if k.optional], ids=lambda k: k.path)
def test_a_model_without_an_optional_key_still_loads_and_evaluates(models, tmp_path, capsys, key):
    # optional means every reader has a default for it (a model written by an earlier objc)
    model_copy = _holding(models, key, tmp_path)
    def drop(d):
        node, last = _holder(key.path, d)
        del node[last]
    _rewrite(model_copy, drop)
    rc, doc, _ = _run(capsys, ["eval", str(model_copy), "--json"])
    assert rc == 0 and doc["ok"], doc


def test_a_label_pair_with_a_label_other_than_plus_or_minus_one_is_refused(model_copy, capsys):
    _rewrite(model_copy, lambda d: d["schema"]["label_map"][1].__setitem__(1, 0.0))
    _refused_everywhere(capsys, model_copy, "M503", ["schema.label_map[1]", "+1 or -1"])


def test_standardization_of_another_length_than_the_inputs_is_refused(model_copy, capsys):
    _rewrite(model_copy, lambda d: d["schema"]["standardization"]["scales"].pop())
    _refused_everywhere(capsys, model_copy, "M503", ["schema.standardization.scales", "one number per input"])


def _rewrite_arrays(json_path: Path, arrays: dict) -> None:
    """Replace the model's arrays and record their checksum and names, as a writer would."""
    import hashlib
    import io
    buf = io.BytesIO()
    np.savez(buf, **arrays)
    json_path.with_suffix(".npz").write_bytes(buf.getvalue())

    def point(d):
        d["arrays"]["sha256"] = hashlib.sha256(buf.getvalue()).hexdigest()
        d["arrays"]["names"] = sorted(arrays)
    _rewrite(json_path, point)


def test_arrays_lacking_a_learned_parameter_are_refused(model_copy, capsys):
    w = model_io.load_model(model_copy).params["w"]
    _rewrite_arrays(model_copy, {"w": w})  # no intercept k, though the spec learns one
    _refused_everywhere(capsys, model_copy, "M505", ["'k'", str(model_copy)])


def test_arrays_of_another_size_than_the_spec_learns_are_refused(model_copy, capsys):
    _rewrite_arrays(model_copy, {"w": np.zeros(2), "k": np.float64(0.0)})
    _refused_everywhere(capsys, model_copy, "M505", ["'w'", "holds 2 number(s)", "3 input(s)"])


def test_an_array_listed_but_not_in_the_file_is_refused(model_copy, capsys):
    _rewrite(model_copy, lambda d: d["arrays"]["names"].append("v"))
    _refused_everywhere(capsys, model_copy, "M505", ["'v'", "arrays.names"])


# ---------------------------------------------------------------- DOCUMENT_KEYS covers what is read

class _SeenDict(dict):
    """A document that notes the path of every key read from it (by [], get or in)."""

    def __init__(self, data: dict, where: str, seen: set):
        super().__init__(data)
        self._where, self._seen = where, seen

    def _note(self, key) -> str:
        path = f"{self._where}.{key}" if self._where else str(key)
        self._seen.add(path)
        return path

    def __getitem__(self, key):
        return _seen(super().__getitem__(key), self._note(key), self._seen)

    def get(self, key, default=None):
        return _seen(super().get(key, default), self._note(key), self._seen)

    def __contains__(self, key):
        self._note(key)
        return super().__contains__(key)


class _SeenList(list):
    """A list whose items note their reads under PATH[] (a list item is read as part of its list)."""

    def __init__(self, data: list, where: str, seen: set):
        super().__init__(data)
        self._where, self._seen = where + "[]", seen

    def __getitem__(self, k):
        got = super().__getitem__(k)
        return [_seen(x, self._where, self._seen) for x in got] if isinstance(k, slice) else \
            _seen(got, self._where, self._seen)

    def __iter__(self):
        return (_seen(x, self._where, self._seen) for x in list.__iter__(self))

    def __reversed__(self):
        return (_seen(x, self._where, self._seen) for x in list.__reversed__(self))


def _seen(v, where: str, seen: set):
    if isinstance(v, dict):
        return _SeenDict(v, where, seen)
    if isinstance(v, list):
        return _SeenList(v, where, seen)
    return v


def _covered(path: str) -> bool:
    for key in DOCUMENT_KEYS:
        pattern = re.escape(key.path).replace(re.escape("{}"), r"\.[^.\[\]]+")
        if re.fullmatch(pattern, path):
            return True
    return False


@pytest.mark.parametrize("which", list(MODELS))
def test_document_keys_cover_every_key_the_loaders_read(which, models, capsys, monkeypatch, tmp_path):
    # every reader runs on a document that records what it reads; the validator is switched off so
    # its own reads do not count
    folder = tmp_path / "model"
    folder.mkdir()
    model_copy = _copy(models[which], folder)
    capsys.readouterr()
    seen: set = set()
    shim = types.SimpleNamespace(loads=lambda text, **kw: _seen(json.loads(text, **kw), "", seen),
                                 dumps=json.dumps, JSONDecodeError=json.JSONDecodeError)
    monkeypatch.setattr(model_io, "json", shim)
    monkeypatch.setattr(model_io, "validate_document", lambda doc, path: None)
    real_digest = model_io.document_digest
    monkeypatch.setattr(model_io, "document_digest", lambda doc: real_digest(json.loads(json.dumps(doc))))
    rows = model_copy.with_name("rows.csv")
    runs = [["eval", str(model_copy), "--json"], ["eval", str(model_copy), str(rows), "--json"],
            ["predict", str(model_copy), str(rows), "-o", str(tmp_path / "p.csv"), "--json"],
            ["plot", "convergence", str(model_copy), "-o", str(tmp_path / "c.png"), "--json"]]
    for argv in runs:
        rc, doc, _ = _run(capsys, argv)
        # a model without two history records has no curve to draw: P601 (after reading the history)
        assert rc == 0 or (argv[0] == "plot" and doc["errors"][0]["code"] == "P601"), doc
    from objc.training import load_trained
    model = load_trained(model_copy)
    X = np.random.default_rng(0).normal(size=(4, len(model.input_names)))
    model.decision_function(X), model.predict(X), model.predict_table(rows), model.input_names, model.task
    # the recorder saw reads on every level, so it did record (a test that cannot fail is no test)
    assert {"spec.text", "schema.inputs", "fit.history", "arrays.names"} <= seen
    if which == "residual":
        assert "tunables.q" in seen  # the pinball metric at the trained quantile
        assert "schema.fourier_draws.warm.W" in seen  # the map's stored draws, not its seed
    if which == "multiclass":
        assert "schema.classes" in seen
    assert sorted(p for p in seen if not _covered(p)) == []


def test_a_history_of_null_objectives_has_no_curve_and_says_so(model_copy, tmp_path, capsys):
    # a non-finite objective is stored as null: `plot convergence` refuses such a history (P601), no traceback
    def nulls(doc):
        doc["fit"]["history"] = [{"passes": k, "objective": None} for k in range(1, 4)]
    _rewrite(model_copy, nulls)
    rc, doc, _err = _run(capsys, ["plot", "convergence", str(model_copy), "-o", str(tmp_path / "c.png"), "--json"])
    assert rc != 0 and doc["errors"][0]["code"] == "P601"
    assert not (tmp_path / "c.png").exists()
