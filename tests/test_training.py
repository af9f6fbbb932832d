"""Training end to end: metrics against scikit-learn's, the saved-model format, every example spec
through fit, eval and predict."""

from __future__ import annotations

import json
import shutil
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from sklearn import datasets, metrics as skm

import objc
from objc.cli import main
from objc.diagnostics import SpecError

ROOT = Path(__file__).resolve().parent.parent
SPECS = sorted((ROOT / "specs").glob("*.objc"))


def _cancer_table(tmp_path: Path) -> Path:
    # breast cancer: UCI Wisconsin Diagnostic Breast Cancer (Street, Wolberg & Mangasarian 1993), shipped in sklearn
    d = datasets.load_breast_cancer()
    X = d.data[:, :6]
    frame = pd.DataFrame(X, columns=[f"f{i}" for i in range(6)])
    frame["diag"] = np.where(d.target == 1, "benign", "malignant")
    frame["wt"] = 1.0 + (np.arange(len(frame)) % 3)
    path = tmp_path / "cancer.csv"
    frame.to_csv(path, index=False)
    return path


CANCER_SPEC = """table c from "cancer.csv"
  target diag: benign -> +1, malignant -> -1
  inputs like "f*"
  rowweight wt
  standardize
learn w over inputs, b
score s = w . x + b
goal mean logistic(y * s) + 0.01 * l2sq(w)
"""


def test_zero_one_error_equals_sklearn_accuracy_complement(tmp_path):
    _cancer_table(tmp_path)
    (tmp_path / "c.objc").write_text(CANCER_SPEC)
    model = objc.fit_spec(tmp_path / "c.objc", backend="cvxpy")
    m = model.document["training_metrics"]
    frame = pd.read_csv(tmp_path / "cancer.csv")
    y = np.where(frame["diag"] == "benign", 1.0, -1.0)
    pred = model.predict(frame[[f"f{i}" for i in range(6)]].to_numpy())
    assert set(pred) <= {"benign", "malignant"}  # the table's own labels, through the spec's label map
    # scikit-learn's accuracy_score with and without sample_weight (its own definition of accuracy)
    truth = frame["diag"].to_numpy()
    assert m["zero_one_error"] == pytest.approx(1 - skm.accuracy_score(truth, pred), abs=1e-12)
    assert m["zero_one_error_weighted"] == pytest.approx(
        1 - skm.accuracy_score(truth, pred, sample_weight=frame["wt"]), abs=1e-12)
    cm = skm.confusion_matrix(truth, pred, labels=["benign", "malignant"])
    c = m["confusion"]
    assert [[c["true_pos"], c["false_neg"]], [c["false_pos"], c["true_neg"]]] == cm.tolist()
    # the mean logistic loss reported equals scikit-learn's log loss (natural log) with the same weights
    s = model.decision_function(frame[[f"f{i}" for i in range(6)]].to_numpy())
    p = 1 / (1 + np.exp(-s))
    assert m["mean_losses"]["logistic"] == pytest.approx(
        skm.log_loss(y, p, sample_weight=frame["wt"], labels=[-1.0, 1.0]), rel=1e-9)


def test_a_dataframe_trains_like_its_csv_and_predict_refuses_missing_rows(tmp_path):
    # regression: fit_spec(data=DataFrame) failed; predict returned +-1 floats and scored NaN rows
    path = _cancer_table(tmp_path)
    (tmp_path / "c.objc").write_text(CANCER_SPEC)
    from_file = objc.fit_spec(tmp_path / "c.objc", backend="cvxpy")
    from_frame = objc.fit_spec(tmp_path / "c.objc", data=pd.read_csv(path), backend="cvxpy")
    np.testing.assert_allclose(from_frame.params["w"], from_file.params["w"], rtol=0, atol=1e-9)
    X = pd.read_csv(path)[[f"f{i}" for i in range(6)]].to_numpy()
    X[3, 2] = np.nan
    with pytest.raises(ValueError, match="row"):
        from_file.predict(X)
    with pytest.raises(ValueError, match="backend"):
        objc.fit_spec(tmp_path / "c.objc", backend="numpi")


