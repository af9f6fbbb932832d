"""The NumPy solver for a K-class goal, copied by source into a generated module like numpy_solvers_src.py.

It minimizes

    P(W, b) = sum_i rho_i L(s_i, y_i) + c2 ||W||_F^2 + c1 sum_jk |W_jk| + cg sum_j ||W[j, :]||_2,
    s_i = W^T x_i + b  (W is p x K, b has K entries and is not penalized),

for L one of softmax_ce, cs_hinge (Crammer & Singer 2001) and ww_hinge (Weston & Watkins 1999), whose
values, derivatives and conjugates are the catalog's kernels (objc/catalog.py, "multiclass kernels"). Only
NumPy is needed; the import of the kernels below is dropped when the file is pasted into a module (the
emitter pastes the kernels themselves), and nothing else from objc is used.

Every answer carries a Fenchel duality gap: for U (n x K) with rows u_i / rho_i in the domain of L*, and
sum_i u_i = 0 when b is free, D(U) = -sum_i rho_i L*(u_i / rho_i, y_i) - R*(-X^T U) <= P* (weak duality;
REFERENCE.md's gap for the binary case, here per row a K-vector). `gap` is relative in the convention of
numpy_solvers_src.py's `relative`: (P - D) / max(1, |P|). One "pass" is one product of the table (or a
block of its rows covering it once) with a matrix.

All three losses are unchanged when a constant is added to every score of a row, so b is defined only up
to such a constant: the answer's b sums to zero over the classes.
"""

import math

import numpy as np

try:  # optional: SciPy's NNLS balances a hinge's dual point when scaling rows by least norm does not
    import scipy.optimize as _scipy_optimize
except ImportError:  # pragma: no cover
    _scipy_optimize = None

from objc.catalog import (_k_cs_hinge_conj, _k_cs_hinge_d, _k_cs_hinge_dual_inside, _k_cs_hinge_dual_room,
                          _k_cs_hinge_dual_row, _k_cs_hinge_smoothed, _k_inputs_l2_conj, _k_inputs_l2_prox, _k_l1_prox,
                          _k_mc_cs_hinge, _k_mc_onehot, _k_mc_probabilities, _k_mc_ww_hinge, _k_softmax_ce_conj,
                          _k_softmax_ce_vd, _k_ww_hinge_conj, _k_ww_hinge_d, _k_ww_hinge_dual_inside,
                          _k_ww_hinge_dual_room, _k_ww_hinge_dual_row, _k_ww_hinge_smoothed)

# each loss's math as the catalog's kernels give it (the emitter pastes every kernel this file names): per-row
# values with (sub)gradients, the conjugate; for the hinges their smoothing and their dual domain (scaled by a
# row's rho): one row's projection onto it, a point in it for every row, and each row's room to grow in it.
# What still reads a loss by its name chooses a method: L-BFGS with the exact intercept for the smooth loss,
# and the active-set face of `_mc_face_candidate`, which is each hinge's optimality conditions
_MC_LOSS_KERNELS = {
    "softmax_ce": {"values and gradients": _k_softmax_ce_vd, "conjugate": _k_softmax_ce_conj},
    "cs_hinge": {"values and gradients": lambda S, y: (_k_mc_cs_hinge(S, y), _k_cs_hinge_d(S, y)),
                 "conjugate": _k_cs_hinge_conj},
    "ww_hinge": {"values and gradients": lambda S, y: (_k_mc_ww_hinge(S, y), _k_ww_hinge_d(S, y)),
                 "conjugate": _k_ww_hinge_conj},
}
_MC_HINGES = {
    "cs_hinge": {"smoothed": _k_cs_hinge_smoothed, "dual_row": _k_cs_hinge_dual_row,
                 "dual_inside": _k_cs_hinge_dual_inside, "dual_room": _k_cs_hinge_dual_room},
    "ww_hinge": {"smoothed": _k_ww_hinge_smoothed, "dual_row": _k_ww_hinge_dual_row,
                 "dual_inside": _k_ww_hinge_dual_inside, "dual_room": _k_ww_hinge_dual_room},
}
_MC_LOSSES = tuple(_MC_LOSS_KERNELS)
_MC_PENALTIES = ("l2sq", "l1", "inputs_l2")


# ---------------------------------------------------------------- predict

def multiclass_scores(W, b, X):
    """The n x K scores X W + b (X dense or SciPy sparse)."""
    return np.asarray(X @ np.asarray(W, dtype=np.float64), dtype=np.float64) + np.asarray(b, dtype=np.float64)


def softmax_probabilities(S):
    """Each row's class probabilities under softmax_ce (shifted by the row maximum, so no overflow)."""
    return _k_mc_probabilities(S)


# ---------------------------------------------------------------- input checks

def _mc_rows_text(rows):
    rows = [int(r) + 1 for r in rows]
    text = ", ".join(str(r) for r in rows[:5])
    return text + (f" and {len(rows) - 5} more" if len(rows) > 5 else "")


class _MCData:
    """The checked table: X (dense or CSR), classes y, row factors rho, K, and the centre m of a free intercept."""

    def __init__(self, X, y, rho, K, intercept):
        self.X, self.y, self.rho, self.K = X, y, rho, K
        self.n, self.p = X.shape
        self.sparse = not isinstance(X, np.ndarray)
        self.E = _k_mc_onehot(y, K)
        self.intercept = bool(intercept)
        # a free intercept is solved for in centred coordinates b' = b + W^T m (m the rho-weighted mean row):
        # the intercept's direction is then orthogonal to the weights' on the data, which keeps L-BFGS and the
        # dual method well conditioned; X itself is never copied
        total = float(np.sum(rho))
        self.m = np.asarray(X.T @ rho, dtype=np.float64).ravel() / total if intercept else None
        self.passes = 0
        self.iterations = 0  # every method's steps (L-BFGS, FISTA, Newton) or sweeps (coordinate ascent)

    def scores(self, W, c):
        """(X - 1 m^T) W + 1 c^T: one pass. The n x K result is column-major (each class's scores contiguous):
        the per-row reductions over the K classes (max, sum) are then elementwise operations over whole columns,
        several times faster in NumPy than reducing rows of length K (measured at K = 10)."""
        if not np.any(W):  # a cold start: the scores are the intercepts, no pass over the table is needed
            S = np.empty((self.n, self.K), order="F")
            S[:] = c if self.m is not None else 0.0
            return S
        self.passes += 1
        if self.sparse:
            S = np.asfortranarray(self.X @ W, dtype=np.float64)
        else:
            S = (np.asarray(W, dtype=np.float64).T @ self.X.T).T
        if self.m is not None:
            S += c - self.m @ W
        return S

    def back(self, U):
        """(X - 1 m^T)^T U: one pass."""
        self.passes += 1
        if self.sparse:
            g = np.asarray(self.X.T @ U, dtype=np.float64)
        else:
            g = np.ascontiguousarray((U.T @ self.X).T)
        if self.m is not None:
            g -= np.outer(self.m, np.sum(U, axis=0))
        return g

    def user_intercept(self, W, c):
        b = c - self.m @ W if self.m is not None else np.zeros(self.K)
        return b - np.mean(b)


