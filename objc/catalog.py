"""Every atom, named loss and norm objc knows, each declared once.

The checker reads curvature, monotonicity, sign and smoothness from here; the cvxpy backend reads
`cvxpy`; the NumPy backend copies the kernel functions named by `value`, `derivative`, `prox` and
`conjugate` into the module it writes (by their source), so a loss's math lives only here.

Kernel functions follow one rule: they use nothing but `np` and their own arguments (and other
kernels named `_k_*`), so they can be copied into a standalone module unchanged.

Conventions (stated once, used by the docs): `squared(r) = r^2 / 2`; `huber(r, d)` is r^2/2 inside
|r| <= d and d(|r| - d/2) outside (the half-scaled form; some libraries use twice this);
`l2sq(w) = ||w||^2` (no half: write `0.5 * l2sq(w)` for the usual ridge term).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any, Callable, Literal

import numpy as np

from objc.curvature import Curvature, Monotonicity, Sign

INC, DEC, NONMONO = Monotonicity.INCREASING, Monotonicity.DECREASING, Monotonicity.NONE
CONVEX, CONCAVE, AFFINE, UNKNOWN = Curvature.CONVEX, Curvature.CONCAVE, Curvature.AFFINE, Curvature.UNKNOWN


# ---------------------------------------------------------------- kernels (copied into modules)

def _k_hinge(m):
    return np.maximum(0.0, 1.0 - m)


def _k_hinge_d(m):
    return np.where(m < 1.0, -1.0, 0.0)


def _k_hinge_prox(v, g):
    return np.where(v < 1.0 - g, v + g, np.where(v <= 1.0, 1.0, v))


def _k_hinge_conj(u):
    return np.where((u >= -1.0) & (u <= 0.0), u, np.inf)


def _k_flat_curv_floor(lo, hi, **_settings):
    # a piecewise-linear loss: its second derivative is 0 wherever it exists, so no interval has curvature
    return np.zeros(np.broadcast(np.asarray(lo), np.asarray(hi)).shape)


def _k_squared_hinge(m):
    return np.maximum(0.0, 1.0 - m) ** 2


def _k_squared_hinge_d(m):
    return -2.0 * np.maximum(0.0, 1.0 - m)


def _k_squared_hinge_prox(v, g):
    return np.where(v >= 1.0, v, (v + 2.0 * g) / (1.0 + 2.0 * g))


def _k_squared_hinge_conj(u):
    return np.where(u <= 0.0, u + u * u / 4.0, np.inf)


def _k_squared_hinge_curv_floor(lo, hi):
    # l'' = 2 left of the corner m = 1 (l' = -2(1 - m) is continuous there), 0 right of it
    return np.where(np.asarray(hi) <= 1.0, 2.0, 0.0) + 0.0 * np.asarray(lo)


def _k_smooth_hinge(m, c=1.0):
    z = 1.0 - m
    return np.where(m >= 1.0, 0.0, np.where(z < c, z * z / (2.0 * c), z - c / 2.0))


def _k_smooth_hinge_d(m, c=1.0):
    z = 1.0 - m
    return np.where(m >= 1.0, 0.0, np.where(z < c, -z / c, -1.0))


def _k_smooth_hinge_prox(v, g, c=1.0):
    return np.where(v + g <= 1.0 - c, v + g, np.where(v < 1.0, (c * v + g) / (c + g), v))


def _k_smooth_hinge_conj(u, c=1.0):
    return np.where((u >= -1.0) & (u <= 0.0), u + c * u * u / 2.0, np.inf)


def _k_smooth_hinge_curv_floor(lo, hi, c=1.0):
    # l'' = 1/c on the quadratic corner [1 - c, 1] (l' continuous at both ends), 0 elsewhere
    return np.where((np.asarray(lo) >= 1.0 - c) & (np.asarray(hi) <= 1.0), 1.0 / c, 0.0)


def _k_modified_huber(m):
    return np.where(m >= -1.0, np.maximum(0.0, 1.0 - m) ** 2, -4.0 * m)


def _k_modified_huber_d(m):
    return np.where(m >= -1.0, -2.0 * np.maximum(0.0, 1.0 - m), -4.0)


def _k_modified_huber_prox(v, g):
    return np.where(v >= 1.0, v, np.where(v + 4.0 * g < -1.0, v + 4.0 * g, (v + 2.0 * g) / (1.0 + 2.0 * g)))


def _k_modified_huber_conj(u):
    return np.where((u >= -4.0) & (u <= 0.0), u + u * u / 4.0, np.inf)


def _k_modified_huber_curv_floor(lo, hi):
    # l'' = 2 on [-1, 1] (l' continuous at both ends), 0 outside
    return np.where((np.asarray(lo) >= -1.0) & (np.asarray(hi) <= 1.0), 2.0, 0.0)


def _k_perceptron(m):
    return np.maximum(0.0, -m)


def _k_perceptron_d(m):
    return np.where(m < 0.0, -1.0, 0.0)


def _k_perceptron_prox(v, g):
    return np.where(v < -g, v + g, np.where(v <= 0.0, 0.0, v))


def _k_perceptron_conj(u):
    return np.where((u >= -1.0) & (u <= 0.0), 0.0, np.inf)


def _k_logistic(m):
    return np.logaddexp(0.0, -m)


def _k_logistic_d(m):
    # -1/(1+e^m), written through logaddexp so it neither overflows nor loses the tail
    return -np.exp(-np.logaddexp(0.0, m))


def _k_logistic_vd(m):
    # value and derivative from one exp and one log1p (the solver needs both at every step):
    # log(1 + e^-m) = max(-m, 0) + log1p(e^-|m|), and sigma(-m) = (1 if m < 0 else e^-|m|) / (1 + e^-|m|)
    # with no np.where and three row-sized arrays: at 1e6 rows each fresh temporary costs about as much as
    # the exp (first touch of its pages), and np.where cost 4x a multiply (measured)
    m = np.asarray(m, dtype=np.float64)
    e = np.abs(m)
    np.negative(e, out=e)
    np.exp(e, out=e)
    value = np.log1p(e)
    scratch = np.add(e, 1.0)
    np.maximum(e, np.less(m, 0.0), out=e)
    np.divide(e, scratch, out=e)
    np.negative(e, out=e)
    value -= np.minimum(m, 0.0, out=scratch)
    return value, e


def _k_logistic_prox(v, g):
    x = np.array(v, dtype=float, copy=True)
    for _ in range(60):
        p = np.exp(-np.logaddexp(0.0, x))  # sigma(-x)
        step = (x - v - g * p) / (1.0 + g * p * (1.0 - p))
        x = x - step
        if np.all(np.abs(step) <= 1e-14 * (1.0 + np.abs(x))):
            break
    return x


def _k_logistic_conj(u):
    # a log a + (1 - a) log(1 - a) with 0 log 0 = 0, a = -u; +inf off [-1, 0] (and at NaN). The log is
    # taken at max(a, 1e-300), which is a itself save where a log a rounds to 0 anyway: no masked logs,
    # three row-sized arrays (masked logs and their zero-filled copies cost 2x, measured at 1e6 rows)
    u = np.asarray(u, dtype=np.float64)
    a = np.negative(u)
    np.clip(a, 0.0, 1.0, out=a)
    value = np.maximum(a, 1e-300)
    np.log(value, out=value)
    value *= a
    np.subtract(1.0, a, out=a)
    tail = np.maximum(a, 1e-300)
    np.log(tail, out=tail)
    tail *= a
    value += tail
    if u.size and not (float(np.min(u)) >= -1.0 and float(np.max(u)) <= 0.0):  # NaN fails both
        value[~((u >= -1.0) & (u <= 0.0))] = np.inf
    return value


def _k_logistic_curv_floor(lo, hi):
    # l'' = sigma(m) sigma(-m) is even and decreases in |m|: its minimum over [lo, hi] is at the end
    # farther from 0, e^-a / (1 + e^-a)^2 with a = that |m| (no overflow for large a)
    a = np.maximum(np.abs(lo), np.abs(hi))
    e = np.exp(-a)
    return e / (1.0 + e) ** 2


def _k_exponential(m):
    with np.errstate(over="ignore"):
        return np.exp(-m)


def _k_exponential_d(m):
    with np.errstate(over="ignore"):
        return -np.exp(-m)


def _k_lambertw_of_exp(big_l):
    # W(e^L) for real L, by Newton on w + log(w) = L; stays finite where e^L would overflow
    w = np.where(big_l > 1.0, big_l - np.log(np.maximum(big_l, 1.0)), np.exp(np.minimum(big_l, 1.0)))
    for _ in range(60):
        step = (w + np.log(w) - big_l) / (1.0 + 1.0 / w)
        w = np.maximum(w - step, 1e-300)
        if np.all(np.abs(step) <= 1e-15 * (1.0 + np.abs(w))):
            break
    return w


def _k_exponential_prox(v, g):
    return v + _k_lambertw_of_exp(np.log(g) - v)


def _k_exponential_conj(u):
    with np.errstate(divide="ignore", invalid="ignore"):
        inner = np.where(u < 0.0, u - u * np.log(np.where(u < 0.0, -u, 1.0)), 0.0)
    return np.where(u <= 0.0, inner, np.inf)


def _k_exponential_curv_floor(lo, hi):
    # l'' = e^-m decreases: its minimum over [lo, hi] is at hi (0 when hi is +inf)
    with np.errstate(over="ignore"):
        return np.exp(-np.asarray(hi, dtype=float)) + 0.0 * np.asarray(lo)


def _k_zero_one(m):
    return np.where(m <= 0.0, 1.0, 0.0)


def _k_zero_one_d(m):
    return np.zeros_like(np.asarray(m, dtype=float))


def _k_squared(r):
    return 0.5 * r * r


def _k_squared_d(r):
    return np.asarray(r, dtype=float) * 1.0


def _k_squared_prox(v, g):
    return v / (1.0 + g)


def _k_squared_conj(u):
    return 0.5 * u * u


def _k_squared_curv_floor(lo, hi):
    # l'' = 1 everywhere
    return np.ones(np.broadcast(np.asarray(lo), np.asarray(hi)).shape)


def _k_absolute(r):
    return np.abs(r)


def _k_absolute_d(r):
    return np.sign(r)


def _k_absolute_prox(v, g):
    return np.sign(v) * np.maximum(np.abs(v) - g, 0.0)


def _k_absolute_conj(u):
    return np.where(np.abs(u) <= 1.0, 0.0, np.inf)


def _k_huber(r, d=1.0):
    a = np.abs(r)
    return np.where(a <= d, 0.5 * r * r, d * (a - 0.5 * d))


def _k_huber_d(r, d=1.0):
    return np.clip(r, -d, d)


def _k_huber_prox(v, g, d=1.0):
    return np.where(np.abs(v) <= d * (1.0 + g), v / (1.0 + g), v - g * d * np.sign(v))


def _k_huber_conj(u, d=1.0):
    return np.where(np.abs(u) <= d, 0.5 * u * u, np.inf)


def _k_huber_curv_floor(lo, hi, d=1.0):
    # l'' = 1 on [-d, d] (l' = clip(r, -d, d) is continuous at both ends), 0 outside
    return np.where((np.asarray(lo) >= -d) & (np.asarray(hi) <= d), 1.0, 0.0)


def _k_pinball(r, t=0.5):
    return np.maximum(t * r, (t - 1.0) * r)


def _k_pinball_d(r, t=0.5):
    return np.where(r > 0.0, t, np.where(r < 0.0, t - 1.0, 0.0))


def _k_pinball_prox(v, g, t=0.5):
    return np.where(v > g * t, v - g * t, np.where(v < -g * (1.0 - t), v + g * (1.0 - t), 0.0))


def _k_pinball_conj(u, t=0.5):
    return np.where((u >= t - 1.0) & (u <= t), 0.0, np.inf)


def _k_epsilon_insensitive(r, e=0.1):
    return np.maximum(0.0, np.abs(r) - e)


def _k_epsilon_insensitive_d(r, e=0.1):
    return np.where(np.abs(r) > e, np.sign(r), 0.0)


def _k_epsilon_insensitive_prox(v, g, e=0.1):
    a = np.abs(v)
    return np.where(a <= e, v, np.where(a <= e + g, e * np.sign(v), v - g * np.sign(v)))


def _k_epsilon_insensitive_conj(u, e=0.1):
    return np.where(np.abs(u) <= 1.0, e * np.abs(u), np.inf)


def _k_below(u, a=0.0):
    return np.where(u < a, 1.0, 0.0)


def _k_below_d(u, a=0.0):
    # zero wherever the step is differentiable (everywhere but u = a): no information for a solver
    return np.zeros_like(np.asarray(u, dtype=float))


def _k_abs(x):
    return np.abs(x)


def _k_abs_d(x):
    return np.sign(x)


def _k_exp(x):
    with np.errstate(over="ignore"):
        return np.exp(x)


def _k_log(x):
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.log(x)


def _k_log_d(x):
    with np.errstate(divide="ignore"):
        return 1.0 / x


def _k_log1p(x):
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.log1p(x)


def _k_log1p_d(x):
    with np.errstate(divide="ignore"):
        return 1.0 / (1.0 + x)


def _k_softplus(x):
    return np.logaddexp(0.0, x)


def _k_softplus_d(x):
    return np.exp(-np.logaddexp(0.0, -x))


def _k_sqrt(x):
    with np.errstate(invalid="ignore"):
        return np.sqrt(x)


def _k_sqrt_d(x):
    with np.errstate(divide="ignore", invalid="ignore"):
        return 0.5 / np.sqrt(x)


def _k_pos(x):
    return np.maximum(x, 0.0)


def _k_pos_d(x):
    return np.where(x > 0.0, 1.0, 0.0)


def _k_neg(x):
    return np.maximum(-x, 0.0)


def _k_neg_d(x):
    return np.where(x < 0.0, -1.0, 0.0)


def _k_cosh(x):
    with np.errstate(over="ignore"):
        return np.cosh(x)


def _k_cosh_d(x):
    with np.errstate(over="ignore"):
        return np.sinh(x)


def _k_tanh(x):
    return np.tanh(x)


def _k_tanh_d(x):
    return 1.0 - np.tanh(x) ** 2


def _k_power(x, p=2.0):
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        return np.power(x, p)


def _k_power_d(x, p=2.0):
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        return p * np.power(x, p - 1.0)


def _k_max(*xs):
    return np.maximum.reduce(np.broadcast_arrays(*xs))


def _k_max_d(*xs):
    # one subgradient: all weight on the first argument that attains the maximum
    arrays = np.broadcast_arrays(*[np.asarray(x, dtype=float) for x in xs])
    top = np.argmax(np.stack(arrays), axis=0)
    return tuple(np.where(top == i, 1.0, 0.0) for i in range(len(arrays)))


def _k_min(*xs):
    return np.minimum.reduce(np.broadcast_arrays(*xs))


def _k_min_d(*xs):
    # min(x) = -max(-x): all weight on the first argument that attains the minimum
    return _k_max_d(*[np.negative(np.asarray(x, dtype=float)) for x in xs])


def _k_hypot(a, b):
    return np.hypot(a, b)


def _k_hypot_d(a, b):
    h = np.hypot(a, b)
    safe = np.where(h > 0.0, h, 1.0)
    return (np.where(h > 0.0, a / safe, 0.0), np.where(h > 0.0, b / safe, 0.0))


def _k_l0(w, z=0.0):
    return float(np.sum(np.abs(np.asarray(w, dtype=float)) > z))


def _k_l0_d(w, z=0.0):
    return np.zeros_like(np.asarray(w, dtype=float))


def _k_l1(w):
    return np.sum(np.abs(w))


def _k_l1_d(w):
    return np.sign(w)


def _k_l1_prox(v, g):
    return np.sign(v) * np.maximum(np.abs(v) - g, 0.0)


def _k_l1_conj(u):
    return 0.0 if np.max(np.abs(u), initial=0.0) <= 1.0 + 1e-12 else np.inf


def _k_l2(w):
    return np.sqrt(np.sum(np.asarray(w, dtype=float) ** 2))


def _k_l2_d(w):
    n = np.sqrt(np.sum(np.asarray(w, dtype=float) ** 2))
    return np.asarray(w, dtype=float) / n if n > 0.0 else np.zeros_like(np.asarray(w, dtype=float))


def _k_l2_prox(v, g):
    n = np.sqrt(np.sum(np.asarray(v, dtype=float) ** 2))
    return np.asarray(v, dtype=float) * (max(0.0, 1.0 - g / n) if n > 0.0 else 0.0)


def _k_l2_conj(u):
    return 0.0 if np.sqrt(np.sum(np.asarray(u, dtype=float) ** 2)) <= 1.0 + 1e-12 else np.inf


def _k_l2sq(w):
    return np.sum(np.asarray(w, dtype=float) ** 2)


def _k_l2sq_d(w):
    return 2.0 * np.asarray(w, dtype=float)


def _k_l2sq_prox(v, g):
    return np.asarray(v, dtype=float) / (1.0 + 2.0 * g)


def _k_l2sq_conj(u):
    return np.sum(np.asarray(u, dtype=float) ** 2) / 4.0


# dropout of inputs averaged out in closed form (Wager, Wang & Liang 2013, "Dropout training as adaptive
# regularization", sec. 2): each x_ij kept with probability 1 - p and scaled by 1 / (1 - p) has variance
# x_ij^2 p / (1 - p), so E[(r_i - w . (x~_i - x_i))^2 / 2] = r_i^2 / 2 + p / (2 (1 - p)) sum_j w_j^2 x_ij^2.
# Averaged over the rows like the loss, the excess is a ridge weighted by the inputs' second moments m2.

def _k_dropout_factor(p):
    return p / (2.0 * (1.0 - p))


def _k_by_input(m2, w):
    # m2 holds one number per input: along the rows of a weight matrix (one column per class)
    m2 = np.asarray(m2, dtype=float)
    return m2.reshape(m2.shape + (1,) * (np.ndim(w) - 1)) if m2.ndim == 1 else m2


def _k_dropridge(w, p=0.5, m2=1.0):
    w = np.asarray(w, dtype=float)
    return _k_dropout_factor(p) * np.sum(_k_by_input(m2, w) * w * w)


def _k_dropridge_d(w, p=0.5, m2=1.0):
    return 2.0 * _k_dropout_factor(p) * _k_by_input(m2, w) * np.asarray(w, dtype=float)


def _k_dropridge_prox(v, g, p=0.5, m2=1.0):
    # argmin_z g f sum m2 z^2 + ||z - v||^2 / 2, coordinate by coordinate
    return np.asarray(v, dtype=float) / (1.0 + 2.0 * g * _k_dropout_factor(p) * _k_by_input(m2, v))


def _k_dropridge_conj(u, p=0.5, m2=1.0):
    # sup_w u.w - f sum m2 w^2 = sum u^2 / (4 f m2)
    return np.sum(np.asarray(u, dtype=float) ** 2 / (4.0 * _k_dropout_factor(p) * _k_by_input(m2, u)))


def _k_second_moments(X, c, rows):
    """sum_i c_i x_ij^2 per column, normalized like the goal's row aggregate: by sum c ('mean'), by the
    row count ('perrow') or not at all ('sum'). X dense, a SciPy sparse matrix or a table read in chunks."""
    if hasattr(X, "weighted_square_sums"):
        total = X.weighted_square_sums(np.asarray(c, dtype=float))
    else:
        squares = X.multiply(X) if hasattr(X, "multiply") and not isinstance(X, np.ndarray) else np.asarray(X) ** 2
        total = np.asarray(squares.T @ np.asarray(c, dtype=float), dtype=float).ravel()
    if rows == "mean":
        return total / float(np.sum(c))
    if rows == "perrow":
        return total / float(X.shape[0])
    return total


# ---- multiclass losses, one value per row: S (rows x K scores), y (each row's class 0..K-1, as floats).
# The entries' `value` (evaluation, metrics, witnesses); the NumPy solver's kernels are its own.

def _k_mc_picked(S, y):
    S = np.asarray(S, dtype=float)
    return S[np.arange(S.shape[0]), np.asarray(y).astype(np.int64)]


def _k_mc_softmax_ce(S, y):
    # log sum_k exp(s_k) - s_y, shifted by the row maximum so that exp cannot overflow
    S = np.asarray(S, dtype=float)
    top = np.max(S, axis=1)
    return top + np.log(np.sum(np.exp(S - top[:, None]), axis=1)) - _k_mc_picked(S, y)


def _k_mc_cs_hinge(S, y):
    # max_k (s_k + [k != y]) - s_y
    S = np.asarray(S, dtype=float)
    other = np.ones_like(S)
    other[np.arange(S.shape[0]), np.asarray(y).astype(np.int64)] = 0.0
    return np.max(S + other, axis=1) - _k_mc_picked(S, y)


def _k_mc_ww_hinge(S, y):
    # sum over k != y of max(0, 1 + s_k - s_y); the k = y term would add max(0, 1) = 1
    S = np.asarray(S, dtype=float)
    return np.sum(np.maximum(0.0, 1.0 + S - _k_mc_picked(S, y)[:, None]), axis=1) - 1.0


def _k_mc_probabilities(S):
    # softmax of each row's scores: the class probabilities softmax_ce models
    S = np.asarray(S, dtype=float)
    e = np.exp(S - np.max(S, axis=1, keepdims=True))
    return e / np.sum(e, axis=1, keepdims=True)


def _k_inputs_l2(W):
    # sum over inputs j of ||W[j, :]||_2
    return float(np.sum(np.sqrt(np.sum(np.asarray(W, dtype=float) ** 2, axis=1))))


def _k_inputs_l2_d(W):
    W = np.asarray(W, dtype=float)
    n = np.sqrt(np.sum(W ** 2, axis=1, keepdims=True))
    return np.where(n > 0.0, W / np.where(n > 0.0, n, 1.0), 0.0)


# ---- multiclass kernels (vector score per row)
# What the NumPy multiclass solver (backends/numpy_multiclass_src.py) needs besides the values above: S is
# (rows x K), y the rows' classes; a conjugate takes the per-row dual vectors V (rows x K) and returns one
# value per row (+inf outside its domain). Domains are tested with a slack of 1e-9 against rounding (common
# practice, no source).

def _k_mc_onehot(y, K):
    E = np.zeros((len(y), K), order="F")  # column-major like the solver's scores (see _MCData.scores)
    E[np.arange(len(y)), np.asarray(y).astype(np.int64)] = 1.0
    return E


def _k_softmax_ce_vd(S, y):
    # the values and the gradient softmax(s) - e_y from one exponential of the shifted scores (in place: this
    # runs on every trial step of a line search)
    S = np.asarray(S, dtype=float)
    rows = np.arange(S.shape[0])
    yi = np.asarray(y).astype(np.int64)
    G = S - np.max(S, axis=1, keepdims=True)
    picked = G[rows, yi]
    np.exp(G, out=G)
    total = np.sum(G, axis=1)
    G /= total[:, None]
    G[rows, yi] -= 1.0
    return np.log(total) - picked, G


def _k_softmax_ce_conj(V, y):
    # with q = v + e_y in the simplex: sum_k q_k log q_k (the negative entropy; 0 log 0 = 0); the copy keeps
    # V's memory layout, so a column-major V is reduced over its classes column by column
    Q = np.array(V, dtype=float)
    Q[np.arange(Q.shape[0]), np.asarray(y).astype(np.int64)] += 1.0
    inside = (np.min(Q, axis=1) >= -1e-9) & (np.abs(np.sum(Q, axis=1) - 1.0) <= 1e-9)
    np.maximum(Q, 0.0, out=Q)
    logs = np.zeros_like(Q)
    np.log(Q, out=logs, where=Q > 0.0)
    Q *= logs
    return np.where(inside, np.sum(Q, axis=1), np.inf)


def _k_cs_hinge_d(S, y):
    # a subgradient: e_k - e_y for the first k attaining max_k (s_k + [k != y])
    S = np.asarray(S, dtype=float)
    E = _k_mc_onehot(y, S.shape[1])
    top = np.argmax(S + 1.0 - E, axis=1)
    G = -E
    G[np.arange(S.shape[0]), top] += 1.0
    return G


def _k_cs_hinge_conj(V, y):
    # conjugate of max_k (s_k + [k != y]) - s_y: with q = v + e_y in the simplex it is -sum_k [k != y] q_k = v_y
    V = np.asarray(V, dtype=float)
    E = _k_mc_onehot(y, V.shape[1])
    Q = V + E
    inside = (np.min(Q, axis=1) >= -1e-9) & (np.abs(np.sum(Q, axis=1) - 1.0) <= 1e-9)
    return np.where(inside, np.sum(V * E, axis=1), np.inf)


def _k_ww_hinge_d(S, y):
    # a subgradient: e_k - e_y summed over the classes k != y with 1 + s_k - s_y > 0
    S = np.asarray(S, dtype=float)
    E = _k_mc_onehot(y, S.shape[1])
    sy = np.sum(S * E, axis=1, keepdims=True)
    A = np.where((1.0 + S - sy > 0.0) & (E == 0.0), 1.0, 0.0)
    return A - E * np.sum(A, axis=1, keepdims=True)


def _k_ww_hinge_conj(V, y):
    # conjugate of sum_{k != y} max(0, 1 + s_k - s_y): finite for v_k in [0, 1] (k != y) and sum_k v_k = 0,
    # where it is -sum_{k != y} v_k = v_y
    V = np.asarray(V, dtype=float)
    E = _k_mc_onehot(y, V.shape[1])
    off = np.where(E == 0.0, V, 0.5)
    inside = (np.min(off, axis=1) >= -1e-9) & (np.max(off, axis=1) <= 1.0 + 1e-9) & \
        (np.abs(np.sum(V, axis=1)) <= 1e-9)
    return np.where(inside, np.sum(V * E, axis=1), np.inf)


# ---- the multiclass hinges as the NumPy solver's hinge methods read them (smoothed Newton, dual coordinate
# ascent): each hinge smoothed, and its conjugate's domain scaled by a row's factor rho (a dual row u with
# u / rho in the domain). E holds the rows' one-hot classes, rho their factors.

def _k_simplex_projection(v):
    # the Euclidean projection of one vector onto {q >= 0, sum q = 1} by sorting (Held, Wolfe & Crowder 1974;
    # Duchi, Shalev-Shwartz, Singer & Chandra 2008, 'Efficient projections onto the l1-ball', Fig. 1)
    u = np.sort(v)[::-1]
    css = np.cumsum(u) - 1.0
    k = np.flatnonzero(u * np.arange(1, len(v) + 1) > css)[-1]
    return np.maximum(v - css[k] / (k + 1), 0.0)


def _k_simplex_rows(Z):
    # each row of Z projected onto the probability simplex, all rows at once (the same sorting method)
    n, K = Z.shape
    desc = -np.sort(-Z, axis=1)
    css = np.cumsum(desc, axis=1) - 1.0
    last = K - 1 - np.argmax((desc * np.arange(1, K + 1) > css)[:, ::-1], axis=1)
    return np.maximum(Z - (css[np.arange(n), last] / (last + 1))[:, None], 0.0)


def _k_cs_hinge_smoothed(S, E, rho, mu, curvature=True):
    # max_k (s_k + [k != y]) smoothed at temperature mu into mu log-sum-exp (Nesterov 2005, 'Smooth
    # minimization of non-smooth functions'), at most mu log K above the hinge per unit of rho. Returns the
    # weighted value; with `curvature` also the gradient U in the scores (its rows over rho lie in the
    # conjugate's domain: U is a dual point of the unsmoothed goal), the per-row K x K Hessians and dU / dmu
    K = S.shape[1]
    A = (S + 1.0 - E) / mu
    top = np.max(A, axis=1, keepdims=True)
    ex = np.exp(A - top)
    tot = np.sum(ex, axis=1, keepdims=True)
    prob = ex / tot
    value = mu * (top[:, 0] + np.log(tot[:, 0])) - np.sum(S * E, axis=1)
    if not curvature:
        return float(rho @ value)
    U = rho[:, None] * (prob - E)
    H = (rho / mu)[:, None, None] * (prob[:, :, None] * np.eye(K) - prob[:, :, None] * prob[:, None, :])
    dU = -np.einsum("ikl,il->ik", H, A)  # d prob / d mu = -(diag prob - prob prob^T) A / mu, A scaled
    return float(rho @ value), U, H, dU


def _k_ww_hinge_smoothed(S, E, rho, mu, curvature=True):
    # each max(0, a) of the Weston-Watkins hinge smoothed into mu softplus(a / mu) (Nesterov 2005), at most
    # mu (K - 1) log 2 above the hinge per unit of rho; returns as _k_cs_hinge_smoothed does
    K = S.shape[1]
    margin = (1.0 + S - np.sum(S * E, axis=1, keepdims=True)) / mu
    off = E == 0
    value = mu * np.sum(np.where(off, np.logaddexp(0.0, margin), 0.0), axis=1)
    if not curvature:
        return float(rho @ value)
    sig = np.where(off, 0.5 * (1.0 + np.tanh(0.5 * margin)), 0.0)  # the logistic function without overflow
    V = sig - E * np.sum(sig, axis=1, keepdims=True)
    U = rho[:, None] * V
    curv = (rho / mu)[:, None] * sig * (1.0 - sig)  # per pair (i, k != y): the softplus's curvature
    # d a_k = d s_k - d s_y for k != y: the Hessian is B^T diag(curv) B with B's rows e_k - e_y
    H = curv[:, :, None] * np.eye(K)
    tot = np.sum(curv, axis=1)
    H -= E[:, :, None] * curv[:, None, :] + curv[:, :, None] * E[:, None, :]
    H += (tot[:, None, None] * E[:, :, None] * E[:, None, :])
    ca = np.where(off, curv * margin, 0.0)  # d sig / d mu = -sig (1 - sig) margin / mu
    dU = -(ca - E * np.sum(ca, axis=1, keepdims=True))
    return float(rho @ value), U, H, dU


def _k_cs_hinge_dual_row(z, y, r):
    # the Euclidean projection of one row's vector z onto r times the domain {v : v + e_y in the simplex}
    q = np.asarray(z, dtype=float) / r
    q[y] += 1.0
    q = _k_simplex_projection(q)
    q[y] -= 1.0
    return r * q


def _k_ww_hinge_dual_row(z, y, r):
    # the Euclidean projection onto r times the domain {0 <= u_k <= 1 (k != y), u_y = -sum_{k != y} u_k}:
    # u_k = clip(z_k - lam, 0, r) with lam = z_y + sum_{k != y} u_k, a monotone piecewise linear equation in
    # lam, solved exactly between its sorted breakpoints
    others = np.delete(z, y)
    bps = np.sort(np.concatenate([others, others - r]))
    h = bps - z[y] - np.sum(np.clip(others[None, :] - bps[:, None], 0.0, r), axis=1)
    j = int(np.searchsorted(h, 0.0))
    if j == 0:
        lam = z[y] + len(others) * r
    elif j == len(bps):
        lam = z[y]
    else:
        lam = bps[j - 1] - h[j - 1] * (bps[j] - bps[j - 1]) / (h[j] - h[j - 1])
    u_o = np.clip(others - lam, 0.0, r)
    return np.insert(u_o, y, -np.sum(u_o))


def _k_cs_hinge_dual_inside(U, E, rho):
    # a point of the domain (scaled by rho) for every row at once: each row's projection
    r = np.where(rho > 0, rho, 1.0)[:, None]
    return rho[:, None] * (_k_simplex_rows(U / r + E) - E)


def _k_ww_hinge_dual_inside(U, E, rho):
    # a point of the domain (scaled by rho) for every row at once: the entries off the row's class clipped into
    # [0, rho], the class's own entry their negated sum
    off_part = np.clip(np.where(E > 0, 0.0, U), 0.0, rho[:, None])
    return off_part - E * np.sum(off_part, axis=1, keepdims=True)


def _k_cs_hinge_dual_room(U, E, rho):
    # how far each row's dual vector may grow, u -> (1 + f) u with 0 <= f <= room, staying in the scaled
    # domain: q_y = 1 + u_y / rho must stay >= 0, and the other entries sum to 1 - q_y
    qy = 1.0 + np.sum(U * E, axis=1) / np.where(rho > 0, rho, 1.0)
    return np.where(qy < 1.0, qy / np.maximum(1.0 - qy, 1e-300), 0.0)


def _k_ww_hinge_dual_room(U, E, rho):
    # the same for the Weston-Watkins domain: the largest entry off the row's class may reach rho
    mag = np.max(np.where(E > 0, 0.0, U), axis=1)
    return np.where(mag > 0, rho / np.where(mag > 0, mag, 1.0) - 1.0, 0.0)


def _k_inputs_l2_prox(W, g):
    # each input's row of W shrunk toward 0 by g in its own L2 norm (the group soft threshold)
    W = np.asarray(W, dtype=float)
    n = np.sqrt(np.sum(W ** 2, axis=1, keepdims=True))
    return W * np.maximum(0.0, 1.0 - g / np.where(n > 0.0, n, 1.0))


def _k_inputs_l2_conj(Z):
    # the dual norm's unit ball: max_j ||Z[j, :]||_2 <= 1
    Z = np.asarray(Z, dtype=float)
    return 0.0 if np.max(np.sqrt(np.sum(Z ** 2, axis=1)), initial=0.0) <= 1.0 + 1e-12 else np.inf


# ---------------------------------------------------------------- entry shape

@dataclass(frozen=True)
class Option:
    """A numeric setting of an entry (huber's threshold, pinball's quantile): a literal in the spec."""

    name: str
    default: float
    low: float
    high: float
    low_open: bool = True
    high_open: bool = False
    meaning: str = ""

    def admits(self, value: float) -> bool:
        above = value > self.low if self.low_open else value >= self.low
        below = value < self.high if self.high_open else value <= self.high
        return above and below

    def describe_range(self) -> str:
        return f"{'(' if self.low_open else '['}{self.low:g}, {self.high:g}{')' if self.high_open else ']'}"


def _fixed_mono(m: Monotonicity) -> Callable[[int, Sign, dict], Monotonicity]:
    return lambda _i, _s, _o: m


def _even_mono(_i: int, s: Sign, _o: dict) -> Monotonicity:
    # functions like |x| and x^2 increase for x >= 0 and decrease for x <= 0
    if s.is_nonneg:
        return INC
    if s.is_nonpos:
        return DEC
    return NONMONO


def _nonneg(_signs: tuple[Sign, ...], _o: dict) -> Sign:
    return Sign.NONNEG


def _unknown(_signs: tuple[Sign, ...], _o: dict) -> Sign:
    return Sign.UNKNOWN


def _same_sign(signs: tuple[Sign, ...], _o: dict) -> Sign:
    return signs[0]


def _const(c: Curvature) -> Callable[[dict], Curvature]:
    return lambda _o: c


@dataclass(frozen=True)
class SettingRule:
    """How an entry's curvature follows one of its settings when the spec makes that setting a tunable with a
    declared range (x ^ q, q within 1.5 .. 4). `over(low, high)`: the (curvature, monotonicity) that hold on
    the argument's domain for every value in [low, high], or None when no one composition rule holds over the
    range; `why(low, high)`: the fact that decides it, as a phrase; `hint(name, default, high)`: the range to
    declare instead; `sign_needed`: the rules hold only where the argument is nonnegative for a range of more
    than one value (a range holds settings that need it), said by `sign_fault` and `sign_hint(name)` when the
    sign is unknown; `value_sign`: the entry's sign over the range, where the range alone decides it."""

    option: str
    over: Callable[[float, float], tuple[Curvature, Monotonicity] | None]
    why: Callable[[float, float], str]
    hint: Callable[[str, float, float], str]
    sign_needed: bool = False
    sign_fault: str = ""
    sign_hint: Callable[[str], str] = lambda _name: ""
    value_sign: Sign | None = None


