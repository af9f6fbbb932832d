"""Property suite over every catalog entry.

Every test is parametrized over `catalog.ENTRIES` (and, for entries with settings, over the default
and other admissible values), so an entry is checked the moment it is added. The checks compare the
catalog with things outside it: cvxpy's own atoms, scipy's minimizers, finite differences, and the
textbook values of REFERENCE.md.
"""

from __future__ import annotations

import inspect
import math
import warnings
from typing import Any

import cvxpy as cp
import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.optimize import minimize, minimize_scalar
from scipy.special import lambertw

from objc import catalog
from objc.catalog import Entry
from objc.curvature import Curvature, Monotonicity, Sign

# ---------------------------------------------------------------- cases

# Settings to test besides each default. huber d=1.35 is the usual robust-regression threshold
# (common practice); the others span each option's admissible range.
EXTRA_OPTIONS: dict[str, list[dict[str, float]]] = {
    "huber": [{"d": 1.35}, {"d": 0.5}],
    "pinball": [{"t": 0.9}, {"t": 0.2}],
    "smooth_hinge": [{"c": 0.5}, {"c": 2.0}],
    "epsilon_insensitive": [{"e": 0.0}, {"e": 0.5}],
    "power": [{"p": 3.0}, {"p": 0.5}, {"p": -1.0}, {"p": 1.5}, {"p": 4.0}],
    "below": [{"a": 0.5}, {"a": -1.0}],
    "l0": [{"z": 0.5}, {"z": 0.25}],
    "dropridge": [{"p": 0.2}, {"p": 0.8}],
}


def _resolve(entry: Entry, setting: dict[str, float]) -> dict[str, float]:
    # go through the entry's own resolver so an inadmissible test value fails loudly
    return entry.resolve_options(tuple(setting[o.name] for o in entry.options))


def _class_shaped(e: Entry) -> bool:
    """An entry of K scores per row or of a matrix learned by classes: its properties are tested on
    those shapes in tests/test_multiclass.py, not on the real line here."""
    return e.role == "multiclass" or e.on_class_matrix == "only"


def _cases() -> list[Any]:
    out = []
    for e in catalog.ENTRIES:
        if _class_shaped(e):
            continue
        out.append(pytest.param(e, e.resolve_options(()), id=e.name))
        for setting in EXTRA_OPTIONS.get(e.name, []):
            opts = _resolve(e, setting)
            out.append(pytest.param(e, opts, id=e.name + "-" + ",".join(f"{k}={v:g}" for k, v in opts.items())))
    return out


CASES = _cases()


def _ids(pred) -> list[Any]:
    return [c for c in CASES if pred(c.values[0], c.values[1])]


def _shape(entry: Entry) -> str:
    """scalar: one real argument; multi: several real arguments (max, min, hypot); vector: a norm."""
    if entry.kind == "norm":
        return "vector"
    return "scalar" if entry.arity == 1 else "multi"


def _nargs(entry: Entry, k: int = 0) -> int:
    # a variadic entry (arity 0) is tried with two and with three arguments
    return entry.arity if entry.arity >= 2 else 2 + (k % 2)


def _interval(entry: Entry, opts: dict[str, float]) -> tuple[float, float]:
    """Where the suite samples: the entry's test points inside its domain."""
    lo, hi = entry.test_points
    dlo, dhi = entry.domain
    if entry.name == "power":
        # the Entry's fixed `domain` cannot follow p; the formula says x >= 0 unless p is an even
        # integer (and x > 0 for p <= 0, where x^p blows up at 0)
        p = opts["p"]
        if not (float(p).is_integer() and int(p) % 2 == 0 and p > 0):
            dlo = 0.0
    # stay a little inside a finite domain end, where derivatives may blow up
    lo, hi = max(lo, dlo + 0.05), min(hi, dhi - 0.05)
    assert lo < hi, f"{entry.name}: test points {entry.test_points} leave nothing inside domain {entry.domain}"
    return lo, hi


def _grid(lo: float, hi: float, step: float = 1 / 40) -> np.ndarray:
    # multiples of 1/40 hit the kinks of every entry (0, +-1, -1, 1 - c, +-d, +-e, ...)
    k0, k1 = math.ceil(lo / step - 1e-9), math.floor(hi / step + 1e-9)
    return np.arange(k0, k1 + 1) * step


def _f(entry: Entry, opts: dict, p: Any) -> float:
    if _shape(entry) == "multi":
        return float(entry.value(*[float(a) for a in p], **opts))
    if entry.kind == "norm":
        return float(entry.value(np.asarray(p, dtype=float), **opts))
    return float(entry.value(float(p), **opts))


def _grad(entry: Entry, opts: dict, p: Any) -> np.ndarray:
    if _shape(entry) == "multi":
        d = entry.derivative(*[float(a) for a in p], **opts)
        assert isinstance(d, tuple) and len(d) == len(p), f"{entry.name}: derivative must give one partial per argument"
        return np.array([float(di) for di in d])
    if entry.kind == "norm":
        return np.asarray(entry.derivative(np.asarray(p, dtype=float), **opts), dtype=float)
    return np.array([float(entry.derivative(float(p), **opts))])


def _vec(p: Any) -> np.ndarray:
    return np.atleast_1d(np.asarray(p, dtype=float))


def _points(entry: Entry, opts: dict, lo: float, hi: float, n: int, rng: np.random.Generator) -> list[Any]:
    shape = _shape(entry)
    if shape == "scalar":
        return list(rng.uniform(lo, hi, n))
    if shape == "multi":
        return [tuple(rng.uniform(lo, hi, _nargs(entry, i))) for i in range(n)]
    return [rng.uniform(lo, hi, 1 + (i % 4)) for i in range(n)]


