"""The checker on tunable exponents, tunable catalog settings, `perrow` and the evaluation-only
entries. Every verdict is backed by something outside objc: cvxpy's DCP analysis of the same
expression at values across the declared range (cvxpy DCP rules, Diamond & Boyd 2016, JMLR 17(83)),
or a counterexample re-checked here from the textbook formula.
"""

from __future__ import annotations

import math

import cvxpy as cp
import numpy as np
import pytest

from objc import check_text

HEADER = """table rows from "rows.csv"
  target label: yes -> +1, no -> -1
  inputs a, b, c
learn w over inputs, b
score s = w . x + b
"""
REGRESSION = HEADER.replace("  target label: yes -> +1, no -> -1\n", "  target amount\n")


def grid(low: float, high: float) -> np.ndarray:
    return np.unique(np.concatenate([np.linspace(low, high, 9), [low, high]]))


def dcp_over_range(build, low: float, high: float) -> bool:
    """cvxpy's verdict on the expression at every value of a grid over the range."""
    m = cp.Variable(4)
    return all(build(m, float(v)).is_dcp() and build(m, float(v)).is_convex() for v in grid(low, high))


# ---------------------------------------------------------------- x ^ q

@pytest.mark.parametrize("low, high", [(1.5, 4.0), (1.0, 3.0), (2.0, 2.5)])
def test_a_convex_nonnegative_base_to_a_power_of_at_least_one_is_convex(low, high):
    c = check_text(HEADER + f"tune q = {max(low, 2.0) if high >= 2 else low} within {low} .. {high}\n"
                   "goal mean pos(1 - y * s) ^ q + 0.01 * l2sq(w)\n", "t.objc")
    assert c.accepted and c.verdict == "convex"
    # cvxpy: power(pos(1 - m), q) is DCP for every q of the range (cvxpy DCP rules)
    assert dcp_over_range(lambda m, q: cp.power(cp.pos(1 - m), q), low, high)


@pytest.mark.parametrize("low, high", [(0.5, 4.0), (0.2, 0.8), (0.9, 1.5)])
def test_a_range_that_admits_q_below_one_is_refused_with_a_witness_inside_it(low, high):
    default = min(max(1.0, low), high)
    c = check_text(HEADER + f"tune q = {default} within {low} .. {high}\n"
                   "goal mean pos(1 - y * s) ^ q + 0.01 * l2sq(w)\n", "t.objc")
    assert not c.accepted and c.verdict == "not convex"
    (e,) = [d for d in c.errors if d.code == "E311"]
    (w,) = [t.witness for t in c.terms if t.witness is not None]
    q = float(dict(p.split(" = ") for p in w.setting.split(", "))["q"])
    assert low <= q <= high and q < 1.0
    assert f"q = {q:g}" in " ".join(e.notes)  # the message says which q and which two points
    # re-checked from the formula max(0, 1 - m)^q: the midpoint lies above the chord
    f = lambda m: max(0.0, 1.0 - m) ** q  # noqa: E731
    assert f((w.a + w.b) / 2) > (f(w.a) + f(w.b)) / 2 + 1e-6
    # and cvxpy: at that q the expression is not DCP
    assert not cp.power(cp.pos(1 - cp.Variable(3)), q).is_dcp()


def test_a_power_of_a_base_of_unknown_sign_is_not_provable_and_abs_fixes_it():
    text = REGRESSION + "tune q = 2 within 1.5 .. 3\ngoal mean (y - s) ^ q + 0.01 * l2sq(w)\n"
    c = check_text(text, "t.objc")
    assert not c.accepted
    (e,) = [d for d in c.errors if d.code in ("E311", "E313")]
    assert "abs(u)^q" in e.hint
    fixed = check_text(text.replace("(y - s) ^ q", "abs(y - s) ^ q"), "t.objc")
    assert fixed.accepted
    assert dcp_over_range(lambda r, q: cp.power(cp.abs(r), q), 1.5, 3.0)


def test_a_tunable_exponent_in_a_custom_loss():
    c = check_text(HEADER + "tune q = 2 within 1 .. 3\nloss powered(m) = pos(1 - m) ^ q\n"
                   "goal mean powered(y * s) + 0.01 * l2sq(w)\n", "t.objc")
    assert c.accepted
    assert "powered(m) = pos(1 - m)^q" in c.expanded and "q = 2 (range 1 .. 3)" in c.expanded


def test_smoothness_of_a_tunable_power_follows_the_lowest_exponent():
    # max(0, u)^q is continuously differentiable for q > 1, with a Lipschitz derivative for q >= 2
    # (common practice); objc calls it smooth once the whole range is >= 2, as for a literal exponent
    smooth = check_text(HEADER + "tune q = 2 within 2 .. 4\ngoal mean pos(1 - y * s) ^ q + l2sq(w)\n", "t.objc")
    rough = check_text(HEADER + "tune q = 2 within 1 .. 4\ngoal mean pos(1 - y * s) ^ q + l2sq(w)\n", "t.objc")
    assert smooth.terms[0].smooth and not rough.terms[0].smooth