@dataclass(frozen=True)
class Entry:
    """One atom, loss or norm: every fact the checker and the backends need about it."""

    name: str
    kind: Literal["atom", "loss", "norm"]
    summary: str
    formula: str
    curvature: Callable[[dict], Curvature]
    monotonicity: Callable[[int, Sign, dict], Monotonicity]
    sign: Callable[[tuple[Sign, ...], dict], Sign]
    value: Callable[..., Any]
    derivative: Callable[..., Any]
    cvxpy: Callable[..., Any]
    arity: int = 1  # expression arguments; 0 means two or more (max, min)
    options: tuple[Option, ...] = ()
    smooth: Callable[[dict], bool] = field(default=lambda _o: False)
    lipschitz: Callable[[dict], float | None] = field(default=lambda _o: None)
    grad_lipschitz: Callable[[dict], float | None] = field(default=lambda _o: None)
    prox: Callable[..., Any] | None = None
    conjugate: Callable[..., Any] | None = None
    # optional: (value, derivative) in one call, for entries where computing both together is cheaper
    value_and_derivative: Callable[..., Any] | None = None
    # optional: the least second derivative of a loss over an interval of its argument, a kernel
    # (lo, hi, **settings) -> min of l'' over [lo, hi] (elementwise); the NumPy backend turns it into a
    # strong-convexity modulus and so a certified distance of the weights to the optimum
    curv_floor: Callable[..., Any] | None = field(default=None, kw_only=True)
    role: Literal["margin", "residual", "multiclass", None] = None
    calibrated: bool | None = None
    trainable: bool = True
    # for an entry that is not trainable: why training on it is refused, and what to do instead
    refusal: str = ""
    refusal_hint: str = ""
    domain: tuple[float, float] = (-np.inf, np.inf)  # where the argument must lie
    test_points: tuple[float, float] = (-4.0, 4.0)  # where the property suite samples arguments
    # how messages and the expanded objective write the entry: "" for name(args); "^" for base^p
    infix: str = field(default="", kw_only=True)
    # settings under which the composition rules hold only where the argument is nonnegative (u^p for
    # p not an even integer): the checker then needs the argument's sign
    needs_nonneg_argument: Callable[[dict], bool] = field(default=lambda _o: False, kw_only=True)
    # settings under which the entry smooths a kink of its argument where the argument is 0 (pos(u)^p
    # for p >= 2 is continuously differentiable)
    smooths_zero_kink: Callable[[dict], bool] = field(default=lambda _o: False, kw_only=True)
    # the argument's kink sits where the entry's value is 0 (pos, neg): a smoothing power sees no kink
    kink_at_zero_value: bool = field(default=False, kw_only=True)
    # with exactly two arguments, one of them the number 0, the same holds (max(0, u) is pos(u))
    kink_at_zero_value_beside_zero: bool = field(default=False, kw_only=True)
    # warnings every goal that trains on the entry gets: (code, message, hint)
    training_warnings: tuple[tuple[str, str, str], ...] = field(default=(), kw_only=True)
    # a norm that applies to a parameter learned by classes (True), or only to one ("only": inputs_l2)
    on_class_matrix: bool | str = field(default=False, kw_only=True)
    # why the entry is convex, with its published source: said in the checker's per-term verdicts
    convexity_rule: str = field(default="", kw_only=True)
    # the entry's value reads the training rows' second moments of the inputs its argument weighs
    # (`m2=`, from `_k_second_moments`, normalized like the goal's row aggregate): a data-scaled norm
    reads_second_moments: bool = field(default=False, kw_only=True)
    # what to write instead when an argument breaks the entry's composition rule (checker's hint), and
    # instead when the rule fails because the argument's sign is unknown (the entry is not monotone then)
    rule_hint: str = field(default="", kw_only=True)
    sign_hint: str = field(default="", kw_only=True)
    # the rule for a setting that is a tunable with a declared range, where the curvature depends on it
    setting_rule: SettingRule | None = field(default=None, kw_only=True)
    # the exact range of the value over an interval of its one argument (options, (lo, hi)) -> (lo, hi), for
    # an entry whose monotonicity alone does not give it (x^p: even, odd, fractional and negative p differ)
    value_interval: Callable[[dict, tuple[float, float]], tuple[float, float]] | None = field(default=None,
                                                                                              kw_only=True)
    # the set `keep f(w) <= r` makes when f is this entry of a parameter: "box" (|w_j| <= r, entry by entry),
    # "l1 ball" or "l2 ball"; the backends project onto these exactly
    constraint_set: Literal["box", "l1 ball", "l2 ball", ""] = field(default="", kw_only=True)

    def resolve_options(self, given: tuple[float, ...]) -> dict[str, float]:
        """Options from positional values; raise ValueError (caught by the resolver) when wrong."""
        if len(given) > len(self.options):
            raise ValueError(f"{self.name} takes at most {len(self.options)} setting(s) after its argument")
        out = {}
        for i, opt in enumerate(self.options):
            v = given[i] if i < len(given) else opt.default
            if not opt.admits(v):
                raise ValueError(f"{self.name}'s {opt.name} must lie in {opt.describe_range()}, got {v:g}")
            out[opt.name] = float(v)
        return out


