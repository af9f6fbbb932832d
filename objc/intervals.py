"""The values a constant-in-theta expression can take, from the declared ranges of its tunables.

This is the one place that answers "what sign has `1 - a` when `tune a = 0.5 within 0 .. 1`?": the
checker (and, through it, the backends) asks it for the sign of every expression that holds no
learned parameter. It is plain interval arithmetic (Moore, Kearfott & Cloud, *Introduction to
Interval Analysis*, SIAM 2009, chapters 2 and 5): each operation maps intervals holding its
operands to an interval holding every value of its result, so the interval of an expression holds
every value the expression takes over the declared ranges. It may be wider than the true range
(`a - a` gives -1 .. 1, the dependency effect) but never narrower, and a sign read from it is
therefore safe.

Endpoints are computed in floating point without outward rounding: an endpoint that is zero in
exact arithmetic (1 - 1) stays zero, which is what the sign decisions need; an endpoint off by a
rounding error can misjudge a sign only for a coefficient within about 1e-16 of zero.
"""

from __future__ import annotations

import math
from typing import Mapping

import numpy as np

from objc import typed_tree as tt
from objc.catalog import CATALOG
from objc.curvature import Monotonicity, Sign

Interval = tuple[float, float]

EVERYTHING: Interval = (-math.inf, math.inf)


def interval_of(e: tt.TExpr, tunables: Mapping[str, Interval] | None = None) -> Interval:
    """An interval (lo, hi) holding every value of `e` while each tunable ranges over its declared
    range (or over `tunables[name]` where given). Data, learned parameters and anything this
    arithmetic does not cover give (-inf, inf)."""
    return _interval(e, dict(tunables or {}))


def sign_of(e: tt.TExpr, tunables: Mapping[str, Interval] | None = None) -> Sign:
    """The sign the interval of `e` proves: known when the interval excludes the other side."""
    lo, hi = interval_of(e, tunables)
    return Sign.of_range(lo, hi)


def _interval(e: tt.TExpr, tun: dict[str, Interval]) -> Interval:
    if isinstance(e, tt.Const):
        return (e.value, e.value)
    if isinstance(e, tt.TunableRef):
        return tun.get(e.name, (e.low, e.high))
    if isinstance(e, tt.Neg):
        lo, hi = _interval(e.operand, tun)
        return (-hi, -lo)
    if isinstance(e, tt.Add):
        return add(_interval(e.left, tun), _interval(e.right, tun))
    if isinstance(e, tt.Mul):
        return mul(_interval(e.left, tun), _interval(e.right, tun))
    if isinstance(e, tt.Div):
        return div(_interval(e.left, tun), _interval(e.right, tun))
    if isinstance(e, tt.CustomLoss):
        return _interval(e.body, tun)
    if isinstance(e, tt.Aggregate):
        return _aggregate(e, _interval(e.operand, tun))
    if isinstance(e, tt.Apply):
        return _apply(e, [_interval(a, tun) for a in e.args])
    return EVERYTHING  # data, learned parameters, scores, dot products


def add(a: Interval, b: Interval) -> Interval:
    lo, hi = a[0] + b[0], a[1] + b[1]
    return (-math.inf if math.isnan(lo) else lo, math.inf if math.isnan(hi) else hi)


def _times(x: float, y: float) -> float:
    # 0 * inf counts as 0: an endpoint 0 is a value the factor takes, and 0 times any finite value is 0
    return 0.0 if x == 0 or y == 0 else x * y


def mul(a: Interval, b: Interval) -> Interval:
    products = [_times(x, y) for x in a for y in b]
    return (min(products), max(products))


def div(a: Interval, b: Interval) -> Interval:
    lo, hi = b
    if lo <= 0 <= hi:
        return EVERYTHING  # the divisor may be zero (or as close to it as one likes)
    return mul(a, (1.0 / hi, 1.0 / lo))


def _aggregate(e: tt.Aggregate, inner: Interval) -> Interval:
    lo, hi = inner
    if e.kind == "mean":
        return inner  # a weighted mean with nonnegative weights lies between the extremes
    # a sum (or any nonnegatively weighted total): only the sign survives, not the size
    return (0.0 if lo >= 0 else -math.inf, 0.0 if hi <= 0 else math.inf)


def _apply(e: tt.Apply, args: list[Interval]) -> Interval:
    entry = CATALOG.get(e.entry)
    opts = e.option_dict
    if entry is None or entry.kind == "norm" or not args:
        return EVERYTHING
    if getattr(e, "tuned", ()):
        # a setting that is itself a tunable (x ^ q, q within 1.5 .. 4): only the entry's sign rule is used
        return _sign_interval(entry.sign(tuple(Sign.of_range(lo, hi) for lo, hi in args), opts))
    if entry.value_interval is not None and len(args) == 1:
        return entry.value_interval(opts, args[0])
    if all(lo == hi for lo, hi in args):
        v = _value(entry, [lo for lo, _ in args], opts)
        if v is not None:
            return (v, v)
    monotone = _monotone(entry, args, opts)
    if monotone is not None:
        return monotone
    if len(args) == 1 and args[0][0] < 0 < args[0][1]:
        # split at 0, where the catalog's monotonicity of a sign-dependent atom (abs, huber) turns
        left = _monotone(entry, [(args[0][0], 0.0)], opts)
        right = _monotone(entry, [(0.0, args[0][1])], opts)
        if left is not None and right is not None:
            return (min(left[0], right[0]), max(left[1], right[1]))
    return _sign_interval(entry.sign(tuple(Sign.of_range(lo, hi) for lo, hi in args), opts))


def _monotone(entry, args: list[Interval], opts: dict) -> Interval | None:
    """[f(lowest corner), f(highest corner)] when f is monotone in every argument over its interval."""
    low_corner, high_corner = [], []
    for i, (lo, hi) in enumerate(args):
        m = entry.monotonicity(i, Sign.of_range(lo, hi), opts)
        if m == Monotonicity.INCREASING:
            low_corner.append(lo), high_corner.append(hi)
        elif m == Monotonicity.DECREASING:
            low_corner.append(hi), high_corner.append(lo)
        else:
            return None
    a, b = _value(entry, low_corner, opts), _value(entry, high_corner, opts)
    if a is None or b is None:
        return None
    return (a, b)


def _value(entry, points: list[float], opts: dict) -> float | None:
    d_lo, d_hi = entry.domain
    pts = [min(max(p, d_lo), d_hi) for p in points]
    with np.errstate(all="ignore"):
        try:
            v = float(np.asarray(entry.value(*[np.float64(p) for p in pts], **opts), dtype=float))
        except (ValueError, TypeError, ZeroDivisionError, OverflowError):
            return None
    return None if math.isnan(v) else v


def _sign_interval(s: Sign) -> Interval:
    return {Sign.ZERO: (0.0, 0.0), Sign.NONNEG: (0.0, math.inf), Sign.NONPOS: (-math.inf, 0.0)}.get(s, EVERYTHING)
