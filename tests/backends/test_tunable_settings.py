"""Tunable exponents, tunable catalog settings and the `perrow` aggregate on the NumPy backend,
against references outside objc: scikit-learn estimators that minimize the same objective and
formulations written here from the math and solved by cvxpy + Clarabel.

Datasets ship inside scikit-learn: iris (Fisher 1936), diabetes (Efron, Hastie, Johnstone &
Tibshirani 2004), z-scored with numpy.
"""

from __future__ import annotations

import cvxpy as cp
import numpy as np
import pytest
from sklearn import datasets
from sklearn.linear_model import QuantileRegressor, Ridge

import objc
from objc import training
from objc.backends import numpy_module

from test_cvxpy_problem import check, names_for, rel  # the same spec helpers, beside this file

OBJ_RTOL = 1e-6
PARAM_ATOL = 1e-4


def zscore(X: np.ndarray) -> np.ndarray:
    return (X - X.mean(axis=0)) / X.std(axis=0)


@pytest.fixture(scope="module")
def iris_pair():
    # versicolor (+1) against virginica (-1): they overlap, so no separating line
    d = datasets.load_iris()
    keep = d.target > 0
    return zscore(d.data[keep]), np.where(d.target[keep] == 1, 1.0, -1.0)


@pytest.fixture(scope="module")
def diabetes():
    d = datasets.load_diabetes()
    return zscore(d.data), d.target.astype(float)


def clarabel(objective) -> cp.Problem:
    problem = cp.Problem(cp.Minimize(objective))
    problem.solve(solver="CLARABEL", tol_gap_abs=1e-9, tol_gap_rel=1e-9, tol_feas=1e-9)
    assert problem.status == "optimal"
    return problem


def test_one_module_serves_every_exponent_of_the_range(iris_pair):
    # the generated module reads q from its tunables: emitted once, solved at three values of q, each
    # against mean max(0, 1 - y_i f_i)^q + 0.05 ||w||^2 written with cvxpy's power atom
    X, y = iris_pair
    checked = check("tune q = 2 within 1.5 .. 4\ngoal mean pos(1 - y * s) ^ q + 0.05 * l2sq(w)")
    source = numpy_module.emit_module(checked)
    assert "tun['q']" in source
    module = numpy_module.load_module(source)
    for q in (1.5, 2.0, 3.5):
        out = module["solve"](X, y, None, names_for(X), {"q": q})
        w, b = cp.Variable(X.shape[1]), cp.Variable()
        ref = clarabel(cp.sum(cp.power(cp.pos(1 - cp.multiply(y, X @ w + b)), q)) / len(y)
                       + 0.05 * cp.sum_squares(w))
        assert rel(out["objective"], ref.value) < OBJ_RTOL, q
        assert np.max(np.abs(out["params"]["w"] - w.value)) < PARAM_ATOL


def test_a_tunable_quantile_matches_sklearn_quantile_regressor(diabetes):
    # QuantileRegressor: (1/n) sum pinball_t(r_i) + alpha ||w||_1 (scikit-learn 1.9 documentation)
    X, y = diabetes
    checked = check("tune t = 0.5 within 0.05 .. 0.95\ngoal perrow pinball(y - s, t) + 0.1 * l1(w)")
    for t in (0.25, 0.9):
        fit = numpy_module.fit(checked, X, y, None, names_for(X), tunables={"t": t})
        sk = QuantileRegressor(quantile=t, alpha=0.1, solver="highs").fit(X, y)
        r = y - X @ sk.coef_ - sk.intercept_
        reference = float(np.mean(np.maximum(t * r, (t - 1.0) * r)) + 0.1 * np.sum(np.abs(sk.coef_)))
        assert rel(fit.objective, reference) < OBJ_RTOL, t
        # the duality-gap certificate uses the pinball conjugate at the tuned t, so it is still a gap
        assert fit.certificate.kind == "duality gap"


def test_a_tunable_huber_threshold_matches_cvxpy_huber(diabetes):
    # cvxpy's huber(x, M) = x^2 inside |x| <= M, 2M|x| - M^2 outside (cvxpy documentation): twice objc's
    X, y = diabetes
    checked = check("tune d = 1.35 within 0.1 .. 50\ngoal mean huber(y - s, d) + 0.01 * l2sq(w)")
    for d in (0.5, 30.0):
        fit = numpy_module.fit(checked, X, y, None, names_for(X), tunables={"d": d})
        w, b = cp.Variable(X.shape[1]), cp.Variable()
        ref = clarabel(cp.sum(cp.huber(y - X @ w - b, d)) / (2 * len(y)) + 0.01 * cp.sum_squares(w))
        assert rel(fit.objective, ref.value) < OBJ_RTOL, d