# ---------------------------------------------------------------- cvxpy constructions
# Each takes the cvxpy module first so this file never imports cvxpy itself (check stays fast).

def _cp_smooth_hinge(cp, m, c=1.0):
    # min over t >= 0 of (t^2)/(2c) + max(0, 1 - m - t) is the smoothed hinge; cvxpy's huber gives it:
    # huber(z, c)/ (2c) for z = pos(1-m) equals the piecewise form above
    return cp.huber(cp.pos(1 - m), c) / (2.0 * c)


def _cp_modified_huber(cp, m):
    # max(0,1-m)^2 on m >= -1 and -4m below is huber(pos(1-m), 2) with the huber scaled form
    return cp.huber(cp.pos(1 - m), 2.0)


def _cp_pinball(cp, r, t=0.5):
    # written as a weighted sum of positive and negative parts (an elementwise maximum of two affine
    # pieces has been seen reported infeasible by one solver interface)
    return t * cp.pos(r) + (1.0 - t) * cp.neg(r)


def _cp_dropridge(cp, w, p=0.5, m2=1.0):
    # sqrt(m2) scales each input's weights: a sum of squares of a linear map of w, convex
    root = np.sqrt(np.asarray(m2, dtype=float))
    if root.ndim == 1 and len(w.shape) == 2:  # one row of weights per input: scale the rows
        return _k_dropout_factor(p) * cp.sum_squares(cp.multiply(np.outer(root, np.ones(w.shape[1])), w))
    return _k_dropout_factor(p) * cp.sum_squares(cp.multiply(root, w))


