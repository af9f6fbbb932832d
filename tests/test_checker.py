"""The convexity checker against cvxpy's DCP analysis, and the verdicts, witnesses, errors and
warnings it owes a practitioner.

cvxpy's `is_dcp()` / `is_convex()` implement the disciplined convex programming rules of Grant, Boyd
& Ye, "Disciplined Convex Programming" (2006), the same composition rules objc applies (Boyd &
Vandenberghe, Convex Optimization, 2004, section 3.2.4). Each case below states one goal twice: as
objc text and as the same function built by hand from cp.Variable(3) and cp.Variable() on small
random data; objc must call it convex exactly when cvxpy does. A "mean" is a sum divided by the
number of rows on both sides (a positive factor, which changes no curvature).
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass
from typing import Callable

import cvxpy as cp
import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from objc import SpecError, check_text
from objc.checker import CheckedObjective

HEADER = """table rows from "rows.csv"
  target label: yes -> +1, no -> -1
  inputs a, b, c
  group first = a, b
  group second = c
tune C = 1.0 within 0.01 .. 100
tune M = 1.0 within -1 .. 10
learn w over inputs, b
score s = w . x + b
"""
# line numbers of the statements added after HEADER (used by the location checks)
FIRST_LINE_AFTER_HEADER = HEADER.count("\n") + 1


def spec(goal: str, extra: str = "", header: str = HEADER) -> str:
    return header + extra + f"goal {goal}\n"


def checked(goal: str, extra: str = "", header: str = HEADER) -> CheckedObjective:
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # overflow in the witness search is expected and harmless
        return check_text(spec(goal, extra, header), "case.objc")


def codes(diags) -> list[str]:
    return [d.code for d in diags]


def objc_says_convex(result: CheckedObjective) -> bool:
    """objc's verdict for the goal: every term and the sum convex (or affine)."""
    return result.verdict in ("convex", "affine") and all(
        t.verdict in ("convex", "affine", "constant") for t in result.terms)


# ---------------------------------------------------------------- the cvxpy side

@dataclass(frozen=True)
class Vars:
    """The cvxpy counterparts of the spec's names, on small random data."""

    w: cp.Variable
    b: cp.Variable
    s: cp.Expression  # X @ w + b
    m: cp.Expression  # y * s
    r: cp.Expression  # y - s
    C: cp.Parameter  # tune C within 0.01 .. 100: a nonnegative parameter
    M: cp.Parameter  # tune M within -1 .. 10: a parameter of unknown sign
    n: int

    def mean(self, e: cp.Expression) -> cp.Expression:
        return cp.sum(e) / self.n

    def group_l2(self) -> cp.Expression:
        return cp.norm2(self.w[0:2]) + cp.norm2(self.w[2:3])


def make_vars(seed: int = 0, n: int = 7) -> Vars:
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(n, 3))
    y = np.array([1.0, -1.0] * n)[:n]  # both labels, so y's sign is unknown as in objc
    w, b = cp.Variable(3), cp.Variable()
    s = X @ w + b
    return Vars(w, b, s, cp.multiply(y, s), y - s, cp.Parameter(nonneg=True, value=1.0),
                cp.Parameter(value=1.0), n)


def hypot(a, b):
    # elementwise sqrt(a^2 + b^2) as a column norm, the DCP form of the Euclidean length
    a, b = cp.Expression.cast_to_const(a), cp.Expression.cast_to_const(b)
    n = max(a.size, b.size)
    a = a if a.size == n else a * np.ones(n)
    b = b if b.size == n else b * np.ones(n)
    return cp.norm(cp.vstack([a, b]), 2, axis=0)


def cvxpy_says_convex(expr: cp.Expression) -> bool:
    return bool(expr.is_dcp() and expr.is_convex())


Case = tuple[str, Callable[[Vars], cp.Expression], str]