def test_regression_metrics_match_sklearn(tmp_path):
    # diabetes: Efron, Hastie, Johnstone & Tibshirani 2004, shipped in sklearn
    d = datasets.load_diabetes()
    frame = pd.DataFrame(d.data[:, :4], columns=["age", "sex", "bmi", "bp"])
    frame["prog"] = d.target
    frame.to_csv(tmp_path / "d.csv", index=False)
    (tmp_path / "d.objc").write_text('table d from "d.csv"\n  target prog\n  inputs age, sex, bmi, bp\n'
                                     'learn w over inputs, b\nscore s = w . x + b\n'
                                     'goal mean pinball(y - s, 0.8) + 0.01 * l1(w)\n')
    model = objc.fit_spec(tmp_path / "d.objc", backend="cvxpy")
    m = model.document["training_metrics"]
    pred = model.predict(frame[["age", "sex", "bmi", "bp"]].to_numpy())
    assert m["mae"] == pytest.approx(skm.mean_absolute_error(frame["prog"], pred), rel=1e-12)
    assert m["rmse"] == pytest.approx(np.sqrt(skm.mean_squared_error(frame["prog"], pred)), rel=1e-12)
    # scikit-learn's mean_pinball_loss at alpha = 0.8 is the pinball loss objc trained on
    assert m["mean_losses"]["pinball(t=0.8)"] == pytest.approx(
        skm.mean_pinball_loss(frame["prog"], pred, alpha=0.8), rel=1e-9)
    # a quantile-0.8 fit leaves about 80% of rows at or below it (Koenker & Bassett 1978)
    assert abs(m["coverage"] - 0.8) < 0.03


def test_saved_model_round_trip_and_tamper_check(tmp_path):
    _cancer_table(tmp_path)
    (tmp_path / "c.objc").write_text(CANCER_SPEC)
    model = objc.fit_spec(tmp_path / "c.objc", backend="cvxpy")
    path = model.save(tmp_path / "out" / "m.json")
    doc = json.loads(path.read_text())
    assert doc["format"] == "objc-model/1" and doc["verdict"] == "convex"
    assert doc["schema"]["inputs"] == [f"f{i}" for i in range(6)]
    assert doc["schema"]["standardization"] is not None and doc["spec"]["text"] == CANCER_SPEC
    again = objc.load_trained(path)
    for k, v in model.params.items():
        np.testing.assert_array_equal(np.asarray(again.params[k]), np.asarray(v))
    npz = path.with_suffix(".npz")
    data = bytearray(npz.read_bytes())
    data[-30] ^= 0xFF
    npz.write_bytes(bytes(data))
    with pytest.raises(SpecError, match="checksum"):
        objc.load_trained(path)


def test_predict_matches_columns_by_name(tmp_path, capsys):
    _cancer_table(tmp_path)
    (tmp_path / "c.objc").write_text(CANCER_SPEC)
    assert main(["fit", str(tmp_path / "c.objc"), "--backend", "cvxpy", "-o", str(tmp_path / "m.json"), "--json"]) == 0
    capsys.readouterr()
    frame = pd.read_csv(tmp_path / "cancer.csv")
    shuffled = frame[["wt", "f5", "f3", "f1", "f0", "f2", "f4"]]  # reordered, no target
    shuffled.to_csv(tmp_path / "new.csv", index=False)
    assert main(["predict", str(tmp_path / "m.json"), str(frame_path := tmp_path / "cancer.csv"), "-o",
                 str(tmp_path / "a.csv")]) == 0
    assert main(["predict", str(tmp_path / "m.json"), str(tmp_path / "new.csv"), "-o", str(tmp_path / "b.csv")]) == 0
    a, b = pd.read_csv(tmp_path / "a.csv"), pd.read_csv(tmp_path / "b.csv")
    np.testing.assert_allclose(a["score"], b["score"], rtol=0, atol=1e-12)
    assert set(a["label"]) <= {"benign", "malignant"}
    frame.drop(columns=["f2"]).to_csv(tmp_path / "missing.csv", index=False)
    capsys.readouterr()
    assert main(["predict", str(tmp_path / "m.json"), str(tmp_path / "missing.csv"), "-o", str(tmp_path / "c.csv")]) == 1
    err = capsys.readouterr().err
    assert "f2" in err and "missing.csv" in err
    assert not (tmp_path / "c.csv").exists()
    assert frame_path.exists()