def _cp_hypot(cp, a, b):
    # elementwise Euclidean norm of the pair: stack the two as rows and take the column norms
    a, b = cp.Expression.cast_to_const(a), cp.Expression.cast_to_const(b)
    if a.size == 1 and b.size == 1:
        return cp.norm2(cp.hstack([cp.reshape(a, (1,), order="F"), cp.reshape(b, (1,), order="F")]))
    n = max(a.size, b.size)
    a = a if a.size == n else a * np.ones(n)
    b = b if b.size == n else b * np.ones(n)
    return cp.norm(cp.vstack([a, b]), 2, axis=0)


def _cp_power(cp, x, p=2.0):
    if float(p).is_integer():
        return cp.power(x, p)
    # a fractional exponent as a power cone: cvxpy's default second-order-cone approximation ended
    # 'inaccurate' in Clarabel on mean |r|^2.5 over the raw diabetes targets, the power cone did not
    # (measured, cvxpy 1.9); a tunable exponent takes any value, not only short fractions
    return cp.power(x, p, approx=False)


def _cp_onehot(cp, S, y):
    Y = np.zeros(S.shape)
    Y[np.arange(S.shape[0]), np.asarray(y).astype(np.int64)] = 1.0
    return Y


def _cp_picked(cp, S, Y):
    return cp.sum(cp.multiply(S, Y), axis=1)