def _pair_strategy(entry: Entry, opts: dict) -> st.SearchStrategy:
    """Two points of the same shape inside the sampling interval."""
    lo, hi = _interval(entry, opts)
    num = st.floats(lo, hi, allow_nan=False, allow_infinity=False)
    shape = _shape(entry)
    if shape == "scalar":
        return st.tuples(num, num)
    if shape == "multi":
        size = st.integers(2, 3) if entry.arity == 0 else st.just(entry.arity)
    else:
        size = st.integers(1, 4)
    return size.flatmap(lambda k: st.tuples(st.tuples(*[num] * k), st.tuples(*[num] * k)))


def _line(entry: Entry, opts: dict):
    """The entry as a function of one real t (for kink scans): f(t), or f along the line t u."""
    if _shape(entry) == "scalar":
        return lambda t: _f(entry, opts, t)
    u = np.array([1.0, -0.5, 0.25])[: _nargs(entry) if _shape(entry) == "multi" else 3]
    return lambda t: _f(entry, opts, tuple(t * u) if _shape(entry) == "multi" else t * u)


SMALL = settings(max_examples=40, deadline=None, derandomize=True)


# ---------------------------------------------------------------- 0. the cases themselves

def test_every_entry_with_settings_is_tested_beyond_its_default() -> None:
    missing = [e.name for e in catalog.ENTRIES if e.options and not EXTRA_OPTIONS.get(e.name)]
    assert not missing, f"add non-default settings to EXTRA_OPTIONS for {missing}"
    unknown = set(EXTRA_OPTIONS) - set(catalog.CATALOG)
    assert not unknown, f"EXTRA_OPTIONS names entries the catalog lacks: {unknown}"


# ---------------------------------------------------------------- 1. value against cvxpy

@pytest.mark.parametrize("entry,opts", CASES)
def test_cvxpy_construction_exists_exactly_for_trainable_provable_entries(entry: Entry, opts: dict) -> None:
    lo, hi = _interval(entry, opts)
    args = [cp.Variable(3) for _ in range(1 if entry.arity == 1 else _nargs(entry))]
    for a in args:
        a.value = np.linspace(lo, hi, 3)
    expr = entry.cvxpy(cp, *args, **opts)
    lacks = not entry.trainable or entry.curvature(opts) == Curvature.UNKNOWN
    assert (expr is None) == lacks, f"{entry.name}: cvxpy construction present={expr is not None}, expected {not lacks}"


@pytest.mark.parametrize("entry,opts", _ids(lambda e, o: e.trainable and e.curvature(o) != Curvature.UNKNOWN))
def test_value_matches_cvxpy(entry: Entry, opts: dict) -> None:
    # cvxpy's atoms are the external reference (cvxpy 1.x atom library)
    lo, hi = _interval(entry, opts)
    rng = np.random.default_rng(1)
    shape = _shape(entry)
    if shape == "scalar":
        xs = np.concatenate([_grid(lo, hi, 0.1), rng.uniform(lo, hi, 50)])
        x = cp.Variable(xs.size)
        x.value = xs
        got = np.asarray(entry.cvxpy(cp, x, **opts).value, dtype=float)
        np.testing.assert_allclose(entry.value(xs, **opts), got, rtol=1e-9, atol=1e-10)
        return
    for p in _points(entry, opts, lo, hi, 30, rng):
        if shape == "multi":
            vs = [cp.Variable() for _ in p]
            for v, a in zip(vs, p):
                v.value = np.asarray(a)
            expr = entry.cvxpy(cp, *vs, **opts)
        else:
            v = cp.Variable(len(p))
            v.value = np.asarray(p)
            expr = entry.cvxpy(cp, v, **opts)
        assert abs(float(expr.value) - _f(entry, opts, p)) <= 1e-9 * (1 + abs(float(expr.value)))
    if shape == "multi":
        # elementwise on equal-length vectors, as the backends use it
        cols = [rng.uniform(lo, hi, 7) for _ in range(_nargs(entry))]
        vs = [cp.Variable(7) for _ in cols]
        for v, c in zip(vs, cols):
            v.value = c
        np.testing.assert_allclose(np.asarray(entry.cvxpy(cp, *vs, **opts).value, dtype=float).ravel(),
                                   np.asarray(entry.value(*cols, **opts), dtype=float), rtol=1e-9, atol=1e-10)


@pytest.mark.parametrize("entry,opts", _ids(lambda e, o: e.trainable and e.curvature(o) != Curvature.UNKNOWN))
def test_cvxpy_agrees_with_declared_curvature_and_sign(entry: Entry, opts: dict) -> None:
    args = [cp.Variable(3) for _ in range(1 if entry.arity == 1 else _nargs(entry))]
    expr = entry.cvxpy(cp, *args, **opts)
    curv = entry.curvature(opts)
    if curv.is_affine:
        assert expr.is_affine()
    elif curv == Curvature.CONVEX:
        assert expr.is_convex(), f"{entry.name}: cvxpy cannot prove the declared convexity"
    elif curv == Curvature.CONCAVE:
        assert expr.is_concave(), f"{entry.name}: cvxpy cannot prove the declared concavity"
    if entry.sign(tuple(Sign.UNKNOWN for _ in args), opts) == Sign.NONNEG:
        assert expr.is_nonneg(), f"{entry.name}: declared nonnegative, cvxpy disagrees"


# ---------------------------------------------------------------- 2. midpoint convexity

@pytest.mark.parametrize("entry,opts", _ids(lambda e, o: e.curvature(o) != Curvature.UNKNOWN))
@SMALL
@given(data=st.data())
def test_midpoint_convexity_or_concavity(entry: Entry, opts: dict, data: st.DataObject) -> None:
    x, y = data.draw(_pair_strategy(entry, opts))
    mid = tuple((np.asarray(x) + np.asarray(y)) / 2) if _shape(entry) != "scalar" else (x + y) / 2
    fx, fy, fm = _f(entry, opts, x), _f(entry, opts, y), _f(entry, opts, mid)
    tol = 1e-9 * (1 + abs(fx) + abs(fy))
    curv = entry.curvature(opts)
    if curv.is_convex:
        assert fm <= (fx + fy) / 2 + tol, f"{entry.name} not convex between {x} and {y}"
    if curv.is_concave:
        assert fm >= (fx + fy) / 2 - tol, f"{entry.name} not concave between {x} and {y}"