# ---------------------------------------------------------------- catalog settings

@pytest.mark.parametrize("call, tune, build", [
    ("huber(y - s, k)", "tune k = 1.35 within 0.1 .. 5", lambda r, k: cp.huber(r, k)),
    ("pinball(y - s, k)", "tune k = 0.5 within 0.05 .. 0.95", lambda r, k: k * cp.pos(r) + (1 - k) * cp.neg(r)),
    ("epsilon_insensitive(y - s, k)", "tune k = 0.1 within 0 .. 2", lambda r, k: cp.pos(cp.abs(r) - k)),
])
def test_a_tunable_setting_inside_its_domain_keeps_the_term_convex(call, tune, build):
    c = check_text(REGRESSION + f"{tune}\ngoal mean {call} + 0.01 * l2sq(w)\n", "t.objc")
    assert c.accepted and c.verdict == "convex"
    low, high = (float(v) for v in tune.split("within ")[1].split(" .. "))
    assert dcp_over_range(build, low, high)
    assert "k = " in c.expanded and f"(range {low:g} .. {high:g})" in c.expanded


def test_smooth_hinge_with_a_tunable_corner():
    c = check_text(HEADER + "tune k = 0.5 within 0.1 .. 2\ngoal mean smooth_hinge(y * s, k) + 0.01 * l2sq(w)\n",
                   "t.objc")
    assert c.accepted and c.terms[0].smooth
    # the catalog's cvxpy form, huber(pos(1 - m), c) / (2c), is DCP for every corner width
    assert dcp_over_range(lambda m, k: cp.huber(cp.pos(1 - m), k) / (2 * k), 0.1, 2.0)


# ---------------------------------------------------------------- perrow

def test_perrow_is_convex_and_spelled_out_in_the_expanded_objective():
    c = check_text(HEADER + "  rowweight a\n".join(["", ""]) if False else
                   HEADER.replace("  inputs a, b, c\n", "  inputs a, b\n  rowweight c\n")
                   + "goal perrow logistic(y * s) + 0.5 * l2sq(w)\n", "t.objc")
    assert c.accepted and c.terms[0].aggregate == "perrow"
    assert "(1 / n) * sum_i c_i * logistic(y_i * s_i)" in c.expanded
    assert "perrow = sum_i c_i l_i / n, with n the number of training rows" in c.expanded


def test_perrow_evaluates_as_its_formula():
    from objc.checker import EvalEnv, evaluate
    c = check_text(HEADER + "goal perrow hinge(y * s) + mean hinge(y * s)\n", "t.objc")
    rng = np.random.default_rng(4)
    score, y, weights = rng.normal(size=20), np.sign(rng.normal(size=20)), rng.uniform(0, 3, size=20)
    env = EvalEnv(["a", "b", "c"], {}, {}, y, score, {}, weights)
    hinge = np.maximum(0.0, 1.0 - y * score)  # max(0, 1 - m), the textbook hinge
    perrow, mean = (evaluate(t.expr, env) for t in c.terms)
    assert math.isclose(perrow, float(weights @ hinge) / 20, rel_tol=1e-12)
    assert math.isclose(mean, float(weights @ hinge) / float(weights.sum()), rel_tol=1e-12)


# ---------------------------------------------------------------- evaluation-only entries

@pytest.mark.parametrize("goal, name", [
    ("mean hinge(y * s) + mean below(y * s, 0)", "below"),
    ("mean hinge(y * s) + 0.1 * l0(w)", "l0"),
])
def test_evaluation_only_entries_are_refused_for_training_with_their_own_message(goal, name):
    c = check_text(HEADER + f"goal {goal}\n", "t.objc")
    assert c.verdict == "not subdifferentiable" and not c.accepted
    (e,) = [d for d in c.errors if d.code == "E310"]
    assert e.message.startswith(name) and "0-1 loss" not in e.message
    assert e.span.line == HEADER.count("\n") + 1 and goal[e.span.column - 6:].startswith(name)


def test_evaluation_only_entries_evaluate():
    # allowed in evaluation: the share of rows with a negative margin, counted directly here
    from objc.checker import EvalEnv, evaluate
    c = check_text(HEADER + "goal mean below(y * s, 0) + l0(w, 0.01)\n", "t.objc")
    rng = np.random.default_rng(9)
    score, y = rng.normal(size=50), np.sign(rng.normal(size=50))
    w = np.array([0.0, 0.005, -1.0])
    env = EvalEnv(["a", "b", "c"], {"w": w, "b": 0.0}, {}, y, score)
    share, count = (evaluate(t.expr, env) for t in c.terms)
    assert share == np.count_nonzero(y * score < 0) / 50 and count == 1.0


def test_cosh_is_a_convex_residual_loss():
    c = check_text(REGRESSION + "goal mean cosh(y - s) + 0.01 * l2sq(w)\n", "t.objc")
    assert c.accepted and c.terms[0].smooth
    r = cp.Variable(3)
    assert ((cp.exp(r) + cp.exp(-r)) / 2).is_dcp()  # cvxpy agrees: exp is convex (DCP rules)