def _cp_softmax_ce(cp, S, y):
    return cp.log_sum_exp(S, axis=1) - _cp_picked(cp, S, _cp_onehot(cp, S, y))


def _cp_cs_hinge(cp, S, y):
    Y = _cp_onehot(cp, S, y)
    return cp.max(S + (1.0 - Y), axis=1) - _cp_picked(cp, S, Y)


def _cp_ww_hinge(cp, S, y):
    Y = _cp_onehot(cp, S, y)
    # the picked score of each row repeated across the K columns, so it subtracts entry by entry
    picked = cp.reshape(_cp_picked(cp, S, Y), (S.shape[0], 1), order="F") @ np.ones((1, S.shape[1]))
    return cp.sum(cp.multiply(cp.pos(1.0 + S - picked), 1.0 - Y), axis=1)


def _cp_inputs_l2(cp, W):
    return cp.sum(cp.norm(W, 2, axis=1))


_SCORE_AFFINE = "composed with the affine score s_i = W^T x_i + b it stays convex (Boyd & Vandenberghe 2004, sec. 3.2.2)"


def _power_curvature(o: dict) -> Curvature:
    p = o["p"]
    if p == 1:
        return AFFINE
    if p == 0:
        return AFFINE
    if 0 < p < 1:
        return CONCAVE
    return CONVEX