@pytest.mark.parametrize("entry,opts", _ids(lambda e, o: e.curvature(o) == Curvature.UNKNOWN))
def test_unproved_entries_really_are_neither_convex_nor_concave(entry: Entry, opts: dict) -> None:
    # "not provable" must not hide a convex function: find a witness each way on the test grid
    f = _line(entry, opts)
    ts = _grid(*_interval(entry, opts), step=0.25)
    vals = {t: f(t) for t in ts}
    gaps = [f((a + b) / 2) - (vals[a] + vals[b]) / 2 for a in ts for b in ts]
    assert max(gaps) > 1e-6, f"{entry.name} looks convex"
    assert min(gaps) < -1e-6, f"{entry.name} looks concave"


# ---------------------------------------------------------------- 3. subgradient inequality

@pytest.mark.parametrize("entry,opts", _ids(lambda e, o: e.curvature(o) != Curvature.UNKNOWN))
@SMALL
@given(data=st.data())
def test_subgradient_inequality(entry: Entry, opts: dict, data: st.DataObject) -> None:
    x, y = data.draw(_pair_strategy(entry, opts))
    g = _grad(entry, opts, x)
    assert g.shape == _vec(x).shape and np.all(np.isfinite(g))
    fx, fy = _f(entry, opts, x), _f(entry, opts, y)
    lin = fx + float(g @ (_vec(y) - _vec(x)))
    tol = 1e-9 * (1 + abs(fx) + abs(fy) + abs(lin))
    curv = entry.curvature(opts)
    if curv.is_convex:
        assert fy >= lin - tol, f"{entry.name}: derivative at {x} is no subgradient (f({y})={fy} < {lin})"
    if curv.is_concave:
        assert fy <= lin + tol, f"{entry.name}: derivative at {x} is no supergradient"


# ---------------------------------------------------------------- 4. derivative against finite differences

def _one_sided(f, t: float, h: float) -> tuple[float, float]:
    f0 = f(t)
    return (f(t + h) - f0) / h, (f0 - f(t - h)) / h


@pytest.mark.parametrize("entry,opts", CASES)
def test_derivative_matches_central_differences(entry: Entry, opts: dict) -> None:
    """Everywhere where declared smooth; elsewhere at points where the one-sided slopes agree."""
    lo, hi = _interval(entry, opts)
    rng = np.random.default_rng(2)
    h = 1e-6
    smooth = entry.smooth(opts)
    checked = 0
    for p in _points(entry, opts, lo + 2 * h, hi - 2 * h, 60, rng):
        g = _grad(entry, opts, p)
        x = _vec(p)
        for j in range(x.size):
            def fj(t: float, j: int = j) -> float:
                z = x.copy()
                z[j] = t
                return _f(entry, opts, z if _shape(entry) != "scalar" else z[0])
            right, left = _one_sided(fj, x[j], h)
            if not smooth and abs(right - left) > 1e-4:
                continue  # at (within h of) a kink
            fd = (right + left) / 2
            assert abs(g[j] - fd) <= 1e-5 * (1 + abs(fd)), f"{entry.name}: d/dx{j} at {p} is {g[j]}, differences give {fd}"
            checked += 1
    assert checked >= 30


@pytest.mark.parametrize("entry,opts", CASES)
def test_declared_smoothness_matches_a_kink_scan(entry: Entry, opts: dict) -> None:
    # smooth = differentiable on the whole domain: one-sided slopes agree at every grid point; an
    # entry declared nonsmooth must show a kink somewhere (otherwise solvers are sent the slow way)
    f = _line(entry, opts)
    h = 1e-6
    worst = 0.0
    for t in _grid(*_interval(entry, opts)):
        right, left = _one_sided(f, float(t), h)
        worst = max(worst, abs(right - left) / (1 + abs(right) + abs(left)))
    if entry.smooth(opts):
        assert worst < 1e-3, f"{entry.name} declared smooth but has a kink (jump {worst})"
    else:
        assert worst > 1e-2, f"{entry.name} declared nonsmooth but no kink found"


# ---------------------------------------------------------------- 5. sign and monotonicity

_SIGN_RANGES = {Sign.NONNEG: (0.0, np.inf), Sign.NONPOS: (-np.inf, 0.0), Sign.UNKNOWN: (-np.inf, np.inf),
                Sign.ZERO: (0.0, 0.0)}


def _region(entry: Entry, opts: dict, s: Sign) -> tuple[float, float] | None:
    lo, hi = _interval(entry, opts)
    a, b = _SIGN_RANGES[s]
    lo, hi = max(lo, a), min(hi, b)
    return (lo, hi) if lo <= hi else None


@pytest.mark.parametrize("entry,opts", CASES)
def test_declared_sign_holds_on_samples(entry: Entry, opts: dict) -> None:
    rng = np.random.default_rng(3)
    nargs = 1 if entry.arity == 1 else _nargs(entry)
    checked = 0
    for combo in np.ndindex(*([4] * nargs)):
        signs = tuple(list(_SIGN_RANGES)[k] for k in combo)
        regions = [_region(entry, opts, s) for s in signs]
        if any(r is None for r in regions):
            continue
        declared = entry.sign(signs, opts)
        for _ in range(40):
            if _shape(entry) == "multi":
                p = tuple(rng.uniform(*r) for r in regions)
            elif _shape(entry) == "vector":
                p = rng.uniform(*regions[0], 3)
            else:
                p = rng.uniform(*regions[0])
            v = _f(entry, opts, p)
            ok = {Sign.NONNEG: v >= 0, Sign.NONPOS: v <= 0, Sign.ZERO: v == 0, Sign.UNKNOWN: True}[declared]
            assert ok, f"{entry.name}{signs}: declared {declared.value}, value {v} at {p}"
            checked += 1
    assert checked > 0