def _mc_checked(X, labels, K, rho, loss, penalties, intercept, tol, max_passes):
    if loss not in _MC_LOSSES:
        raise ValueError(f"unknown multiclass loss {loss!r}: the solver knows {', '.join(_MC_LOSSES)}")
    try:
        K = int(K)
    except (TypeError, ValueError):
        raise ValueError(f"the class count K must be an integer, got {K!r}") from None
    if K < 2:
        raise ValueError(f"the class count K must be at least 2, got {K}")
    if hasattr(X, "tocsr") and not isinstance(X, np.ndarray):
        X = X.tocsr().astype(np.float64)
        bad = np.flatnonzero(~np.isfinite(X.data))
        bad_rows = np.unique(np.searchsorted(X.indptr, bad, side="right") - 1)
    else:
        try:
            X = np.asarray(X, dtype=np.float64)
        except (TypeError, ValueError):
            raise ValueError("the data matrix X must be numeric (an array of floats)") from None
        if X.ndim != 2:
            raise ValueError(f"the data matrix X must have two dimensions (rows x inputs), got shape {X.shape}")
        bad_rows = np.flatnonzero(~np.all(np.isfinite(X), axis=1)) if X.size else np.zeros(0, dtype=np.intp)
    n = X.shape[0]
    if n == 0:
        raise ValueError("the data matrix X has no rows")
    if len(bad_rows):
        raise ValueError(f"the data matrix X holds NaN or infinite values in rows {_mc_rows_text(bad_rows)} "
                         "(counting from 1): fill or drop them before fitting")
    y = np.asarray(labels)
    if y.shape != (n,):
        raise ValueError(f"labels must hold one class per row: {n} rows, got shape {y.shape}")
    try:
        yf = y.astype(np.float64)
    except (TypeError, ValueError):
        raise ValueError("labels must be class numbers 0 .. K-1 (integers)") from None
    off = np.flatnonzero(~np.isfinite(yf) | (yf != np.round(yf)) | (yf < 0) | (yf > K - 1))
    if len(off):
        raise ValueError(f"labels must be class numbers 0 .. {K - 1}: rows {_mc_rows_text(off)} (counting from 1) "
                         f"hold {y[off[0]]!r}" + (" and others" if len(off) > 1 else "")
                         + "; map every label to a class first")
    y = yf.astype(np.int64)
    rho = np.asarray(rho, dtype=np.float64)
    if rho.shape != (n,):
        raise ValueError(f"rho must hold one factor per row: {n} rows, got shape {rho.shape}")
    off = np.flatnonzero(~np.isfinite(rho) | (rho < 0))
    if len(off):
        raise ValueError(f"row factors rho must be finite and >= 0: rows {_mc_rows_text(off)} (counting from 1) "
                         f"hold {rho[off[0]]!r}")
    if not np.sum(rho) > 0:
        raise ValueError("every row factor rho is 0: the loss has no rows to fit")
    coef = {kind: 0.0 for kind in _MC_PENALTIES}
    for item in penalties:
        try:
            kind, value = item
        except (TypeError, ValueError):
            raise ValueError(f"a penalty must be a pair (kind, coefficient), got {item!r}") from None
        if kind not in _MC_PENALTIES:
            raise ValueError(f"unknown penalty {kind!r} on the class matrix: the solver knows "
                             f"{', '.join(_MC_PENALTIES)}")
        value = float(value)
        if not (math.isfinite(value) and value >= 0):
            raise ValueError(f"the coefficient of {kind} must be finite and >= 0, got {value!r}")
        coef[kind] += value
    if not (isinstance(tol, (int, float)) and math.isfinite(tol) and tol > 0):
        raise ValueError(f"tol (the relative duality gap to reach) must be a positive number, got {tol!r}")
    if max_passes is not None and not (isinstance(max_passes, (int, np.integer)) and max_passes >= 1):
        raise ValueError(f"max_passes must be a positive integer or None, got {max_passes!r}")
    return _MCData(X, y, rho, K, intercept), coef


def _mc_start(d, theta0):
    """(W, c) in the solver's coordinates from theta0: None, a pair (W, b), a dict with W and b, or a flat
    vector holding W row by row (p x K) and then b when there is an intercept."""
    W = np.zeros((d.p, d.K))
    b = np.zeros(d.K)
    if theta0 is not None:
        if isinstance(theta0, dict):
            W, b = theta0["W"], theta0.get("b", b)
        elif isinstance(theta0, (tuple, list)) and len(theta0) == 2:
            W, b = theta0
        else:
            flat = np.asarray(theta0, dtype=np.float64).ravel()
            size = d.p * d.K
            if flat.size not in (size, size + d.K):
                raise ValueError(f"theta0 must hold {size} weights (p x K) and optionally {d.K} intercepts, "
                                 f"got {flat.size} numbers")
            W, b = flat[:size].reshape(d.p, d.K), (flat[size:] if flat.size > size else b)
        W = np.array(W, dtype=np.float64).reshape(d.p, d.K)
        b = np.array(b, dtype=np.float64).reshape(d.K)
        if not (np.all(np.isfinite(W)) and np.all(np.isfinite(b))):
            raise ValueError("theta0 holds NaN or infinite values")
    if not d.intercept:
        return W, np.zeros(d.K)
    return W, b + d.m @ W


# ---------------------------------------------------------------- objective and certificate

def _mc_loss_vd(loss, S, y):
    """Per-row values and (sub)gradients in the scores; the gradient rows lie in the conjugate's domain."""
    return _MC_LOSS_KERNELS[loss]["values and gradients"](S, y)


def _mc_loss_conj(loss, V, y):
    return _MC_LOSS_KERNELS[loss]["conjugate"](V, y)


def _mc_penalty(coef, W):
    total = coef["l2sq"] * float(np.sum(W * W))
    if coef["l1"] > 0:
        total += coef["l1"] * float(np.sum(np.abs(W)))
    if coef["inputs_l2"] > 0:
        total += coef["inputs_l2"] * float(np.sum(np.sqrt(np.sum(W * W, axis=1))))
    return total


def _mc_soft_rows(Z, c1):
    return _k_l1_prox(Z, c1) if c1 > 0 else Z


def _mc_penalty_conj(coef, Z):
    """R*(Z) for R = c2 ||W||^2 + c1 |W|_1 + cg sum_j ||W_j||. Per input j the supremum is attained at
    W_j = groupshrink(soft(Z_j, c1), cg) / (2 c2) (the sparse group lasso's prox, Simon, Friedman, Hastie &
    Tibshirani 2013), which gives (||soft(Z_j, c1)|| - cg)_+^2 / (4 c2); with c2 = 0 it is the indicator of
    ||soft(Z_j, c1)|| <= cg for every j (the dual ball; `_mc_dual_scale` makes the point feasible)."""
    c2, c1, cg = coef["l2sq"], coef["l1"], coef["inputs_l2"]
    V = _mc_soft_rows(Z, c1)
    if c2 > 0:
        if cg > 0:
            norms = np.sqrt(np.sum(V * V, axis=1))
            return float(np.sum(np.maximum(norms - cg, 0.0) ** 2)) / (4.0 * c2)
        return float(np.sum(V * V)) / (4.0 * c2)
    if cg > 0:
        return _k_inputs_l2_conj(V / cg)
    return 0.0 if np.max(np.abs(V), initial=0.0) <= 1e-12 * max(1.0, c1) else math.inf


def _mc_dual_scale(coef, Z):
    """The largest t <= 1 with R*(t Z) finite (the rescaling of Kim, Koh, Lustig, Boyd & Gorinevsky 2007):
    1 when c2 > 0; otherwise every row must reach ||soft(t Z_j, c1)|| <= cg, increasing in t."""
    c2, c1, cg = coef["l2sq"], coef["l1"], coef["inputs_l2"]
    if c2 > 0:
        return 1.0
    A = np.abs(Z)
    if cg == 0:
        top = float(np.max(A, initial=0.0))
        return 1.0 if top <= c1 else (c1 / top if c1 > 0 else 0.0)
    if c1 == 0:
        top = float(np.max(np.sqrt(np.sum(A * A, axis=1)), initial=0.0))
        return 1.0 if top <= cg else cg / top
    need = np.sqrt(np.sum(np.maximum(A - c1, 0.0) ** 2, axis=1)) > cg
    if not np.any(need):
        return 1.0
    A = A[need]
    lo, hi = np.zeros(A.shape[0]), np.ones(A.shape[0])
    for _ in range(60):  # bisection per row on the monotone ||soft(t a, c1)||
        mid = 0.5 * (lo + hi)
        over = np.sqrt(np.sum(np.maximum(mid[:, None] * A - c1, 0.0) ** 2, axis=1)) > cg
        hi = np.where(over, mid, hi)
        lo = np.where(over, lo, mid)
    return float(np.min(lo))


