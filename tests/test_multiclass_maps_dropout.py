"""One spec with everything a multiclass table may need at once (specs/proofing_room.objc): a 3-class
target, a one-hot column, random Fourier features and a dropout penalty. It checks convex with its
expanded objective, fits to the same answer on both backends, evaluates with the K x K table, and
predicts from a fresh process through the generated module exactly as `objc predict` does."""

from __future__ import annotations

import json
import shutil
import subprocess
import sys
import textwrap
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from sklearn.metrics import confusion_matrix, log_loss, precision_recall_fscore_support

REPO = Path(__file__).resolve().parent.parent
SPEC = REPO / "specs" / "proofing_room.objc"
CLASSES = ["under", "ready", "past"]


def _objc(*args: str, cwd: Path) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "objc", *args], cwd=cwd, capture_output=True, text=True, timeout=300)


@pytest.fixture(scope="module")
def room(tmp_path_factory) -> Path:
    folder = tmp_path_factory.mktemp("proofing")
    shutil.copy(REPO / "specs" / "data" / "proofing.csv", folder / "proofing.csv")
    (folder / "room.objc").write_text(SPEC.read_text().replace("data/proofing.csv", "proofing.csv"))
    # the same goal trained on every row, for the generated module (which has no holdout of its own)
    (folder / "all.objc").write_text("\n".join(line for line in (folder / "room.objc").read_text().splitlines()
                                               if "holdout" not in line) + "\n")
    return folder


def test_it_checks_convex_and_says_what_each_piece_is(room):
    run = _objc("check", "room.objc", cwd=room)
    assert run.returncode == 0, run.stderr
    text = run.stdout
    assert "verdict   CONVEX" in text
    assert "sum_i c_i (log sum_k exp(s_ik) - s_i,y_i) / sum_i c_i" in text
    assert "dropridge(W, drop) = drop / (2 (1 - drop)) * sum_j m2_j sum_k W_jk^2" in text
    assert "quadratic approximation" in text
    assert "warning" not in text  # both backends train it


@pytest.fixture(scope="module")
def fits(room) -> dict:
    out = {}
    for backend in ("numpy", "cvxpy"):
        run = _objc("fit", "room.objc", "--backend", backend, "--json", "-o", f"{backend}.json", cwd=room)
        assert run.returncode == 0, run.stderr
        out[backend] = dict(json.loads(run.stdout), npz=np.load(room / f"{backend}.npz"))
    return out


def test_both_backends_reach_the_same_optimum(fits):
    # the cvxpy backend (Clarabel at its tight settings) is the reference for the NumPy solver
    a, b = fits["numpy"], fits["cvxpy"]
    assert abs(a["objective"] - b["objective"]) <= 1e-8 * b["objective"]
    np.testing.assert_allclose(a["npz"]["W"], b["npz"]["W"], atol=1e-6)
    # the intercepts are fixed up to one number added to every class (the softmax does not see it)
    ba, bb = a["npz"]["b"], b["npz"]["b"]
    np.testing.assert_allclose(ba - ba.mean(), bb - bb.mean(), atol=1e-6)
    inputs = a["inputs"]
    assert "oven=deck" in inputs and "curve_40" in inputs and len(inputs) == 3 + 3 + 40


def test_eval_gives_the_k_by_k_table_and_per_class_figures(room, fits):
    # reference: scikit-learn's confusion_matrix, precision_recall_fscore_support and log_loss on the
    # labels and probabilities `objc predict` wrote for the same rows
    run = _objc("eval", "numpy.json", "proofing.csv", "--json", cwd=room)
    assert run.returncode == 0, run.stderr
    metrics = json.loads(run.stdout)["metrics"]
    assert _objc("predict", "numpy.json", "proofing.csv", "-o", "pred.csv", cwd=room).returncode == 0
    pred = pd.read_csv(room / "pred.csv")
    truth = pd.read_csv(room / "proofing.csv")["proof"]
    assert metrics["class_confusion"] == confusion_matrix(truth, pred["label"], labels=CLASSES).tolist()
    precision, recall, _f, _n = precision_recall_fscore_support(truth, pred["label"], labels=CLASSES, zero_division=0)
    np.testing.assert_allclose([c["precision"] for c in metrics["per_class"]], precision, rtol=1e-12)
    np.testing.assert_allclose([c["recall"] for c in metrics["per_class"]], recall, rtol=1e-12)
    # log_loss reads the probability columns in sorted label order
    ordered = sorted(CLASSES)
    chances = pred[[f"chance:{c}" for c in ordered]].to_numpy()
    assert metrics["log_loss"] == pytest.approx(log_loss(truth, chances, labels=ordered), rel=1e-9)
    report = _objc("eval", "numpy.json", "proofing.csv", cwd=room).stdout
    assert all(c in report for c in CLASSES) and "precision" in report


def test_the_generated_module_predicts_in_a_fresh_process_as_objc_does(room):
    assert _objc("fit", "all.objc", "-o", "all.json", cwd=room).returncode == 0
    assert _objc("predict", "all.json", "proofing.csv", "-o", "all_pred.csv", cwd=room).returncode == 0
    assert _objc("build", "all.objc", "-o", "proofing_model.py", cwd=room).returncode == 0
    script = textwrap.dedent("""
        import json
        import pandas as pd
        import proofing_model
        t = pd.read_csv("proofing.csv")
        m = proofing_model.fit(t, t["proof"], tol=1e-14)
        print(json.dumps({"labels": list(proofing_model.predict(m, t)),
                          "chances": proofing_model.predict_proba(m, t).tolist(), "inputs": m["inputs"]}))
    """)
    fresh = subprocess.run([sys.executable, "-c", script], cwd=room, capture_output=True, text=True, timeout=300)
    assert fresh.returncode == 0, fresh.stderr
    out = json.loads(fresh.stdout)
    ours = pd.read_csv(room / "all_pred.csv")
    assert out["inputs"] == json.loads((room / "all.json").read_text())["schema"]["inputs"]
    assert out["labels"] == ours["label"].tolist()
    np.testing.assert_allclose(out["chances"], ours[[f"chance:{c}" for c in CLASSES]].to_numpy(), atol=1e-9)


def test_the_module_refuses_a_plain_matrix_when_the_spec_maps_columns(room):
    assert _objc("build", "all.objc", "-o", "proofing_model.py", cwd=room).returncode == 0
    script = ("import numpy as np, proofing_model\ntry:\n    proofing_model.fit(np.zeros((4, 3)), ['under'] * 4)\n"
              "except ValueError as e:\n    print(e)\n")
    fresh = subprocess.run([sys.executable, "-c", script], cwd=room, capture_output=True, text=True, timeout=300)
    assert "DataFrame" in fresh.stdout