@pytest.mark.parametrize("entry,opts", CASES)
def test_declared_monotonicity_holds_on_samples(entry: Entry, opts: dict) -> None:
    rng = np.random.default_rng(4)
    nargs = 1 if entry.arity == 1 else _nargs(entry)
    checked = 0
    for i in range(nargs):
        for s in (Sign.NONNEG, Sign.NONPOS, Sign.UNKNOWN):
            mono = entry.monotonicity(i, s, opts)
            region = _region(entry, opts, s)
            if mono == Monotonicity.NONE or region is None or region[0] == region[1]:
                continue
            ts = np.sort(np.concatenate([_grid(*region, step=0.1), rng.uniform(*region, 30)]))
            lo, hi = _interval(entry, opts)
            for _ in range(4):
                if _shape(entry) == "multi":
                    other = rng.uniform(lo, hi)
                    vals = [_f(entry, opts, (t, other) if i == 0 else (other, t)) for t in ts]
                elif _shape(entry) == "vector":
                    base, j = rng.uniform(*region, 3), int(rng.integers(3))
                    vals = [_f(entry, opts, np.where(np.arange(3) == j, t, base)) for t in ts]
                else:
                    vals = [_f(entry, opts, t) for t in ts]
                steps = np.diff(vals)
                tol = 1e-12 * (1 + np.max(np.abs(vals)))
                if mono == Monotonicity.INCREASING:
                    assert np.all(steps >= -tol), f"{entry.name} not nondecreasing in argument {i} for {s.value}"
                else:
                    assert np.all(steps <= tol), f"{entry.name} not nonincreasing in argument {i} for {s.value}"
                checked += 1
    assert checked > 0, f"{entry.name}: no monotonicity claim to check"


# ---------------------------------------------------------------- 6. prox and conjugate

_GS = (0.05, 0.4, 1.0, 3.0)


@pytest.mark.parametrize("entry,opts", _ids(lambda e, o: e.prox is not None and _shape(e) == "scalar"))
def test_scalar_prox_minimizes(entry: Entry, opts: dict) -> None:
    lo, hi = _interval(entry, opts)
    vs = np.concatenate([_grid(lo - 2, hi + 2, 0.25) + 0.0123, [-1.0, 0.0, 1.0]])
    for g in _GS:
        xs = np.asarray(entry.prox(vs, g, **opts), dtype=float)
        assert xs.shape == vs.shape
        for v, x in zip(vs, xs):
            obj = lambda z, v=v: g * _f(entry, opts, z) + 0.5 * (z - v) ** 2  # noqa: E731
            best = min((minimize_scalar(obj, bracket=(v - 1, v), method="brent", tol=1e-12),
                        minimize_scalar(obj, bracket=(x - 1e-3, x + 1e-3), method="brent", tol=1e-12)),
                       key=lambda r: r.fun)
            # the objective is 1-strongly convex, so a small objective gap pins x down
            assert obj(x) <= best.fun + 1e-10 * (1 + abs(best.fun)), f"{entry.name}: prox({v}, {g}) = {x}, better {best.x}"
            assert abs(x - best.x) <= 1e-5 * (1 + abs(x))


@pytest.mark.parametrize("entry,opts", _ids(lambda e, o: e.prox is not None and _shape(e) == "vector"))
def test_vector_prox_minimizes(entry: Entry, opts: dict) -> None:
    rng = np.random.default_rng(5)
    for k in range(12):
        v = rng.uniform(-3, 3, 3) * (0.2 if k % 3 == 0 else 1.0)
        g = _GS[k % len(_GS)]
        x = np.asarray(entry.prox(v, g, **opts), dtype=float)
        obj = lambda z: g * _f(entry, opts, z) + 0.5 * float(np.sum((z - v) ** 2))  # noqa: E731
        runs = [minimize(obj, start, method="Nelder-Mead",
                         options={"xatol": 1e-10, "fatol": 1e-14, "maxiter": 20000, "maxfev": 40000})
                for start in (v, np.zeros(3), x + 1e-3)]
        best = min(runs, key=lambda r: r.fun)
        assert obj(x) <= best.fun + 1e-9, f"{entry.name}: prox({v}, {g}) = {x} beaten by {best.x}"
        assert np.allclose(x, best.x, atol=1e-4)


_BIG = 1e6


def _ray_gain(entry: Entry, opts: dict, u: np.ndarray | float) -> float:
    """max of u.x - f(x) over a few far points: huge exactly when the conjugate is +inf."""
    if _shape(entry) == "scalar":
        dirs = [np.array([1.0]), np.array([-1.0])]
    else:
        uu = np.asarray(u, dtype=float)
        j = int(np.argmax(np.abs(uu)))
        dirs = [uu, np.sign(uu), np.eye(uu.size)[j] * np.sign(uu[j])]
        dirs = [d / max(np.linalg.norm(d), 1e-300) for d in dirs]
    best = -np.inf
    for d in dirs:
        for r in (_BIG, -_BIG):
            z = r * d
            fz = _f(entry, opts, z if _shape(entry) != "scalar" else z[0])
            best = max(best, float(np.sum(_vec(u) * z)) - fz)
    return best


@pytest.mark.parametrize("entry,opts", _ids(lambda e, o: e.conjugate is not None and _shape(e) == "scalar"))
def test_scalar_conjugate_is_a_supremum(entry: Entry, opts: dict) -> None:
    # the grid avoids the boundaries of every conjugate's domain by at least 0.0137
    us = _grid(-6, 6, 0.1) - 0.0137
    cs = np.asarray(entry.conjugate(us, **opts), dtype=float)
    inside = 0
    for u, c in zip(us, cs):
        assert not np.isnan(c) and c > -np.inf
        gain = _ray_gain(entry, opts, u)
        if np.isinf(c):
            assert gain > 1e3, f"{entry.name}: conjugate({u}) = inf but u*x - l(x) stays bounded"
            continue
        inside += 1
        res = minimize_scalar(lambda x, u=u: _f(entry, opts, x) - u * x, bounds=(-60, 60), method="bounded",
                              options={"xatol": 1e-11})
        sup = -res.fun
        assert abs(c - sup) <= 1e-6 * (1 + abs(c)), f"{entry.name}: conjugate({u}) = {c}, maximization gives {sup}"
        assert gain <= c + 1e-6 * (1 + abs(c))
    assert inside >= 5


