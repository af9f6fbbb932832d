"""The NumPy backend's L-BFGS from a warm start (a regularization path's next point) and from a cold start
where the loss has no curvature at the start: the first step's length comes from the curvature along the
gradient (`_first_step_scale`), a warm start's evaluation is reused, and neither may change the answer.

References outside the project: scikit-learn's LogisticRegression(newton-cg) at a tight tolerance (within
4e-11 of cvxpy + Clarabel on these tables, measured in tests/test_reference_fits.py) and cvxpy + Clarabel.
"""

from __future__ import annotations

import warnings

import cvxpy as cp
import numpy as np
import pytest
from sklearn import datasets
from sklearn.linear_model import LogisticRegression

import objc
from objc.backends import numpy_module as nm
from objc.checker import CheckedObjective

PARAM_ATOL = 1e-6  # the NumPy backend's default parameter tolerance


def _standardized(X: np.ndarray) -> np.ndarray:
    return (X - X.mean(axis=0)) / X.std(axis=0)


def _spec(target: str, goal: str) -> CheckedObjective:
    text = (f'table t from "t.csv"\n  {target}\n  inputs all\ntune lam = 1 within 0 .. 1000000\n'
            f"learn w over inputs, b\nscore s = w . x + b\ngoal {goal}\n")
    return objc.check_text(text, "warm.objc")


@pytest.fixture(scope="module")
def cancer():
    # the Wisconsin diagnostic breast cancer table (Street, Wolberg & Mangasarian 1993), as scikit-learn ships it
    data = datasets.load_breast_cancer()
    X = _standardized(data.data)
    y = np.where(data.target == 1, 1.0, -1.0)
    return X, y, tuple(f"x{j}" for j in range(X.shape[1]))


def _sklearn_logistic(X, y, lam):
    # mean log(1 + exp(-y s)) + lam ||w||^2  <->  C sum log(1 + exp(-y s)) + ||w||^2 / 2 with C = 1 / (2 lam n)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        model = LogisticRegression(C=1.0 / (2.0 * lam * len(y)), solver="newton-cg", tol=1e-14, max_iter=10000)
        model.fit(X, (y > 0).astype(int))
    return model.coef_.ravel(), float(model.intercept_[0])


def test_warm_start_matches_the_reference_and_the_cold_fit(cancer):
    X, y, names = cancer
    checked = _spec("target y: yes -> +1, no -> -1", "mean logistic(y * s) + lam * l2sq(w)")
    first = nm.fit(checked, X, y, None, names, {"lam": 1e-3})
    cold = nm.fit(checked, X, y, None, names, {"lam": 4e-4})
    warm = nm.fit(checked, X, y, None, names, {"lam": 4e-4},
                  theta0=np.append(first.params["w"], first.params["b"]))
    w_ref, b_ref = _sklearn_logistic(X, y, 4e-4)
    for result in (cold, warm):
        assert result.status == "optimal", result.certificate
        assert np.max(np.abs(result.params["w"] - w_ref)) <= PARAM_ATOL
        assert abs(result.params["b"] - b_ref) <= PARAM_ATOL
        assert result.certificate.distance is not None and result.certificate.distance <= PARAM_ATOL
    # the point of a warm start: fewer products with the table than from zero (pass counts are deterministic)
    assert warm.passes < cold.passes, (warm.passes, cold.passes)


def test_warm_start_at_the_answer_certifies_without_iterating_far(cancer):
    X, y, names = cancer
    checked = _spec("target y: yes -> +1, no -> -1", "mean logistic(y * s) + lam * l2sq(w)")
    w_ref, b_ref = _sklearn_logistic(X, y, 1e-3)
    at_answer = nm.fit(checked, X, y, None, names, {"lam": 1e-3}, theta0=np.append(w_ref, b_ref))
    assert at_answer.status == "optimal"
    assert np.max(np.abs(at_answer.params["w"] - w_ref)) <= PARAM_ATOL
    # the start is evaluated once for the overflow check and once more for L-BFGS: the second is reused,
    # so the start costs its two passes (score and gradient) plus the modulus's sample, and no more than a
    # couple of L-BFGS steps follow
    assert at_answer.passes <= 8, at_answer.passes


def test_cold_start_with_no_curvature_at_the_start_still_converges():
    # the diabetes table (Efron, Hastie, Johnstone & Tibshirani 2004, Least Angle Regression), target unscaled:
    # at w = 0, b = 0 every residual (25 to 346) lies beyond the Huber threshold 1.35, where the loss is flat,
    # so the curvature along the first gradient is the ridge weight's alone
    data = datasets.load_diabetes()
    X, y = _standardized(data.data), data.target.astype(float)
    names = tuple(f"x{j}" for j in range(X.shape[1]))
    lam = 1e-3
    checked = _spec("target y", "mean huber(y - s, 1.35) + lam * l2sq(w)")
    result = nm.fit(checked, X, y, None, names, {"lam": lam})
    assert result.status == "optimal", result.certificate
    # reference: cvxpy + Clarabel; cvxpy's huber(r, M) is r^2 inside and 2 M |r| - M^2 outside, twice objc's
    w, b = cp.Variable(X.shape[1]), cp.Variable()
    goal = cp.sum(0.5 * cp.huber(y - X @ w - b, 1.35)) / len(y) + lam * cp.sum_squares(w)
    problem = cp.Problem(cp.Minimize(goal))
    # Clarabel's settings of tests/test_reference_fits.py (tight gap and feasibility, tightened iterative
    # refinement), where its weights came within 4e-11 of scikit-learn's exact solvers
    problem.solve(solver=cp.CLARABEL, tol_gap_abs=1e-12, tol_gap_rel=1e-12, tol_feas=1e-12, max_iter=500,
                  iterative_refinement_reltol=1e-14, iterative_refinement_abstol=1e-14)
    assert abs(result.objective - problem.value) <= 1e-9 * abs(problem.value)
    assert np.max(np.abs(result.params["w"] - w.value)) <= PARAM_ATOL
    assert abs(result.params["b"] - float(b.value)) <= PARAM_ATOL