def _mc_dual_value(d, loss, coef, V, Z):
    """(t, D) for the dual point t U, U = rho V, -X_c^T U = Z, scaled so that R*(t Z) is finite. Scaling keeps
    each row in its conjugate's domain (a convex set holding 0) and keeps sum_i u_i = 0."""
    t = _mc_dual_scale(coef, Z)
    if not t > 0:
        return t, -math.inf
    pos = d.rho > 0
    with np.errstate(all="ignore"):
        conj = float(d.rho[pos] @ _mc_loss_conj(loss, t * V[pos], d.y[pos]))
    return t, -conj - _mc_penalty_conj(coef, t * Z)


def _mc_relative(value, objective):
    return value / max(1.0, abs(objective))


def _mc_gap_floor(P):
    """The least gap a report claims: P and D are sums over the rows rounded to about 1e-16 |P| each, so a gap
    below 1e-15 max(1, |P|) (our own floor, the binary runtime's too) is not resolved (and an exact face would
    otherwise report gap 0 and a distance bound of 0)."""
    return 1e-15 * max(1.0, abs(P))


def _mc_tilt(d, S, loss):
    """The shift a of every row's scores minimizing sum_i rho_i softmax_ce(s_i + a): the exact intercept for
    these weights, by Newton steps in K dimensions (no pass over the table). At the shift the dual point
    rho (softmax(s_i + a) - e_y) sums to zero, as a free intercept's dual constraint asks, to rounding
    (|sum_i u_i| <= 1e-14 sum rho, our own threshold: a few units of rounding in that sum)."""
    a = np.zeros(d.K)
    f, V = _mc_loss_vd(loss, S, d.y)
    scale = float(np.sum(d.rho))
    r = d.rho @ V
    size = float(np.max(np.abs(r)))
    for _ in range(12):
        if size <= 1e-14 * scale:
            break
        Pr = V + d.E
        H = np.diag(d.rho @ Pr) - Pr.T @ (d.rho[:, None] * Pr)
        # H 1 = 0 (shift invariance): adding 1 1^T makes it invertible and leaves the step orthogonal to 1
        H = H + np.full((d.K, d.K), max(float(np.trace(H)) / d.K, 1e-300))
        try:
            step = -np.linalg.solve(H, r)
        except np.linalg.LinAlgError:
            step = -np.linalg.lstsq(H, r, rcond=None)[0]
        t = 1.0
        for _ in range(8):  # Newton's step on the gradient r, halved while it does not shrink r
            f_new, V_new = _mc_loss_vd(loss, S + (a + t * step), d.y)
            r_new = d.rho @ V_new
            if float(np.max(np.abs(r_new))) < size:
                break
            t *= 0.5
        else:
            break
        a, f, V, r = a + t * step, f_new, V_new, r_new
        size = float(np.max(np.abs(r)))
    return a, f, V


class _MCState:
    """A primal point with what the certificate computed there (all in the solver's coordinates)."""

    def __init__(self, W, c, S, f, V, P, grad, gap, t):
        self.W, self.c, self.S, self.f, self.V, self.P, self.grad, self.gap, self.t = W, c, S, f, V, P, grad, gap, t


def _mc_certify(d, loss, coef, W, c):
    """Objective, gradient and duality gap at (W, c), after setting the intercept exactly (softmax_ce).
    Two passes: the scores afresh (no drift from incremental updates) and X_c^T U."""
    S = d.scores(W, c)
    if d.intercept and loss == "softmax_ce":
        a, f, V = _mc_tilt(d, S, loss)
        c = c + a
        S = S + a
    else:
        f, V = _mc_loss_vd(loss, S, d.y)
    P = float(d.rho @ f) + _mc_penalty(coef, W)
    U = d.rho[:, None] * V
    XtU = d.back(U)
    grad = np.concatenate([(XtU + 2.0 * coef["l2sq"] * W).ravel(), np.sum(U, axis=0) if d.intercept else []])
    if d.intercept and loss != "softmax_ce":
        gap, t = math.inf, 0.0  # a hinge's dual point is balanced by its own method
    else:
        t, D = _mc_dual_value(d, loss, coef, V, -XtU)
        gap = P - D
    return _MCState(W, c, S, f, V, P, grad, max(gap, 0.0) if gap == gap else math.inf, t)


# ---------------------------------------------------------------- softmax_ce + l2sq: L-BFGS

def _mc_two_loop(g, memory):
    q = g.copy()
    alphas = []
    for s, yv, r in reversed(memory):
        a = r * float(s @ q)
        alphas.append(a)
        q -= a * yv
    if memory:
        s, yv, _ = memory[-1]
        q *= float(s @ yv) / float(yv @ yv)
    for (s, yv, r), a in zip(memory, reversed(alphas)):
        q += (a - r * float(yv @ q)) * s
    return -q


def _mc_unpack(d, theta):
    size = d.p * d.K
    W = theta[:size].reshape(d.p, d.K)
    return W, (theta[size:] if d.intercept else np.zeros(d.K))


def _mc_pack(d, W, c):
    return np.concatenate([W.ravel(), c if d.intercept else []])