@pytest.mark.parametrize("entry,opts", _ids(lambda e, o: e.conjugate is not None and _shape(e) == "vector"))
def test_vector_conjugate_is_a_supremum(entry: Entry, opts: dict) -> None:
    rng = np.random.default_rng(6)
    inside = 0
    for k in range(16):
        u = rng.uniform(-1.5, 1.5, 3) * (0.3 if k % 2 == 0 else 1.0)
        c = float(entry.conjugate(u, **opts))
        gain = _ray_gain(entry, opts, u)
        if np.isinf(c):
            assert c > 0 and gain > 1e3, f"{entry.name}: conjugate({u}) = inf but u.x - f(x) stays bounded"
            continue
        inside += 1
        obj = lambda z: _f(entry, opts, z) - float(u @ z)  # noqa: E731
        runs = [minimize(obj, s, method="Nelder-Mead", options={"xatol": 1e-10, "fatol": 1e-14, "maxiter": 20000})
                for s in (np.zeros(3), u, -u)]
        sup = -min(r.fun for r in runs)
        assert abs(c - sup) <= 1e-6 * (1 + abs(c)), f"{entry.name}: conjugate({u}) = {c}, maximization gives {sup}"
        assert gain <= c + 1e-6
    assert inside >= 3


def test_exponential_prox_matches_scipy_lambertw() -> None:
    # REFERENCE.md: prox of g*e^-m at v is v + W(g e^-v); scipy.special.lambertw is the reference W
    e = catalog.CATALOG["exponential"]
    for v in np.linspace(-20, 20, 41):
        for g in _GS:
            want = v + float(lambertw(g * np.exp(-v)).real)
            assert abs(float(e.prox(v, g)) - want) <= 1e-10 * (1 + abs(want))


# ---------------------------------------------------------------- 7. fields

@pytest.mark.parametrize("entry", catalog.ENTRIES, ids=lambda e: e.name)
def test_every_field_is_filled(entry: Entry) -> None:
    assert entry.summary.strip() and entry.formula.strip()
    assert entry.kind in ("atom", "loss", "norm")
    assert len(catalog.CATALOG) == len(catalog.ENTRIES), "two entries share a name"
    if entry.kind == "loss" and entry.role == "multiclass":
        assert entry.arity == 2 and entry.convexity_rule, f"{entry.name}: loss(s, y) with its convexity rule"
    elif entry.kind == "loss":
        assert entry.role in ("margin", "residual"), f"{entry.name}: a loss needs a role"
        assert entry.arity == 1
    else:
        assert entry.role is None and entry.calibrated is None
    if entry.role == "margin":
        if entry.trainable:
            assert entry.calibrated in (True, False), f"{entry.name}: margin surrogate must declare calibrated"
        else:
            assert entry.calibrated is None  # the 0-1 loss is the target calibration aims at, not a surrogate
    if entry.role == "residual":
        assert entry.calibrated is None
    lo, hi = entry.test_points
    assert lo < hi and entry.domain[0] <= lo and hi <= entry.domain[1]
    for o in entry.options:
        assert o.admits(o.default) and o.meaning.strip(), f"{entry.name}.{o.name}"
    if entry.kind in ("loss", "norm") and entry.trainable:
        # a multiclass loss has no prox in closed form; its solver works with the conjugate
        assert (entry.prox is not None or entry.role == "multiclass") and entry.conjugate is not None, \
            f"{entry.name}: trainable loss/norm lacks prox or conjugate"


_KERNEL_FIELDS = ("value", "derivative", "prox", "conjugate")


@pytest.mark.parametrize("entry", catalog.ENTRIES, ids=lambda e: e.name)
def test_kernels_are_self_contained(entry: Entry) -> None:
    # the NumPy backend copies kernels by their source (catalog docstring): they may use only np,
    # their arguments and other _k_* kernels
    todo = [getattr(entry, f) for f in _KERNEL_FIELDS if getattr(entry, f) is not None]
    for fn in todo:  # grows with the _k_ kernels each kernel calls
        assert fn.__name__.startswith("_k_"), f"{entry.name}: {fn.__name__} is not a named _k_ kernel"
        refs = inspect.getclosurevars(fn)
        assert not refs.nonlocals, f"{fn.__name__} closes over {set(refs.nonlocals)}"
        foreign = {n for n in refs.globals if n != "np" and not n.startswith("_k_")}
        assert not foreign, f"{fn.__name__} uses module names {foreign}"
        todo += [refs.globals[n] for n in refs.globals if n.startswith("_k_") and refs.globals[n] not in todo]


def _wide_grid(entry: Entry, opts: dict) -> np.ndarray:
    # Lipschitz constants are global: look past the test points where the domain allows
    lo, hi = _interval(entry, opts)
    wlo = -50.0 if entry.domain[0] == -np.inf and lo == entry.test_points[0] else lo
    whi = 50.0 if entry.domain[1] == np.inf and hi == entry.test_points[1] else hi
    xs = np.sort(np.concatenate([_grid(lo, hi, 0.005), np.linspace(wlo, whi, 2001)]))
    return xs[np.concatenate([[True], np.diff(xs) > 1e-6])]  # near-duplicates would blow up quotients


def _wide_points(entry: Entry, opts: dict, n: int) -> list[Any]:
    rng = np.random.default_rng(7)
    xs = _wide_grid(entry, opts)
    return _points(entry, opts, xs[0], xs[-1], n, rng) + _points(entry, opts, *_interval(entry, opts), n, rng)