# (objc goal, the same function in cvxpy, extra spec lines). Catalog conventions on the cvxpy side:
# hinge = pos(1 - m), logistic = log(1 + e^-m), squared = r^2/2, huber = cvxpy's huber / 2.
CASES: list[Case] = [
    # catalog losses of the margin and the residual
    ("mean hinge(y * s) + 0.5 * l2sq(w)", lambda v: v.mean(cp.pos(1 - v.m)) + 0.5 * cp.sum_squares(v.w), ""),
    ("mean logistic(y * s)", lambda v: v.mean(cp.logistic(-v.m)), ""),
    ("mean squared(y - s) + 0.1 * l1(w)", lambda v: v.mean(0.5 * cp.square(v.r)) + 0.1 * cp.norm1(v.w), ""),
    ("mean pinball(y - s, 0.9)", lambda v: v.mean(0.9 * cp.pos(v.r) + 0.1 * cp.neg(v.r)), ""),
    ("mean epsilon_insensitive(y - s, 0.1)", lambda v: v.mean(cp.pos(cp.abs(v.r) - 0.1)), ""),
    # sign-dependent monotonicity: square, abs, huber increase on nonnegative arguments only
    ("mean (y - s)^2", lambda v: v.mean(cp.square(v.r)), ""),
    ("mean (abs(y - s) + 1)^2", lambda v: v.mean(cp.square(cp.abs(v.r) + 1)), ""),
    ("mean (abs(y - s) - 1)^2", lambda v: v.mean(cp.square(cp.abs(v.r) - 1)), ""),
    ("mean neg(y * s)^2", lambda v: v.mean(cp.square(cp.neg(v.m))), ""),
    ("mean (-1 - exp(y * s))^2", lambda v: v.mean(cp.square(-1 - cp.exp(v.m))), ""),
    ("mean (1 - exp(y * s))^2", lambda v: v.mean(cp.square(1 - cp.exp(v.m))), ""),
    ("mean abs(1 + exp(y * s))", lambda v: v.mean(cp.abs(1 + cp.exp(v.m))), ""),
    ("mean abs(1 - exp(y * s))", lambda v: v.mean(cp.abs(1 - cp.exp(v.m))), ""),
    ("mean abs(abs(y - s) - 1)", lambda v: v.mean(cp.abs(cp.abs(v.r) - 1)), ""),
    ("mean huber(abs(y - s) + 1)", lambda v: v.mean(cp.huber(cp.abs(v.r) + 1) / 2), ""),
    ("mean huber(abs(y - s) - 1)", lambda v: v.mean(cp.huber(cp.abs(v.r) - 1) / 2), ""),
    ("mean huber(y - s, 1.35)", lambda v: v.mean(cp.huber(v.r, 1.35) / 2), ""),
    # concave atoms
    ("mean log(y * s)", lambda v: v.mean(cp.log(v.m)), ""),
    ("mean -log(y * s)", lambda v: -v.mean(cp.log(v.m)), ""),
    ("mean sqrt(y * s)", lambda v: v.mean(cp.sqrt(v.m)), ""),
    ("mean -sqrt(y * s)", lambda v: -v.mean(cp.sqrt(v.m)), ""),
    ("mean neg(log(y * s))", lambda v: v.mean(cp.neg(cp.log(v.m))), ""),
    ("mean pos(log(y * s))", lambda v: v.mean(cp.pos(cp.log(v.m))), ""),
    ("mean min(y * s, 1)", lambda v: v.mean(cp.minimum(v.m, 1)), ""),
    ("mean -min(y * s, 1)", lambda v: -v.mean(cp.minimum(v.m, 1)), ""),
    # max and min of several arguments
    ("mean max(0, 1 - y * s, -(y * s))", lambda v: v.mean(cp.maximum(0, 1 - v.m, -v.m)), ""),
    ("mean max(0, exp(-(y * s)), abs(y - s))", lambda v: v.mean(cp.maximum(0, cp.exp(-v.m), cp.abs(v.r))), ""),
    ("mean max(0, -exp(y * s))", lambda v: v.mean(cp.maximum(0, -cp.exp(v.m))), ""),
    ("mean min(0, y * s, exp(y * s))", lambda v: v.mean(cp.minimum(0, v.m, cp.exp(v.m))), ""),
    ("mean -min(0, y * s, -exp(y * s))", lambda v: -v.mean(cp.minimum(0, v.m, -cp.exp(v.m))), ""),
    ("max(l1(w), l2sq(w))", lambda v: cp.maximum(cp.norm1(v.w), cp.sum_squares(v.w)), ""),
    ("min(l1(w), 1)", lambda v: cp.minimum(cp.norm1(v.w), 1), ""),
    # powers p in {2, 3, 0.5, -1, 1.5}
    ("mean max(1 - y * s, 0)^2", lambda v: v.mean(cp.square(cp.maximum(1 - v.m, 0))), ""),
    ("mean pos(1 - y * s)^3", lambda v: v.mean(cp.power(cp.pos(1 - v.m), 3)), ""),
    ("mean (y * s)^0.5", lambda v: v.mean(cp.power(v.m, 0.5)), ""),
    ("mean -((y * s)^0.5)", lambda v: -v.mean(cp.power(v.m, 0.5)), ""),
    ("l2sq(w)^0.5", lambda v: cp.power(cp.sum_squares(v.w), 0.5), ""),
    ("mean exp(y * s)^-1", lambda v: v.mean(cp.power(cp.exp(v.m), -1)), ""),
    ("mean (1 + pos(y * s))^-1", lambda v: v.mean(cp.power(1 + cp.pos(v.m), -1)), ""),
    ("mean sqrt(y * s)^-1", lambda v: v.mean(cp.power(cp.sqrt(v.m), -1)), ""),
    ("mean abs(y * s)^1.5", lambda v: v.mean(cp.power(cp.abs(v.m), 1.5)), ""),
    # scaling by negative constants
    ("-1 * mean hinge(y * s)", lambda v: -v.mean(cp.pos(1 - v.m)), ""),
    ("-2 * -l2sq(w)", lambda v: -2 * -cp.sum_squares(v.w), ""),
    ("l2sq(w) / -2", lambda v: cp.sum_squares(v.w) / -2, ""),
    ("mean hinge(y * s) - 2 * l1(w)", lambda v: v.mean(cp.pos(1 - v.m)) - 2 * cp.norm1(v.w), ""),
    ("mean -abs(y - s)", lambda v: -v.mean(cp.abs(v.r)), ""),
    # the sign of a pure number is known even when written as a difference (elastic net mixing)
    ("mean logistic(y * s) + 0.3 * l1(w) + (1 - 0.3) * l2sq(w)",
     lambda v: v.mean(cp.logistic(-v.m)) + 0.3 * cp.norm1(v.w) + (1 - 0.3) * cp.sum_squares(v.w), ""),
    # tunables: a positive range is a Parameter(nonneg=True), a mixed one an unsigned Parameter
    ("C * mean hinge(y * s) + 0.5 * l2sq(w)",
     lambda v: v.C * v.mean(cp.pos(1 - v.m)) + 0.5 * cp.sum_squares(v.w), ""),
    ("M * mean hinge(y * s)", lambda v: v.M * v.mean(cp.pos(1 - v.m)), ""),
    ("mean squared(y - s) + M * l2sq(w)", lambda v: v.mean(0.5 * cp.square(v.r)) + v.M * cp.sum_squares(v.w), ""),
    ("M * mean (y - s)", lambda v: v.M * v.mean(v.r), ""),
    ("mean hinge(C * (y * s))", lambda v: v.mean(cp.pos(1 - v.C * v.m)), ""),
    ("mean abs(M * (y - s))", lambda v: v.mean(cp.abs(v.M * v.r)), ""),
    ("mean (M * hinge(y * s))", lambda v: v.mean(v.M * cp.pos(1 - v.m)), ""),
    # custom losses, used by name
    ("mean softsq(y * s)", lambda v: v.mean(cp.square(cp.pos(1 - v.m))), "loss softsq(m) = max(0, 1 - m)^2\n"),
    ("mean mix(y * s) + 0.5 * l2sq(w)",
     lambda v: v.mean(0.5 * cp.square(cp.pos(1 - v.m)) + 0.5 * cp.logistic(-v.m)) + 0.5 * cp.sum_squares(v.w),
     "loss mix(m) = 0.5 * max(0, 1 - m)^2 + 0.5 * log(1 + exp(-m))\n"),
    ("mean bump(y * s)", lambda v: v.mean(cp.exp(-cp.square(v.m))), "loss bump(m) = exp(-m^2)\n"),
    ("mean flipped(y - s)", lambda v: v.mean(-cp.abs(v.r)), "loss flipped(r) = -abs(r)\n"),
    ("mean scaled(y - s)", lambda v: v.mean(v.C * cp.abs(v.r)), "loss scaled(r) = C * abs(r)\n"),
    ("mean mscaled(y - s)", lambda v: v.mean(v.M * cp.abs(v.r)), "loss mscaled(r) = M * abs(r)\n"),
    # norms, norms of selections, group_l2
    ("l1(w[a, b]) + l2(w[b, c])", lambda v: cp.norm1(v.w[0:2]) + cp.norm2(v.w[1:3]), ""),
    ("-l2(w[a, c])", lambda v: -cp.norm2(v.w[[0, 2]]), ""),
    ("l2(w[first]) + sum abs(w)", lambda v: cp.norm2(v.w[0:2]) + cp.sum(cp.abs(v.w)), ""),
    ("exp(l2(w))", lambda v: cp.exp(cp.norm2(v.w)), ""),
    ("log1p(l1(w))", lambda v: cp.log1p(cp.norm1(v.w)), ""),
    ("sqrt(l2sq(w))", lambda v: cp.sqrt(cp.sum_squares(v.w)), ""),
    ("mean hinge(y * s) + group_l2(w)", lambda v: v.mean(cp.pos(1 - v.m)) + v.group_l2(), ""),
    ("mean hinge(y * s) - group_l2(w)", lambda v: v.mean(cp.pos(1 - v.m)) - v.group_l2(), ""),
    ("M * group_l2(w)", lambda v: v.M * v.group_l2(), ""),
    ("b^2 + l1(w)", lambda v: cp.square(v.b) + cp.norm1(v.w), ""),
    # hypot is the provable form of sqrt(a^2 + m^2)
    ("mean hypot(1, y * s)", lambda v: v.mean(hypot(1.0, v.m)), ""),
    ("mean hypot(abs(y - s), 1)", lambda v: v.mean(hypot(cp.abs(v.r), 1.0)), ""),
    ("mean hypot(log(y * s), 1)", lambda v: v.mean(hypot(cp.log(v.m), 1.0)), ""),
    ("mean sqrt(1 + (y * s)^2)", lambda v: v.mean(cp.sqrt(1 + cp.square(v.m))), ""),
    ("mean (y * s)^2 - l2sq(w)", lambda v: v.mean(cp.square(v.m)) - cp.sum_squares(v.w), ""),
]