def _power_needs_nonneg(p: float) -> bool:
    """u^p is convex on the whole line only for even integer p; for other p > 1 and for p < 0 the
    composition rules hold only on u >= 0 (elsewhere it is concave or undefined)."""
    even = float(p).is_integer() and int(p) % 2 == 0
    return (p > 1 and not even) or p < 0


def _power_interval(o: dict, iv: tuple[float, float]) -> tuple[float, float]:
    """The exact range of x^p over x in [lo, hi] (the whole line where it is not a real number)."""
    p = o["p"]
    lo, hi = iv
    if p == 0:
        return (1.0, 1.0)
    integer = float(p).is_integer()
    even = integer and int(p) % 2 == 0

    def pw(x: float) -> float:
        with np.errstate(all="ignore"):
            return float(np.power(np.float64(x), p))
    if p > 0:
        if even:
            if lo >= 0:
                return (pw(lo), pw(hi))
            if hi <= 0:
                return (pw(hi), pw(lo))
            return (0.0, max(pw(lo), pw(hi)))
        if integer:
            return (pw(lo), pw(hi))  # odd: increasing on the whole line
        if hi < 0:
            return (-math.inf, math.inf)  # not a real number
        return (pw(max(lo, 0.0)), pw(hi))
    # p < 0
    if lo > 0:
        return (pw(hi), pw(lo))
    if hi < 0 and integer:
        return (pw(lo), pw(hi)) if even else (pw(hi), pw(lo))
    if even:
        return (0.0, math.inf)
    return (-math.inf, math.inf)


def _power_over_range(low: float, high: float) -> tuple[Curvature, Monotonicity] | None:
    """u^q on u >= 0 for every q in [low, high]: convex and increasing for q >= 1, concave and increasing for
    0 <= q <= 1, convex and decreasing for q <= 0 (the same cases as `_power_curvature`); else no one rule."""
    if low >= 1:
        return CONVEX, INC
    if low >= 0 and high <= 1:
        return CONCAVE, INC
    if high <= 0:
        return CONVEX, DEC
    return None


_POWER_RULE = SettingRule(
    "p", _power_over_range,
    lambda low, high: ("u^q is concave for 0 <= q <= 1 and convex for q >= 1 (on u >= 0), and the declared range "
                       f"admits {'q < 1' if high > 1 else 'q < 0'}"),
    lambda name, default, high: (f"declare a range with {name} >= 1 for a convex power, e.g. tune {name} = "
                                 f"{max(default, 1.0):g} within 1 .. {max(high, 1.0):g}"),
    sign_needed=True,
    sign_fault="u^q for a q that is not an even integer is defined and convex only where u >= 0",
    sign_hint=lambda name: f"write abs(u)^{name} or pos(u)^{name}", value_sign=Sign.NONNEG)


def _power_mono(_i: int, s: Sign, o: dict) -> Monotonicity:
    p = o["p"]
    if p == 1 or (0 < p < 1) or (p > 1 and not float(p).is_integer()):
        return INC
    if p < 0:
        return DEC
    if float(p).is_integer() and int(p) % 2 == 0:
        return _even_mono(0, s, o)
    return INC if s.is_nonneg else NONMONO


def _power_sign(signs: tuple[Sign, ...], o: dict) -> Sign:
    p = o["p"]
    if float(p).is_integer() and int(p) % 2 == 1:
        return signs[0]
    return Sign.NONNEG


def _max_sign(signs: tuple[Sign, ...], _o: dict) -> Sign:
    if any(s.is_nonneg for s in signs):
        return Sign.NONNEG
    if all(s.is_nonpos for s in signs):
        return Sign.NONPOS
    return Sign.UNKNOWN


def _min_sign(signs: tuple[Sign, ...], _o: dict) -> Sign:
    return _max_sign(tuple(s.negate() for s in signs), _o).negate()  # min(a, b) = -max(-a, -b)


def _yes(_o: dict) -> bool:
    return True


def _k(v: float | None) -> Callable[[dict], float | None]:
    return lambda _o: v