@pytest.mark.parametrize("entry,opts", _ids(lambda e, o: e.lipschitz(o) is not None))
def test_lipschitz_constant_bounds_the_derivative(entry: Entry, opts: dict) -> None:
    big_l = entry.lipschitz(opts)
    if _shape(entry) == "scalar":
        xs = _wide_grid(entry, opts)
        d = np.abs(np.asarray(entry.derivative(xs, **opts), dtype=float))
    else:  # Euclidean length of the gradient
        d = np.array([np.linalg.norm(_grad(entry, opts, p)) for p in _wide_points(entry, opts, 200)])
    assert d.max() <= big_l * (1 + 1e-12), f"{entry.name}: |derivative| reaches {d.max()} > {big_l}"
    # and the constant is not needlessly loose (solvers take steps of 1/L)
    assert d.max() >= 0.99 * big_l, f"{entry.name}: declared Lipschitz {big_l}, samples reach only {d.max()}"


@pytest.mark.parametrize("entry,opts", _ids(lambda e, o: e.grad_lipschitz(o) is not None))
def test_grad_lipschitz_constant_bounds_difference_quotients(entry: Entry, opts: dict) -> None:
    big_l = entry.grad_lipschitz(opts)
    assert entry.smooth(opts), f"{entry.name}: a gradient Lipschitz constant needs a gradient"
    if _shape(entry) == "scalar":
        xs = _wide_grid(entry, opts)
        d = np.asarray(entry.derivative(xs, **opts), dtype=float)
        q = np.abs(np.diff(d)) / np.diff(xs)
        assert q.max() >= 0.98 * big_l, f"{entry.name}: declared {big_l}, samples reach only {q.max()}"
    else:
        pts = _wide_points(entry, opts, 200)
        q = np.array([np.linalg.norm(_grad(entry, opts, a) - _grad(entry, opts, b)) / np.linalg.norm(_vec(a) - _vec(b))
                      for a, b in zip(pts[:-1], pts[1:]) if _vec(a).shape == _vec(b).shape and np.any(a != b)])
    assert q.max() <= big_l * (1 + 1e-6), f"{entry.name}: derivative quotient reaches {q.max()} > {big_l}"


# ---------------------------------------------------------------- 8. textbook values

def _v(name: str, x: Any, **opts: float) -> np.ndarray:
    return np.asarray(catalog.CATALOG[name].value(x, **opts), dtype=float)


def test_textbook_values() -> None:
    # REFERENCE.md loss table (l(0), l(1) column); hinge/logistic/exponential/0-1 are the standard
    # margin losses (common practice; Friedman, Hastie & Tibshirani, Annals of Statistics 2000)
    assert _v("hinge", 1.0) == 0.0 and _v("hinge", 0.0) == 1.0
    assert math.isclose(float(_v("logistic", 0.0)), math.log(2.0), rel_tol=1e-15)
    assert _v("exponential", 0.0) == 1.0
    assert _v("zero_one", 0.0) == 1.0
    assert abs(float(_v("logistic", 1.0)) - 0.3133) < 5e-5  # REFERENCE.md: logistic l(1) = 0.3133
    assert _v("squared", 1.0) == 0.5  # REFERENCE.md: squared r^2/2, l(1) = 1/2


# REFERENCE.md loss table, column "l(0), l(1)"
_L0_L1 = [
    ("hinge", {}, 1.0, 0.0),
    ("squared_hinge", {}, 1.0, 0.0),
    ("smooth_hinge", {"c": 1.0}, 0.5, 0.0),
    ("smooth_hinge", {"c": 0.5}, 0.75, 0.0),
    ("perceptron", {}, 0.0, 0.0),
    ("logistic", {}, math.log(2.0), None),
    ("exponential", {}, 1.0, math.exp(-1.0)),
    ("modified_huber", {}, 1.0, 0.0),
    ("zero_one", {}, 1.0, 0.0),
    ("squared", {}, 0.0, 0.5),
    ("absolute", {}, 0.0, 1.0),
    ("huber", {"d": 1.35}, 0.0, 0.5),
    ("pinball", {"t": 0.9}, 0.0, 0.9),
    ("pinball", {"t": 0.2}, 0.0, 0.2),
    ("epsilon_insensitive", {"e": 0.1}, 0.0, 0.9),
    ("epsilon_insensitive", {"e": 1.5}, 0.0, 0.0),
]


@pytest.mark.parametrize("name,opts,at0,at1", _L0_L1, ids=[f"{r[0]}{r[1]}" for r in _L0_L1])
def test_reference_table_values_at_0_and_1(name: str, opts: dict, at0: float, at1: float | None) -> None:
    assert math.isclose(float(_v(name, 0.0, **opts)), at0, rel_tol=1e-12, abs_tol=1e-15)
    if at1 is not None:
        assert math.isclose(float(_v(name, 1.0, **opts)), at1, rel_tol=1e-12, abs_tol=1e-15)


def test_perceptron_is_the_hinge_shifted_by_one() -> None:
    # max(0, -m) = max(0, 1 - (m + 1)) (common practice)
    m = np.linspace(-5, 5, 401)
    np.testing.assert_array_equal(_v("perceptron", m), _v("hinge", m + 1.0))


def test_surrogates_bound_the_zero_one_loss() -> None:
    # hinge, exponential and logistic / ln 2 upper-bound the 0-1 loss (common practice; REFERENCE.md
    # lists them as surrogates of the 0-1 loss)
    m = np.linspace(-5, 5, 2001)
    z = _v("zero_one", m)
    assert np.all(_v("hinge", m) >= z)
    assert np.all(_v("exponential", m) >= z)
    assert np.all(_v("logistic", m) / math.log(2.0) >= z - 1e-15)