@pytest.fixture(scope="module")
def cvx() -> Vars:
    return make_vars()


def test_the_comparison_covers_both_outcomes(cvx: Vars) -> None:
    verdicts = [cvxpy_says_convex(build(cvx)) for _, build, _ in CASES]
    assert len(CASES) >= 40
    assert sum(verdicts) >= 20 and len(verdicts) - sum(verdicts) >= 20


@pytest.mark.parametrize("goal, build, extra", CASES, ids=[c[0] for c in CASES])
def test_checker_agrees_with_cvxpy_dcp(goal: str, build, extra: str, cvx: Vars) -> None:
    expected = cvxpy_says_convex(build(cvx))
    result = checked(goal, extra)
    assert objc_says_convex(result) == expected, (result.verdict, [t.verdict for t in result.terms],
                                                  [d.message for d in result.errors])


# Where objc is stricter than cvxpy on purpose: cvxpy's `power` atom (cvxpy documentation, from
# memory) defines x^p for p > 1 not an even integer as +inf below 0, and for p < 0 as +inf at or
# below 0, so it silently adds the constraint x >= 0 (x > 0) and calls x^p increasing and convex.
# objc evaluates u^p on the whole line (a negative u is not excluded from the data), where u^3 and
# u^-1 are concave for u < 0, so it refuses u^p unless u is known to be nonnegative.
DOMAIN_CASES: list[Case] = [
    ("mean (y * s)^3", lambda v: v.mean(cp.power(v.m, 3)), ""),
    ("mean (y * s)^-1", lambda v: v.mean(cp.power(v.m, -1)), ""),
    ("mean (y - s)^1.5", lambda v: v.mean(cp.power(v.r, 1.5)), ""),
    ("mean (abs(y * s) - 1)^3", lambda v: v.mean(cp.power(cp.abs(v.m) - 1, 3)), ""),
]


