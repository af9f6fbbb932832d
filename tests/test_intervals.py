"""Interval arithmetic over declared tunable ranges (objc/intervals.py) against brute force.

Each expression is written once as objc text (a coefficient in a goal) and once as a Python
function with the standard library's math; the Python side is sampled on a dense grid over the
declared ranges. The interval must hold every sampled value (the containment property of interval
extensions, Moore, Kearfott & Cloud, Introduction to Interval Analysis, SIAM 2009, ch. 5), and
where every tunable occurs once the interval must also be tight: its ends are reached by the
samples (an expression in which each variable occurs once has an exact interval extension when
its operations are continuous on the box; the same book, from memory).
"""

from __future__ import annotations

import itertools
import math

import numpy as np
import pytest

from objc import check_text
from objc.curvature import Sign
from objc.intervals import interval_of, sign_of

HEADER = """table t from "t.csv"
  target y
  inputs a1, a2
tune a = 0.5 within 0 .. 1
tune c = 1 within 0 .. 2
tune lam = 1 within 0.2 .. 5
tune k = 1.5 within 0.5 .. 2
tune q = 1 within -1 .. 3
learn w over inputs, b
score s = w . x + b
"""
RANGES = {"a": (0.0, 1.0), "c": (0.0, 2.0), "lam": (0.2, 5.0), "k": (0.5, 2.0), "q": (-1.0, 3.0)}


def coefficient(text: str):
    spec = check_text(HEADER + f"goal ({text}) * l2sq(w)\n", "iv.objc").spec
    return spec.goal.left


def hinge(u):
    return max(0.0, 1.0 - u)  # REFERENCE.md, table of losses


def logistic(u):
    return math.log1p(math.exp(-u))  # REFERENCE.md, table of losses


def pos(u):
    return max(u, 0.0)


def softplus(u):
    return math.log1p(math.exp(u))


def huber(u, d=1.0):
    return u * u / 2 if abs(u) <= d else d * (abs(u) - d / 2)  # REFERENCE.md, half-scaled


PY = {"exp": math.exp, "log": math.log, "sqrt": math.sqrt, "abs": abs, "hinge": hinge, "logistic": logistic,
      "pos": pos, "softplus": softplus, "huber": huber, "max": max, "min": min, "log1p": math.log1p}

# (objc text, tightness expected: every tunable occurs once and the operations are continuous)
CASES = [
    ("1 - a", True),
    ("lam * (1 - a)", True),
    ("lam / k", True),
    ("lam / (1 + a)", True),
    ("-lam * k", True),
    ("a - 0.5", True),
    ("(a - 0.5)^2", True),
    ("(1 - c)^3", True),
    ("q^2", True),
    ("q^4 - 1", True),
    ("(lam)^0.5", True),
    ("k^-1", True),
    ("k^-2", True),
    ("exp(-a)", True),
    ("log(k)", True),
    ("log1p(a)", True),
    ("sqrt(lam)", True),
    ("abs(q)", True),
    ("abs(q - 1)", True),
    ("hinge(q)", True),
    ("logistic(q)", True),
    ("pos(q - 1)", True),
    ("huber(q)", True),
    ("max(a, q)", True),
    ("min(lam, k)", True),
    ("a - a", False),
    ("a * (1 - a)", False),
    ("lam * k - k", False),
    ("q * q", False),
]


def sampled(text: str) -> np.ndarray:
    names = [n for n in RANGES if any(tok == n for tok in _tokens(text))]
    grids = [np.linspace(*RANGES[n], 41) for n in names]
    expr = text.replace("^", "**")
    out = []
    for point in itertools.product(*grids):
        env = dict(PY, **dict(zip(names, (float(p) for p in point))))
        out.append(eval(expr, {"__builtins__": {}}, env))  # noqa: S307 - test expressions written above
    return np.array(out, dtype=float)


def _tokens(text: str) -> list[str]:
    word, out = "", []
    for ch in text + " ":
        if ch.isalnum() or ch == "_":
            word += ch
        else:
            if word:
                out.append(word)
            word = ""
    return out


@pytest.mark.parametrize("text, tight", CASES, ids=[c[0] for c in CASES])
def test_interval_holds_every_value(text: str, tight: bool) -> None:
    lo, hi = interval_of(coefficient(text))
    values = sampled(text)
    tol = 1e-12 * (1 + np.max(np.abs(values)))
    assert np.all(values >= lo - tol) and np.all(values <= hi + tol), (lo, hi, values.min(), values.max())
    if tight:
        assert math.isclose(values.min(), lo, rel_tol=1e-9, abs_tol=1e-9), (lo, values.min())
        assert math.isclose(values.max(), hi, rel_tol=1e-9, abs_tol=1e-9), (hi, values.max())


@pytest.mark.parametrize("text, sign", [
    ("1 - a", Sign.NONNEG),  # a within 0 .. 1
    ("1 - c", Sign.UNKNOWN),  # c within 0 .. 2 crosses 1
    ("lam - 0.2", Sign.NONNEG),  # lam within 0.2 .. 5: 0 at the low end
    ("lam - 0.3", Sign.UNKNOWN),
    ("a - 2", Sign.NONPOS),
    ("lam / k", Sign.NONNEG),
    ("lam / (k - 1)", Sign.UNKNOWN),  # the divisor crosses 0
    ("-(lam * k)", Sign.NONPOS),
    ("(1 - c)^2", Sign.NONNEG),
    ("(1 - c)^3", Sign.UNKNOWN),
    ("hinge(1 + a)", Sign.ZERO),  # max(0, 1 - u) = 0 for u >= 1
    ("1 - 0.3", Sign.NONNEG),
    ("0.3 - 1", Sign.NONPOS),
    ("2 - 2", Sign.ZERO),
])
def test_sign_from_the_declared_ranges(text: str, sign: Sign) -> None:
    assert sign_of(coefficient(text)) == sign
    # the same answer by sampling (a sign is known when no sample has the other sign)
    values = sampled(text)
    finite = values[np.isfinite(values)]
    if sign == Sign.NONNEG:
        assert np.all(finite >= 0)
    elif sign == Sign.NONPOS:
        assert np.all(finite <= 0)
    elif sign == Sign.ZERO:
        assert np.all(finite == 0)


def test_given_ranges_replace_the_declared_ones() -> None:
    e = coefficient("1 - c")
    assert interval_of(e) == (-1.0, 1.0)
    assert interval_of(e, {"c": (0.0, 1.0)}) == (0.0, 1.0)
    assert sign_of(e, {"c": (0.25, 0.5)}) == Sign.NONNEG


def test_data_and_learned_values_are_unbounded() -> None:
    spec = check_text(HEADER + "goal mean hinge(y * s) + l2sq(w)\n", "iv.objc").spec
    lo, hi = interval_of(spec.score.expr)
    assert (lo, hi) == (-math.inf, math.inf)