@pytest.mark.parametrize("entry,opts", _ids(lambda e, o: e.role == "margin" and e.trainable))
def test_calibration_agrees_with_the_derivative_at_zero(entry: Entry, opts: dict) -> None:
    # Bartlett, Jordan & McAuliffe, JASA 2006 (theorem number 6 from memory): a convex margin loss
    # is classification-calibrated iff it is differentiable at 0 with negative derivative
    assert entry.curvature(opts).is_convex
    h = 1e-7
    right, left = _one_sided(lambda t: _f(entry, opts, t), 0.0, h)
    differentiable = abs(right - left) < 1e-5
    if entry.smooth(opts):
        assert differentiable
    d0 = float(entry.derivative(0.0, **opts))
    if differentiable:
        assert abs(d0 - (right + left) / 2) < 1e-5
    assert entry.calibrated == (differentiable and d0 < 0), f"{entry.name}: calibrated={entry.calibrated}"


def test_calibration_of_hinge_and_perceptron_from_their_kernels() -> None:
    hinge, perc = catalog.CATALOG["hinge"], catalog.CATALOG["perceptron"]
    # hinge: derivative -1 on both sides of 0 (its kink is at 1), so calibrated
    assert float(hinge.derivative(-1e-3)) == float(hinge.derivative(1e-3)) == -1.0 and hinge.calibrated is True
    # perceptron: slope -1 left of 0 and 0 right of it, not differentiable at 0, so not calibrated
    assert float(perc.derivative(-1e-3)) == -1.0 and float(perc.derivative(1e-3)) == 0.0
    assert perc.calibrated is False


def test_margin_losses_match_scikit_learn_sgd_losses() -> None:
    # scikit-learn's own SGD loss classes (private module sklearn.linear_model._sgd_fast, scikit-learn
    # 1.9): loss(p, y) of the score p and label y; margin losses see m = p * y, residual ones r = y - p
    sgd = pytest.importorskip("sklearn.linear_model._sgd_fast")
    pairs = [("hinge", sgd.Hinge(1.0), {}), ("squared_hinge", sgd.SquaredHinge(1.0), {}),
             ("modified_huber", sgd.ModifiedHuber(), {})]
    residual = [("epsilon_insensitive", sgd.EpsilonInsensitive(0.3), {"e": 0.3})]
    for p in np.linspace(-4, 4, 81):
        for y in (-1.0, 1.0):
            for name, ref, opts in pairs:
                assert math.isclose(float(_v(name, p * y, **opts)), ref.py_loss(p, y), rel_tol=1e-12, abs_tol=1e-12)
                right, left = _one_sided(lambda t: float(_v(name, t, **opts)), p * y, 1e-7)
                if abs(right - left) > 1e-5:
                    continue  # at a kink both sides pick some subgradient, not necessarily the same
                # sklearn's dloss is d/dp, i.e. y * l'(m)
                d = float(catalog.CATALOG[name].derivative(p * y, **opts)) * y
                assert math.isclose(d, ref.py_dloss(p, y), rel_tol=1e-12, abs_tol=1e-12), (name, p, y)
            for name, ref, opts in residual:
                assert math.isclose(float(_v(name, y - p, **opts)), ref.py_loss(p, y), rel_tol=1e-12, abs_tol=1e-12)


# ---------------------------------------------------------------- 9. stability

def test_logistic_is_stable_at_extreme_margins() -> None:
    # exp overflows in float64 past about 709 (REFERENCE.md); underflow to 0 of e^-1000 is the exact
    # float answer, so only overflow, division and invalid operations are errors here
    e = catalog.CATALOG["logistic"]
    m = np.array([-1e3, -710.0, -1.0, 0.0, 1.0, 710.0, 1e3])
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        with np.errstate(over="raise", divide="raise", invalid="raise"):
            val = np.asarray(e.value(m), dtype=float)
            der = np.asarray(e.derivative(m), dtype=float)
            prox = np.asarray(e.prox(m, 1.0), dtype=float)
    assert np.all(np.isfinite(val)) and np.all(np.isfinite(der)) and np.all(np.isfinite(prox))
    assert math.isclose(val[0], 1e3, rel_tol=1e-12) and val[-1] >= 0.0
    assert der[0] == -1.0 and -1e-300 <= der[-1] <= 0.0


@pytest.mark.parametrize("entry", [e for e in catalog.ENTRIES if e.value_and_derivative is not None
                                   and not _class_shaped(e)],
                         ids=lambda e: e.name)
def test_fused_value_and_derivative_equal_the_separate_kernels(entry):
    # the fused kernel is an optimization only: it must agree with value and derivative everywhere,
    # including far out where exp over- or underflows
    m = np.concatenate([np.linspace(-40, 40, 2001), [-1e3, -710.0, 0.0, 710.0, 1e3]])
    with np.errstate(over="raise", invalid="raise", divide="raise"):
        v, d = entry.value_and_derivative(m)
    np.testing.assert_allclose(v, entry.value(m), rtol=1e-14, atol=1e-300)
    np.testing.assert_allclose(d, entry.derivative(m), rtol=1e-13, atol=1e-300)


# ---------------------------------------------------------------- 10. cosh, the step and the l0 count

def test_cosh_textbook_values() -> None:
    # cosh x = (e^x + e^-x) / 2 (Abramowitz & Stegun 1964, formula 4.5.2); its values are compared with
    # the C library's cosh (math.cosh), an implementation outside objc
    xs = np.linspace(-30.0, 30.0, 601)
    np.testing.assert_allclose(_v("cosh", xs), [math.cosh(x) for x in xs], rtol=1e-14)
    assert _v("cosh", 0.0) == 1.0
    # cosh 1 = 1.5430806348152437... (A&S table 4.16 gives 1.54308 06348; recalled from memory)
    assert abs(float(_v("cosh", 1.0)) - 1.5430806348) < 1e-10
    # d/dx cosh = sinh (A&S 4.5.80); compared with math.sinh
    np.testing.assert_allclose(catalog.CATALOG["cosh"].derivative(xs), [math.sinh(x) for x in xs], rtol=1e-14)