ENTRIES: tuple[Entry, ...] = (
    # ---- margin losses: argument m = y * s
    Entry("hinge", "loss", "hinge loss of the margin", "max(0, 1 - m)", _const(CONVEX), _fixed_mono(DEC),
          _nonneg, _k_hinge, _k_hinge_d, lambda cp, m: cp.pos(1 - m), lipschitz=_k(1.0),
          prox=_k_hinge_prox, conjugate=_k_hinge_conj, role="margin", calibrated=True,
          curv_floor=_k_flat_curv_floor),
    Entry("squared_hinge", "loss", "squared hinge loss of the margin", "max(0, 1 - m)^2", _const(CONVEX),
          _fixed_mono(DEC), _nonneg, _k_squared_hinge, _k_squared_hinge_d,
          lambda cp, m: cp.square(cp.pos(1 - m)), smooth=_yes, grad_lipschitz=_k(2.0),
          prox=_k_squared_hinge_prox, conjugate=_k_squared_hinge_conj, role="margin", calibrated=True,
          curv_floor=_k_squared_hinge_curv_floor),
    Entry("smooth_hinge", "loss", "hinge with a quadratic corner of width c",
          "0 if m >= 1; (1-m)^2/(2c) if 1-c < m < 1; 1 - m - c/2 otherwise", _const(CONVEX),
          _fixed_mono(DEC), _nonneg, _k_smooth_hinge, _k_smooth_hinge_d, _cp_smooth_hinge,
          options=(Option("c", 1.0, 0.0, np.inf, meaning="width of the quadratic corner"),),
          smooth=_yes, lipschitz=_k(1.0), grad_lipschitz=lambda o: 1.0 / o["c"],
          prox=_k_smooth_hinge_prox, conjugate=_k_smooth_hinge_conj, role="margin", calibrated=True,
          curv_floor=_k_smooth_hinge_curv_floor),
    Entry("modified_huber", "loss", "modified Huber loss of the margin",
          "max(0, 1 - m)^2 if m >= -1 else -4m", _const(CONVEX), _fixed_mono(DEC), _nonneg,
          _k_modified_huber, _k_modified_huber_d, _cp_modified_huber, smooth=_yes, lipschitz=_k(4.0),
          grad_lipschitz=_k(2.0), prox=_k_modified_huber_prox, conjugate=_k_modified_huber_conj,
          role="margin", calibrated=True, curv_floor=_k_modified_huber_curv_floor),
    Entry("perceptron", "loss", "perceptron loss of the margin", "max(0, -m)", _const(CONVEX),
          _fixed_mono(DEC), _nonneg, _k_perceptron, _k_perceptron_d, lambda cp, m: cp.pos(-m),
          lipschitz=_k(1.0), prox=_k_perceptron_prox, conjugate=_k_perceptron_conj, role="margin",
          calibrated=False, curv_floor=_k_flat_curv_floor, training_warnings=(
              ("W301", "the perceptron loss is minimized by w = 0 (with b = 0): under empirical risk it rewards the "
                       "all-zero model; it is meant as an online update rule",
               "use hinge(y * s) for a margin, or logistic(y * s)"),
              ("W302", "the perceptron loss is not classification-calibrated (its derivative at margin 0 is 0; "
                       "Bartlett, Jordan & McAuliffe 2006)", ""))),
    Entry("logistic", "loss", "logistic loss of the margin (natural log)", "log(1 + exp(-m))",
          _const(CONVEX), _fixed_mono(DEC), _nonneg, _k_logistic, _k_logistic_d,
          lambda cp, m: cp.logistic(-m), smooth=_yes, lipschitz=_k(1.0), grad_lipschitz=_k(0.25),
          prox=_k_logistic_prox, conjugate=_k_logistic_conj, role="margin", calibrated=True,
          value_and_derivative=_k_logistic_vd, curv_floor=_k_logistic_curv_floor),
    Entry("exponential", "loss", "exponential loss of the margin", "exp(-m)", _const(CONVEX),
          _fixed_mono(DEC), _nonneg, _k_exponential, _k_exponential_d, lambda cp, m: cp.exp(-m),
          smooth=_yes, prox=_k_exponential_prox, conjugate=_k_exponential_conj, role="margin",
          calibrated=True, test_points=(-3.0, 3.0), curv_floor=_k_exponential_curv_floor),
    Entry("zero_one", "loss", "0-1 loss of the margin (evaluation only)", "1 if m <= 0 else 0",
          _const(UNKNOWN), _fixed_mono(DEC), _nonneg, _k_zero_one, _k_zero_one_d,
          lambda cp, m: None, role="margin", trainable=False,
          refusal="the 0-1 loss is discontinuous: it cannot be trained on (no subgradient carries information), "
                  "only evaluated",
          refusal_hint="train with a surrogate such as hinge(y * s) or logistic(y * s); `objc eval` reports the 0-1 "
                       "error of every model"),
    # ---- residual losses: argument r = y - s
    Entry("squared", "loss", "squared loss of the residual (half-scaled)", "r^2 / 2", _const(CONVEX),
          _even_mono, _nonneg, _k_squared, _k_squared_d, lambda cp, r: 0.5 * cp.square(r), smooth=_yes,
          grad_lipschitz=_k(1.0), prox=_k_squared_prox, conjugate=_k_squared_conj, role="residual",
          curv_floor=_k_squared_curv_floor),
    Entry("absolute", "loss", "absolute loss of the residual", "|r|", _const(CONVEX), _even_mono, _nonneg,
          _k_absolute, _k_absolute_d, lambda cp, r: cp.abs(r), lipschitz=_k(1.0), prox=_k_absolute_prox,
          conjugate=_k_absolute_conj, role="residual", curv_floor=_k_flat_curv_floor),
    Entry("huber", "loss", "Huber loss of the residual (half-scaled: r^2/2 inside)",
          "r^2/2 if |r| <= d else d(|r| - d/2)", _const(CONVEX), _even_mono, _nonneg, _k_huber, _k_huber_d,
          lambda cp, r, d=1.0: cp.huber(r, d) / 2.0,
          options=(Option("d", 1.0, 0.0, np.inf, meaning="threshold between the quadratic and linear parts"),),
          smooth=_yes, lipschitz=lambda o: o["d"], grad_lipschitz=_k(1.0), prox=_k_huber_prox,
          conjugate=_k_huber_conj, role="residual", curv_floor=_k_huber_curv_floor),
    Entry("pinball", "loss", "pinball (quantile) loss of the residual at quantile t",
          "max(t r, (t - 1) r)", _const(CONVEX), _even_mono, _nonneg, _k_pinball, _k_pinball_d, _cp_pinball,
          options=(Option("t", 0.5, 0.0, 1.0, high_open=True, meaning="the quantile, strictly between 0 and 1"),),
          lipschitz=lambda o: max(o["t"], 1.0 - o["t"]), prox=_k_pinball_prox, conjugate=_k_pinball_conj,
          role="residual", curv_floor=_k_flat_curv_floor),
    Entry("epsilon_insensitive", "loss", "epsilon-insensitive loss of the residual", "max(0, |r| - e)",
          _const(CONVEX), _even_mono, _nonneg, _k_epsilon_insensitive, _k_epsilon_insensitive_d,
          lambda cp, r, e=0.1: cp.pos(cp.abs(r) - e),
          options=(Option("e", 0.1, 0.0, np.inf, low_open=False, meaning="half-width of the free band"),),
          lipschitz=_k(1.0), prox=_k_epsilon_insensitive_prox, conjugate=_k_epsilon_insensitive_conj,
          role="residual", curv_floor=_k_flat_curv_floor),
    # ---- multiclass losses: arguments s (the K scores of a row) and y (the row's class)
    Entry("softmax_ce", "loss", "softmax cross-entropy (multinomial logistic loss) of a row's K scores",
          "log sum_k exp(s_k) - s_y", _const(CONVEX), _fixed_mono(NONMONO), _nonneg, _k_mc_softmax_ce, None,
          _cp_softmax_ce, arity=2, smooth=_yes, role="multiclass", calibrated=True,
          value_and_derivative=_k_softmax_ce_vd, conjugate=_k_softmax_ce_conj,
          convexity_rule="log-sum-exp is convex (Boyd & Vandenberghe 2004, sec. 3.1.5, example 'log-sum-exp') and "
                         "-s_y is affine; " + _SCORE_AFFINE),
    Entry("cs_hinge", "loss", "multiclass hinge of Crammer & Singer (2001)", "max_k (s_k + [k != y]) - s_y",
          _const(CONVEX), _fixed_mono(NONMONO), _nonneg, _k_mc_cs_hinge, _k_cs_hinge_d, _cp_cs_hinge, arity=2,
          role="multiclass", calibrated=False, conjugate=_k_cs_hinge_conj,
          convexity_rule="a pointwise maximum of affine functions of s is convex (Boyd & Vandenberghe 2004, sec. "
                         "3.2.3) and -s_y is affine; " + _SCORE_AFFINE),
    Entry("ww_hinge", "loss", "multiclass hinge of Weston & Watkins (1999)", "sum_{k != y} max(0, 1 + s_k - s_y)",
          _const(CONVEX), _fixed_mono(NONMONO), _nonneg, _k_mc_ww_hinge, _k_ww_hinge_d, _cp_ww_hinge, arity=2,
          role="multiclass", calibrated=False, conjugate=_k_ww_hinge_conj,
          convexity_rule="each max(0, 1 + s_k - s_y) is a pointwise maximum of affine functions of s, so convex "
                         "(Boyd & Vandenberghe 2004, sec. 3.2.3), and a sum of convex functions is convex; "
                         + _SCORE_AFFINE),
    # ---- scalar atoms (elementwise on vectors)
    Entry("abs", "atom", "absolute value", "|x|", _const(CONVEX), _even_mono, _nonneg, _k_abs, _k_abs_d,
          lambda cp, x: cp.abs(x), lipschitz=_k(1.0), constraint_set="box"),
    Entry("exp", "atom", "exponential", "e^x", _const(CONVEX), _fixed_mono(INC), _nonneg, _k_exp, _k_exp,
          lambda cp, x: cp.exp(x), smooth=_yes, test_points=(-3.0, 3.0)),
    Entry("log", "atom", "natural logarithm", "log(x), x > 0", _const(CONCAVE), _fixed_mono(INC), _unknown,
          _k_log, _k_log_d, lambda cp, x: cp.log(x), smooth=_yes, domain=(0.0, np.inf), test_points=(0.05, 6.0)),
    Entry("log1p", "atom", "log(1 + x)", "log(1 + x), x > -1", _const(CONCAVE), _fixed_mono(INC), _same_sign,
          _k_log1p, _k_log1p_d, lambda cp, x: cp.log1p(x), smooth=_yes, domain=(-1.0, np.inf),
          test_points=(-0.9, 6.0)),
    Entry("softplus", "atom", "softplus", "log(1 + e^x)", _const(CONVEX), _fixed_mono(INC), _nonneg,
          _k_softplus, _k_softplus_d, lambda cp, x: cp.logistic(x), smooth=_yes, lipschitz=_k(1.0),
          grad_lipschitz=_k(0.25)),
    Entry("sqrt", "atom", "square root", "sqrt(x), x >= 0", _const(CONCAVE), _fixed_mono(INC), _nonneg,
          _k_sqrt, _k_sqrt_d, lambda cp, x: cp.sqrt(x), smooth=_yes, domain=(0.0, np.inf),
          test_points=(0.05, 6.0),
          rule_hint="sqrt is concave: it proves convexity of nothing but affine or concave arguments; for the "
                    "length of a vector, sqrt(a^2 + m^2), write hypot(a, m), which the rules can prove convex"),
    Entry("pos", "atom", "positive part", "max(x, 0)", _const(CONVEX), _fixed_mono(INC), _nonneg, _k_pos,
          _k_pos_d, lambda cp, x: cp.pos(x), lipschitz=_k(1.0), kink_at_zero_value=True),
    Entry("neg", "atom", "negative part", "max(-x, 0)", _const(CONVEX), _fixed_mono(DEC), _nonneg, _k_neg,
          _k_neg_d, lambda cp, x: cp.neg(x), lipschitz=_k(1.0), kink_at_zero_value=True),
    Entry("cosh", "atom", "hyperbolic cosine; cosh(0) = 1 and cosh'' = cosh >= 1, so strongly convex with "
          "modulus 1", "(e^x + e^-x) / 2", _const(CONVEX), _even_mono, _nonneg, _k_cosh, _k_cosh_d,
          lambda cp, x: (cp.exp(x) + cp.exp(-x)) / 2.0, smooth=_yes, test_points=(-3.0, 3.0)),
    Entry("below", "atom", "0/1 indicator that u lies below a (evaluation only)", "1 if u < a else 0",
          _const(UNKNOWN), _fixed_mono(DEC), _nonneg, _k_below, _k_below_d, lambda cp, u, a=0.0: None,
          options=(Option("a", 0.0, -np.inf, np.inf, meaning="the threshold u is compared with"),),
          trainable=False,
          refusal="below(u, a) is a 0/1 indicator, a step: it cannot be trained on (its derivative is 0 wherever it "
                  "exists), only evaluated",
          refusal_hint="use it to report a share of rows (e.g. mean below(y * s, 0), the rows with a negative "
                       "margin) and train on a convex surrogate such as hinge(y * s)"),
    Entry("tanh", "atom", "hyperbolic tangent (neither convex nor concave)", "tanh(x)", _const(UNKNOWN),
          _fixed_mono(INC), _same_sign, _k_tanh, _k_tanh_d, lambda cp, x: None, smooth=_yes),
    Entry("power", "atom", "x^p (written x ^ p, p a number or a tunable)", "x^p; for p not an even integer x >= 0",
          _power_curvature, _power_mono, _power_sign, _k_power, _k_power_d, _cp_power,
          options=(Option("p", 2.0, -np.inf, np.inf, meaning="the exponent, a number or a tunable"),), smooth=_yes,
          infix="^", needs_nonneg_argument=lambda o: _power_needs_nonneg(o["p"]),
          smooths_zero_kink=lambda o: o["p"] >= 2, setting_rule=_POWER_RULE, value_interval=_power_interval,
          sign_hint="write abs(...) ^ p, or square a nonnegative expression such as pos(...) ^ 2"),
    Entry("max", "atom", "largest of its arguments", "max(a, b, ...)", _const(CONVEX), _fixed_mono(INC),
          _max_sign, _k_max, _k_max_d, lambda cp, *xs: cp.maximum(*xs), arity=0,
          kink_at_zero_value_beside_zero=True),
    Entry("min", "atom", "smallest of its arguments", "min(a, b, ...)", _const(CONCAVE), _fixed_mono(INC),
          _min_sign, _k_min, _k_min_d, lambda cp, *xs: cp.minimum(*xs), arity=0),
    Entry("hypot", "atom", "Euclidean length of (a, b)", "sqrt(a^2 + b^2)", _const(CONVEX), _even_mono,
          _nonneg, _k_hypot, _k_hypot_d, lambda cp, a, b: _cp_hypot(cp, a, b), arity=2, lipschitz=_k(1.0)),
    # ---- norms of a parameter vector (or a selection of it)
    Entry("l0", "norm", "count of nonzero weights (the l0 count; not a norm, evaluation only)",
          "number of j with |w_j| > z", _const(UNKNOWN), _even_mono, _nonneg, _k_l0, _k_l0_d,
          lambda cp, w, z=0.0: None,
          options=(Option("z", 0.0, 0.0, np.inf, low_open=False, meaning="entries with |w_j| <= z count as zero"),),
          trainable=False,
          refusal="l0(w) counts nonzero weights: a step in every weight, it cannot be trained on (its derivative "
                  "is 0 wherever it exists), only evaluated",
          refusal_hint="report it for a trained model; for sparse weights train with the convex l1(w)"),
    # on a matrix learned by classes, l1 is entrywise (cvxpy's norm1 of a matrix sums every |W_jk|, measured
    # with cvxpy 1.9; its norm(W, 1) would be the induced norm) and l2sq the squared Frobenius norm
    Entry("l1", "norm", "L1 norm", "sum_j |w_j|", _const(CONVEX), _even_mono, _nonneg, _k_l1, _k_l1_d,
          lambda cp, w: cp.norm1(w), prox=_k_l1_prox, conjugate=_k_l1_conj, on_class_matrix=True,
          constraint_set="l1 ball"),
    Entry("l2", "norm", "L2 (Euclidean) norm", "sqrt(sum_j w_j^2)", _const(CONVEX), _even_mono, _nonneg,
          _k_l2, _k_l2_d, lambda cp, w: cp.norm2(w), prox=_k_l2_prox, conjugate=_k_l2_conj,
          on_class_matrix=True, constraint_set="l2 ball"),
    Entry("l2sq", "norm", "squared L2 norm (no half)", "sum_j w_j^2", _const(CONVEX), _even_mono, _nonneg,
          _k_l2sq, _k_l2sq_d, lambda cp, w: cp.sum_squares(w), smooth=_yes, prox=_k_l2sq_prox,
          conjugate=_k_l2sq_conj, on_class_matrix=True),
    Entry("inputs_l2", "norm", "sum over inputs of the L2 norm of the input's weights across the classes (drops an "
          "input from every class at once)", "sum_j ||W[j, :]||_2", _const(CONVEX), _even_mono, _nonneg,
          _k_inputs_l2, _k_inputs_l2_d, _cp_inputs_l2, on_class_matrix="only", prox=_k_inputs_l2_prox,
          conjugate=_k_inputs_l2_conj,
          convexity_rule="a sum of norms of affine functions of W is convex (Boyd & Vandenberghe 2004, sec. 3.1.5 "
                         "and 3.2.1)"),
    Entry("dropridge", "norm", "dropout of the inputs w weighs, drop probability p, averaged out: a ridge "
          "weighted by each input's second moment (exact for the squared loss; Wager, Wang & Liang 2013)",
          "p / (2 (1 - p)) sum_j m2_j w_j^2, m2_j = the rows' mean of x_j^2 (normalized like the loss)",
          _const(CONVEX), _even_mono, _nonneg, _k_dropridge, _k_dropridge_d,
          _cp_dropridge,
          options=(Option("p", 0.5, 0.0, 1.0, low_open=True, high_open=True,
                          meaning="the probability that an input is dropped from a row"),),
          smooth=_yes, prox=_k_dropridge_prox, conjugate=_k_dropridge_conj, reads_second_moments=True,
          on_class_matrix=True),
)

CATALOG: dict[str, Entry] = {e.name: e for e in ENTRIES}
# the entries written as an operator (`base ^ p`), by their operator
INFIX: dict[str, Entry] = {e.infix: e for e in ENTRIES if e.infix}

# `group_l2(w)` is resolved to a sum of l2 norms over the groups a table declares; it is listed
# here so that name lookup and the docs know it.
GROUP_NORM = "group_l2"


def lookup(name: str) -> Entry | None:
    return CATALOG.get(name)


def names() -> list[str]:
    return sorted(CATALOG) + [GROUP_NORM]