def test_perrow_divides_by_the_row_count_as_ridge_sample_weights_do(diabetes):
    # Ridge.fit(sample_weight=c): sum_i c_i r_i^2 + alpha ||w||^2 (scikit-learn 1.9 documentation), so
    # perrow (y - s)^2 + lam * l2sq(w) has Ridge's minimizer at alpha = lam * n
    X, y = diabetes
    c = np.random.default_rng(5).integers(0, 5, size=len(y)).astype(float)
    lam = 0.02
    checked = check(f"goal perrow (y - s)^2 + {lam} * l2sq(w)", table="  rowweight cw\n")
    fit = numpy_module.fit(checked, X, y, c, names_for(X))
    sk = Ridge(alpha=lam * len(y), solver="cholesky").fit(X, y, sample_weight=c)
    assert np.max(np.abs(fit.params["w"] - sk.coef_)) < PARAM_ATOL
    assert abs(fit.params["b"] - sk.intercept_) < PARAM_ATOL
    r = y - X @ sk.coef_ - sk.intercept_
    assert rel(fit.objective, float(c @ r ** 2) / len(y) + lam * float(sk.coef_ @ sk.coef_)) < OBJ_RTOL


def test_reference_evaluation_of_perrow_and_tuned_settings():
    # objective_terms (checker.evaluate) against the formulas computed here with numpy
    from objc.fit_result import objective_terms
    from objc.score_form import score_form
    rng = np.random.default_rng(2)
    X, y = rng.normal(size=(40, 3)), rng.normal(size=40)
    c = rng.uniform(0.0, 2.0, size=40)
    checked = check("tune d = 1 within 0.5 .. 3\ntune q = 2 within 1 .. 3\n"
                    "goal perrow huber(y - s, d) + mean abs(y - s) ^ q + 0.1 * l2sq(w)", table="  rowweight cw\n")
    form = score_form(checked, names_for(X))
    w, b = rng.normal(size=3), 0.3
    total, terms = objective_terms(checked, form, X, y, c, {"w": w, "b": b}, {"d": 2.0, "q": 2.5})
    r = y - X @ w - b
    huber = np.where(np.abs(r) <= 2.0, 0.5 * r * r, 2.0 * (np.abs(r) - 1.0))  # d = 2, half-scaled
    assert np.allclose(terms, [float(c @ huber) / 40, float(c @ np.abs(r) ** 2.5) / c.sum(), 0.1 * float(w @ w)],
                       rtol=1e-12)
    assert np.isclose(total, sum(terms), rtol=1e-12)


@pytest.mark.parametrize("backend", ["numpy", "cvxpy"])
def test_sweep_varies_an_exponent(tmp_path, iris_pair, backend):
    # `objc sweep SPEC q`: each point is the fit at that q (compared with a separate fit at it)
    X, y = iris_pair
    (tmp_path / "iris.csv").write_text("f0,f1,f2,f3,t\n" + "\n".join(
        ",".join(f"{v:.17g}" for v in row) + f",{int(lab)}" for row, lab in zip(X, y)) + "\n", encoding="utf-8")
    spec = tmp_path / "tuned.objc"
    spec.write_text('table d from "iris.csv"\n  target t: 1 -> +1, -1 -> -1\n  inputs f0, f1, f2, f3\n'
                    "tune q = 2 within 1.5 .. 4\nlearn w over inputs, b\nscore s = w . x + b\n"
                    "goal mean pos(1 - y * s) ^ q + 0.05 * l2sq(w)\n", encoding="utf-8")
    checked = objc.check_file(spec)
    result = training.sweep(checked, tmp_path, "q", [1.5, 3.0], backend=backend)
    for point in result["points"]:
        single = training.fit_spec(spec, backend=backend, tunables={"q": point["value"]})
        assert rel(point["objective"], single.document["fit"]["objective"]) < 1e-6
    assert rel(result["points"][0]["objective"], result["points"][1]["objective"]) > 1e-3