def test_cosh_is_strongly_convex_with_modulus_one() -> None:
    # (cosh)'' = cosh >= 1 (A&S 4.5.80 twice): second differences of the kernel stay >= 1 everywhere
    e = catalog.CATALOG["cosh"]
    xs, h = np.linspace(-8.0, 8.0, 1601), 1e-4
    second = (e.value(xs + h) - 2.0 * e.value(xs) + e.value(xs - h)) / (h * h)
    assert np.all(second >= 1.0 - 1e-5) and abs(second[800] - 1.0) < 1e-5
    # and cvxpy's DCP analysis proves the catalog's construction convex (Diamond & Boyd 2016)
    x = cp.Variable(3)
    assert e.cvxpy(cp, x).is_convex() and e.cvxpy(cp, x).is_dcp()


def test_the_step_reports_a_share_of_rows() -> None:
    # below(u, a) is the indicator of u < a (the Heaviside step H(a - u), common practice): the mean of
    # below(m, 0) over margins is the share of rows with a negative margin, counted here directly
    rng = np.random.default_rng(11)
    m = rng.normal(size=1000)
    m[:7] = 0.0  # a margin of exactly 0 is not below 0
    assert float(np.mean(_v("below", m, a=0.0))) == np.count_nonzero(m < 0) / m.size
    assert _v("below", 0.0, a=0.0) == 0.0 and _v("below", -1e-300, a=0.0) == 1.0
    assert not catalog.CATALOG["below"].trainable and catalog.CATALOG["below"].refusal


def test_l0_counts_nonzero_weights() -> None:
    # the "l0 norm" ||w||_0 = #{j : w_j != 0} (common practice; e.g. Hastie, Tibshirani & Wainwright,
    # Statistical Learning with Sparsity, 2015, section 2.1), with entries at most z in size counted as 0
    w = np.array([0.0, 1e-9, -2.0, 0.3, 0.0])
    assert float(catalog.CATALOG["l0"].value(w)) == float(np.count_nonzero(w)) == 3.0
    assert float(catalog.CATALOG["l0"].value(w, z=1e-6)) == 2.0
    assert float(catalog.CATALOG["l0"].value(w, z=0.5)) == 1.0
    assert not catalog.CATALOG["l0"].trainable and catalog.CATALOG["l0"].refusal


# ---------------------------------------------------------------- curvature floors

def _second_difference(entry: Entry, opts: dict, x: float, h: float) -> float:
    return (_f(entry, opts, x + h) - 2.0 * _f(entry, opts, x) + _f(entry, opts, x - h)) / (h * h)


@pytest.mark.parametrize("entry,opts", _ids(lambda e, o: e.curv_floor is not None))
def test_curvature_floor_lies_below_every_second_difference_on_its_interval(entry: Entry, opts: dict) -> None:
    """The floor of l'' over [lo, hi] is a fact the NumPy backend's certified distance rests on: every
    central second difference sampled inside the interval (a convex function's second difference is
    an average of l'' over [x - h, x + h]) must be at least the floor."""
    a, b = _interval(entry, opts)
    rng = np.random.default_rng(11)
    h = 1e-4
    for _ in range(300):
        lo, hi = np.sort(rng.uniform(a, b, 2))
        if rng.random() < 0.3:  # narrow intervals too, where a floor is largest
            hi = min(b, lo + rng.uniform(0.0, 0.2))
        floor = float(entry.curv_floor(np.asarray(lo), np.asarray(hi), **opts))
        assert floor >= 0.0
        if hi - lo <= 2 * h:
            continue
        for x in rng.uniform(lo + h, hi - h, 8):
            sd = _second_difference(entry, opts, float(x), h)
            assert sd >= floor - 1e-5 * (1 + abs(sd)), f"{entry.name}{opts}: l'' ~ {sd} at {x} < floor {floor} on [{lo}, {hi}]"


@pytest.mark.parametrize("entry,opts", _ids(lambda e, o: e.curv_floor is not None))
def test_curvature_floor_of_a_point_is_the_second_derivative_there(entry: Entry, opts: dict) -> None:
    """Not a floor that is merely safe: on a one-point interval, where l'' exists, it equals l''(x) by finite
    differences (the second differences just left and just right of x agreeing tells a point where l''
    exists from a kink or a jump of l'')."""
    a, b = _interval(entry, opts)
    checked = 0
    h = 5e-4
    for x in np.linspace(a + 0.01, b - 0.01, 97):
        fine = _second_difference(entry, opts, x, h)
        left, right = _second_difference(entry, opts, x - h, h), _second_difference(entry, opts, x + h, h)
        if abs(left - right) > 1e-2 * (1 + abs(fine)) or abs(fine - right) > 1e-2 * (1 + abs(fine)):
            continue  # within two steps of a kink or of a jump of l''
        floor = float(entry.curv_floor(np.asarray(x), np.asarray(x), **opts))
        assert floor == pytest.approx(fine, rel=1e-4, abs=1e-4), f"{entry.name}{opts} at {x}"
        checked += 1
    assert checked >= 60


def test_curvature_floors_textbook_values() -> None:
    # the logistic sigmoid's derivative is sigma (1 - sigma) (Bishop 2006, Pattern Recognition and
    # Machine Learning, eq. 4.88), so logistic'' (0) = 1/4; r^2/2 has second derivative 1; e^-m at m = 0 is 1
    assert float(catalog.CATALOG["logistic"].curv_floor(np.asarray(0.0), np.asarray(0.0))) == pytest.approx(0.25)
    assert float(catalog.CATALOG["squared"].curv_floor(np.asarray(-5.0), np.asarray(5.0))) == 1.0
    assert float(catalog.CATALOG["exponential"].curv_floor(np.asarray(-1.0), np.asarray(0.0))) == pytest.approx(1.0)
    # past the corner of a hinge-like loss there is no curvature left
    assert float(catalog.CATALOG["squared_hinge"].curv_floor(np.asarray(0.0), np.asarray(1.5))) == 0.0
