"""The verdict every goal of a table must get, each backed by a judge from outside objc.

Two kinds of judge, named per row:

- "cvxpy": the same goal built by hand in cvxpy on small random data, and cvxpy's own DCP analysis
  (cvxpy DCP rules, Diamond & Boyd 2016, JMLR 17(83)) must prove what the verdict says: a
  "convex" goal `is_dcp()` and `is_convex()`, a "concave" goal `is_concave()` and not `is_convex()`.
  Where objc proves a sign from a tunable's declared range (1 - a >= 0 for a within 0 .. 1), the
  cvxpy form uses a nonnegative Parameter for that factor, and the test checks by sampling the
  range that the factor really is nonnegative there.
- "witness": a "not convex" goal must come with a witness, and the test evaluates the goal again
  at the witness's two points and their midpoint from a formula written here with NumPy (not
  objc's kernels), on the witness's data row, label and tunable values: the midpoint value must lie
  above the average of the ends.

A "not provable" row is backed by cvxpy twice: the goal as written is not DCP for cvxpy either,
and an equivalent form is DCP-convex, so the goal really is convex and objc must not have called
it non-convex (no witness, no E311/E312).

Loss formulas used here (REFERENCE.md, table of losses): hinge max(0, 1 - m), logistic
log(1 + e^-m), squared r^2 / 2, Huber r^2/2 inside d and d(|r| - d/2) outside; the ramp
min(1, max(0, 1 - m)) and the sigmoid loss 1 - tanh(m) as OBJECTIVES.md (item 20) states them.
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass
from typing import Callable

import cvxpy as cp
import numpy as np
import pytest

from objc import check_text
from objc import typed_tree as tt
from objc.checker import CheckedObjective, EvalEnv, evaluate

MARGIN = """table rows from "rows.csv"
  target late: yes -> +1, no -> -1
  inputs a1, a2, a3
learn w over inputs, b
score s = w . x + b
"""
RESIDUAL = """table rows from "rows.csv"
  target amount
  inputs a1, a2, a3