def _mc_lbfgs(d, coef, W, c, tol, budget, memory_size=10):
    """L-BFGS (Nocedal 1980; the two-loop recursion, Nocedal & Wright 2006, Algorithm 7.4) on the smooth
    objective. Its own rather than SciPy's because the score is linear in the parameters: along a direction D
    the scores are S + t X D, so one pass gives every trial step of the (weak Wolfe) line search, and an
    iteration costs two passes. The gap is formed (two passes and the exact intercept) when its predicted value
    passes the test. The first certificate also sets the intercept exactly for the starting weights."""
    c2 = coef["l2sq"]
    loss = "softmax_ce"
    st = _mc_certify(d, loss, coef, W, c)
    if _mc_relative(st.gap, st.P) <= tol:
        return st, "optimal"
    W, c, S, P, g = st.W, st.c, st.S, st.P, st.grad
    best = st
    f, V = st.f, st.V
    memory = []
    last_check = st.gap
    while d.passes < budget:
        d.iterations += 1
        direction = _mc_two_loop(g, memory)
        slope = float(direction @ g)
        if not slope < 0:
            memory, direction = [], -g
            slope = -float(g @ g)
        # the gap at the gradient's dual point is ||g_W||^2 / (4 c2) once the intercept is exact (the loss's
        # Fenchel-Young term vanishes at its own gradient), so it is formed only when that passes the test
        gW = g[:d.p * d.K]
        predicted = float(gW @ gW) / (4.0 * c2)
        if _mc_relative(predicted, P) <= tol and predicted <= 0.25 * last_check:
            st = _mc_certify(d, loss, coef, W, c)
            best = st if _mc_relative(st.gap, st.P) < _mc_relative(best.gap, best.P) else best
            if _mc_relative(st.gap, st.P) <= tol:
                return st, "optimal"
            last_check = st.gap
            W, c, S, P, f, V = st.W, st.c, st.S, st.P, st.f, st.V
            if float(np.max(np.abs(st.grad - g))) > 0:
                g = st.grad
                direction = _mc_two_loop(g, memory)
                slope = float(direction @ g)
                if not slope < 0:
                    memory, direction = [], -g
                    slope = -float(g @ g)
            if d.passes >= budget:
                break
        DW, dc = _mc_unpack(d, direction)
        dS = d.scores(DW, dc)
        WD, DD = float(np.sum(W * DW)), float(np.sum(DW * DW))
        t = 1.0 if memory else min(1.0, 1.0 / max(math.sqrt(float(g @ g)), 1e-300))
        lo, hi = 0.0, math.inf
        accepted = None
        for _ in range(50):
            f_t, V_t = _mc_loss_vd(loss, S + t * dS, d.y)
            val = float(d.rho @ f_t) + c2 * float(np.sum((W + t * DW) ** 2))
            der = float(d.rho @ np.sum(V_t * dS, axis=1)) + 2.0 * c2 * (WD + t * DD)
            if not (math.isfinite(val) and val <= P + 1e-4 * t * slope):
                hi = t
            elif der < 0.9 * slope:
                lo = t
                accepted = (t, f_t, V_t, val)  # acceptable, keep looking for curvature
            else:
                accepted = (t, f_t, V_t, val)
                break
            t = 2.0 * t if hi == math.inf else 0.5 * (lo + hi)
        if accepted is None:
            break
        t, f, V, val = accepted
        W = W + t * DW
        c = c + t * dc
        S = S + t * dS
        U = d.rho[:, None] * V
        XtU = d.back(U)
        g_new = np.concatenate([(XtU + 2.0 * c2 * W).ravel(), np.sum(U, axis=0) if d.intercept else []])
        s_vec, y_vec = t * direction, g_new - g
        sy = float(s_vec @ y_vec)
        if sy > 1e-12 * float(y_vec @ y_vec):
            memory.append((s_vec, y_vec, 1.0 / sy))
            memory = memory[-memory_size:]
        progress = P - val
        P, g = val, g_new
        if progress <= 0 and t * math.sqrt(DD) <= 1e-16 * max(1.0, math.sqrt(float(np.sum(W * W)))):
            break
    st = _mc_certify(d, loss, coef, W, c)
    best = st if _mc_relative(st.gap, st.P) < _mc_relative(best.gap, best.P) else best
    if _mc_relative(best.gap, best.P) <= tol:
        return best, "optimal"
    why = "the pass budget ran out" if d.passes >= budget else "no further progress (rounding)"
    return best, f"stopped: {why} at relative gap {_mc_relative(best.gap, best.P):.3g} (tol {tol:g})"


# ---------------------------------------------------------------- nonsmooth penalties: FISTA

def _mc_prox(coef, Wv, step):
    out = _k_l1_prox(Wv, step * coef["l1"]) if coef["l1"] > 0 else Wv
    if coef["inputs_l2"] > 0:
        out = _k_inputs_l2_prox(out, step * coef["inputs_l2"])
    return out


def _mc_fista(d, loss, coef, W, c, tol, budget):
    """Accelerated proximal gradient (FISTA, Beck & Teboulle 2009) with backtracking on the step and the
    function-value restart of O'Donoghue & Candes (2015); the smooth part is the loss and c2 ||W||^2, the
    prox that of c1 |W|_1 + cg sum_j ||W_j|| (soft threshold, then the group shrink: the sparse group lasso's
    prox). The extrapolated point's scores are the same combination of known scores, so an iteration costs
    two passes (the gradient there and the new point's scores). The gap is checked every 10 iterations."""
    c2 = coef["l2sq"]
    st = _mc_certify(d, loss, coef, W, c)
    best = st
    if _mc_relative(st.gap, st.P) <= tol:
        return st, "optimal"
    W, c, S = st.W, st.c, st.S
    Fx = st.P
    W_prev, c_prev, S_prev = W, c, S
    momentum = 1.0
    L = None
    it = 0
    while d.passes < budget:
        it += 1
        d.iterations += 1
        tn = 0.5 * (1.0 + math.sqrt(1.0 + 4.0 * momentum * momentum))
        beta = (momentum - 1.0) / tn
        Wy, cy, Sy = W + beta * (W - W_prev), c + beta * (c - c_prev), S + beta * (S - S_prev)
        fy, Vy = _mc_loss_vd(loss, Sy, d.y)
        smooth_y = float(d.rho @ fy) + c2 * float(np.sum(Wy * Wy))
        U = d.rho[:, None] * Vy
        gW = d.back(U) + 2.0 * c2 * Wy
        gc = np.sum(U, axis=0)
        if L is None:  # a first guess from the gradient's size, corrected by the backtracking below
            L = max(1e-12, math.sqrt(float(np.sum(gW * gW)) + float(gc @ gc)) / max(1.0, math.sqrt(
                float(np.sum(Wy * Wy)) + float(cy @ cy))))
        while True:
            Wn = _mc_prox(coef, Wy - gW / L, 1.0 / L)
            cn = cy - gc / L if d.intercept else cy
            Sn = d.scores(Wn, cn)
            fn, _ = _mc_loss_vd(loss, Sn, d.y)
            smooth_n = float(d.rho @ fn) + c2 * float(np.sum(Wn * Wn))
            dW, dcv = Wn - Wy, cn - cy
            model = smooth_y + float(np.sum(gW * dW)) + float(gc @ dcv) + 0.5 * L * (float(np.sum(dW * dW))
                                                                                    + float(dcv @ dcv))
            if smooth_n <= model + 1e-12 * abs(smooth_y) or d.passes >= budget:
                break
            L *= 2.0
        Fn = smooth_n + _mc_penalty({**coef, "l2sq": 0.0}, Wn)
        if Fn > Fx:  # restart the momentum from the better point
            momentum = 1.0
            W_prev, c_prev, S_prev = W, c, S
        else:
            momentum = tn
            W_prev, c_prev, S_prev = W, c, S
            W, c, S, Fx = Wn, cn, Sn, Fn
        L *= 0.9  # let the step grow back where the curvature allows
        if it % 10 == 0 or d.passes >= budget:
            st = _mc_certify(d, loss, coef, W, c)
            best = st if _mc_relative(st.gap, st.P) < _mc_relative(best.gap, best.P) else best
            if _mc_relative(st.gap, st.P) <= tol:
                return st, "optimal"
            if st.P < Fx:  # the exact intercept moved the point
                W, c, S, Fx = st.W, st.c, st.S, st.P
                W_prev, c_prev, S_prev, momentum = W, c, S, 1.0
    return best, (f"stopped: the pass budget ran out at relative gap {_mc_relative(best.gap, best.P):.3g} "
                  f"(tol {tol:g})")


# ---------------------------------------------------------------- multiclass hinges + l2sq: dual coordinate ascent

def _mc_dense_rows(d, rows):
    Xr = d.X[rows]
    Xr = Xr.toarray() if d.sparse else Xr
    return Xr - d.m if d.m is not None else Xr


