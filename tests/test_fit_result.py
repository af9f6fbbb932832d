"""objc.fit_result: the flat vector theta of the learned parameters and back, and objective_terms,
the reference evaluation every backend reports its terms by, against the goal written out by hand.

The hand-written goals follow the catalog's formulas (docs/language.md, section 8: hinge max(0, 1 - m),
logistic log(1 + exp(-m)), squared r^2 / 2, huber r^2 / 2 inside d and d(|r| - d/2) outside
(Huber, Annals of Mathematical Statistics 1964, with the half), l1, l2sq with no half, and Weston &
Watkins' multiclass hinge sum_{k != y} max(0, 1 + s_k - s_y)) and the row weights of section 5
(mean: sum c_i E_i / sum c_i; perrow: sum c_i E_i / n; sum: sum c_i E_i).
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest

import objc
from objc.fit_result import objective_terms, params_from_theta, theta_from_params
from objc.score_form import score_form

HEADER = '''table t from "t.csv"
  target y{labels}
  inputs a, b, c
  feature z = a * c
'''
NAMES = ("a", "b", "c", "z")


def checked(goal: str, *, margin: bool, learn: str = "learn w over inputs, b0", score: str = "w . x + b0",
            extra: str = ""):
    text = (HEADER.format(labels=": yes -> +1, no -> -1" if margin else "") + extra + f"{learn}\nscore s = {score}\n"
            f"goal {goal}\n")
    result = objc.check_text(text, "fit.objc")
    assert result.accepted, [d.render(result.source) for d in result.errors]
    return result


@pytest.fixture(scope="module")
def table():
    rng = np.random.default_rng(8)
    n = 30
    X = rng.normal(size=(n, 4))
    X[:, 3] = X[:, 0] * X[:, 2]
    labels = np.where(rng.random(n) < 0.5, 1.0, -1.0)
    return X, labels, rng.normal(scale=2.0, size=n), rng.uniform(0.2, 3.0, size=n)


# ---------------------------------------------------------------- theta

ROUND_TRIP = dict(goal="mean squared(y - s) + 0.1 * l2sq(w) + g^2", margin=False, learn="learn b0, w over inputs, g",
                  score="w . x + b0 + g * z")


def test_params_and_theta_round_trip():
    form = score_form(checked(**ROUND_TRIP), NAMES)
    params = {"b0": -0.75, "w": np.array([1.0, -2.0, 3.5, 0.25]), "g": 4.0}
    theta = theta_from_params(form, params)
    # each parameter at its slot: b0 first, then the four weights, then g
    np.testing.assert_array_equal(theta, [-0.75, 1.0, -2.0, 3.5, 0.25, 4.0])
    back = params_from_theta(form, theta)
    assert set(back) == set(params)
    np.testing.assert_array_equal(back["w"], params["w"])
    assert type(back["b0"]) is float and type(back["g"]) is float
    assert (back["b0"], back["g"]) == (-0.75, 4.0)
    # and from theta: any vector comes back unchanged
    theta = np.random.default_rng(1).normal(size=form.size)
    np.testing.assert_array_equal(theta_from_params(form, params_from_theta(form, theta)), theta)


def test_params_from_theta_copies_so_theta_can_change_after():
    form = score_form(checked(**ROUND_TRIP), NAMES)
    theta = np.arange(6.0)
    params = params_from_theta(form, theta)
    theta[:] = -1.0
    np.testing.assert_array_equal(params["w"], [1.0, 2.0, 3.0, 4.0])


def test_theta_takes_numbers_as_numpy_scalars_lists_or_arrays():
    form = score_form(checked(**ROUND_TRIP), NAMES)
    theta = theta_from_params(form, {"b0": np.float32(0.5), "w": [1, 2, 3, 4], "g": np.array(2.0)})
    np.testing.assert_array_equal(theta, [0.5, 1.0, 2.0, 3.0, 4.0, 2.0])
    with pytest.raises(ValueError):  # a vector of the wrong length is refused, not cut or padded
        theta_from_params(form, {"b0": 0.0, "w": [1.0, 2.0, 3.0], "g": 0.0})


# ---------------------------------------------------------------- objective_terms

def test_a_weighted_margin_goal_term_by_term(table):
    X, labels, _target, c = table
    spec = checked("C * mean hinge(y * s) + 0.5 * l2sq(w) + perrow logistic(y * s)", margin=True,
                   extra="tune C = 2 within 0.01 .. 100\n")
    form = score_form(spec, NAMES)
    w, b0 = np.array([0.3, -1.2, 0.8, 0.5]), 0.4
    m = labels * (X @ w + b0)
    for tunables, C in ((None, 2.0), ({"C": 7.5}, 7.5)):  # the tunable at its default, then set
        total, terms = objective_terms(spec, form, X, labels, c, {"w": w, "b0": b0}, tunables)
        expected = (C * np.sum(c * np.maximum(0.0, 1.0 - m)) / np.sum(c), 0.5 * np.sum(w ** 2),
                    np.sum(c * np.log1p(np.exp(-m))) / len(m))
        np.testing.assert_allclose(terms, expected, rtol=1e-13)
        assert total == pytest.approx(sum(expected), rel=1e-13)


def test_a_regression_goal_with_sum_perrow_and_a_penalized_intercept(table):
    X, _labels, y, c = table
    spec = checked("perrow squared(y - s) + sum huber(y - s, 1.5) + 0.1 * l1(w) + 0.01 * b0^2", margin=False)
    form = score_form(spec, NAMES)
    w, b0 = np.array([0.5, 0.0, -0.25, 1.0]), -0.3
    r = y - (X @ w + b0)
    huber = np.where(np.abs(r) <= 1.5, r ** 2 / 2, 1.5 * (np.abs(r) - 1.5 / 2))
    assert np.any(np.abs(r) > 1.5) and np.any(np.abs(r) <= 1.5)  # both pieces of huber are used
    expected = (np.sum(c * r ** 2 / 2) / len(r), np.sum(c * huber), 0.1 * np.sum(np.abs(w)), 0.01 * b0 ** 2)
    total, terms = objective_terms(spec, form, X, y, c, {"w": w, "b0": b0})
    np.testing.assert_allclose(terms, expected, rtol=1e-13)
    assert total == pytest.approx(sum(expected), rel=1e-13)


def test_without_row_weights_mean_is_the_plain_mean(table):
    X, _labels, y, _c = table
    spec = checked("mean absolute(y - s) + 0.1 * l2sq(w)", margin=False)
    form = score_form(spec, NAMES)
    w, b0 = np.array([1.0, 2.0, 3.0, 4.0]), 0.5
    _total, terms = objective_terms(spec, form, X, y, None, {"w": w, "b0": b0})
    assert terms[0] == pytest.approx(np.mean(np.abs(y - X @ w - b0)), rel=1e-13)


def test_a_score_with_data_and_a_second_learned_number(table):
    X, _labels, y, c = table
    spec = checked("mean squared(y - s) + 0.1 * l2sq(w) + g^2", margin=False, learn="learn w over inputs, b0, g",
                   score="w . x + b0 + 0.5 * z - g * a")
    form = score_form(spec, NAMES)
    w, b0, g = np.array([0.2, 0.4, -0.6, 0.8]), 1.5, -0.7
    s = X @ w + b0 + 0.5 * X[:, 3] - g * X[:, 0]
    _total, terms = objective_terms(spec, form, X, y, c, {"w": w, "b0": b0, "g": g})
    np.testing.assert_allclose(terms, (np.sum(c * (y - s) ** 2 / 2) / np.sum(c), 0.1 * np.sum(w ** 2), g ** 2),
                               rtol=1e-13)


def test_a_multiclass_goal_from_its_k_scores(table):
    X = table[0][:, :3]
    c = table[3]
    text = ('table t from "t.csv"\n  target kind classes rye, spelt, wheat\n  inputs a, b, c\n'
            'learn W over inputs by classes, b by classes\nscore s = W . x + b\n'
            'goal mean ww_hinge(s, y) + 0.05 * inputs_l2(W) + 0.01 * l2sq(W)\n')
    spec = objc.check_text(text, "classes.objc")
    assert spec.accepted
    rng = np.random.default_rng(4)
    W, b = rng.normal(size=(3, 3)), rng.normal(size=3)
    classes = rng.integers(0, 3, size=len(X))
    S = X @ W + b
    per_row = np.array([sum(max(0.0, 1.0 + S[i, k] - S[i, classes[i]]) for k in range(3) if k != classes[i])
                        for i in range(len(X))])
    expected = (np.sum(c * per_row) / np.sum(c), 0.05 * sum(np.linalg.norm(W[j]) for j in range(3)),
                0.01 * np.sum(W ** 2))
    total, terms = objective_terms(spec, None, X, classes.astype(float), c, {"W": W, "b": b})
    np.testing.assert_allclose(terms, expected, rtol=1e-13)
    assert total == pytest.approx(sum(expected), rel=1e-13)


def test_an_overflowing_loss_is_infinite_without_a_warning():
    # exp(1000) is past the largest float64 (about 1.8e308, IEEE 754): the objective is inf, and
    # evaluating it says so by its value, not by a RuntimeWarning
    spec = checked("mean exponential(y * s) + 0.1 * l2sq(w)", margin=True)
    form = score_form(spec, NAMES)
    X = np.eye(4)
    labels = np.array([1.0, -1.0, 1.0, -1.0])
    w = np.array([-1000.0, 1000.0, 0.0, 0.0])
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        total, terms = objective_terms(spec, form, X, labels, np.ones(4), {"w": w, "b0": 0.0})
    assert total == np.inf and terms[0] == np.inf and terms[1] == pytest.approx(0.1 * 2e6)