learn w over inputs, b
score s = w . x + b
"""


def spec_text(header: str, tunes: str, goal: str, extra: str = "") -> str:
    return header + tunes + extra + f"goal {goal}\n"


def run_check(header: str, tunes: str, goal: str, extra: str = "") -> CheckedObjective:
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # overflow inside the witness search is expected and harmless
        return check_text(spec_text(header, tunes, goal, extra), "verdicts.objc")


# ---------------------------------------------------------------- the cvxpy side

@dataclass(frozen=True)
class Vars:
    w: cp.Variable
    b: cp.Variable
    m: cp.Expression  # y * s
    r: cp.Expression  # y - s
    n: int

    def mean(self, e):
        return cp.sum(e) / self.n


def make_vars(seed: int = 0, n: int = 7) -> Vars:
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(n, 3))
    y = np.array([1.0, -1.0] * n)[:n]
    w, b = cp.Variable(3), cp.Variable()
    s = X @ w + b
    return Vars(w, b, cp.multiply(y, s), y - s, n)


def nonneg(value: float) -> cp.Parameter:
    return cp.Parameter(nonneg=True, value=value)


def hinge(m):
    return cp.pos(1 - m)


# ---------------------------------------------------------------- independent formulas (NumPy)

def np_hinge(m):
    return np.maximum(0.0, 1.0 - m)


def np_logistic(m):
    return np.logaddexp(0.0, -m)


def np_huber(r, d):
    return np.where(np.abs(r) <= d, r * r / 2, d * (np.abs(r) - d / 2))


# a formula gets (w, b, x row, y, tunables) and returns the goal's value on that one row
Formula = Callable[[np.ndarray, float, np.ndarray, float, dict], float]


@dataclass(frozen=True)
class Row:
    goal: str
    verdict: str
    judge: str  # "cvxpy" or "witness"
    tunes: str = ""
    header: str = MARGIN
    extra: str = ""
    cvx: Callable[[Vars], cp.Expression] | None = None  # the same goal (or an equivalent form) in cvxpy
    as_written: Callable[[Vars], cp.Expression] | None = None  # "not provable": the goal as written
    formula: Formula | None = None  # "witness": the goal on one row
    sign_check: tuple[str, Callable[[np.ndarray], np.ndarray], float, float] | None = None
    collected: bool = False  # like terms are collected into fewer terms
    codes: tuple[str, ...] = ()  # error codes that must be among the errors

    @property
    def id(self) -> str:
        return (self.tunes.strip().replace("\n", "; ") + " | " if self.tunes else "") + self.goal


T_A01 = "tune a = 0.5 within 0 .. 1\n"
T_A02 = "tune a = 0.5 within 0 .. 2\n"
T_LAM05 = "tune lam = 1 within 0 .. 5\n"
T_LAM = "tune lam = 1 within 0.2 .. 5\n"
T_C = "tune C = 1 within 0.01 .. 100\n"
T_M = "tune M = 1 within -1 .. 10\n"
T_K = "tune k = 1.5 within 0.5 .. 2\n"

ROWS: list[Row] = [
    # --- plain convex goals (cvxpy)
    Row("mean hinge(y * s) + 0.5 * l2sq(w)", "convex", "cvxpy",
        cvx=lambda v: v.mean(hinge(v.m)) + 0.5 * cp.sum_squares(v.w)),
    Row("C * mean logistic(y * s) + 0.5 * l2sq(w)", "convex", "cvxpy", tunes=T_C,
        cvx=lambda v: nonneg(1.0) * v.mean(cp.logistic(-v.m)) + 0.5 * cp.sum_squares(v.w)),
    Row("mean hypot(1, y * s) + 0.01 * l2sq(w)", "convex", "cvxpy",
        cvx=lambda v: v.mean(cp.norm(cp.vstack([np.ones(v.n), v.m]), 2, axis=0)) + 0.01 * cp.sum_squares(v.w)),
    # --- like terms collected, with constants (cvxpy on the collected form)
    Row("mean hinge(y * s) + l2sq(w) + 0.5 * l1(w) - 0.2 * l2sq(w)", "convex", "cvxpy", collected=True,
        cvx=lambda v: v.mean(hinge(v.m)) + 0.8 * cp.sum_squares(v.w) + 0.5 * cp.norm1(v.w)),
    Row("mean logistic(y * s) + 0.5 * mean logistic(y * s) - 0.25 * mean logistic(y * s) + 0.1 * l2sq(w)",
        "convex", "cvxpy", collected=True,
        cvx=lambda v: 1.25 * v.mean(cp.logistic(-v.m)) + 0.1 * cp.sum_squares(v.w)),
    Row("mean squared(y - s) + l2sq(w) - 0.5 * l2sq(w)", "convex", "cvxpy", header=RESIDUAL, collected=True,
        cvx=lambda v: v.mean(0.5 * cp.square(v.r)) + 0.5 * cp.sum_squares(v.w)),
    Row("mean huber(y - s, 1.35) + 0.5 * mean huber(y - s, 1.35) + 0.01 * l2sq(w)", "convex", "cvxpy",
        header=RESIDUAL, collected=True,
        cvx=lambda v: 1.5 * v.mean(cp.huber(v.r, 1.35) / 2) + 0.01 * cp.sum_squares(v.w)),
    # a coefficient that sums to zero leaves a constant term
    Row("mean squared(y - s) + mean absolute(y - s) - mean absolute(y - s)", "convex", "cvxpy", header=RESIDUAL,
        collected=True, cvx=lambda v: v.mean(0.5 * cp.square(v.r))),
    Row("mean blend(y * s) + mean blend(y * s) + 0.01 * l2sq(w)", "convex", "cvxpy", collected=True,
        extra="loss blend(m) = 0.5 * max(0, 1 - m)^2 + 0.5 * log(1 + exp(-m))\n",
        cvx=lambda v: 2 * v.mean(0.5 * cp.square(cp.pos(1 - v.m)) + 0.5 * cp.logistic(-v.m))
        + 0.01 * cp.sum_squares(v.w)),
    # --- like terms collected, with tunables: the summed coefficient lam - 0.2 is >= 0 for lam >= 0.2
    Row("mean hinge(y * s) + lam * l2sq(w) - 0.2 * l2sq(w)", "convex", "cvxpy", tunes=T_LAM, collected=True,
        cvx=lambda v: v.mean(hinge(v.m)) + nonneg(0.8) * cp.sum_squares(v.w),
        sign_check=("lam - 0.2", lambda lam: lam - 0.2, 0.2, 5.0)),
    # ... and may be negative for lam within 0 .. 5: at lam = 0 the goal is hinge - 0.2 ||w||^2
    Row("mean hinge(y * s) + lam * l2sq(w) - 0.2 * l2sq(w)", "not convex", "witness", tunes=T_LAM05,
        collected=True, codes=("E315",),
        formula=lambda w, b, x, y, t: np_hinge(y * (w @ x + b)) + (t["lam"] - 0.2) * (w @ w)),
    # --- signs decided by the declared ranges
    Row("mean hinge(y * s) + lam * (a * l1(w) + (1 - a) * l2sq(w))", "convex", "cvxpy", tunes=T_A01 + T_LAM05,
        cvx=lambda v: v.mean(hinge(v.m)) + nonneg(0.5) * cp.norm1(v.w) + nonneg(0.5) * cp.sum_squares(v.w),
        sign_check=("1 - a", lambda a: 1 - a, 0.0, 1.0)),
    Row("mean hinge(y * s) + a * l1(w) + (1 - a) * l2sq(w)", "convex", "cvxpy", tunes=T_A01,
        cvx=lambda v: v.mean(hinge(v.m)) + nonneg(0.5) * cp.norm1(v.w) + nonneg(0.5) * cp.sum_squares(v.w),
        sign_check=("1 - a", lambda a: 1 - a, 0.0, 1.0)),
    # a's range crosses 1: at a = 2, lam = 5 the penalty is 10 ||w||_1 - 5 ||w||^2
    Row("mean hinge(y * s) + lam * (a * l1(w) + (1 - a) * l2sq(w))", "not convex", "witness",
        tunes=T_A02 + T_LAM05, codes=("E315",),
        formula=lambda w, b, x, y, t: np_hinge(y * (w @ x + b))
        + t["lam"] * (t["a"] * np.abs(w).sum() + (1 - t["a"]) * (w @ w))),
    Row("mean hinge(y * s) + (1 - a)^3 * l2sq(w)", "convex", "cvxpy", tunes=T_A01,
        cvx=lambda v: v.mean(hinge(v.m)) + nonneg(0.125) * cp.sum_squares(v.w),
        sign_check=("(1 - a)^3", lambda a: (1 - a) ** 3, 0.0, 1.0)),
    Row("mean hinge(y * s) + (1 - a)^3 * l2sq(w)", "not convex", "witness", tunes=T_A02, codes=("E315",),
        formula=lambda w, b, x, y, t: np_hinge(y * (w @ x + b)) + (1 - t["a"]) ** 3 * (w @ w)),
    Row("mean logistic(y * s) + (a - 0.5) * l1(w)", "not convex", "witness", tunes=T_A01, codes=("E315",),
        formula=lambda w, b, x, y, t: np_logistic(y * (w @ x + b)) + (t["a"] - 0.5) * np.abs(w).sum()),
    Row("mean squared(y - s) + (a - 0.5)^2 * l1(w)", "convex", "cvxpy", tunes=T_A01, header=RESIDUAL,
        cvx=lambda v: v.mean(0.5 * cp.square(v.r)) + nonneg(0.0) * cp.norm1(v.w),
        sign_check=("(a - 0.5)^2", lambda a: (a - 0.5) ** 2, 0.0, 1.0)),
    Row("mean scaled(y - s) + 0.01 * l2sq(w)", "convex", "cvxpy", tunes=T_A01, header=RESIDUAL,
        extra="loss scaled(r) = (1 - a) * abs(r)\n",
        cvx=lambda v: v.mean(nonneg(0.5) * cp.abs(v.r)) + 0.01 * cp.sum_squares(v.w),
        sign_check=("1 - a", lambda a: 1 - a, 0.0, 1.0)),
    # --- ratios and products of tunables
    Row("mean hinge(y * s) + lam / k * l2sq(w)", "convex", "cvxpy", tunes=T_LAM05 + T_K,
        cvx=lambda v: v.mean(hinge(v.m)) + nonneg(1 / 1.5) * cp.sum_squares(v.w),
        sign_check=("lam / k at lam = 1", lambda k: 1.0 / k, 0.5, 2.0)),
    Row("mean hinge(y * s) + lam / (k - 1) * l2sq(w)", "not convex", "witness", tunes=T_LAM05 + T_K,
        codes=("E315",),
        formula=lambda w, b, x, y, t: np_hinge(y * (w @ x + b)) + t["lam"] / (t["k"] - 1) * (w @ w)),
    Row("C * lam * mean hinge(y * s) + l2sq(w)", "convex", "cvxpy", tunes=T_C + T_LAM05,
        cvx=lambda v: nonneg(1.0) * v.mean(hinge(v.m)) + cp.sum_squares(v.w)),
    Row("M * lam * mean hinge(y * s) + l2sq(w)", "not convex", "witness", tunes=T_M + T_LAM05, codes=("E315",),
        formula=lambda w, b, x, y, t: t["M"] * t["lam"] * np_hinge(y * (w @ x + b)) + w @ w),
    Row("M * mean hinge(y * s) + 0.5 * l2sq(w)", "not convex", "witness", tunes=T_M, codes=("E315",),
        formula=lambda w, b, x, y, t: t["M"] * np_hinge(y * (w @ x + b)) + 0.5 * (w @ w)),
    # --- negative weights that make the goal non-convex (true witnesses)
    Row("mean hinge(y * s) + 2 * l1(w) - 3 * l1(w)", "not convex", "witness", collected=True,
        formula=lambda w, b, x, y, t: np_hinge(y * (w @ x + b)) - np.abs(w).sum()),
    Row("mean hinge(y * s) + l1(w) - 0.1 * l2sq(w)", "not convex", "witness", codes=("E312",),
        formula=lambda w, b, x, y, t: np_hinge(y * (w @ x + b)) + np.abs(w).sum() - 0.1 * (w @ w)),
    Row("mean logistic(y * s) - 0.5 * l2sq(w)", "not convex", "witness", codes=("E312",),
        formula=lambda w, b, x, y, t: np_logistic(y * (w @ x + b)) - 0.5 * (w @ w)),
    Row("mean squared(y - s) - 2 * mean squared(y - s) + 0.5 * l2sq(w)", "not convex", "witness", header=RESIDUAL,
        collected=True, formula=lambda w, b, x, y, t: -0.5 * (y - w @ x - b) ** 2 + 0.5 * (w @ w)),
    # --- concave goals (cvxpy: is_concave)
    Row("-l2sq(w) - mean logistic(y * s)", "concave", "cvxpy", codes=("E316",),
        cvx=lambda v: -cp.sum_squares(v.w) - v.mean(cp.logistic(-v.m))),
    Row("-1 * mean hinge(y * s)", "concave", "cvxpy", codes=("E316",), cvx=lambda v: -v.mean(hinge(v.m))),
    Row("0.5 * l1(w) - 2 * l1(w) - l2(w)", "concave", "cvxpy", collected=True, codes=("E316",),
        cvx=lambda v: -1.5 * cp.norm1(v.w) - cp.norm2(v.w)),
    # --- truly non-convex losses (witnesses in the margin)
    Row("mean min(1, max(0, 1 - y * s)) + 0.01 * l2sq(w)", "not convex", "witness", codes=("E311",),
        formula=lambda w, b, x, y, t: min(1.0, max(0.0, 1.0 - y * (w @ x + b))) + 0.01 * (w @ w)),
    Row("mean (1 - tanh(y * s)) + 0.01 * l2sq(w)", "not convex", "witness", codes=("E311",),
        formula=lambda w, b, x, y, t: 1.0 - math.tanh(y * (w @ x + b)) + 0.01 * (w @ w)),
    Row("mean (y - s)^3 + 0.01 * l2sq(w)", "not convex", "witness", header=RESIDUAL, codes=("E311",),
        formula=lambda w, b, x, y, t: (y - w @ x - b) ** 3 + 0.01 * (w @ w)),
    # --- convex, but not provable by the rules: never called non-convex
    Row("mean sqrt(1 + (y * s)^2) + 0.01 * l2sq(w)", "not provable", "cvxpy", codes=("E313",),
        as_written=lambda v: v.mean(cp.sqrt(1 + cp.square(v.m))) + 0.01 * cp.sum_squares(v.w),
        cvx=lambda v: v.mean(cp.norm(cp.vstack([np.ones(v.n), v.m]), 2, axis=0)) + 0.01 * cp.sum_squares(v.w)),
    # a subtracted term that keeps the goal convex: 2||w||^2 - w_1^2 = w_1^2 + 2 w_2^2 + 2 w_3^2
    Row("mean hinge(y * s) + 2 * l2sq(w) - w[a1]^2", "not provable", "cvxpy", codes=("E313",),
        as_written=lambda v: v.mean(hinge(v.m)) + 2 * cp.sum_squares(v.w) - cp.square(v.w[0]),
        cvx=lambda v: v.mean(hinge(v.m)) + cp.square(v.w[0]) + 2 * cp.sum_squares(v.w[1:])),
    # ||w||_1 - 0.5 |w_1| = 0.5 |w_1| + |w_2| + |w_3|
    Row("mean hinge(y * s) + l1(w) - 0.5 * abs(w[a1])", "not provable", "cvxpy", codes=("E313",),
        as_written=lambda v: v.mean(hinge(v.m)) + cp.norm1(v.w) - 0.5 * cp.abs(v.w[0]),
        cvx=lambda v: v.mean(hinge(v.m)) + 0.5 * cp.abs(v.w[0]) + cp.norm1(v.w[1:])),
    # sum - mean = (1 - 1/n) sum with n >= 1 rows: convex, but the two aggregates are not like terms
    Row("sum hinge(y * s) - mean hinge(y * s) + 0.01 * l2sq(w)", "not provable", "cvxpy", codes=("E313",),
        as_written=lambda v: cp.sum(hinge(v.m)) - v.mean(hinge(v.m)) + 0.01 * cp.sum_squares(v.w),
        cvx=lambda v: (1 - 1 / v.n) * cp.sum(hinge(v.m)) + 0.01 * cp.sum_squares(v.w)),
]

IDS = [r.id for r in ROWS]


def test_the_table_is_wide_enough() -> None:
    assert len(ROWS) >= 30
    verdicts = {r.verdict for r in ROWS}
    assert verdicts == {"convex", "concave", "not convex", "not provable"}
    assert sum(r.collected for r in ROWS) >= 8
    assert sum(bool(r.tunes) for r in ROWS) >= 12


@pytest.mark.parametrize("row", ROWS, ids=IDS)
def test_verdict(row: Row) -> None:
    c = run_check(row.header, row.tunes, row.goal, row.extra)
    assert c.verdict == row.verdict, (c.verdict, [d.render(c.source) for d in c.errors])
    assert c.accepted == (row.verdict == "convex")
    codes = {d.code for d in c.errors}
    assert set(row.codes) <= codes, codes
    if row.verdict != "not convex":
        # "not convex" is a claim made only with a witness; nothing else may claim it (a concave goal
        # may show one as an illustration, but its verdict is the exact "concave")
        assert c.witness is None or row.verdict == "concave"
        assert all(t.verdict != "not convex" for t in c.terms)
        assert not codes & {"E311", "E312"}
    if row.verdict == "not provable":
        assert codes & {"E313", "E315"}
    assert (any(t.parts for t in c.terms)) == row.collected


@pytest.mark.parametrize("row", [r for r in ROWS if r.judge == "cvxpy"], ids=[r.id for r in ROWS if r.judge == "cvxpy"])
def test_cvxpy_agrees(row: Row) -> None:
    # cvxpy DCP rules, Diamond & Boyd 2016, JMLR 17(83)
    v = make_vars()
    expr = row.cvx(v)
    if row.verdict == "convex":
        assert expr.is_dcp() and expr.is_convex()
    elif row.verdict == "concave":
        assert expr.is_concave() and not expr.is_convex()
    elif row.verdict == "not provable":
        written = row.as_written(v)
        assert not written.is_convex()  # cvxpy cannot prove the form as written either
        assert expr.is_dcp() and expr.is_convex()  # ... but an equivalent form is convex
        # the two forms are the same function (checked at random points)
        rng = np.random.default_rng(3)
        for _ in range(5):
            v.w.value, v.b.value = rng.normal(size=3), float(rng.normal())
            assert math.isclose(float(written.value), float(expr.value), rel_tol=1e-9, abs_tol=1e-12)
    else:  # pragma: no cover - the table has no other verdicts for cvxpy
        raise AssertionError(row.verdict)
    if row.sign_check is not None:
        # the declared range makes the factor nonnegative: sampled densely over the range
        what, factor, low, high = row.sign_check
        grid = np.linspace(low, high, 2001)
        assert np.all(factor(grid) >= 0), what


def _tunable_values(c: CheckedObjective, w) -> dict[str, float]:
    values = {t.name: t.default for t in c.spec.tunables}
    values.update(dict(w.tunables))
    return values


@pytest.mark.parametrize("row", [r for r in ROWS if r.judge == "witness"],
                         ids=[r.id for r in ROWS if r.judge == "witness"])
def test_witness_is_a_real_counterexample(row: Row) -> None:
    c = run_check(row.header, row.tunes, row.goal, row.extra)
    w = c.witness
    assert w is not None and c.verdict == "not convex"
    x = np.array([dict(w.row)[n] for n in ("a1", "a2", "a3")])
    tun = _tunable_values(c, w)
    for t in c.spec.tunables:
        assert t.low <= tun[t.name] <= t.high  # the witness uses values the spec allows

    def f(which: str) -> float:
        p = w.params(which)
        return float(row.formula(np.asarray(p["w"], dtype=float), float(p["b"]), x, w.label, tun))
    fa, fb, fm = f("a"), f("b"), f("mid")
    # midpoint convexity fails, by more than rounding
    assert fm > (fa + fb) / 2 + 1e-9 * (1 + abs(fa) + abs(fb))
    # and objc reports the whole goal's values there, not those of one term
    assert math.isclose(fm, w.value_mid, rel_tol=1e-7, abs_tol=1e-9)
    assert math.isclose((fa + fb) / 2, w.value_avg, rel_tol=1e-7, abs_tol=1e-9)


@pytest.mark.parametrize("row", [r for r in ROWS if r.judge == "witness"],
                         ids=[r.id for r in ROWS if r.judge == "witness"])
def test_terms_called_not_convex_fail_at_the_witness_themselves(row: Row) -> None:
    # a term's own "not convex" rests on the same two points: its midpoint lies above its chord too
    c = run_check(row.header, row.tunes, row.goal, row.extra)
    w = c.witness
    for t in c.terms:
        if t.verdict != "not convex":
            continue
        assert t.witness == w
        env = lambda which: EvalEnv(list(w.inputs), w.params(which), {k: np.array([v]) for k, v in w.row},  # noqa: E731
                                    np.array([w.label]), None, dict(w.tunables))
        fa, fb, fm = (float(np.sum(evaluate(t.expr, env(k)))) for k in ("a", "b", "mid"))
        assert fm > (fa + fb) / 2


# ---------------------------------------------------------------- collected goals are the same function

def _collected_goal(c: CheckedObjective) -> tt.TExpr:
    total = None
    for t in c.terms:
        total = t.expr if total is None else tt.Add(total, t.expr, t.span)
    return total


@pytest.mark.parametrize("row", [r for r in ROWS if r.collected], ids=[r.id for r in ROWS if r.collected])
def test_collected_goal_has_the_value_of_the_goal_as_written(row: Row) -> None:
    # c1 * f + c2 * f = (c1 + c2) * f: the collected terms sum to the goal as written, at random
    # parameters, data and tunable values inside the declared ranges
    c = run_check(row.header, row.tunes, row.goal, row.extra)
    collected = _collected_goal(c)
    rng = np.random.default_rng(11)
    inputs = ["a1", "a2", "a3"]
    for _ in range(20):
        n = 9
        cols = {name: rng.normal(size=n) for name in inputs}
        y = rng.choice([-1.0, 1.0], size=n) if row.header is MARGIN else rng.normal(size=n)
        tun = {t.name: float(rng.uniform(t.low, t.high)) for t in c.spec.tunables}
        params = {"w": rng.normal(scale=2.0, size=3), "b": float(rng.normal())}
        env = EvalEnv(inputs, params, cols, y, None, tun, rng.uniform(0.5, 2.0, size=n))
        as_written = float(evaluate(c.spec.goal, env))
        assert math.isclose(float(evaluate(collected, env)), as_written, rel_tol=1e-12, abs_tol=1e-12)
    # the collected form is what the expanded objective shows, with the terms it came from
    assert "like terms collected:" in c.expanded
    for t in c.terms:
        if t.parts:
            assert len(t.parts) == len(t.part_texts) >= 2
            assert all(p in t.text for p in (s.lstrip("- ") for s in t.part_texts))


def test_collected_coefficient_with_a_tunable_is_shown_summed() -> None:
    c = run_check(MARGIN, T_LAM, "mean hinge(y * s) + lam * l2sq(w) + 0.5 * l1(w) - 0.2 * l2sq(w)")
    assert c.verdict == "convex"
    (pen,) = [t for t in c.terms if t.parts]
    assert pen.parts == (2, 4) and pen.coefficient_text == "lam - 0.2"
    assert "(lam - 0.2) * [l2sq(w)]" in c.expanded
    assert "terms 2 and 4 as written (lam * l2sq(w) - 0.2 * l2sq(w)) into term 2" in c.expanded
    assert math.isclose(pen.coefficient, 0.8)


def test_a_factor_distributed_over_a_sum_is_shown_whole() -> None:
    # the text of a term whose factor sits outside a parenthesized sum is written out, not cut
    c = run_check(MARGIN, T_A01 + T_LAM05, "mean hinge(y * s) + lam * (a * l1(w) + (1 - a) * l2sq(w))")
    assert [t.text for t in c.terms][1:] == ["lam * a * l1(w)", "lam * (1 - a) * l2sq(w)"]


# ---------------------------------------------------------------- both backends on collected goals

BACKEND_GOALS = [
    (RESIDUAL, "", "mean squared(y - s) + l2sq(w) + 0.5 * l1(w) - 0.2 * l2sq(w)"),
    (RESIDUAL, T_LAM, "mean squared(y - s) + lam * l2sq(w) - 0.2 * l2sq(w) + 0.1 * mean squared(y - s)"),
    # not collected, but the sign of 1 - a comes from the declared range, which cvxpy cannot see
    (RESIDUAL, T_A01, "mean squared(y - s) + a * l1(w) + (1 - a) * l2sq(w)"),
    (MARGIN, "", "mean logistic(y * s) + 0.5 * mean logistic(y * s) + 0.3 * l2sq(w) - 0.1 * l2sq(w)"),
]


def _objective_as_written(c: CheckedObjective, X, y, params, tun) -> float:
    env = EvalEnv(["a1", "a2", "a3"], params, {n: X[:, i] for i, n in enumerate(["a1", "a2", "a3"])}, y, None, tun)
    return float(evaluate(c.spec.goal, env))


@pytest.mark.parametrize("header, tunes, goal", BACKEND_GOALS, ids=[g for _, _, g in BACKEND_GOALS])
def test_both_backends_solve_a_collected_goal(header: str, tunes: str, goal: str) -> None:
    from objc.backends import cvxpy_problem, numpy_module
    c = run_check(header, tunes, goal)
    assert c.accepted
    rng = np.random.default_rng(5)
    X = rng.normal(size=(60, 3))
    if header is MARGIN:
        y = np.where(X @ [1.0, -1.0, 0.5] + 0.3 * rng.normal(size=60) > 0, 1.0, -1.0)
    else:
        y = X @ [1.0, -2.0, 0.5] + 0.3 + rng.normal(size=60)
    tun = {t.name: t.default for t in c.spec.tunables}
    fits = [mod.fit(c, X, y, None, ("a1", "a2", "a3"), None) for mod in (cvxpy_problem, numpy_module)]
    for fit in fits:
        # the objective a backend reports is the goal as written, evaluated at its solution
        assert math.isclose(fit.objective, _objective_as_written(c, X, y, fit.params, tun), rel_tol=1e-9)
        assert math.isclose(sum(fit.term_values), fit.objective, rel_tol=1e-9)
    # the two backends reach the same optimum (cvxpy's interior point method is the reference)
    assert math.isclose(fits[0].objective, fits[1].objective, rel_tol=1e-6)


TUNED_GOALS = [g for g in BACKEND_GOALS if g[1]]


@pytest.mark.parametrize("header, tunes, goal", TUNED_GOALS, ids=[g for _, _, g in TUNED_GOALS])
def test_collected_goal_at_other_tunable_values_and_in_the_emitted_module(header, tunes, goal, tmp_path) -> None:
    import importlib.util

    from objc.backends import cvxpy_problem, numpy_module
    c = run_check(header, tunes, goal)
    rng = np.random.default_rng(6)
    X = rng.normal(size=(60, 3))
    y = X @ [1.0, -2.0, 0.5] + 0.3 + rng.normal(size=60)
    (t,) = c.spec.tunables
    value = t.low + 0.3 * (t.high - t.low)  # away from the default, inside the declared range
    fits = [mod.fit(c, X, y, None, ("a1", "a2", "a3"), {t.name: value}) for mod in (cvxpy_problem, numpy_module)]
    for fit in fits:
        assert math.isclose(fit.objective, _objective_as_written(c, X, y, fit.params, {t.name: value}), rel_tol=1e-9)
    assert math.isclose(fits[0].objective, fits[1].objective, rel_tol=1e-6)
    # the standalone cvxpy module takes the same goal (its range-signed factor as a derived parameter)
    path = tmp_path / "emitted.py"
    path.write_text(cvxpy_problem.emit_module(c), encoding="utf-8")
    loader = importlib.util.spec_from_file_location("objc_emitted_collected", path)
    module = importlib.util.module_from_spec(loader)
    loader.loader.exec_module(module)
    out = module.solve(X, y, **{t.name: value})
    assert math.isclose(out["objective"], fits[0].objective, rel_tol=1e-7)


# ---------------------------------------------------------------- docs/language.md, where the checker stops

DOCS = __import__("pathlib").Path(__file__).resolve().parent.parent / "docs" / "language.md"
LIMITS_HEADER = """table rows from "rows.csv"
  target late: yes -> +1, no -> -1
  inputs a, b, c