def _mc_balance(d, loss, U):
    """A dual point with sum_i u_i = 0 exactly enough to certify: rows with room are scaled, u_i -> (1 + f_i)
    u_i, with the least-norm f solving sum_i f_i u_i = -sum_i u_i (scaling keeps 0 in reach; growth is
    limited by each row's room in its domain). Returns (U, rows changed) or None when no such f is found."""
    r = np.sum(U, axis=0)
    if float(np.max(np.abs(r))) == 0.0:
        return U, np.zeros(0, dtype=np.intp)
    pos = d.rho > 0
    mag = np.max(np.where(d.E > 0, 0.0, U), axis=1)  # the largest entry off the row's own class (all >= 0)
    room = _MC_HINGES[loss]["dual_room"](U, d.E, d.rho)
    ok = lambda M, f: (np.max(np.abs(M @ f + r)) <= 1e-9 * max(1.0, float(np.max(np.abs(r))))  # noqa: E731
                       and not np.any(f < -1.0) and not np.any(f > room[rows]))
    rows = np.flatnonzero(pos & (mag > 0) & (room > 1e-6))
    M = U[rows].T  # K x |rows|
    f = np.linalg.lstsq(M, -r, rcond=None)[0] if len(rows) else np.zeros(0)
    if not (len(rows) and ok(M, f)):
        # rows at the edge of their domain may only shrink: f = -g, g >= 0 with sum g_i u_i = r (NNLS,
        # Lawson & Hanson 1974, SciPy's when importable)
        rows = np.flatnonzero(pos & (mag > 0))
        if _scipy_optimize is None or len(rows) == 0:
            return None
        M = U[rows].T
        f = -_scipy_optimize.nnls(M, r)[0]
        if not ok(M, f):
            return None
    U = U.copy()
    U[rows] *= (1.0 + f)[:, None]
    return U, rows


def _mc_hinge_certify(d, loss, c2, U, b0):
    """(P, gap, W, S) for the dual point U of `_mc_dual_cd` (which runs with a free intercept only): the primal
    point W = -X_c^T U / (2 c2) afresh with the intercept b0, the dual D of U balanced (`_mc_balanced_dual`)."""
    W = -d.back(U) / (2.0 * c2)
    S = d.scores(W, b0)
    f, _ = _mc_loss_vd(loss, S, d.y)
    P = float(d.rho @ f) + c2 * float(np.sum(W * W))
    D, _Wb = _mc_balanced_dual(d, loss, c2, U, W)
    gap = P - D
    return P, max(gap, 0.0) if gap == gap else math.inf, W, S


def _mc_dual_cd(d, loss, c2, tol, budget, seed=0, block=256):
    """Dual block coordinate ascent for a multiclass hinge with c2 ||W||^2: each row's dual vector is set to
    the exact maximizer of the dual with the others fixed (Keerthi, Sundararajan, Chang, Hsieh & Lin 2008,
    'A sequential dual method for large scale multi-class linear SVMs'; for Crammer & Singer the row
    subproblem is a projection onto a simplex, solved by sorting as in Crammer & Singer 2001). Rows are
    visited in a random order in blocks whose Gram matrix carries the earlier rows' updates to the later
    rows' scores, so NumPy works on a block at a time. A free intercept is handled by the method of
    multipliers (Hestenes 1969, Powell 1969) on sum_i u_i = 0: the intercept is an extra input of value
    sqrt(2 sigma c2) held near the current b0, which moves to the inner solution once that is solved well. Rows whose dual
    vector is 0 and whose margins hold by 1e-3 (our own threshold, common practice in LIBLINEAR's shrinking)
    are skipped until the next full sweep. Each sweep counts 3 passes (block scores, Gram blocks, update),
    each certificate 2 or 3. Used with a free intercept only, after `_mc_hinge_newton` ends uncertified: its
    face solve can miss the optimum's face where the table is separable (wine, cs_hinge at l2sq 0.005: gap
    9e-4, measured), where this method still certifies; on tables whose optimum has most rows at a kink it
    stalls and Newton's answer stands."""
    rng = np.random.default_rng(seed)
    dual_row = _MC_HINGES[loss]["dual_row"]
    n, K = d.n, d.K
    U = np.zeros((n, K))
    W = np.zeros((d.p, K))
    b0 = np.zeros(K)
    sq = np.zeros(n)
    for start in range(0, n, 4096):
        Xr = _mc_dense_rows(d, np.arange(start, min(n, start + 4096)))
        sq[start:start + len(Xr)] = np.sum(Xr * Xr, axis=1)
    d.passes += 1
    sigma = float(np.mean(sq)) / (2.0 * c2) if d.intercept else 0.0
    if d.intercept and sigma == 0.0:
        sigma = 1.0 / (2.0 * c2)
    active = d.rho > 0
    beta = np.zeros(K)  # -sigma sum_i u_i: the intercept's move within the current b0
    best = None
    inner_tol = 1e-2
    full = True
    sweeps = 0
    while d.passes < budget:
        sweeps += 1
        d.iterations += 1
        rows_all = np.flatnonzero(active if not full else d.rho > 0)
        order = rng.permutation(rows_all)
        for start in range(0, len(order), block):
            rows = order[start:start + block]
            Xr = _mc_dense_rows(d, rows)
            Sb = Xr @ W + (b0 + beta)
            # the multiplier method's extra input adds sigma to every entry of the scaled Gram matrix
            G = (Xr @ Xr.T) / (2.0 * c2) + sigma
            Ub = U[rows].copy()
            for j in range(len(rows)):
                i = rows[j]
                yi = d.y[i]
                A = G[j, j]
                g = Sb[j].copy()
                g[yi] -= 1.0
                u = Ub[j]
                if A > 0:
                    z = u + g / A
                else:  # an empty row: the dual is linear in it, so the best vertex
                    z = u + g * 1e300
                new = dual_row(z, yi, d.rho[i])
                delta = new - u
                if np.any(delta != 0.0):
                    Ub[j] = new
                    if j + 1 < len(rows):
                        Sb[j + 1:] -= G[j + 1:, j, None] * delta[None, :]
            dU = Ub - U[rows]
            U[rows] = Ub
            W -= (Xr.T @ dU) / (2.0 * c2)
            if d.intercept:
                beta -= sigma * np.sum(dU, axis=0)
        d.passes += 3 if full else 3 * len(order) / max(1, n)
        b_now = b0 + beta  # the intercept of the current inner problem's primal point
        if full:
            P, gap, W, S = _mc_hinge_certify(d, loss, c2, U, b_now)
            if best is None or _mc_relative(gap, P) < _mc_relative(best[1], best[0]):
                best = (P, gap, W.copy(), b_now)
            if _mc_relative(gap, P) <= tol:
                return best, sweeps, "optimal"
            if d.intercept:
                # the inner (augmented) problem's own gap; the multiplier moves once it is solved to inner_tol,
                # which tightens tenfold per move (an inexact method of multipliers, Rockafellar 1976)
                f_now, _ = _mc_loss_vd(loss, S, d.y)
                su = np.sum(U, axis=0)
                inner = float(d.rho @ f_now) + float(np.sum(U * d.E)) - float(b0 @ su) + \
                    2.0 * c2 * float(np.sum(W * W)) + sigma * float(su @ su)
                if _mc_relative(inner, P) <= inner_tol:
                    b0 = b_now
                    beta = -sigma * su
                    inner_tol = max(0.1 * inner_tol, 0.1 * tol)
            marg = np.where(d.E > 0, -np.inf, S - np.sum(S * d.E, axis=1, keepdims=True) + 1.0)
            active = (d.rho > 0) & ((np.max(np.abs(U), axis=1) > 0) | (np.max(marg, axis=1) > -1e-3))
            full = False
        else:
            full = sweeps % 2 == 0 or np.count_nonzero(active) == 0
    return best, sweeps, (f"stopped: the pass budget ran out at relative gap {_mc_relative(best[1], best[0]):.3g} "
                          f"(tol {tol:g})")


# ---------------------------------------------------------------- multiclass hinges + l2sq: smoothed Newton