@pytest.mark.parametrize("goal, build, extra", DOMAIN_CASES, ids=[c[0] for c in DOMAIN_CASES])
def test_powers_of_arguments_of_unknown_sign(goal: str, build, extra: str, cvx: Vars) -> None:
    assert cvxpy_says_convex(build(cvx))  # by cvxpy's implicit domain
    result = checked(goal, extra)
    assert not objc_says_convex(result) and not result.accepted
    assert result.terms[0].verdict in ("not provable", "not convex")


# ---------------------------------------------------------------- random compositions, both sides

# Leaves always depend on the learned parameters; pure numbers enter only as nonzero factors and
# addends (objc evaluates a pure number to learn its sign, cvxpy only reads a constant's sign, so
# zero products and odd powers of constants are left out on purpose), and the addend 1 is avoided
# because objc reads log(1 + exp(u)) as softplus(u), which cvxpy does not.
_LEAVES = [("(y * s)", lambda v: v.m), ("(y - s)", lambda v: v.r), ("s", lambda v: v.s)]
_UNARY = {
    "abs": cp.abs, "exp": cp.exp, "log": cp.log, "sqrt": cp.sqrt, "pos": cp.pos, "neg": cp.neg,
    "softplus": cp.logistic, "hinge": lambda e: cp.pos(1 - e), "logistic": lambda e: cp.logistic(-e),
    "squared": lambda e: 0.5 * cp.square(e), "huber": lambda e: cp.huber(e) / 2,
    "exponential": lambda e: cp.exp(-e), "squared_hinge": lambda e: cp.square(cp.pos(1 - e)),
}
_FACTORS = [("2", lambda v: 2.0), ("(-3)", lambda v: -3.0), ("C", lambda v: v.C), ("M", lambda v: v.M)]
_ADDENDS = [("0.5", 0.5), ("(-2)", -2.0)]
_POWERS = [2, 4, 0.5]  # odd and fractional p > 1: see DOMAIN_CASES