@pytest.mark.parametrize("spec", SPECS, ids=[p.name for p in SPECS])
def test_every_example_spec_fits_evaluates_and_predicts_with_cvxpy(tmp_path, capsys, spec):
    work = tmp_path / "specs"
    shutil.copytree(ROOT / "specs", work, ignore=shutil.ignore_patterns("refused", "*.py"))
    target = work / spec.name
    model = tmp_path / "out" / "model.json"
    assert main(["fit", str(target), "--backend", "cvxpy", "-o", str(model), "--json"]) == 0
    fit_doc = json.loads(capsys.readouterr().out)
    assert np.isfinite(fit_doc["objective"]) and fit_doc["status"].startswith("optimal")
    assert sum(t["value"] for t in fit_doc["terms"]) == pytest.approx(fit_doc["objective"], rel=1e-6, abs=1e-9)
    assert main(["eval", str(model), "--json"]) == 0
    ev = json.loads(capsys.readouterr().out)["metrics"]
    assert ("zero_one_error" in ev) == (fit_doc["training_metrics"].get("zero_one_error") is not None)
    tb = objc.check_file(target).spec.table
    assert main(["predict", str(model), str(work / tb.path), "-o", str(tmp_path / "p.csv"), "--json"]) == 0
    pred = pd.read_csv(tmp_path / "p.csv")
    assert len(pred) > 0 and np.isfinite(pred.iloc[:, 1]).all()


def test_sweep_with_class_weights_ranks_by_the_weighted_error(tmp_path):
    # regression: sweep ranked by the unweighted 0-1 error even when the goal weighs classes unequally
    from objc.frontend import check_text
    from objc import training
    text = (ROOT / "specs" / "bike_dock_classweight.objc").read_text().replace(
        "  standardize\n", "  standardize\n  holdout 30% seed 1\n").replace("0.01 * l2sq", "lam * l2sq").replace(
        "learn w", "tune lam = 0.01 within 0.0001 .. 10\nlearn w")
    checked = check_text(text, str(ROOT / "specs" / "sweep_weighted.objc"))
    result = training.sweep(checked, ROOT / "specs", "lam", [0.001, 0.1, 10.0], backend="cvxpy")
    assert result["metric"] == "zero_one_error_weighted"
    train, held, _ = training.bind_training(checked, ROOT / "specs")
    form = training.form_for(checked, train.input_names)
    for p in result["points"]:
        pred = np.where(training.scores(form, p["params"], held.X) > 0, 1.0, -1.0)
        # scikit-learn's accuracy_score with sample_weight = row x class weight
        assert p["held"] == pytest.approx(1 - skm.accuracy_score(held.y, pred, sample_weight=held.weights), abs=1e-12)


def test_numpy_fit_matches_cvxpy_weights_and_saves_the_certified_distance(tmp_path):
    # breast cancer, row weights, standardized: the default NumPy stop gives weights within 1e-6 of the
    # cvxpy backend's (Clarabel; its own accuracy on these weights is about 1e-8 here), inside the
    # certified distance; the saved model carries that certificate
    _cancer_table(tmp_path)
    (tmp_path / "c.objc").write_text(CANCER_SPEC)
    ours = objc.fit_spec(tmp_path / "c.objc")
    ref = objc.fit_spec(tmp_path / "c.objc", backend="cvxpy")
    measured = float(np.linalg.norm(np.r_[ours.params["w"] - ref.params["w"], ours.params["b"] - ref.params["b"]]))
    cert = ours.document["fit"]["certificate"]
    assert cert["distance"] is not None and cert["distance"] <= 1e-6 and cert["param_tolerance"] == 1e-6
    assert measured <= cert["distance"] + 1e-7, (measured, cert)
    saved = json.loads(ours.save(tmp_path / "m.json").read_text())["fit"]["certificate"]
    assert saved["distance"] == cert["distance"] and saved["curvature"] == cert["curvature"]
    assert saved["distance_note"].startswith("certified")
    assert ref.document["fit"]["certificate"]["distance"] is None
    assert "cvxpy backend" in ref.document["fit"]["certificate"]["distance_note"]
    off = objc.fit_spec(tmp_path / "c.objc", param_tol=None)
    assert off.document["fit"]["certificate"]["param_tolerance"] is None
    with pytest.raises(ValueError, match="param_tol"):
        objc.fit_spec(tmp_path / "c.objc", param_tol=0.0)