def _mc_weighted_gram(d, H, rows, keep, ones=False):
    """sum_i (x_i x_i^T) (kron) H_i over the given rows, as a (K p) x (K p) matrix indexed (class, input), one
    p x p block per pair of classes k <= l summed over the rows whose H_i[k, l] is kept (keep: rows x K x K):
    at small mu a row's Hessian lives on the few classes at its kink, so most pairs skip most rows. With
    `ones` each row is (x_i - m, 1), the last input standing for the intercept (K (p + 1) square)."""
    Xr = _mc_dense_rows(d, rows)
    if ones:
        Xr = np.hstack([Xr, np.ones((len(Xr), 1))])
    Hr, keep = H[rows], keep[rows]
    K, p = d.K, Xr.shape[1]
    out = np.zeros((K, p, K, p))
    for k in range(K):
        for l in range(k, K):
            sel = np.flatnonzero(keep[:, k, l])
            if len(sel) == 0:
                continue
            Xs = Xr[sel]
            block = Xs.T @ (Xs * Hr[sel, k, l, None])
            out[k, :, l, :] = block
            if l != k:
                out[l, :, k, :] = block.T
    return out.reshape(K * p, K * p)


def _mc_spd_solver(A):
    """A solve with the symmetric positive definite A, factored once (SciPy's Cholesky when importable; else
    NumPy's LU, and least squares if A is numerically singular). SciPy is imported here, not at the top: the
    emitted module's own import block names only scipy.optimize."""
    try:
        import scipy.linalg as scipy_linalg
    except ImportError:  # pragma: no cover
        scipy_linalg = None
    if scipy_linalg is not None:
        try:
            factor = scipy_linalg.cho_factor(A)
            return lambda b: scipy_linalg.cho_solve(factor, b)
        except np.linalg.LinAlgError:
            pass

    def solve(b):
        try:
            return np.linalg.solve(A, b)
        except np.linalg.LinAlgError:
            return np.linalg.lstsq(A, b, rcond=None)[0]
    return solve


def _mc_hinge_dual_value(d, c2, U):
    """D(U) = -sum_i u_iy - c2 ||W(U)||^2 with W(U) = -X^T U / (2 c2), for a U inside the hinge's dual domain
    (both hinges' conjugates are v_y there); one pass."""
    Wd = -d.back(U) / (2.0 * c2)
    return -float(np.sum(U * d.E)) - c2 * float(np.sum(Wd * Wd)), Wd


def _mc_hinge_value(d, loss, c2, W, c=None):
    S = d.scores(W, np.zeros(d.K) if c is None else c)
    f, _ = _mc_loss_vd(loss, S, d.y)
    return float(d.rho @ f) + c2 * float(np.sum(W * W)), S


def _mc_face_solve(d, c2, U0, rows, V):
    """(t, c): the free dual entries t maximizing D(U0 + sum_f t_f e_{rows_f} v_f^T) with no bounds, D quadratic
    in t, so one linear system (least norm when the face is degenerate); one pass for W(U0)'s scores. With a
    free intercept the dual must also balance, sum_i u_i = 0: K - 1 equalities A t = -sum_i u0_i (A = V^T less
    its last row; every v_f and every dual row sum to 0 over the classes), whose multipliers are the intercept
    c (last entry 0, the gauge of `_mc_hinge_newton`): the face's conditions v_f^T (s_i + c - e_i) = 0 hold at
    the solution. c is zeros without an intercept."""
    K = d.K
    _D0, W0 = _mc_hinge_dual_value(d, c2, U0)
    S0 = d.scores(W0, np.zeros(K))
    rhs = np.sum(V * (S0[rows] - d.E[rows]), axis=1)  # dD/dt at t = 0
    uniq, where = np.unique(rows, return_inverse=True)
    Xu = _mc_dense_rows(d, uniq)
    M = (Xu @ Xu.T)[where][:, where] * (V @ V.T) / (2.0 * c2)
    if d.intercept:
        # [[M, A^T], [A, 0]] (t, -c) = (rhs, -r0): stationarity M t - A^T c = rhs, and the balance
        A = V.T[:-1]
        M = np.block([[M, A.T], [A, np.zeros((K - 1, K - 1))]])
        rhs = np.concatenate([rhs, -np.sum(U0, axis=0)[:-1]])
    try:
        sol = np.linalg.solve(M, rhs)
    except np.linalg.LinAlgError:
        sol = np.linalg.lstsq(M, rhs, rcond=None)[0]
    F = len(rows)
    return sol[:F], (np.append(-sol[F:], 0.0) if d.intercept else np.zeros(K))


def _mc_face_candidate(d, loss, c2, U, S, mu, rounds=12):
    """The exact optimum on the face the smoothed point points to (an active-set candidate, as the Gram path's
    `_active_set_candidate` does for the Lasso): for cs_hinge the classes whose smoothed weight exceeds 1e-9
    of the row are the ties of the row's max (Crammer & Singer 2001), for ww_hinge the pairs whose margin is
    within 40 mu of 0 are free in [0, rho]; every other dual entry is fixed at its bound. Stationarity on the
    face is one linear system in the free dual entries (the scores are linear in them through W(U)); entries
    that land outside their bounds are fixed at the bound they crossed and the rest solved again (at most
    `rounds` times). With a free intercept the face's solve also balances the dual and gives the intercept
    (`_mc_face_solve`). Returns (primal weights, dual point made feasible by projection, intercept) or None."""
    K = d.K
    rho = d.rho
    live = rho > 0
    classes = np.arange(K)[None, :]
    c = None
    if loss == "cs_hinge":
        support = (U / np.where(live, rho, 1.0)[:, None] + d.E > 1e-9) & live[:, None]
    else:
        margin = 1.0 + S - np.sum(S * d.E, axis=1, keepdims=True)
        off = (d.E == 0) & live[:, None]
        free = off & (np.abs(margin) <= 40.0 * mu)
        upper = off & ~free & (margin > 0)
    for _ in range(rounds):
        if loss == "cs_hinge":
            Q = U / np.where(live, rho, 1.0)[:, None] + d.E
            base = np.argmax(np.where(support, Q, -np.inf), axis=1)  # rows with an empty support keep y
            base = np.where(np.any(support, axis=1), base, d.y)
            U0 = rho[:, None] * (np.eye(K)[base] - d.E)
            rows, cls = np.nonzero(support & (classes != base[:, None]))
            V = np.zeros((len(rows), K))
            V[np.arange(len(rows)), cls] = 1.0
            V[np.arange(len(rows)), base[rows]] -= 1.0
        else:
            U0 = np.where(upper, rho[:, None], 0.0)
            U0 -= d.E * np.sum(U0, axis=1, keepdims=True)
            rows, cls = np.nonzero(free)
            V = np.zeros((len(rows), K))
            V[np.arange(len(rows)), cls] = 1.0
            V[np.arange(len(rows)), d.y[rows]] -= 1.0
        if len(rows) > d.p * K + (K - 1 if d.intercept else 0):  # more ties than the unknowns can meet
            return None
        t, c = _mc_face_solve(d, c2, U0, rows, V) if len(rows) else (np.zeros(0), None)
        U = U0.copy()
        np.add.at(U, rows, t[:, None] * V)
        slack = 1e-12 * rho[rows]
        if loss == "cs_hinge":
            below = t < -slack
            base_low = (U / np.where(live, rho, 1.0)[:, None] + d.E)[np.arange(d.n), base] < -1e-12
            if not (np.any(below) or np.any(base_low)):
                break
            support[rows[below], cls[below]] = False
            support[np.flatnonzero(base_low), base[base_low]] = False
        else:
            below, above = t < -slack, t > rho[rows] + slack
            if not (np.any(below) or np.any(above)):
                break
            free[rows[below | above], cls[below | above]] = False
            upper[rows[above], cls[above]] = True
    W_face = -d.back(U) / (2.0 * c2)
    return W_face, _MC_HINGES[loss]["dual_inside"](U, d.E, rho), (np.zeros(K) if c is None else c)