def _unary(pair):
    name, (text, build) = pair
    return f"{name}({text})", lambda v, f=_UNARY[name], g=build: f(g(v))


def _extreme(pair):
    name, items = pair
    op = cp.maximum if name == "max" else cp.minimum
    return (f"{name}({', '.join(t for t, _ in items)})",
            lambda v, op=op, bs=[b for _, b in items]: op(*[b(v) for b in bs]))


def _power(pair):
    (text, build), p = pair
    return f"({text})^{p:g}", lambda v, g=build, p=p: cp.power(g(v), p)


def _scale(pair):
    (ftext, fb), (text, build) = pair
    return f"({ftext} * {text})", lambda v, fb=fb, g=build: fb(v) * g(v)


def _shift(pair):
    (text, build), (atext, a) = pair
    return f"({text} + {atext})", lambda v, g=build, a=a: g(v) + a


def _combine(pair):
    op, (lt, lb), (rt, rb) = pair
    if op == "+":
        return f"({lt} + {rt})", lambda v, lb=lb, rb=rb: lb(v) + rb(v)
    if op == "-":
        return f"({lt} - {rt})", lambda v, lb=lb, rb=rb: lb(v) - rb(v)
    return f"({lt} * {rt})", lambda v, lb=lb, rb=rb: cp.multiply(lb(v), rb(v))


