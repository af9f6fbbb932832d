"""The cluster engine (objc/cluster_rows.py) on a LocalCluster of two worker processes on this machine
(loopback only): each pass a distributed reduction, the fit and its certificate equal to the in-memory
one, and one case against scikit-learn's Lasso on its bundled diabetes table (Efron, Hastie, Johnstone &
Tibshirani 2004, "Least Angle Regression")."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

pytest.importorskip("distributed")

from objc import chunked_tables, cluster_rows, training  # noqa: E402
from objc.cli import main  # noqa: E402
from objc.frontend import check_file  # noqa: E402
from test_chunked_tables import as_parquet_dataset, products_match  # noqa: E402  (the same checks on the other table)

SPECS = Path(__file__).resolve().parent.parent / "specs"


@pytest.fixture(scope="module")
def client():
    c = cluster_rows.connect(cluster_rows.LOCAL, workers=2)
    yield c
    cluster_rows.close(c)


@pytest.mark.parametrize("name", ["late_parcels_free.objc", "croissant_lasso.objc", "croissant_huber.objc",
                                  "parcel_svm.objc"])
def test_cluster_fit_equals_the_fit_in_memory(tmp_path, client, name):
    spec = SPECS / name
    if name == "late_parcels_free.objc":  # the demo's goal without its holdout (a holdout needs every row at once)
        spec = tmp_path / name
        spec.write_text((SPECS / "late_parcels.objc").read_text().replace("  holdout 20% seed 7\n", ""))
    checked = check_file(spec)
    dataset = as_parquet_dataset(SPECS / checked.spec.table.path, tmp_path / "rows", files=2, row_group=40)
    mem, _, _ = training.bind_training(checked, SPECS, dataset)
    n, p = mem.X.shape
    on, _, _ = training.bind_training(checked, SPECS, dataset, engine="cluster", client=client,
                                      budget=max(8 * p * (n // 5), 64 * (p + 4)))
    assert isinstance(on.X, cluster_rows.ClusterRows) and len(on.X.parts) >= 4
    a = training.run_backend(checked, mem, "numpy")
    b = training.run_backend(checked, on, "numpy")
    assert on.X.passes > 0 and b.status == a.status == "optimal"
    slack = sum(abs(r.certificate.absolute) for r in (a, b)) + 1e-12 * max(1.0, abs(a.objective))
    assert abs(b.objective - a.objective) <= slack
    if a.certificate.distance is not None:
        assert b.certificate.distance is not None
        flat = [np.concatenate([np.atleast_1d(np.asarray(r.params[k], float)) for k in sorted(r.params)])
                for r in (a, b)]
        assert np.max(np.abs(flat[0] - flat[1])) <= a.certificate.distance + b.certificate.distance


def test_cluster_lasso_matches_scikit_learn(tmp_path, client):
    # Lasso (scikit-learn 1.9 documentation) minimizes (1 / 2n) ||y - Xw - b||^2 + alpha ||w||_1, which is
    # objc's  mean squared(y - s) + alpha * l1(w)  (squared is r^2 / 2)
    from sklearn.datasets import load_diabetes
    from sklearn.linear_model import Lasso
    X, y = load_diabetes(return_X_y=True)
    Z = (X - X.mean(axis=0)) / X.std(axis=0)
    pd.DataFrame(np.column_stack([X, y]), columns=[f"x{j}" for j in range(10)] + ["y"]).to_parquet(
        tmp_path / "diabetes.parquet", row_group_size=100)
    spec = tmp_path / "d.objc"
    spec.write_text('table t from "diabetes.parquet"\n  target y\n  inputs all\n  standardize\n'
                    "learn w over inputs, b\nscore s = w . x + b\ngoal mean squared(y - s) + 0.5 * l1(w)\n")
    checked = check_file(spec)
    data, _, _ = training.bind_training(checked, tmp_path, engine="cluster", client=client, budget=8 * 10 * 100)
    fit = training.run_backend(checked, data, "numpy", tol=1e-10)
    # coordinate descent at tol 1e-12 reaches the optimum to about 1e-9 here (common practice, no source)
    est = Lasso(alpha=0.5, tol=1e-12, max_iter=100000).fit(Z, y)
    assert np.max(np.abs(np.asarray(fit.params["w"]) - est.coef_)) <= 1e-6
    assert abs(float(fit.params["b"]) - float(est.intercept_)) <= 1e-6


def test_cluster_products_match_the_array(tmp_path, client):
    rng = np.random.default_rng(5)
    A = rng.normal(size=(83, 6))
    A.tofile(tmp_path / "rows.f64")
    X = cluster_rows.ClusterRows(client, chunked_tables.ChunkedRows(tmp_path / "rows.f64", 83, 6), block_rows=20)
    products_match(A, X)
    rows = np.asarray([82, 4, 4, 40, 0, -1])
    np.testing.assert_array_equal(X[rows], A[rows])
    np.testing.assert_array_equal(X[10:50], A[10:50])
    np.testing.assert_array_equal(X[:, 2], A[:, 2])
    assert [(a, b) for a, b, _blk in X.blocks()] == [(0, 20), (20, 40), (40, 60), (60, 80), (80, 83)]


def test_cli_cluster_engine_writes_the_model(tmp_path, capsys):
    # the command line starts (and stops) a LocalCluster of its own
    frame = pd.read_csv(SPECS / "data" / "parcels.csv")
    frame.to_parquet(tmp_path / "parcels.parquet", row_group_size=50)
    assert main(["fit", str(SPECS / "parcel_svm.objc"), "--data", str(tmp_path / "parcels.parquet"), "--engine",
                 "cluster", "--workers", "1", "--memory", "64k", "-o", str(tmp_path / "m.json"), "--json"]) == 0
    out = json.loads(capsys.readouterr().out)
    assert out["ok"] and out["status"] == "optimal"
    doc = json.loads((tmp_path / "m.json").read_text())
    assert doc["schema"]["inputs"] == out["inputs"]


def test_cli_cluster_flags_need_the_cluster_engine(capsys):
    assert main(["fit", str(SPECS / "parcel_svm.objc"), "--cluster", "tcp://127.0.0.1:1"]) == 2
    assert "--engine cluster" in capsys.readouterr().err


def test_fit_spec_trains_on_a_cluster_it_starts(tmp_path):
    from objc import fit_spec
    frame = pd.read_csv(SPECS / "data" / "croissants.csv")
    frame.to_parquet(tmp_path / "days.parquet", row_group_size=64)
    on = fit_spec(SPECS / "croissant_lasso.objc", data=tmp_path / "days.parquet", engine="cluster", workers=1)
    mem = fit_spec(SPECS / "croissant_lasso.objc")
    gap = on.document["fit"]["certificate"]["distance"] + mem.document["fit"]["certificate"]["distance"]
    assert np.max(np.abs(np.asarray(on.params["w"]) - np.asarray(mem.params["w"]))) <= gap


def test_without_dask_the_cluster_engine_says_how_to_install_it(monkeypatch, capsys):
    import sys
    monkeypatch.setitem(sys.modules, "distributed", None)  # `import distributed` now fails, as when not installed
    assert main(["fit", str(SPECS / "parcel_svm.objc"), "--engine", "cluster"]) == 2
    err = capsys.readouterr().err
    assert "needs Dask" in err and "pip install" in err and "Traceback" not in err