def _mc_hinge_newton(d, loss, c2, tol, budget, mu0=1.0, shrink=10.0):
    """Newton's method on the hinge smoothed at temperature mu, mu cut tenfold whenever the smoothed problem
    is solved (Newton decrement below mu / 10, our own rule), each point certified on the true goal by the
    dual point its gradient gives. At each cut the point moves along the path's tangent dW/dmu (a predictor,
    as in path-following interior-point methods; kept only if it lowers the new smoothed goal), and from
    mu = 1e-2 on the face the dual point points to is solved exactly (`_mc_face_candidate`), which ends the
    run when that face is the optimum's. The unknowns are the p K weights: each Newton step forms
    sum_i x_i x_i^T (kron) H_i from the (row, class pair) entries whose curvature is not negligible, which
    at small mu are only those at a kink, and solves one (p K) x (p K) system; the step length backtracks
    along the scores, which are linear in it. A step costs 2 passes (X^T U, X D) plus that Gram.

    With a free intercept c (centred coordinates, see `_MCData`) each row reads (x_i - m, 1) and the unknowns
    are W and c less c's last entry: both hinges are unchanged when one number is added to every class's
    score, so the Hessian is singular along c = (1, ..., 1) and that entry stays 0 (a gauge; the user's b
    comes centred from `user_intercept`). The dual point is balanced (sum_i u_i = 0, `_mc_balance`) before it
    certifies, which costs a third pass, and the exact face's solve balances it too (`_mc_face_solve`).
    Returns ((P, gap, W, c), steps, status)."""
    K, p = d.K, d.p
    smoothed = _MC_HINGES[loss]["smoothed"]
    q = p + 1 if d.intercept else p  # unknowns per class: the inputs, and the intercept's entry
    W, c = np.zeros((p, K)), np.zeros(K)
    S = d.scores(W, c) if d.intercept else np.zeros((d.n, K))
    mu = mu0
    row_sq = np.asarray(d.X.multiply(d.X).sum(axis=1)).ravel() if d.sparse else np.einsum("ij,ij->i", d.X, d.X)
    if d.intercept:  # ||(x_i - m, 1)||^2
        row_sq = row_sq - 2.0 * np.asarray(d.X @ d.m, dtype=np.float64).ravel() + float(d.m @ d.m) + 1.0
    # the unknowns' positions in (class, input) order, the gauge's entry left out
    free = np.ones(K * q, dtype=bool)
    if d.intercept:
        free[(K - 1) * q + p] = False
    ridge = np.tile(np.append(np.full(p, 2.0 * c2), np.zeros(q - p)), K)  # 2 c2 on W's entries, none on c

    def stacked(GW, gc):
        """A (p, K) part for W and a (K,) part for c as one vector in (class, input) order."""
        return (np.vstack([GW, gc[None, :]]) if d.intercept else GW).T.ravel()

    def split(v):
        full = np.zeros(K * q)
        full[free] = v
        A = full.reshape(K, q).T
        return A[:p], (A[p] if d.intercept else np.zeros(K))

    best = None  # (P, gap, W, c)
    steps = 0
    while d.passes < budget:
        Fs, U, H, dU = smoothed(S, d.E, d.rho, mu)
        XtU = d.back(U)
        grad = stacked(XtU + 2.0 * c2 * W, np.sum(U, axis=0))
        F = Fs + c2 * float(np.sum(W * W))
        # the certificate of the true goal at (W, c) by the dual point U (balanced first with an intercept):
        # D(U) as in `_mc_hinge_dual_value`, from the same X^T U where no balance moved U
        f, _ = _mc_loss_vd(loss, S, d.y)
        P = float(d.rho @ f) + c2 * float(np.sum(W * W))
        if d.intercept:
            D = _mc_balanced_dual(d, loss, c2, U, -XtU / (2.0 * c2))[0]
        else:
            D = -float(np.sum(U * d.E)) - float(np.sum(XtU * XtU)) / (4.0 * c2)
        gap = max(P - D, _mc_gap_floor(P)) if np.isfinite(D) else math.inf
        if best is None or _mc_relative(gap, P) < _mc_relative(best[1], best[0]):
            best = (P, gap, W.copy(), c.copy())
        if _mc_relative(best[1], best[0]) <= tol:
            return best, steps, "optimal"
        # rows whose curvature is below 1e-12 of the penalty's own are left out of the Newton matrix (the
        # gradient stays exact, so only the step's quality depends on it): at small mu that is every row
        # not at a kink
        keep = np.abs(H) * row_sq[:, None, None] > 1e-12 * 2.0 * c2
        rows = np.flatnonzero(np.any(keep, axis=(1, 2)))
        Hess = _mc_weighted_gram(d, H, rows, keep, ones=d.intercept) if len(rows) else np.zeros((K * q, K * q))
        # the intercept's entries carry no ridge: a damping of 1e-12 of the weights' keeps the system definite
        # where no row at a kink reads a class (our own choice; it only shortens the step along such entries)
        Hess[np.diag_indices(K * q)] += np.where(ridge > 0, ridge, 1e-12 * 2.0 * c2)
        Hess = Hess[np.ix_(free, free)]
        g = grad[free]
        solve = _mc_spd_solver(Hess)
        step = -solve(g)
        decrement = -float(step @ g)
        Dir, dc = split(step)
        XD = d.scores(Dir, dc)
        t = 1.0
        while True:  # backtracking (Armijo) along the scores, which are linear in t: no pass per trial
            Wt = W + t * Dir
            Ft = smoothed(S + t * XD, d.E, d.rho, mu, False) + c2 * float(np.sum(Wt * Wt))
            if Ft <= F - 0.25 * t * decrement or t < 1e-10:
                break
            t *= 0.5
        W, c, S = W + t * Dir, c + t * dc, S + t * XD
        steps += 1
        d.iterations += 1
        if decrement <= 0.1 * mu or t < 1e-10:
            if mu <= 1e-2:
                cand = _mc_face_candidate(d, loss, c2, U, S, mu)
                if cand is not None:
                    Wf, Uf, cf = cand
                    Pf, _Sf = _mc_hinge_value(d, loss, c2, Wf, cf)
                    if d.intercept:
                        Df, Wdf = _mc_balanced_dual(d, loss, c2, Uf)
                    else:
                        Df, Wdf = _mc_hinge_dual_value(d, c2, Uf)
                    Pdf = _mc_hinge_value(d, loss, c2, Wdf, cf)[0] if Wdf is not None else math.inf
                    Pc, Wc = (Pf, Wf) if Pf <= Pdf else (Pdf, Wdf)
                    gc = max(Pc - Df, _mc_gap_floor(Pc)) if np.isfinite(Df) else math.inf
                    if _mc_relative(gc, Pc) < _mc_relative(best[1], best[0]):
                        best = (Pc, gc, Wc.copy(), cf.copy())
                    if _mc_relative(best[1], best[0]) <= tol:
                        return best, steps, "optimal"
            # the predictor: the smoothed minimizer moves along dW/dmu = -Hess^-1 X^T dU/dmu (the tangent of the
            # path, from the last Hessian), which for a piecewise-linear loss is nearly straight at small mu
            new_mu = mu / shrink
            dU2 = smoothed(S, d.E, d.rho, mu)[3]
            tW, tc = split(-solve(stacked(d.back(dU2), np.sum(dU2, axis=0))[free]))
            Wp, cp = W + (new_mu - mu) * tW, c + (new_mu - mu) * tc
            Sp = d.scores(Wp, cp)
            if smoothed(Sp, d.E, d.rho, new_mu, False) + c2 * float(np.sum(Wp * Wp)) < \
                    smoothed(S, d.E, d.rho, new_mu, False) + c2 * float(np.sum(W * W)):
                W, c, S = Wp, cp, Sp
            mu = new_mu
            if mu < 1e-14:  # below this the smoothing is lost in the rounding of the scores
                break
    why = "the pass budget ran out" if d.passes >= budget else "the smoothing reached its floor (mu 1e-14)"
    return best, steps, f"stopped: {why} at relative gap {_mc_relative(best[1], best[0]):.3g} (tol {tol:g})"