learn w over inputs, b0
score s = w . x + b0
"""


def _limit_rows() -> list[tuple[str, list[str], str]]:
    import re
    text = DOCS.read_text(encoding="utf-8")
    body = text.split("<!-- limits:start -->")[1].split("<!-- limits:end -->")[0]
    rows = [ln for ln in body.splitlines() if ln.startswith("| ") and not ln.startswith("| ---")][1:]
    out = []
    for row in rows:
        goal_cell, verdict_cell, _why = [c.strip() for c in re.split(r"(?<!\\)\|", row)[1:-1]]
        snippets = re.findall(r"`([^`]+)`", goal_cell)
        out.append((snippets[0], snippets[1:], verdict_cell.strip("`")))
    return out


@pytest.mark.parametrize("goal, tunes, verdict", _limit_rows(), ids=[r[0] for r in _limit_rows()])
def test_documented_checker_limits_match_the_checker(goal: str, tunes: list[str], verdict: str) -> None:
    declared = "".join(f"tune {t.split()[0]} = {t.split()[2]} {' '.join(t.split()[1:])}\n" for t in tunes)
    c = run_check(LIMITS_HEADER, declared, goal)
    assert c.verdict == verdict, [d.render(c.source) for d in c.errors]
    if verdict == "not provable":
        assert c.witness is None


def test_the_documented_limits_are_there() -> None:
    assert len(_limit_rows()) >= 5