def test_metrics_use_the_tuned_quantile_not_its_default(tmp_path):
    # regression: a pinball quantile given by a tunable was evaluated at the tunable's default
    model = objc.fit_spec(ROOT / "specs" / "croissant_tuned_quantile.objc", backend="cvxpy", tunables={"t": 0.6})
    m = model.document["training_metrics"]
    assert "pinball(t=0.6)" in m["mean_losses"] and "pinball(t=0.9)" not in m["mean_losses"]
    frame = pd.read_csv(ROOT / "specs" / "data" / "croissants.csv")
    pred = model.decision_function(frame[list(model.input_names)].to_numpy())
    # scikit-learn's mean_pinball_loss at alpha = 0.6 (its own definition of the pinball loss)
    assert m["mean_losses"]["pinball(t=0.6)"] == pytest.approx(
        skm.mean_pinball_loss(frame["sold"], pred, alpha=0.6), rel=1e-9)


def test_a_row_term_reading_a_column_fits_the_same_by_blocks_of_rows(tmp_path):
    # The NumPy backend evaluates row terms by blocks of 16384 rows; a term that reads a data column must see
    # each block's own rows. Wisconsin Diagnostic Breast Cancer (Street, Wolberg & Mangasarian 1993, UCI;
    # bundled with scikit-learn), five standardized inputs and the mean area / 1000 as a column, tiled 40
    # times (22,760 rows: two blocks). Reference: scikit-learn's LogisticRegression with sample_weight =
    # area, which minimizes C sum_i a_i log(1 + e^-y_i s_i) + ||w||^2 / 2, n C times objc's goal at
    # lam = 1 / (2 C n); and the goal written out in NumPy at objc's answer.
    from sklearn.linear_model import LogisticRegression
    d = datasets.load_breast_cancer()
    Z = (d.data[:, :5] - d.data[:, :5].mean(axis=0)) / d.data[:, :5].std(axis=0)
    frame = pd.DataFrame(np.tile(Z, (40, 1)), columns=[f"c{j}" for j in range(5)])
    frame["area"] = np.tile(d.data[:, 3] / 1000.0, 40)
    frame["dx"] = np.tile(np.where(d.target == 1, "benign", "malignant"), 40)
    frame.to_csv(tmp_path / "cancer.csv", index=False)
    spec = tmp_path / "area.objc"
    spec.write_text('table t from "cancer.csv"\n  target dx: benign -> +1, malignant -> -1\n'
                    "  inputs c0, c1, c2, c3, c4, area\nlearn w over inputs, b\nscore s = w . x + b\n"
                    "goal mean (abs(area) * logistic(y * s)) + 0.01 * l2sq(w)\n")
    model = objc.fit_spec(spec)
    fit = model.document["fit"]
    assert fit["status"] == "optimal"
    X, y = frame[["c0", "c1", "c2", "c3", "c4", "area"]].to_numpy(), np.where(frame["dx"] == "benign", 1.0, -1.0)
    w, b = np.asarray(model.params["w"]), float(model.params["b"])
    by_hand = float(np.mean(frame["area"].to_numpy() * np.logaddexp(0.0, -y * (X @ w + b))) + 0.01 * w @ w)
    assert fit["objective"] == pytest.approx(by_hand, rel=1e-12)
    n = len(y)
    ref = LogisticRegression(C=1.0 / (2.0 * 0.01 * n), tol=1e-12, max_iter=100_000).fit(
        X, (y > 0).astype(int), sample_weight=frame["area"].to_numpy())
    # lbfgs stops on its relative decrease before its own tolerance (2e-6 off on another table here,
    # measured), so 1e-5
    np.testing.assert_allclose(w, ref.coef_.ravel(), atol=1e-5)
    assert b == pytest.approx(float(ref.intercept_[0]), abs=1e-5)