def _mc_balanced_dual(d, loss, c2, U, W_of_U=None):
    """(D(U'), W(U')) for U' = U balanced by `_mc_balance` (sum_i u'_i = 0, which a free intercept's dual
    needs), or (-inf, None) where no balance is found: D = -sum_i rho_i L*(u'_i / rho_i) - c2 ||W(U')||^2,
    W(U') = -X_c^T U' / (2 c2); one pass, none when the balance leaves U as it is and `W_of_U` is given."""
    fixed = _mc_balance(d, loss, U)
    if fixed is None:
        return -math.inf, None
    Ub = fixed[0]
    Wb = W_of_U if (Ub is U and W_of_U is not None) else -d.back(Ub) / (2.0 * c2)
    pos = d.rho > 0
    with np.errstate(all="ignore"):
        conj = float(d.rho[pos] @ _mc_loss_conj(loss, Ub[pos] / d.rho[pos, None], d.y[pos]))
    return -conj - c2 * float(np.sum(Wb * Wb)), Wb


# ---------------------------------------------------------------- the entry point

def solve_multiclass(X, labels, K, rho, loss, penalties, intercept, tol=1e-8, max_passes=None, theta0=None):
    """Minimize sum_i rho_i L(s_i, y_i) + sum_k coef_k R_k(W), s_i = W^T x_i + b, to a relative duality gap tol.

    X (n, p) dense or SciPy sparse; labels 0 .. K-1; rho (n,) >= 0; loss in softmax_ce, cs_hinge, ww_hinge;
    penalties a list of (kind, coef), kind in l2sq (||W||_F^2, no half), l1 (sum |W_jk|), inputs_l2
    (sum_j ||W[j, :]||_2); intercept: b free (unpenalized) or absent (zeros). theta0 warm-starts softmax_ce
    (see `_mc_start`); the hinges start from 0 (smoothed Newton without an intercept, dual coordinate ascent
    with one).

    Returns dict(W, b, objective, gap, distance, mu, passes, iterations, status, method): gap = (P - D) /
    max(1, |P|) for the dual point D certifies; distance a proved bound on ||theta - theta*||_2 (sqrt(2 (P - D) / mu))
    when the objective is mu-strongly convex in every learned number (c2 > 0, no intercept: mu = 2 c2),
    else None. Bad input raises ValueError saying what is wrong and where."""
    d, coef = _mc_checked(X, labels, K, rho, loss, penalties, intercept, tol, max_passes)
    budget = max_passes if max_passes is not None else 20000
    c2, c1, cg = coef["l2sq"], coef["l1"], coef["inputs_l2"]
    if loss == "softmax_ce":
        if d.intercept:
            empty = np.flatnonzero(d.rho @ d.E <= 0)
            if len(empty):
                raise ValueError(f"class {int(empty[0])} has no row with a positive factor: with a free intercept "
                                 "softmax_ce has no minimizer (that class's intercept would go to -infinity); "
                                 "drop the class or the intercept")
        if c2 == 0 and c1 == 0 and cg == 0:
            raise ValueError("softmax_ce with no penalty: the NumPy multiclass solver needs l2sq, l1 or inputs_l2 "
                             "with a positive coefficient (without one there may be no minimizer and no dual "
                             "certificate)")
        W, c = _mc_start(d, theta0)
        if c1 == 0 and cg == 0:
            st, status = _mc_lbfgs(d, coef, W, c, tol, budget)
            method = "L-BFGS with an exact line search along the scores and the exact intercept (multiclass)"
        else:
            st, status = _mc_fista(d, loss, coef, W, c, tol, budget)
            method = "FISTA with restarts (multiclass)"
        W, P, gap_abs = st.W, st.P, st.gap
        b = d.user_intercept(W, st.c)
    else:
        if c1 > 0 or cg > 0:
            raise ValueError(f"{loss} with an l1 or inputs_l2 penalty is not supported by the NumPy multiclass "
                             "solver (its dual method needs l2sq alone); use the cvxpy backend")
        if c2 <= 0:
            raise ValueError(f"{loss} needs an l2sq penalty with a positive coefficient in the NumPy multiclass "
                             "solver; use the cvxpy backend otherwise")
        # dual coordinate ascent stalls on weakly penalized tables whose optimum has most rows at a kink (its
        # dual gains about c2 / ||x_i||^2 per row and sweep there, measured in bench/RESULTS.md; with an
        # intercept it was still at gap 0.33 after 1000 passes on a 2000-row table); the smoothed Newton
        # path does not
        (P, gap_abs, W, c), _steps, status = _mc_hinge_newton(d, loss, c2, tol, budget)
        method = "Newton's method on the smoothed hinge, then the exact face (multiclass hinge)"
        if d.intercept and status != "optimal" and d.passes < budget:
            (P2, gap2, W2, c2_), _sweeps, status2 = _mc_dual_cd(d, loss, c2, tol, budget)
            method += "; not certified, so dual coordinate ascent after it"
            # any primal point against any dual point bounds the gap: the lower P with the higher D
            dual = max(P - gap_abs, P2 - gap2)
            if P2 < P:
                P, W, c = P2, W2, c2_
                method += " (its weights kept)"
            gap_abs = P - dual
            status = "optimal" if _mc_relative(gap_abs, P) <= tol else status2
        b = d.user_intercept(W, c)
    if math.isfinite(gap_abs):  # neither the gap nor the distance bound drawn from it below the floor
        gap_abs = max(gap_abs, _mc_gap_floor(P))
    mu = 2.0 * c2 if (c2 > 0 and not d.intercept) else None
    distance = math.sqrt(2.0 * gap_abs / mu) if (mu is not None and math.isfinite(gap_abs)) else None
    return dict(W=np.asarray(W, dtype=np.float64), b=np.asarray(b, dtype=np.float64), objective=float(P),
                gap=float(_mc_relative(gap_abs, P)), distance=distance, mu=mu, passes=int(math.ceil(d.passes)),
                iterations=int(d.iterations),
                status=status, method=method)


def multiclass_gap(X, labels, K, rho, loss, penalties, intercept, W, b):
    """(objective, relative duality gap) certified at the given (W, b), whoever computed it: the dual point is
    built from the (sub)gradients there, with the exact intercept's shift for softmax_ce (so P(W, b) - D is a
    proved bound on P(W, b) - P*) or the balancing of `_mc_balance` for a hinge. For benchmarks and tests."""
    d, coef = _mc_checked(X, labels, K, rho, loss, penalties, intercept, 1.0, None)
    W = np.asarray(W, dtype=np.float64).reshape(d.p, d.K)
    b = np.asarray(b, dtype=np.float64).reshape(d.K) if intercept else np.zeros(d.K)
    c = b + d.m @ W if d.intercept else b
    S = d.scores(W, c)
    f, _ = _mc_loss_vd(loss, S, d.y)
    P = float(d.rho @ f) + _mc_penalty(coef, W)
    if d.intercept and loss == "softmax_ce":
        _a, _f, V = _mc_tilt(d, S, loss)
    else:
        V = _mc_loss_vd(loss, S, d.y)[1]
    U = d.rho[:, None] * V
    if d.intercept and loss != "softmax_ce":
        fixed = _mc_balance(d, loss, U)
        if fixed is None:
            return P, math.inf
        U = fixed[0]
        V = np.where(d.rho[:, None] > 0, U / np.where(d.rho > 0, d.rho, 1.0)[:, None], 0.0)
    _t, D = _mc_dual_value(d, loss, coef, V, -d.back(U))
    return P, _mc_relative(max(P - D, 0.0), P)
