"""A backend's refusal of a spec the checker accepts is a diagnostic with a code and the spec's
line and column: `objc check` says it before any training, `objc fit` and `objc build` refuse with the
same code, and nothing is written. Regression: `keep w[a]*2 + w[b] <= 1` checked convex and then
ended in fit as "internal error (NotSupported...)"."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest

from objc.cli import main
from objc.diagnostics import NUMPY_REFUSAL_CODES, SCORE_FORM_CODE

HEAD = """table t from "rows.csv"
  target y: yes -> +1, no -> -1
  inputs a, b, c
learn w over inputs, k
"""
SCORE = "score s = w . x + k\n"

# (code, the spec's lines after HEAD, the line and column the refusal points at); each the NumPy
# backend cannot train and the cvxpy backend can
NUMPY_ONLY = [
    ("E403", SCORE + "goal mean logistic(y * s) + 0.5 * l2sq(w)\nkeep w[a]*2 + w[b] <= 1\n", (7, 1)),
    ("E405", SCORE + "goal mean logistic(y * s) + (mean a^2) * l2sq(w)\n", (6, 30)),
    ("E407", SCORE + "goal mean logistic(y * s) + 0.5 * l2sq(w) + abs(w[a] - w[b])\n", (6, 45)),
    ("E408", SCORE + "goal max(mean logistic(y * s), 0.3) + 0.5 * l2sq(w)\n", (6, 6)),
]


def _rows(path: Path, n: int = 40) -> None:
    rng = np.random.default_rng(11)
    X = rng.normal(size=(n, 3))
    y = np.where(X @ [1.0, -1.0, 0.5] + 0.5 * rng.normal(size=n) > 0, "yes", "no")
    path.write_text("a,b,c,y\n" + "".join(f"{r[0]:.4f},{r[1]:.4f},{r[2]:.4f},{lab}\n" for r, lab in zip(X, y)))


def _spec(folder: Path, body: str) -> Path:
    _rows(folder / "rows.csv")
    spec = folder / "m.objc"
    spec.write_text(HEAD + body)
    return spec


def _json(capsys, argv: list) -> tuple[int, dict]:
    rc = main([str(a) for a in argv] + ["--json"])
    return rc, json.loads(capsys.readouterr().out)


def _written(folder: Path) -> list[str]:
    return sorted(p.name for p in folder.iterdir() if p.suffix not in (".objc", ".csv"))


def test_every_numpy_refusal_kind_has_its_own_documented_code():
    codes = list(NUMPY_REFUSAL_CODES.values())
    assert len(set(codes)) == len(codes)
    docs = (Path(__file__).resolve().parents[1] / "docs" / "language.md").read_text(encoding="utf-8")
    assert all(f"| {c} |" in docs for c in codes)


@pytest.mark.parametrize("code, body, at", NUMPY_ONLY, ids=[c for c, _, _ in NUMPY_ONLY])
def test_a_numpy_refusal_is_said_by_check_and_given_by_fit_and_build(tmp_path, capsys, code, body, at):
    spec = _spec(tmp_path, body)
    rc, doc = _json(capsys, ["check", spec])
    # only one backend refuses: a warning that names the refusal's code and where, and check passes
    warned = [w for w in doc["warnings"] if w["code"] == "W321"]
    assert rc == 0 and doc["ok"] and len(warned) == 1, doc
    assert (warned[0]["line"], warned[0]["column"]) == at and f"({code} in `objc fit`)" in warned[0]["message"]
    assert "--backend cvxpy" in warned[0]["hint"]
    for argv in (["fit", spec, "-o", tmp_path / "m.json"], ["build", spec, "--backend", "numpy", "-o",
                                                            tmp_path / "m.py"]):
        rc, doc = _json(capsys, argv)
        assert rc == 1 and "internal_error" not in doc, doc
        e = doc["errors"][0]
        assert e["code"] == code and (e["line"], e["column"]) == at and e["file"] == str(spec)
        # the same diagnostic as check's warning: the same reason, after the same lead-in
        assert e["message"].split(": ", 1)[1] == warned[0]["message"].split(": ", 1)[1]
        rc = main([str(a) for a in argv])  # the text report: the located message, no traceback
        err = capsys.readouterr().err
        assert rc == 1 and f"m.objc:{at[0]}:{at[1]}: error [{code}]" in err and "Traceback" not in err
    assert _written(tmp_path) == []
    # the other backend trains it, as the warning says
    rc, doc = _json(capsys, ["fit", spec, "--backend", "cvxpy", "-o", tmp_path / "m.json"])
    assert rc == 0 and doc["ok"], doc


def test_a_score_no_backend_can_read_is_an_error_of_check_and_of_fit_with_either_backend(tmp_path, capsys):
    # the checker calls `2 * (w . x) + k` affine, but objc/score_form.py (every backend, every metric)
    # reads a score as blocks; the cvxpy backend used to train it and then fail computing its metrics
    spec = _spec(tmp_path, "score s = 2 * (w . x) + k\ngoal mean logistic(y * s) + 0.5 * l2sq(w)\n")
    rc, doc = _json(capsys, ["check", spec])
    assert rc == 1 and not doc["ok"] and [(e["code"], e["line"], e["column"]) for e in doc["errors"]] == [
        (SCORE_FORM_CODE, 5, 1)]
    assert "moving the factor onto x's columns" in doc["errors"][0]["message"]
    for backend in ("numpy", "cvxpy"):
        rc, doc = _json(capsys, ["fit", spec, "--backend", backend, "-o", tmp_path / "m.json"])
        assert rc == 1 and "internal_error" not in doc and doc["errors"][0]["code"] == SCORE_FORM_CODE, doc
    rc, doc = _json(capsys, ["build", spec, "--backend", "cvxpy", "-o", tmp_path / "m.py"])
    assert rc == 1 and doc["errors"][0]["code"] == SCORE_FORM_CODE, doc
    assert _written(tmp_path) == []


def test_the_same_score_written_blockwise_is_accepted_with_no_backend_warning(tmp_path, capsys):
    # the fix E306 suggests: the factor on the columns (or no factor) is a score both backends read
    spec = _spec(tmp_path, SCORE + "goal mean logistic(y * s) + 0.5 * l2sq(w)\n")
    rc, doc = _json(capsys, ["check", spec])
    assert rc == 0 and not [w for w in doc["warnings"] if w["code"] == "W321"]