EXPRESSIONS = st.recursive(
    st.sampled_from(_LEAVES),
    lambda inner: st.one_of(
        st.tuples(st.sampled_from(sorted(_UNARY)), inner).map(_unary),
        st.tuples(st.sampled_from(["max", "min"]), st.lists(inner, min_size=2, max_size=3)).map(_extreme),
        st.tuples(inner, st.sampled_from(_POWERS)).map(_power),
        st.tuples(st.sampled_from(_FACTORS), inner).map(_scale),
        st.tuples(inner, st.sampled_from(_ADDENDS)).map(_shift),
        st.tuples(st.sampled_from(["+", "-", "*"]), inner, inner).map(_combine),
    ),
    max_leaves=6,
)


@settings(max_examples=120, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(EXPRESSIONS)
def test_random_compositions_agree_with_cvxpy(pair) -> None:
    text, build = pair
    v = make_vars()
    expected = cvxpy_says_convex(v.mean(build(v)))
    result = checked(f"mean ({text})")
    assert objc_says_convex(result) == expected, (text, result.verdict)


# ---------------------------------------------------------------- known non-convex losses: witnesses

def _midpoint_violation(loss, witness) -> float:
    a, b = witness.a, witness.b
    return loss((a + b) / 2) - (loss(a) + loss(b)) / 2


@pytest.mark.parametrize("goal, loss", [
    # the ramp (truncated hinge) and the sigmoid loss are the classic non-convex surrogates (from memory)
    ("mean min(1, max(0, 1 - y * s))", lambda m: min(1.0, max(0.0, 1.0 - m))),
    ("mean (1 - tanh(y * s))", lambda m: 1.0 - np.tanh(m)),
])
def test_nonconvex_losses_come_with_a_witness(goal: str, loss) -> None:
    result = checked(goal)
    assert result.verdict == "not convex" and not result.accepted
    (term,) = result.terms
    assert term.verdict == "not convex" and term.witness is not None
    assert "E311" in codes(result.errors)
    # the witness is real: recomputed from the loss's textbook formula, not from objc's kernels
    assert term.witness.variable == "the margin m"
    assert _midpoint_violation(loss, term.witness) > 1e-6


def test_convex_but_not_provable_is_not_called_nonconvex() -> None:
    # sqrt(1 + m^2) is convex (it is the Euclidean length of (1, m)) but the composition rules cannot
    # prove it as written (REFERENCE.md, composition rules)
    result = checked("mean sqrt(1 + (y * s)^2)")
    assert result.verdict == "not provable" and not result.accepted
    (term,) = result.terms
    assert term.verdict == "not provable" and term.witness is None
    (error,) = result.errors
    assert error.code == "E313"
    assert "hypot" in error.hint
    assert "may well be convex" in " ".join(error.notes)
    # the suggested rewrite is accepted
    rewritten = checked("mean hypot(1, y * s)")
    assert rewritten.accepted and rewritten.verdict == "convex"


def test_zero_one_loss_is_not_subdifferentiable() -> None:
    result = checked("mean zero_one(y * s) + 0.5 * l2sq(w)")
    assert result.verdict == "not subdifferentiable" and not result.accepted
    assert result.terms[0].verdict == "not subdifferentiable"
    (error,) = [e for e in result.errors if e.code == "E310"]
    assert (error.span.line, error.span.column) == (FIRST_LINE_AFTER_HEADER, 11)


def test_perceptron_alone_is_accepted_with_a_warning() -> None:
    # the perceptron loss max(0, -m) is convex, and w = 0, b = 0 minimizes its empirical risk
    result = checked("mean perceptron(y * s)")
    assert result.accepted and result.verdict == "convex"
    assert "W301" in codes(result.warnings)
    assert "w = 0" in next(w.message for w in result.warnings if w.code == "W301")


def test_subtracted_penalty_is_refused() -> None:
    result = checked("mean hinge(y * s) + l1(w) - 0.1 * l2sq(w)")
    assert not result.accepted
    assert "E312" in codes(result.errors)
    assert [t.verdict for t in result.terms][:2] == ["convex", "convex"]
    assert result.terms[2].verdict in ("not convex", "concave")


def test_tunable_with_mixed_range_is_refused_with_its_range() -> None:
    result = checked("mean hinge(y * s) + M * l2sq(w)")
    assert not result.accepted
    (error,) = [e for e in result.errors if e.code == "E315"]
    assert "-1 .. 10" in error.message
    assert "within 0 .. 10" in error.hint
    # the diagnostic points at the tunable in the goal: `goal mean hinge(y * s) + M`
    assert (error.span.line, error.span.column) == (FIRST_LINE_AFTER_HEADER, 26)
    # the same term with a positive range is fine
    assert checked("mean hinge(y * s) + C * l2sq(w)").accepted


def test_product_of_parameters_in_the_score_is_refused_at_the_product() -> None:
    header = HEADER.replace("score s = w . x + b\n", "score s = w[a] * w[b] * a\n")
    result = checked("mean hinge(y * s)", header=header)
    assert not result.accepted
    (error,) = [e for e in result.errors if e.code == "E301"]
    score_line = header.split("\n").index("score s = w[a] * w[b] * a") + 1
    assert (error.span.line, error.span.column) == (score_line, 11)
    assert result.source.snippet(error.span) == "w[a] * w[b]"


def test_logistic_without_regularizer_warns() -> None:
    assert "W305" in codes(checked("mean logistic(y * s)").warnings)
    assert "W305" not in codes(checked("mean logistic(y * s) + 0.5 * l2sq(w)").warnings)


def test_margin_loss_without_label_map_warns() -> None:
    header = HEADER.replace("target label: yes -> +1, no -> -1", "target label")
    result = checked("mean hinge(y * s) + 0.5 * l2sq(w)", header=header)
    assert result.accepted
    (warning,) = [w for w in result.warnings if w.code == "W304"]
    assert (warning.span.line, warning.span.column) == (2, 3)
    assert "W304" not in codes(checked("mean hinge(y * s) + 0.5 * l2sq(w)").warnings)


def test_expanded_objective_states_weighting_and_intercept() -> None:
    plain = checked("mean hinge(y * s) + 0.5 * l2sq(w)")
    assert "c_i" in plain.expanded and "weighted mean" in plain.expanded
    assert "intercept b: not penalized" in plain.expanded
    assert not plain.penalizes_intercept
    penalized = checked("mean hinge(y * s) + 0.5 * l2sq(w) + 0.01 * b^2")
    assert penalized.accepted and penalized.penalizes_intercept
    assert "intercept b: penalized" in penalized.expanded
    assert "0.01 * [b^2]" in penalized.expanded


def test_parameters_outside_the_score_in_a_row_term_are_refused() -> None:
    result = checked("mean hinge(y * s + b)")
    (error,) = [e for e in result.errors if e.code == "E303"]
    assert (error.span.line, error.span.column) == (FIRST_LINE_AFTER_HEADER, 25)
    assert not result.accepted


def test_product_of_a_row_term_and_a_penalty_gets_a_verdict() -> None:
    # a product of two parameter-dependent factors used to crash the witness search
    result = checked("C * mean squared(y - s) * l2sq(w)")
    assert not result.accepted and result.verdict in ("not convex", "not provable")


def test_division_by_zero_is_reported_not_raised() -> None:
    result = checked("l2sq(w) / 0")
    assert not result.accepted
    assert any("division by zero" in e.message for e in result.errors)


def test_nan_constant_is_refused() -> None:
    # (-2)^0.5 is not a real number (common practice: real powers of negatives are undefined)
    with pytest.raises(SpecError) as info:
        checked("(-2)^0.5 * l1(w) + mean hinge(y * s)")
    assert [d.code for d in info.value.diagnostics] == ["E249"]


def test_overflowing_literal_is_refused() -> None:
    with pytest.raises(SpecError) as info:
        checked("mean (y * s)^1e400 + l1(w)")
    assert "E248" in [d.code for d in info.value.diagnostics]


def test_a_clean_spec_is_not_a_spec_error() -> None:
    # the header itself resolves: failures above are verdicts, not resolution errors
    try:
        checked("0.5 * l2sq(w)")
    except SpecError as err:  # pragma: no cover - reported as the failure
        pytest.fail(str(err))
