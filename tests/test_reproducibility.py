"""The same spec, data and seed give byte-identical generated modules (both backends) and
byte-identical saved models, across runs and across fresh processes.

What legitimately differs, and how it is kept apart:
- wall-clock time: never written into a model (the `seconds` of a fit is printed and in
  `objc fit --json`, not in the model file), so the hashed document holds no timing;
- paths: a generated module names its spec by the path it was given (in its docstrings); a model records the spec's path as given and resolved (`spec.path`, `spec.resolved_path`),
  the table as the spec names it (`schema.training_table`) and its arrays file's name
  (`arrays.file`). Run from the same folder they are the same, and the files are byte-identical;
  trained from another folder only those fields (and so `document_sha256`) differ, which
  `test_another_folder_changes_only_the_paths` checks field by field.
"""

from __future__ import annotations

import hashlib
import json
import os
import shutil
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from objc.cli import main

ROOT = Path(__file__).resolve().parents[1]

SPEC = """table t from "data.csv"
  target y: yes -> +1, no -> -1
  inputs a, b, c
  standardize
  holdout 25% seed 11
tune C = 2.0 within 0.01 .. 100
learn w over inputs, b
score s = w . x + b
goal C * mean logistic(y * s) + 0.5 * l2sq(w) + 0.01 * l1(w)
"""

PATH_FIELDS = (("spec", "path"), ("spec", "resolved_path"), ("schema", "training_table"), ("arrays", "file"),
               ("document_sha256",))


def _folder(root: Path) -> Path:
    root.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(4)
    X = rng.normal(size=(200, 3)) * [1.0, 5.0, 0.2] + [0.0, 3.0, -1.0]
    y = np.where(X @ [1.0, -0.3, 4.0] + rng.normal(size=200) > -4, "yes", "no")
    rows = "\n".join(f"{a:.6f},{b:.6f},{c:.6f},{t}" for (a, b, c), t in zip(X, y))
    (root / "data.csv").write_text("a,b,c,y\n" + rows + "\n")
    (root / "s.objc").write_text(SPEC)
    return root


def _fresh(args: list[str], cwd: Path) -> None:
    env = dict(os.environ, PYTHONPATH=str(ROOT), PYTHONHASHSEED="random")
    proc = subprocess.run([sys.executable, "-m", "objc", *args], cwd=cwd, env=env, capture_output=True, text=True,
                          timeout=300)
    assert proc.returncode == 0, proc.stderr


def _here(argv: list[str], folder: Path) -> None:
    """The command in this process, from `folder`: modules and models name the spec by the path it
    was given, so this run gives the same relative path as the fresh processes."""
    cwd = Path.cwd()
    os.chdir(folder)
    try:
        assert main(argv) == 0
    finally:
        os.chdir(cwd)


def _digest(p: Path) -> str:
    return hashlib.sha256(p.read_bytes()).hexdigest()


def _three_runs(folder: Path, command: str, backend: str, outputs: tuple[str, str, str]) -> None:
    """The command writing each output in turn: two fresh interpreters (each with its own string-hash
    seed), then this one."""
    for run, out in zip((_fresh, _fresh, _here), outputs):
        run([command, "s.objc", "--backend", backend, "-o", out], folder)


@pytest.mark.parametrize("backend", ["numpy", "cvxpy"])
def test_modules_are_byte_identical_across_processes(tmp_path, backend, capsys):
    folder = _folder(tmp_path)
    _three_runs(folder, "build", backend, ("one.py", "two.py", "three.py"))
    capsys.readouterr()
    assert _digest(folder / "one.py") == _digest(folder / "two.py") == _digest(folder / "three.py")


@pytest.mark.parametrize("backend", ["numpy", "cvxpy"])
def test_models_are_byte_identical_across_runs_and_processes(tmp_path, backend, capsys):
    folder = _folder(tmp_path)
    _three_runs(folder, "fit", backend, ("m1.json", "m2.json", "m3.json"))
    capsys.readouterr()
    npz = {_digest(folder / f"m{k}.npz") for k in (1, 2, 3)}
    assert len(npz) == 1
    docs = [json.loads((folder / f"m{k}.json").read_text()) for k in (1, 2, 3)]
    # the documents differ only in the arrays file's own name (m1.npz, m2.npz, ...) and so in the
    # digest over the document; with that name set equal, the files are the same bytes
    for d in docs:
        assert "seconds" not in d["fit"]
        d["arrays"]["file"] = "m.npz"
        d.pop("document_sha256")
    assert docs[0] == docs[1] == docs[2]
    # written under the same name, the JSON files themselves are byte-identical
    first = (folder / "m1.json").read_bytes()
    _fresh(["fit", "s.objc", "--backend", backend, "-o", "m1.json"], folder)
    assert (folder / "m1.json").read_bytes() == first


def test_another_folder_changes_only_the_paths(tmp_path):
    here = _folder(tmp_path / "here")
    there = tmp_path / "elsewhere" / "deeper"
    there.mkdir(parents=True)
    for f in ("data.csv", "s.objc"):
        shutil.copy(here / f, there / f)
    _fresh(["fit", "s.objc", "-o", "m.json"], here)
    _fresh(["fit", str(there / "s.objc"), "-o", str(there / "m.json")], tmp_path)
    a, b = (json.loads((p / "m.json").read_text()) for p in (here, there))
    assert _digest(here / "m.npz") == _digest(there / "m.npz")
    differ = []
    for keys in PATH_FIELDS:
        va, vb = a, b
        for k in keys[:-1]:
            va, vb = va[k], vb[k]
        if va[keys[-1]] != vb[keys[-1]]:
            differ.append(".".join(keys))
        va.pop(keys[-1]), vb.pop(keys[-1])
    assert a == b  # everything but the paths is the same
    assert "spec.resolved_path" in differ and "document_sha256" in differ


def test_sweep_save_best_is_reproducible(tmp_path):
    folder = _folder(tmp_path)
    _fresh(["sweep", "s.objc", "C", "--steps", "3", "--save-best", "best.json"], folder)
    first = {p: (folder / p).read_bytes() for p in ("best.json", "best.npz")}
    _fresh(["sweep", "s.objc", "C", "--steps", "3", "--save-best", "best.json"], folder)
    assert all((folder / p).read_bytes() == raw for p, raw in first.items())


def reproducibility_fields() -> dict:
    """For docs/reliability.md: the fields that may differ between runs, and why."""
    return {"timing": "not in the model (printed, and in `objc fit --json` only)",
            "paths": ", ".join(".".join(k) for k in PATH_FIELDS[:-1]) + " (and so document_sha256): they "
                     "record where the spec and table were; equal when run from the same folder"}
