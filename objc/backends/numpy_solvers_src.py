"""Generic solver code that every generated NumPy module carries, copied from here by source.

`numpy_module.emit_module` copies every top-level function and class of this file (not the
imports) into the module it writes, after the spec's own definitions (the per-row bodies, the
penalties and constraints generated from the typed tree, and the `SPEC` table that lists them).
So this file is the one place the solvers live, and the module a user ships is plain Python that
needs only NumPy; SciPy (L-BFGS-B, and HiGHS for the exact finish of an l1 problem) and
threadpoolctl are used when importable.

The functions read a spec table (a plain dict built by the generated module) and the data; none
of them keeps state between calls. The catalog kernels they call (`_k_l1_prox`, `_k_l2_prox`, ...)
are copied into the module by the emitter as well.

Conventions: theta is the flat vector of learned parameters in the order the spec's `learn` line
gives them; s = A theta + offset is the score; a row term k adds sum_i rho_ki phi_k(s_i), with
rho_ki = coefficient x c_i (divided by sum c for `mean`). One "pass" is one product with the data
matrix (X @ v or X.T @ u).
"""

import math

import numpy as np

try:  # optional: SciPy's L-BFGS-B; the module has its own L-BFGS when SciPy is missing
    import scipy.optimize as _scipy_optimize
except ImportError:  # pragma: no cover - exercised through use_scipy=False
    _scipy_optimize = None
try:  # optional: keeps BLAS thread pools from fighting over the cores
    import threadpoolctl as _threadpoolctl
except ImportError:  # pragma: no cover
    _threadpoolctl = None


# ---------------------------------------------------------------- data

class SolverInputError(ValueError):
    """Data or settings the solver cannot use; the message says what and where."""


def _is_sparse(X):
    return hasattr(X, "tocsr") and hasattr(X, "nnz")


def as_data_matrix(X):
    """X as float64 (dense, any memory order, or CSR), copying at most once (float32 -> float64)."""
    if _is_sparse(X):
        X = X.tocsr()
        if X.dtype != np.float64:
            X = X.astype(np.float64)  # copies the nonzero values only
        values = X.data
    else:
        X = np.asarray(X)
        if X.dtype.kind == "c":
            raise SolverInputError("complex data is not supported")
        if X.dtype != np.float64:
            try:
                X = X.astype(np.float64)
            except (TypeError, ValueError) as err:
                raise SolverInputError(f"the data matrix is not numeric: {err}") from None
        values = X
    if X.ndim != 2:
        raise SolverInputError(f"Expected 2D array, got {X.ndim}D array instead")
    if not np.all(np.isfinite(values)):
        raise SolverInputError("the data matrix holds NaN or infinity")
    return X


def _column(X, j):
    if _is_sparse(X):
        return np.asarray(X[:, [j]].toarray()).ravel()
    return X[:, j]


class _Columns:
    """The input columns by name, for per-row bodies that read data (fetched when first asked)."""

    def __init__(self, X, names):
        self._X, self._index, self._cache = X, {n: j for j, n in enumerate(names)}, {}

    def __getitem__(self, name):
        if name not in self._cache:
            if name not in self._index:
                raise SolverInputError(f"the spec reads column {name!r}, which is not among the inputs")
            self._cache[name] = _column(self._X, self._index[name])
        return self._cache[name]


# ---------------------------------------------------------------- the problem

class _RowTerm:
    """One `mean`/`sum` term: rho_i phi(s_i) with phi generated from the spec."""

    def __init__(self, table, rho, y):
        self.index, self.line, self.text = table["index"], table["line"], table["text"]
        self.fn, self.smooth, self.rho, self.y = table["rows"], table["smooth"], rho, y
        self.loss, self.role, self.options = table.get("loss"), table.get("role"), table.get("options", {})
        self.prox_kernel, self.conj_kernel = table.get("prox"), table.get("conjugate")
        self.lipschitz = table.get("lipschitz")
        self.positive = rho > 0.0
        self.all_positive = bool(np.all(self.positive))

    def value_and_derivative(self, s, cols, tun):
        value, d = self.fn(s, self.y, cols, tun)
        n = s.shape[0]
        value = np.broadcast_to(np.asarray(value, dtype=np.float64), (n,))
        d = np.broadcast_to(np.asarray(d, dtype=np.float64), (n,))
        return value, d

    def weighted_sum(self, value):
        # np.sum of the product, not np.dot: BLAS's threaded dot was 10x slower on a busy machine
        if self.all_positive:
            return float(np.sum(self.rho * value))
        return float(np.dot(self.rho[self.positive], value[self.positive]))  # 0 x inf stays 0

    def prox(self, v, g, cols, tun):
        """prox of g * phi at v, lifted from the catalog kernel of l (REFERENCE.md, 'Lifting'), or found
        by bisection for a loss the spec defines (phi convex: p + g phi'(p) - v increases in p)."""
        if self.prox_kernel is None:
            return self._prox_by_bisection(v, g, cols, tun)
        y = self.y
        if self.role == "margin":
            # phi(s) = l(y s): prox(v) = prox_{g y^2 l}(y v) / y; rows with y = 0 have phi constant
            safe = np.where(y != 0.0, y, 1.0)
            p = self.prox_kernel(safe * v, g * safe * safe, **self.options) / safe
            return np.where(y != 0.0, p, v)
        return y - self.prox_kernel(y - v, g, **self.options)

    def _prox_by_bisection(self, v, g, cols, tun):
        # p lies between v and v - g phi'(v), since phi' does not decrease
        d = self.value_and_derivative(v, cols, tun)[1]
        low, high = np.minimum(v, v - g * d), np.maximum(v, v - g * d)
        for _ in range(60):
            mid = 0.5 * (low + high)
            h = mid + g * self.value_and_derivative(mid, cols, tun)[1] - v
            low, high = np.where(h < 0, mid, low), np.where(h < 0, high, mid)
        return 0.5 * (low + high)

    def inside(self, d):
        """d moved into the conjugate's domain where rounding put it just outside (a prox-based
        derivative lies in the subdifferential only up to rounding); the domain holds 0."""
        if self.conj_kernel is None:
            return d
        with np.errstate(all="ignore"):
            bad = ~np.isfinite(self.conjugate(d))
        if not np.any(bad):
            return d
        d = d.copy()
        for shrink in (1e-15, 1e-13, 1e-11, 1e-9, 1e-7, 1e-5, 1e-3, 1e-1, 1.0):
            trial = d[bad] * (1.0 - shrink)
            with np.errstate(all="ignore"):
                ok = np.isfinite(self.conjugate_rows(trial, bad))
            d[np.flatnonzero(bad)[ok]] = trial[ok]
            bad[np.flatnonzero(bad)[ok]] = False
            if not np.any(bad):
                break
        return d

    def conjugate_rows(self, v, rows):
        """phi*(v) for the chosen rows only."""
        y = self.y[rows]
        if self.role == "margin":
            safe = np.where(y != 0.0, y, 1.0)
            return self.conj_kernel(v / safe, **self.options)
        with np.errstate(invalid="ignore"):
            return v * y + self.conj_kernel(-v, **self.options)

    def conjugate(self, v):
        """phi*(v) per row from the catalog conjugate of l (REFERENCE.md, 'Lifting')."""
        y = self.y
        if self.role == "margin":
            safe = np.where(y != 0.0, y, 1.0)
            return self.conj_kernel(v / safe, **self.options)
        with np.errstate(invalid="ignore"):
            return v * y + self.conj_kernel(-v, **self.options)


class _Penalty:
    """A goal term on the parameters alone: coefficient x f(theta[idx])."""

    def __init__(self, table, idx, coef):
        self.index, self.line, self.text = table["index"], table["line"], table["text"]
        self.fn, self.form, self.smooth = table["penalty"], table.get("form"), table["smooth"]
        self.idx, self.coef = idx, coef

    def value_and_gradient(self, theta, tun):
        value, grad = self.fn(theta[self.idx], tun)
        return self.coef * float(value), self.coef * np.broadcast_to(np.asarray(grad, dtype=np.float64),
                                                                     self.idx.shape)


class _Problem:
    """Everything one fit needs: data, layout, terms with their row weights, penalties, constraints."""

    passes = 0


def _indices_of(names, input_names, what):
    index = {n: j for j, n in enumerate(input_names)}
    out = []
    for n in names:
        if n not in index:
            unnamed = tuple(input_names) == tuple(f"x{j}" for j in range(len(input_names)))
            raise SolverInputError(f"{what} names input {n!r}, which is not among the inputs "
                                   f"({', '.join(map(repr, input_names[:8]))}{', ...' if len(input_names) > 8 else ''})"
                                   + ("; X came without column names: pass a pandas DataFrame (or input_names) "
                                      "so the spec's names find their columns" if unnamed else ""))
        out.append(index[n])
    return np.asarray(out, dtype=np.intp)


def _theta_indices(pb, param, entries):
    """Positions in theta of a parameter, or of the chosen entries of a vector parameter."""
    start, size, vector = pb.slots[param]
    if not vector:
        return np.asarray([start], dtype=np.intp)
    if entries is None:
        return np.arange(start, start + size, dtype=np.intp)
    return start + _indices_of(entries, pb.input_names, f"the spec's {param}[...]")


def resolve_tunables(spec, tunables):
    """Tunable values: the spec's defaults, overridden by `tunables`, each within its declared range."""
    tun = dict(spec["tunables"])
    for name, value in (tunables or {}).items():
        if name not in tun:
            known = ", ".join(sorted(tun)) or "none"
            raise SolverInputError(f"unknown tunable {name!r} (the spec declares: {known})")
        value = float(value)
        low, high = spec["tunable_ranges"][name]
        if not (low <= value <= high):
            # the convexity verdict holds for the declared range only
            raise SolverInputError(f"tunable {name} = {value:g} lies outside its declared range {low:g} .. {high:g}")
        tun[name] = value
    return tun


def _bind_score(pb, spec):
    """The layout of theta and the score's blocks (s = A theta + offset) for this data."""
    n, p = pb.n, pb.p
    pb.slots, start = {}, 0
    for name, vector in spec["parameters"]:
        size = p if vector else 1
        pb.slots[name] = (start, size, vector)
        start += size
    pb.size = start
    table = spec["score"]
    pb.standard = table["standard"]
    pb.dot_blocks, pb.scalar_blocks, pb.offset = [], [], None
    for param, entries, sign in table["dots"]:
        cols = np.arange(p, dtype=np.intp) if entries is None else _indices_of(entries, pb.input_names, "the score")
        pb.dot_blocks.append((pb.slots[param][0] + cols, cols, float(sign)))
    for param, entries, sign, coefficient in table["scalars"]:
        k = int(_theta_indices(pb, param, entries)[0])
        coef = 1.0 if coefficient is None else np.broadcast_to(
            np.asarray(coefficient(pb.cols, pb.tun), dtype=np.float64), (n,))
        pb.scalar_blocks.append((k, coef, float(sign)))
    if table["offset"] is not None:
        pb.offset = np.broadcast_to(np.asarray(table["offset"](pb.cols, pb.tun), dtype=np.float64), (n,))
    pb.w_index = pb.dot_blocks[0][0] if pb.standard else None
    pb.b_index = pb.scalar_blocks[0][0] if pb.standard and pb.scalar_blocks else None
    pb.center = None


def _default_input_names(spec, p):
    if spec["inputs"] is not None and len(spec["inputs"]) == p:
        return tuple(spec["inputs"])
    return tuple(f"x{j}" for j in range(p))


def build_problem(spec, X, y, weights, input_names, tunables=None):
    """Bind the spec's terms to the data: row weights, index sets, bounds; checks every input."""
    pb = _Problem()
    pb.spec = spec
    pb.X = as_data_matrix(X)
    n, p = pb.X.shape
    if n == 0 or p == 0:
        raise SolverInputError(f"no data to fit: {n} rows and {p} inputs")
    pb.n, pb.p = n, p
    if input_names is None:
        input_names = _default_input_names(spec, p)
    pb.input_names = tuple(str(nm) for nm in input_names)
    if len(pb.input_names) != p:
        raise SolverInputError(f"{len(pb.input_names)} input names for {p} columns of data")
    if len(set(pb.input_names)) != p:
        raise SolverInputError("input names must be distinct")
    y = np.asarray(y, dtype=np.float64).ravel() if y is not None else np.full(n, np.nan)
    if y.shape[0] != n:
        raise SolverInputError(f"the target has {y.shape[0]} values for {n} rows")
    needs_y = spec["needs_target"]
    if needs_y and not np.all(np.isfinite(y)):
        raise SolverInputError("the target holds NaN or infinity")
    pb.y = y
    c = np.ones(n) if weights is None else np.asarray(weights, dtype=np.float64).ravel()
    if c.shape[0] != n:
        raise SolverInputError(f"{c.shape[0]} row weights for {n} rows")
    if not (np.all(np.isfinite(c)) and np.all(c >= 0.0)):
        raise SolverInputError("row weights must be finite and nonnegative")
    if not np.sum(c) > 0.0:
        raise SolverInputError("every row weight is zero")
    pb.c = c
    pb.tun = resolve_tunables(spec, tunables)
    pb.cols = _Columns(pb.X, pb.input_names)

    _bind_score(pb, spec)

    # ---- terms
    pb.row_terms, pb.penalties, pb.constant = [], [], 0.0
    total_c = float(np.sum(c))
    for table in spec["terms"]:
        coef = float(table["coefficient"](pb.tun))
        if table["kind"] == "rows":
            rho = coef * c / total_c if table["aggregate"] == "mean" else coef * c
            pb.row_terms.append(_RowTerm(table, rho, y))
        elif table["kind"] == "params":
            idx = _theta_indices(pb, table["param"], table["entries"])
            pb.penalties.append(_Penalty(table, idx, coef))
        else:
            pb.constant += coef * float(table["constant"](pb.tun))

    # ---- constraints: per-coordinate intervals, and norm balls
    pb.lo, pb.hi = np.full(pb.size, -np.inf), np.full(pb.size, np.inf)
    pb.l1_balls, pb.l2_balls = [], []
    for con in spec["constraints"]:
        idx = _theta_indices(pb, con["param"], con["entries"])
        if con["kind"] == "interval":
            if con["low"] is not None:
                pb.lo[idx] = np.maximum(pb.lo[idx], float(con["low"](pb.tun)))
            if con["high"] is not None:
                pb.hi[idx] = np.minimum(pb.hi[idx], float(con["high"](pb.tun)))
        else:
            radius = float(con["radius"](pb.tun))
            if radius < 0:
                raise SolverInputError(f"spec line {con['line']}: a norm ball needs a nonnegative radius")
            (pb.l1_balls if con["kind"] == "l1 ball" else pb.l2_balls).append((idx, radius))
    if np.any(pb.lo > pb.hi):
        raise SolverInputError("the constraints contradict each other (a lower bound above an upper bound)")
    _plan_prox(pb)
    pb.center = None
    pb.passes = 0
    pb.row_reads = 0  # rows read one by one (balancing the dual point); n of them count as a pass
    return pb


def _plan_prox(pb):
    """Per-coordinate l1 weights, groups, and whether the nonsmooth part has an exact prox here."""
    pb.alpha = np.zeros(pb.size)  # l1 weight per coordinate
    pb.beta = np.zeros(pb.size)   # ridge weight per coordinate: (beta/2) theta_j^2 (for the gap only)
    pb.groups = []                # (idx, lam): lam * ||theta[idx]||_2
    pb.other_nonsmooth = []       # nonsmooth penalties with no prox here
    pb.other_smooth = False       # smooth penalties that are not plain ridge terms
    for pen in pb.penalties:
        if pen.form == "l1":
            np.add.at(pb.alpha, pen.idx, pen.coef)
        elif pen.form == "l2":
            pb.groups.append((pen.idx, pen.coef))
        elif pen.form == "l2sq":
            np.add.at(pb.beta, pen.idx, 2.0 * pen.coef)
        elif pen.smooth:
            pb.other_smooth = True
        else:
            pb.other_nonsmooth.append(pen)
    if pb.spec["accepted"]:  # a concave penalty (negative weight) only runs under allow_nonconvex
        if np.any(pb.alpha < 0) or any(lam < 0 for _, lam in pb.groups) or np.any(pb.beta < 0):
            raise SolverInputError("a penalty has a negative weight")
    in_group = np.zeros(pb.size, dtype=int)
    for idx, _ in pb.groups:
        in_group[idx] += 1
    in_ball = np.zeros(pb.size, dtype=int)
    for idx, _ in pb.l1_balls + pb.l2_balls:
        in_ball[idx] += 1
    bounded = np.isfinite(pb.lo) | np.isfinite(pb.hi)
    problems = []
    if np.any(in_group > 1):
        problems.append("two group norms share an input")
    if np.any(in_ball > 1):
        problems.append("two norm balls share an input")
    for idx, _ in pb.groups:
        if np.any(bounded[idx]) or np.any(in_ball[idx]):
            problems.append("a group norm and a constraint share an input")
        if np.any(pb.alpha[idx] > 0) and not np.all(pb.alpha[idx] > 0):
            problems.append("an l1 penalty covers part of a group")
    for idx, _ in pb.l2_balls:
        if np.any(bounded[idx]) or np.any(pb.alpha[idx] > 0):
            problems.append("an l2 ball shares inputs with another nonsmooth term")
    pb.prox_problems = tuple(dict.fromkeys(problems))
    pb.has_prox_part = bool(np.any(pb.alpha > 0) or pb.groups or np.any(bounded) or pb.l1_balls or pb.l2_balls)


# ---------------------------------------------------------------- score and its adjoint

def score(pb, theta):
    """s = A theta + offset (one pass, none when w = 0)."""
    if pb.standard:
        w = theta[pb.w_index]
        if np.any(w):
            pb.passes += 1
            s = np.asarray(pb.X @ w, dtype=np.float64).ravel()
        else:  # the usual start: no product needed
            s = np.zeros(pb.n)
        if pb.b_index is not None:
            # with centring the intercept coordinate holds b' = b + m.w, and s = (X - 1 m^T) w + b'
            s = s + (theta[pb.b_index] - float(np.dot(pb.center, w)) if pb.center is not None else theta[pb.b_index])
        return s
    pb.passes += 1
    w = np.zeros(pb.p)
    for tidx, cols, sign in pb.dot_blocks:
        w[cols] += sign * theta[tidx]
    s = np.asarray(pb.X @ w, dtype=np.float64).ravel()
    for k, coef, sign in pb.scalar_blocks:
        s = s + sign * coef * theta[k]
    if pb.offset is not None:
        s = s + pb.offset
    return s


def adjoint(pb, u):
    """A^T u (one pass); u may hold several columns, read in the same pass."""
    pb.passes += 1
    Xtu = np.asarray(pb.X.T @ u, dtype=np.float64)
    g = np.zeros((pb.size,) + u.shape[1:])
    if pb.standard:
        g[pb.w_index] = Xtu
        if pb.b_index is not None:
            total = u.sum(axis=0)
            g[pb.b_index] = total
            if pb.center is not None:
                g[pb.w_index] -= np.multiply.outer(pb.center, total) if u.ndim > 1 else pb.center * total
        return g
    for tidx, cols, sign in pb.dot_blocks:
        g[tidx] += sign * Xtu[cols]
    for k, coef, sign in pb.scalar_blocks:
        g[k] += sign * (coef @ u if np.ndim(coef) else coef * u.sum(axis=0))
    return g


# ---------------------------------------------------------------- objective pieces

def rows_part(pb, s, mu=0.0):
    """Sum of the row terms at s, its derivative in s (u), and each term's per-row derivative.

    With mu > 0 every nonsmooth row term is replaced by its Moreau envelope of parameter mu
    (Nesterov 2005): env(s) = phi(p) + (s - p)^2 / (2 mu) with p = prox_{mu phi}(s), whose
    derivative (s - p) / mu is a subgradient of phi at p.
    """
    total, u, derivs = 0.0, np.zeros(pb.n), []
    for term in pb.row_terms:
        if mu > 0.0 and not term.smooth:
            p = term.prox(s, mu, pb.cols, pb.tun)
            value, _ = term.value_and_derivative(p, pb.cols, pb.tun)
            d = term.inside((s - p) / mu)
            value = value + 0.5 * mu * d * d
        else:
            value, d = term.value_and_derivative(s, pb.cols, pb.tun)
        total += term.weighted_sum(value)
        u += term.rho * d
        derivs.append(d)
    return total, u, derivs


def true_rows_value(pb, s):
    return sum(term.weighted_sum(term.value_and_derivative(s, pb.cols, pb.tun)[0]) for term in pb.row_terms)


def smooth_penalties(pb, theta):
    """Value and gradient of the smooth parameter terms (ridge and other smooth penalties)."""
    value, grad = 0.0, np.zeros(pb.size)
    for pen in pb.penalties:
        if pen.smooth:
            v, g = pen.value_and_gradient(theta, pb.tun)
            value += v
            np.add.at(grad, pen.idx, g)
    return value, grad


def nonsmooth_penalties(pb, theta):
    return sum(pen.value_and_gradient(theta, pb.tun)[0] for pen in pb.penalties if not pen.smooth)


def feasible(pb, theta, slack=1e-9):
    scale = 1.0 + np.abs(theta)
    if np.any(theta < pb.lo - slack * scale) or np.any(theta > pb.hi + slack * scale):
        return False
    for idx, r in pb.l1_balls:
        if np.sum(np.abs(theta[idx])) > r * (1 + slack) + slack:
            return False
    for idx, r in pb.l2_balls:
        if np.sqrt(np.sum(theta[idx] ** 2)) > r * (1 + slack) + slack:
            return False
    return True


def objective_value(pb, theta, s=None):
    """The spec's objective (no smoothing), from s if given; +inf outside the constraints."""
    if s is None:
        s = score(pb, theta)
    if not feasible(pb, theta):
        return math.inf
    value = true_rows_value(pb, s) + smooth_penalties(pb, theta)[0] + nonsmooth_penalties(pb, theta)
    return float(value + pb.constant)


def term_values(pb, theta):
    """Each goal term's value (coefficient included), in the spec's order."""
    s = score(pb, theta)
    out = {}
    for term in pb.row_terms:
        out[term.index] = term.weighted_sum(term.value_and_derivative(s, pb.cols, pb.tun)[0])
    for pen in pb.penalties:
        out[pen.index] = pen.value_and_gradient(theta, pb.tun)[0]
    for table in pb.spec["terms"]:
        if table["kind"] == "constant":
            out[table["index"]] = float(table["coefficient"](pb.tun)) * float(table["constant"](pb.tun))
    return tuple(out[k] for k in sorted(out))


# ---------------------------------------------------------------- prox of the nonsmooth part

def _soft(v, g):
    return _k_l1_prox(v, g)


def _project_l1_ball(v, lo, hi, alpha, radius):
    """argmin over the ball ||x||_1 <= radius and lo <= x <= hi of alpha.|x| + ||x - v||^2 / 2.

    For one coordinate the answer is clip(soft(v, alpha + tau), lo, hi) (prox of a 1-D convex
    function plus an interval is the clipped prox); tau >= 0 prices the ball and is found by
    bisection, since the L1 norm of that point does not increase with tau.
    """
    def at(tau):
        return np.clip(_soft(v, alpha + tau), lo, hi)

    x = at(0.0)
    if np.sum(np.abs(x)) <= radius:
        return x
    low, high = 0.0, float(np.max(np.abs(v))) + 1.0
    if np.sum(np.abs(at(high))) > radius * (1 + 1e-12):
        raise SolverInputError("the constraints cannot all hold: the bounds keep every point outside the L1 ball")
    for _ in range(100):
        mid = 0.5 * (low + high)
        if np.sum(np.abs(at(mid))) > radius:
            low = mid
        else:
            high = mid
        if high - low <= 1e-15 * (1.0 + high):
            break
    return at(high)


def prox(pb, v, step):
    """prox of step * (l1 and group penalties) plus the projection on the constraints."""
    x = np.array(v, dtype=np.float64, copy=True)
    in_ball = np.zeros(pb.size, dtype=bool)
    for idx, radius in pb.l1_balls:
        x[idx] = _project_l1_ball(v[idx], pb.lo[idx], pb.hi[idx], step * pb.alpha[idx], radius)
        in_ball[idx] = True
    rest = ~in_ball
    if np.any(pb.alpha > 0):
        x[rest] = _soft(x[rest], step * pb.alpha[rest])
    for idx, lam in pb.groups:
        x[idx] = _k_l2_prox(x[idx], step * lam)
    x[rest] = np.clip(x[rest], pb.lo[rest], pb.hi[rest])
    for idx, radius in pb.l2_balls:
        norm = np.sqrt(np.sum(x[idx] ** 2))
        if norm > radius:
            x[idx] *= radius / norm
    return x


# ---------------------------------------------------------------- certificates

def gap_available(pb):
    """Whether the duality gap can be formed: conjugates known for every term, a separable penalty."""
    if not pb.standard or pb.l1_balls or pb.l2_balls or pb.other_nonsmooth or pb.other_smooth:
        return False
    if not all(t.conj_kernel is not None and t.role in ("margin", "residual") for t in pb.row_terms):
        return False
    if any(np.any(t.rho < 0) for t in pb.row_terms):
        return False
    for idx, _ in pb.groups:
        if np.any(pb.alpha[idx] > 0) or np.ptp(pb.beta[idx]) > 0:
            return False
    free = _free_coordinates(pb)
    return all(k == pb.b_index for k in free)


def _free_coordinates(pb):
    """Coordinates with no penalty and no bound: the dual must have A^T u = 0 there."""
    grouped = np.zeros(pb.size, dtype=bool)
    for idx, _ in pb.groups:
        grouped[idx] = True
    free = (pb.alpha == 0) & (pb.beta == 0) & ~grouped & np.isneginf(pb.lo) & np.isposinf(pb.hi)
    return [int(k) for k in np.flatnonzero(free)]


def _separable_conjugate(z, alpha, beta, lo, hi):
    """r*(z) for r(x) = alpha |x| + (beta/2) x^2 + indicator(lo <= x <= hi), per coordinate."""
    out = np.zeros_like(z)
    pos = beta > 0
    if np.any(pos):
        xs = np.clip(_soft(z[pos], alpha[pos]) / beta[pos], lo[pos], hi[pos])
        out[pos] = z[pos] * xs - alpha[pos] * np.abs(xs) - 0.5 * beta[pos] * xs * xs
    lin = ~pos
    if np.any(lin):
        zl, al, lol, hil = z[lin], alpha[lin], lo[lin], hi[lin]
        best = np.full(zl.shape, -np.inf)
        with np.errstate(invalid="ignore"):
            for cand in (lol, hil, np.clip(0.0, lol, hil)):
                val = np.where(np.isfinite(cand), zl * cand - al * np.abs(cand), -np.inf)
                best = np.maximum(best, val)
        unbounded = (np.isposinf(hil) & (zl > al)) | (np.isneginf(lol) & (zl < -al))
        out[lin] = np.where(unbounded, np.inf, best)
    return out


def _dual_scale(pb, z):
    """The largest t <= 1 with R*(t z) finite (the rescaling of Kim et al. 2007)."""
    t = 1.0
    lin = pb.beta == 0
    for idx, _ in pb.groups:  # a group's coordinates are priced by its norm below
        lin[idx] = False
    up = lin & np.isposinf(pb.hi) & (z > pb.alpha)
    down = lin & np.isneginf(pb.lo) & (z < -pb.alpha)
    for mask in (up, down):
        if np.any(mask):
            t = min(t, float(np.min(pb.alpha[mask] / np.abs(z[mask]))))
    for idx, lam in pb.groups:
        if pb.beta[idx[0]] == 0:
            norm = float(np.sqrt(np.sum(z[idx] ** 2)))
            if norm > lam:
                t = min(t, lam / norm)
    return t


def _penalty_conjugate(pb, z):
    grouped = np.zeros(pb.size, dtype=bool)
    total = 0.0
    for idx, lam in pb.groups:
        grouped[idx] = True
        norm = float(np.sqrt(np.sum(z[idx] ** 2)))
        b = pb.beta[idx[0]]
        if b > 0:
            total += max(norm - lam, 0.0) ** 2 / (2.0 * b)
        elif norm > lam * (1 + 1e-12):
            return math.inf
    rest = ~grouped
    total += float(np.sum(_separable_conjugate(z[rest], pb.alpha[rest], pb.beta[rest], pb.lo[rest], pb.hi[rest])))
    return total


def dual_adjoint_inputs(pb, derivs):
    """u = sum over row terms of rho * d: the vector whose adjoint is the gradient (and the dual point)."""
    u = np.zeros(pb.n)
    for term, d in zip(pb.row_terms, derivs):
        u += term.rho * d
    return u


# at most this share of the rows may be touched to balance the dual point without a pass
_BALANCE_ROWS = 1.0 / 64.0


def _balance_rows(pb, u):
    """Rows whose derivatives shrink toward 0 so that sum u = 0 (a free intercept's dual constraint).

    Shrinking a row's derivatives keeps them in every conjugate's domain (a convex set holding 0).
    The largest rows on the side with the surplus go first, so few rows move (one, once the
    intercept is nearly optimal); A^T of the change then costs only those rows. Returns (rows,
    factors) or None when more than a small share of the rows would have to move."""
    r = float(np.sum(u))
    if r == 0.0:
        return np.zeros(0, dtype=np.intp), np.zeros(0)
    a = u if r > 0 else -u
    need = abs(r)
    j = int(np.argmax(a))
    if a[j] >= need:
        return np.asarray([j], dtype=np.intp), np.asarray([(a[j] - need) / a[j]])
    limit = max(1, int(pb.n * _BALANCE_ROWS))
    if limit >= pb.n:
        order = np.argsort(-a)
    else:
        top = np.argpartition(-a, limit - 1)[:limit]
        order = top[np.argsort(-a[top])]
    cum = np.cumsum(a[order])
    if cum[-1] < need:
        return None
    k = int(np.searchsorted(cum, need))
    rows = order[:k + 1]
    factors = np.zeros(k + 1)
    factors[k] = (cum[k] - need) / a[order[k]]
    return rows, factors


def _adjoint_of_rows(pb, rows, delta):
    """A^T delta for delta nonzero on a few rows only (reads those rows, not the table)."""
    pb.row_reads += len(rows)
    g = np.zeros(pb.size)
    Xr = pb.X[rows]
    g[pb.w_index] = np.asarray(Xr.T @ delta, dtype=np.float64).ravel()
    total = float(np.sum(delta))
    g[pb.b_index] = total
    if pb.center is not None:
        g[pb.w_index] -= pb.center * total
    return g


def duality_gap(pb, theta, P, derivs, Atu):
    """P(theta) - D(u) for the dual point u built from the per-row derivatives (REFERENCE.md).

    `Atu` is A^T u, u = dual_adjoint_inputs(pb, derivs) (the gradient's own pass). A free intercept
    needs sum u = 0: a few rows on the side with the surplus shrink toward zero (`_balance_rows`),
    or, when that would take many rows, the whole side is scaled down at the price of one more
    pass; then the whole point is scaled by t (Kim et al. 2007) so the penalty's conjugate is
    finite. Returns +inf when no finite dual value is found.
    """
    if pb.balance:
        u = dual_adjoint_inputs(pb, derivs)
        fix = _balance_rows(pb, u)
        if fix is not None:
            rows, f = fix
            z = -Atu
            if len(rows):
                z = z - _adjoint_of_rows(pb, rows, (f - 1.0) * u[rows])
            derivs = [d.copy() if len(rows) else d for d in derivs]
            for d in derivs:
                if len(rows):
                    d[rows] *= f
        else:
            plus_total = float(np.sum(np.maximum(u, 0.0)))
            minus_total = -float(np.sum(np.minimum(u, 0.0)))
            r_plus = min(1.0, minus_total / plus_total) if plus_total > 0 else 1.0
            r_minus = min(1.0, plus_total / minus_total) if minus_total > 0 else 1.0
            At_plus = adjoint(pb, np.maximum(u, 0.0))
            z = -(r_plus * At_plus + r_minus * (Atu - At_plus))
            row_factor = np.where(u > 0, r_plus, r_minus)
            derivs = [d * row_factor for d in derivs]
        z = np.array(z, dtype=np.float64, copy=True)
        z[pb.b_index] = 0.0  # balanced exactly; drop the rounding
    else:
        z = -Atu
    t = _dual_scale(pb, z)
    if not t > 0.0:
        return math.inf
    conj = 0.0
    with np.errstate(all="ignore"):
        for term, d in zip(pb.row_terms, derivs):
            values = term.conjugate(t * d)
            conj += term.weighted_sum(values)
    dual = -conj - _penalty_conjugate(pb, t * z)
    gap = P - (dual + pb.constant)
    return gap if np.isfinite(gap) else math.inf


def relative(value, objective):
    return value / max(1.0, abs(objective))


# ---------------------------------------------------------------- the smooth model

class _Evaluation:
    """Everything computed at one theta: score, value, gradient and the certificate's inputs."""

    def __init__(self, theta, s, f, grad, derivs, Atu):
        self.theta, self.s, self.f, self.grad, self.derivs, self.Atu = theta, s, f, grad, derivs, Atu


def evaluate_smooth(pb, theta, mu=0.0, s=None):
    """f (row terms, smoothed when mu > 0, plus smooth penalties) and its gradient at theta."""
    if s is None:
        s = score(pb, theta)
    rows, _u, derivs = rows_part(pb, s, mu)
    Atu = adjoint(pb, dual_adjoint_inputs(pb, derivs))
    pen, pgrad = smooth_penalties(pb, theta)
    grad = Atu + pgrad
    return _Evaluation(theta, s, rows + pen + pb.constant, grad, derivs, Atu)


def certificate(pb, ev, P, residual):
    """('duality gap' or 'optimality residual', absolute value)."""
    if pb.use_gap:
        return "duality gap", duality_gap(pb, ev.theta, P, ev.derivs, ev.Atu)
    return "optimality residual", residual


# ---------------------------------------------------------------- L-BFGS

def _two_loop(grad, memory):
    q = grad.copy()
    alphas = []
    for s_k, y_k, rho_k in reversed(memory):
        a = rho_k * np.dot(s_k, q)
        alphas.append(a)
        q -= a * y_k
    if memory:
        s_k, y_k, _ = memory[-1]
        q *= np.dot(s_k, y_k) / np.dot(y_k, y_k)
    for (s_k, y_k, rho_k), a in zip(memory, reversed(alphas)):
        b = rho_k * np.dot(y_k, q)
        q += (a - b) * s_k
    return -q


def lbfgs_own(fun, theta0, stop, max_iter, memory_size=10):
    """L-BFGS with the two-loop recursion and a backtracking (Armijo) line search.

    Used when SciPy is not importable. `fun(theta)` returns (f, grad); `stop(theta, f)` returns
    True to end. Returns (theta, iterations, status).
    """
    theta = np.array(theta0, dtype=np.float64, copy=True)
    f, g = fun(theta)
    memory = []
    for it in range(1, max_iter + 1):
        if stop(theta, f):
            return theta, it - 1, "converged"
        direction = _two_loop(g, memory)
        slope = float(np.dot(direction, g))
        if not slope < 0:
            memory, direction, slope = [], -g, -float(np.dot(g, g))
        step = 1.0 if memory else min(1.0, 1.0 / max(np.sqrt(-slope), 1e-300))
        for _ in range(60):
            trial = theta + step * direction
            f_new, g_new = fun(trial)
            if np.isfinite(f_new) and f_new <= f + 1e-4 * step * slope:
                break
            step *= 0.5
        else:
            return theta, it, "line search failed"
        s_k, y_k = trial - theta, g_new - g
        sy = float(np.dot(s_k, y_k))
        if sy > 1e-12 * float(np.dot(y_k, y_k)):
            memory.append((s_k, y_k, 1.0 / sy))
            memory = memory[-memory_size:]
        if f - f_new <= 0 and np.allclose(trial, theta, rtol=0, atol=0):
            return trial, it, "no progress"
        theta, f, g = trial, f_new, g_new
    return theta, max_iter, "max iterations"


def lbfgs_scipy(fun, theta0, stop, max_iter, bounds=None):
    """SciPy's L-BFGS-B with our stopping rule in its callback (its own tests switched off)."""
    state = {"theta": np.array(theta0, dtype=np.float64, copy=True), "iterations": 0}

    def callback(intermediate_result):
        state["iterations"] += 1
        state["theta"] = np.array(intermediate_result.x, copy=True)
        if stop(state["theta"], float(intermediate_result.fun)):
            raise StopIteration

    result = _scipy_optimize.minimize(fun, theta0, jac=True, method="L-BFGS-B", bounds=bounds, callback=callback,
                                      options={"maxiter": max_iter, "maxfun": 2 * max_iter + 20, "ftol": 0.0,
                                               "gtol": 0.0, "maxcor": 10})
    if result.status == 99 or "callback" in str(result.message).lower():
        return state["theta"], state["iterations"], "converged"
    status = "max iterations" if result.status == 1 else "no progress"
    return np.array(result.x, copy=True), state["iterations"], status


# ---------------------------------------------------------------- the methods

class _Run:
    """Bookkeeping shared by the methods: passes budget, progress, the best certified point."""

    def __init__(self, pb, tol, max_passes, progress):
        self.pb, self.tol, self.max_passes, self.progress = pb, tol, max_passes, progress
        self.iterations, self.cert_kind, self.cert_abs, self.objective = 0, None, math.inf, math.inf
        self.theta = None
        self.smoothing = None

    def record(self, theta, P, kind, absolute):
        self.iterations += 1
        if self.theta is None or absolute <= self.cert_abs or not np.isfinite(self.cert_abs):
            self.theta, self.objective, self.cert_kind, self.cert_abs = np.array(theta, copy=True), P, kind, absolute
        if self.progress is not None:
            self.progress(self.pb.passes, P, relative(absolute, P))
        return relative(absolute, P) <= self.tol

    def note(self, P):
        """An iteration whose certificate was not formed (progress gets None for it)."""
        self.iterations += 1
        if self.progress is not None:
            self.progress(self.pb.passes, P, None)

    def out_of_passes(self):
        return self.pb.passes >= self.max_passes


def _lbfgs_driver(run, theta0, mu, inner_stop, use_scipy):
    """Minimize the smooth model (smoothed with mu) by L-BFGS; inner_stop(ev, P) ends the run."""
    pb = run.pb
    cache = {}

    def fun(theta):
        with np.errstate(over="ignore", invalid="ignore"):
            ev = evaluate_smooth(pb, theta, mu)
        cache["ev"] = ev
        if not (np.isfinite(ev.f) and np.all(np.isfinite(ev.grad))):
            # overflow (an exponential loss far out): a value too large to accept, so the line search
            # steps back; the gradient is never used at a rejected point
            return 1e300, np.zeros_like(theta)
        return ev.f, ev.grad

    def stop(theta, f):
        ev = cache.get("ev")
        if ev is None or not np.array_equal(ev.theta, theta):
            ev = evaluate_smooth(pb, theta, mu)
            cache["ev"] = ev
        return inner_stop(ev) or run.out_of_passes()

    max_iter = max(1, run.max_passes)
    if use_scipy and _scipy_optimize is not None:
        return lbfgs_scipy(fun, theta0, stop, max_iter)
    return lbfgs_own(fun, theta0, stop, max_iter)


def _gap_out_of_reach(pb, ev, P, tol):
    """A cheap test that the gap cannot pass yet, so it is not formed (it costs about a third of a pass).

    For a smooth loss and a ridge weight beta_j > 0 on every weight, Fenchel-Young is tight at the
    dual point u = rho l'(s), and the gap equals sum_j grad_j^2 / (2 beta_j) over the weights when
    sum u = 0 (balancing a free intercept's dual only changes it a little near the optimum). While
    that estimate exceeds a hundred times the tolerance, the certificate is skipped; a skipped last
    point is certified before the method returns, so this only saves work."""
    if not pb.use_gap or not pb.standard or pb.has_prox_part:
        return False
    w = pb.w_index
    beta = pb.beta[w]
    if not np.all(beta > 0):
        return False
    estimate = 0.5 * float(np.sum(ev.grad[w] ** 2 / beta))
    return estimate > 100.0 * tol * max(1.0, abs(P))


def method_lbfgs(run, theta0, use_scipy):
    pb = run.pb
    done = {"skipped": False}

    def inner_stop(ev, force=False):
        P = ev.f + nonsmooth_penalties(pb, ev.theta)
        done["skipped"] = not force and _gap_out_of_reach(pb, ev, P, run.tol)
        if done["skipped"]:
            run.note(P)
            return False
        kind, absolute = certificate(pb, ev, P, float(np.sqrt(np.dot(ev.grad, ev.grad))))
        return run.record(ev.theta, P, kind, absolute)

    theta, _, status = _lbfgs_driver(run, theta0, 0.0, inner_stop, use_scipy)
    if run.theta is None or done["skipped"]:
        inner_stop(evaluate_smooth(pb, theta), force=True)
    return status


def method_fista(run, theta0, mu=0.0, inner_stop=None):
    """Accelerated proximal gradient (Beck & Teboulle 2009) with backtracking and gradient restart
    (O'Donoghue & Candes 2015). The certificate at x_{k+1} uses the dual point from y_k, so it
    costs no extra pass: P(x_{k+1}) - D(u(y_k)) still bounds the excess of x_{k+1}."""
    pb = run.pb
    x = prox(pb, np.asarray(theta0, dtype=np.float64), 1.0)
    s_x = score(pb, x)
    y, s_y, t = x, s_x, 1.0
    L = None
    while True:
        ev = evaluate_smooth(pb, y, mu, s=s_y)
        if L is None:
            L = _initial_lipschitz(pb, y, ev, mu)
        while True:
            x_new = prox(pb, y - ev.grad / L, 1.0 / L)
            s_new = score(pb, x_new)
            rows_new = rows_part(pb, s_new, mu)[0]
            f_new = rows_new + smooth_penalties(pb, x_new)[0] + pb.constant
            diff = x_new - y
            bound = ev.f + float(np.dot(ev.grad, diff)) + 0.5 * L * float(np.dot(diff, diff))
            if f_new <= bound + 1e-12 * abs(bound) or run.out_of_passes():
                break
            L *= 2.0
        P_new = (f_new if mu == 0.0 else true_rows_value(pb, s_new) + smooth_penalties(pb, x_new)[0] + pb.constant) \
            + nonsmooth_penalties(pb, x_new)
        residual = L * float(np.sqrt(np.dot(diff, diff)))
        kind, absolute = certificate(pb, ev, P_new, residual)
        if inner_stop is not None:
            if inner_stop(ev, x_new, P_new, kind, absolute):
                return "converged"
        elif run.record(x_new, P_new, kind, absolute):
            return "converged"
        if run.out_of_passes():
            return "max passes"
        if float(np.dot(y - x_new, x_new - x)) > 0:  # the momentum points uphill: restart it
            t = 1.0
        t_new = 0.5 * (1.0 + math.sqrt(1.0 + 4.0 * t * t))
        beta = (t - 1.0) / t_new
        y = x_new + beta * (x_new - x)
        s_y = s_new + beta * (s_new - s_x)
        x, s_x, t = x_new, s_new, t_new
        L *= 0.95  # let the step grow back slowly after a cautious backtrack


def _initial_lipschitz(pb, theta, ev, mu):
    """A first guess of the gradient's Lipschitz constant from one nearby gradient."""
    g_norm = float(np.sqrt(np.dot(ev.grad, ev.grad)))
    h = 1e-3 * (1.0 + float(np.sqrt(np.dot(theta, theta)))) / max(g_norm, 1e-12)
    other = evaluate_smooth(pb, theta - h * ev.grad, mu)
    diff = other.grad - ev.grad
    est = float(np.sqrt(np.dot(diff, diff))) / max(h * g_norm, 1e-300)
    return max(est, 1e-8)


def gram_possible(pb):
    """Squared-loss row terms on a tall dense table: the smooth part is a quadratic in theta whose
    matrix (the Gram matrix) costs one pass, after which an iteration never touches the data."""
    return (pb.standard and not _is_sparse(pb.X) and pb.n >= 2 * pb.size and pb.size <= 2000 and pb.row_terms
            and all(t.loss == "squared" and t.role == "residual" for t in pb.row_terms))


def build_gram(pb):
    """H = A^T diag(rho) A, q = A^T rho y and the sums the gap needs, A the (centred) design [X, 1]."""
    rho = np.sum([t.rho for t in pb.row_terms], axis=0)
    y = pb.y
    m = pb.center if pb.center is not None else np.zeros(pb.p)
    P = pb.size
    H, q, h = np.zeros((P, P)), np.zeros(P), np.zeros(P)
    w = pb.w_index
    if not (not _is_sparse(pb.X) and np.ptp(rho) == 0.0 and _gram_uncentred(pb, rho, y, m, H, q, h)):
        _gram_centred_blocks(pb, rho, y, m, H, q, h)
    if pb.b_index is not None:
        b = pb.b_index
        H[w, b] = H[b, w] = h[w]
        H[b, b] = h[b] = float(np.sum(rho))
        q[b] = float(np.dot(rho, y))
    pb.passes += 1
    pb.gram = {"H": H, "q": q, "h": h, "yy": float(np.dot(rho, y * y)), "rho_sum": float(np.sum(rho)),
               "rho_y": float(np.dot(rho, y))}


def _gram_uncentred(pb, rho, y, m, H, q, h):
    """Equal row weights r: H_ww = r (X^T X - n m m^T), one matrix product with no copy of the table
    (about half the time of the centred blocks). Used only when centring cancels at most two digits
    (sum x^2 <= 100 sum (x - m)^2 in every column); returns False otherwise."""
    w = pb.w_index
    G = pb.X.T @ pb.X
    n, r = pb.n, float(rho[0])
    diag = np.diag(G)
    centred = diag - n * m * m
    if not np.all(centred > 0) or np.any(diag > 100.0 * centred):
        return False
    H[np.ix_(w, w)] = r * (G - n * np.outer(m, m))
    both = pb.X.T @ np.column_stack([rho * y, rho])
    pb.passes += 1
    q[w] = both[:, 0] - m * float(np.dot(rho, y))
    h[w] = both[:, 1] - m * float(np.sum(rho))
    return True


def _gram_centred_blocks(pb, rho, y, m, H, q, h):
    """H_ww, q_w, h_w from centred row blocks (any row weights; a copy of one block at a time)."""
    w = pb.w_index
    # rows per block: at most 8 MB and an eighth of the table, so the temporary copy stays small
    chunk = max(1, min(pb.n // 8 or 1, (8 << 20) // (8 * pb.p)))
    Hww = np.zeros((pb.p, pb.p))
    for start in range(0, pb.n, chunk):
        Xc = pb.X[start:start + chunk] - m
        r = rho[start:start + chunk]
        Hww += (Xc * r[:, None]).T @ Xc
        q[w] += Xc.T @ (r * y[start:start + chunk])
        h[w] += Xc.T @ r
    H[np.ix_(w, w)] = Hww


def _gram_smooth(pb, theta):
    G = pb.gram
    Ht = G["H"] @ theta
    pen, pgrad = smooth_penalties(pb, theta)
    f = 0.5 * float(np.dot(theta, Ht)) - float(np.dot(theta, G["q"])) + 0.5 * G["yy"] + pen + pb.constant
    return f, Ht - G["q"] + pgrad, Ht


def gram_gap(pb, theta, P, Ht):
    """The duality gap of a squared-loss problem from the Gram sums alone (no pass over the data).

    Row derivatives v = s - y; phi*(v) = v y + v^2 / 2 (REFERENCE.md, squared loss lifted). A free
    intercept needs sum rho v = 0: since phi* is finite everywhere, v is shifted by a constant."""
    G = pb.gram
    tq = float(np.dot(theta, G["q"]))
    sum_v = float(np.dot(theta, G["h"])) - G["rho_y"]
    sum_vy = tq - G["yy"]
    sum_vv = float(np.dot(theta, Ht)) - 2.0 * tq + G["yy"]
    z = -(Ht - G["q"])
    delta = 0.0
    if pb.balance:
        delta = sum_v / G["rho_sum"]
        z = z + delta * G["h"]
        z[pb.b_index] = 0.0
    t = _dual_scale(pb, z)
    if not t > 0.0:
        return math.inf
    sum_vy -= delta * G["rho_y"]
    sum_vv += -2.0 * delta * sum_v + delta * delta * G["rho_sum"]
    conj = t * sum_vy + 0.5 * t * t * sum_vv
    gap = P - (-conj - _penalty_conjugate(pb, t * z) + pb.constant)
    return gap if np.isfinite(gap) else math.inf


def method_fista_gram(run, theta0):
    """FISTA with restart on the quadratic of a squared loss: each iteration costs O(size^2), no pass."""
    pb = run.pb
    build_gram(pb)
    x = prox(pb, np.asarray(theta0, dtype=np.float64), 1.0)
    y, t = x, 1.0
    L = _largest_eigenvalue(pb.gram["H"]) + float(np.max(pb.beta, initial=0.0)) + 1e-300
    iterations = 0
    while True:
        f_y, g_y, _ = _gram_smooth(pb, y)
        while True:
            x_new = prox(pb, y - g_y / L, 1.0 / L)
            f_new, _, Ht_new = _gram_smooth(pb, x_new)
            diff = x_new - y
            if f_new <= f_y + float(np.dot(g_y, diff)) + 0.5 * L * float(np.dot(diff, diff)) + 1e-12 * abs(f_new):
                break
            L *= 2.0
        P_new = f_new + nonsmooth_penalties(pb, x_new)
        if pb.use_gap:
            kind, absolute = "duality gap", gram_gap(pb, x_new, P_new, Ht_new)
        else:
            kind, absolute = "optimality residual", L * float(np.sqrt(np.dot(diff, diff)))
        if run.record(x_new, P_new, kind, absolute):
            return "converged"
        iterations += 1
        if iterations >= 20 * max(run.max_passes, 1) or (iterations % 1000 == 0 and _stalled(run, iterations)):
            return "max iterations"
        if float(np.dot(y - x_new, x_new - x)) > 0:
            t = 1.0
        t_new = 0.5 * (1.0 + math.sqrt(1.0 + 4.0 * t * t))
        y = x_new + ((t - 1.0) / t_new) * (x_new - x)
        x, t = x_new, t_new


def _stalled(run, iterations):
    """True when the best certificate has not improved over the last thousand iterations."""
    history = run.__dict__.setdefault("history", {})
    history[iterations] = run.cert_abs
    before = history.get(iterations - 1000)
    return before is not None and not run.cert_abs < 0.999 * before


def _largest_eigenvalue(H):
    v = np.ones(H.shape[0]) / math.sqrt(H.shape[0])
    lam = 0.0
    for _ in range(100):
        w = H @ v
        norm = float(np.sqrt(np.dot(w, w)))
        if norm == 0.0:
            return 0.0
        v = w / norm
        if abs(norm - lam) <= 1e-6 * norm:
            return 1.05 * norm  # a little above: power iteration approaches from below
        lam = norm
    return 1.05 * lam


def method_smoothing(run, theta0, use_scipy, inner):
    """Nonsmooth row terms: minimize their Moreau envelopes of parameter mu (Nesterov 2005), then
    shrink mu tenfold and start again from there (continuation).

    The envelope lies below phi by at most mu L^2 / 2 (L the loss's Lipschitz constant), so a stage
    ends when the smoothed problem's own gap is below mu times that spread; the run ends as soon as
    the certificate of the *unsmoothed* objective holds. Without conjugates (a loss the spec defines)
    there is no gap: mu is shrunk a millionfold and the last stage's residual is reported.
    """
    pb = run.pb
    spread = 0.0
    for term in pb.row_terms:
        if not term.smooth:
            lip = term.lipschitz if term.lipschitz is not None else 1.0
            scale = np.abs(term.y) if term.role == "margin" else 1.0
            spread += term.weighted_sum(0.5 * (lip * scale) ** 2 * np.ones(pb.n))
    mu, mu_last = pb.mu0, pb.mu0 * 1e-6
    theta = np.asarray(theta0, dtype=np.float64)
    status = "max passes"
    stalled = 0
    while not run.out_of_passes():
        best_before = run.cert_abs
        finished = {"done": False}
        final = pb.use_gap or mu <= mu_last
        if not pb.use_gap:
            run.theta, run.cert_abs = None, math.inf  # only the last stage's point counts

        def stage_over(ev, P, absolute, P_mu, mu=mu, final=final):
            if final and run.record(ev.theta if P_mu is None else ev.theta, P, run_kind(pb), absolute):
                finished["done"] = True
                return True
            if not final:
                run.record(ev.theta, P, run_kind(pb), absolute)
            if pb.use_gap:
                extra = sum(t.weighted_sum(0.5 * mu * d * d) for t, d in zip(pb.row_terms, ev.derivs) if not t.smooth)
                inner_gap = duality_gap(pb, ev.theta, P_mu, ev.derivs, ev.Atu) + extra
                return inner_gap <= max(mu * spread, 0.5 * run.tol * max(1.0, abs(P)))
            return relative(absolute, P) <= run.tol

        def lbfgs_stop(ev):
            P = true_rows_value(pb, ev.s) + smooth_penalties(pb, ev.theta)[0] + pb.constant + \
                nonsmooth_penalties(pb, ev.theta)
            kind, absolute = certificate(pb, ev, P, float(np.sqrt(np.dot(ev.grad, ev.grad))))
            return stage_over(ev, P, absolute, ev.f + nonsmooth_penalties(pb, ev.theta))

        def fista_stop(ev, x_new, P, kind, absolute):
            over = stage_over(_Evaluation(x_new, None, None, None, ev.derivs, ev.Atu), P, absolute,
                              ev.f + nonsmooth_penalties(pb, ev.theta))
            return over

        if inner == "lbfgs":
            theta, _, status = _lbfgs_driver(run, theta, mu, lbfgs_stop, use_scipy)
        else:
            status = method_fista(run, theta, mu, fista_stop)
            theta = run.theta if run.theta is not None else theta
        if finished["done"]:
            return "converged"
        if pb.finish and exact_finish(run, theta, mu):
            pb.finished_exactly = True
            return "converged"
        if not pb.use_gap and mu <= mu_last:
            return status
        # three stages in a row without a better certificate: rounding has the last word
        stalled = stalled + 1 if pb.use_gap and not run.cert_abs < 0.9 * best_before else 0
        if stalled >= 3:
            return "no progress"
        mu = max(mu * 0.1, mu_last if not pb.use_gap else pb.mu0 * 1e-12)
    return "max passes"


# ---------------------------------------------------------------- exact finish for piecewise-linear losses

def finish_kind(pb):
    """'qp' (ridge on every coordinate, no l1) or 'lp' (l1 and free coordinates only, no ridge) when
    one nonsmooth row term with a known conjugate (a piecewise-linear catalog loss), a standard score
    and SciPy allow the exact finish; else None."""
    if _scipy_optimize is None or not (pb.use_gap and pb.standard and len(pb.row_terms) == 1):
        return None
    term = pb.row_terms[0]
    if term.smooth or term.conj_kernel is None or term.prox_kernel is None or not term.all_positive:
        return None
    if pb.groups or pb.l1_balls or pb.l2_balls or pb.other_nonsmooth or pb.other_smooth:
        return None
    if np.any(np.isfinite(pb.lo)) or np.any(np.isfinite(pb.hi)):
        return None
    ridge = pb.beta > 0
    if pb.balance:  # a free intercept: its multiplier is found by a 1-D search (`_band_qp_intercept`)
        ridge[pb.b_index] = True
    if np.all(ridge) and not np.any(pb.alpha > 0):
        return "qp"
    if not np.any(pb.beta > 0):
        return "lp"
    return None


def _one_sided_slopes(pb, term, s):
    """The derivative just left and right of each s (they differ exactly at a kink)."""
    h = 1e-9 * (1.0 + np.abs(s))
    left = term.value_and_derivative(s - h, pb.cols, pb.tun)[1]
    right = term.value_and_derivative(s + h, pb.cols, pb.tun)[1]
    return left.copy(), right.copy()


def _kinks_between(pb, term, a, b, rows, slope_a):
    """For each chosen row, the point between a and b where the derivative leaves slope_a (bisection
    on all those rows at once; the derivative of a convex loss is monotone)."""
    lo, hi = a[rows].copy(), b[rows].copy()
    probe = np.array(b, dtype=np.float64, copy=True)
    for _ in range(60):
        mid = 0.5 * (lo + hi)
        probe[rows] = mid
        same = term.value_and_derivative(probe, pb.cols, pb.tun)[1][rows] == slope_a[rows]
        lo, hi = np.where(same, mid, lo), np.where(same, hi, mid)
    return 0.5 * (lo + hi)


def _data_bytes(pb):
    X = pb.X
    return float(X.data.nbytes + X.indices.nbytes + X.indptr.nbytes) if _is_sparse(X) else float(X.nbytes)


def _design_rows(pb, rows):
    """Rows of A (s = A theta) for the chosen data rows (reads only those rows)."""
    pb.row_reads += len(rows)
    A = np.zeros((len(rows), pb.size))
    Xr = pb.X[rows]
    Xr = np.asarray(Xr.toarray() if _is_sparse(Xr) else Xr, dtype=np.float64)
    A[:, pb.w_index] = Xr - pb.center if pb.center is not None else Xr
    if pb.b_index is not None:
        A[:, pb.b_index] = 1.0
    return A


def _band_qp(pb, A, g, kink, lo, hi, tol, theta=None):
    """Ridge case, with or without a free intercept (the latter by `_band_qp_intercept`)."""
    if pb.balance and pb.beta[pb.b_index] == 0:
        b0 = float(theta[pb.b_index]) if theta is not None else 0.0
        return _band_qp_intercept(A, g, kink, lo, hi, pb.beta, pb.b_index, tol, b0)
    return _box_qp(A, g, kink, lo, hi, pb.beta, tol)[:2]


def _band_qp_intercept(A, g, kink, lo, hi, beta, k, tol, b0):
    """Ridge case with a free intercept b (coordinate k, column of ones in A): the restricted dual
    gains the equality g_k + sum v = 0. Its multiplier is b itself: for a fixed b the band problem
    in the weights is the box QP of `_box_qp` with the kinks shifted by -b, and its optimal value
    F(b) is convex in b with derivative F'(b) = g_k + sum v(b) (envelope theorem), nondecreasing.
    So b is found by a bracketing root search on F' (regula falsi, Illinois variant, with a
    bisection step whenever it stalls), each step one box QP warm-started from the last; the
    result is then certified by the duality gap of the whole problem like any other candidate."""
    keep = np.arange(A.shape[1]) != k
    Aw, gw, bw = A[:, keep], g[keep], beta[keep]
    state = {"x": None}

    def slope(b):
        theta_w, v, x = _box_qp(Aw, gw, kink - b, lo, hi, bw, tol, state["x"])
        state["x"] = x
        return g[k] + float(np.sum(v)), theta_w, v

    def candidate(b, theta_w, v):
        theta = np.zeros(A.shape[1])
        theta[keep], theta[k] = theta_w, b
        return theta, v

    f0, tw0, v0 = slope(b0)
    if f0 == 0.0:
        return candidate(b0, tw0, v0)
    # bracket the root: step away from b0 downhill, doubling; F' moves by at most sum(hi - lo) overall
    step = 1e-3 * (1.0 + abs(b0))
    direction = -1.0 if f0 > 0 else 1.0
    a, fa, best = b0, f0, (abs(f0), b0, tw0, v0)
    for _ in range(80):
        b = a + direction * step
        fb, twb, vb = slope(b)
        if abs(fb) < best[0]:
            best = (abs(fb), b, twb, vb)
        if fb == 0.0 or (fb > 0) != (fa > 0):
            break
        a, fa, step = b, fb, 2.0 * step
    else:
        return None, None
    if fb == 0.0:
        return candidate(b, twb, vb)
    low, f_low, high, f_high = (a, fa, b, fb) if a < b else (b, fb, a, fa)  # f_low < 0 < f_high
    scale = float(np.sum(hi - lo)) + abs(g[k])
    last, repeats = 0, 0
    for _ in range(100):
        if high - low <= 1e-14 * (1.0 + abs(low) + abs(high)) or best[0] <= 1e-14 * scale:
            break
        mid = (low * f_high - high * f_low) / (f_high - f_low)
        if repeats >= 3 or not (low < mid < high):  # one end keeps moving: bisect instead
            mid, repeats = 0.5 * (low + high), 0
        fm, twm, vm = slope(mid)
        if abs(fm) < best[0]:
            best = (abs(fm), mid, twm, vm)
        if fm == 0.0:
            break
        side = -1 if fm < 0 else 1
        repeats = repeats + 1 if side == last else 1
        if side < 0:
            low, f_low = mid, fm
            if last < 0:
                f_high *= 0.5  # Illinois: halve the value at the end that stays
        else:
            high, f_high = mid, fm
            if last > 0:
                f_low *= 0.5
        last = side
    _, b, tw, v = best
    return candidate(b, tw, v)


def _box_qp(A, g, kink, lo, hi, beta, tol, x0=None):
    """Ridge case: the band rows' dual values v in [lo, hi] maximize the restricted dual
    -||g + A^T v||^2 / (2 beta) - kink.v, a box-constrained QP in a few hundred variables,
    min v.Qv/2 + c.v with Q = A diag(1/beta) A^T and c = A (g / beta) + kink, solved in units of the
    box widths by L-BFGS-B (no pass over the data); then the variables strictly inside the box are
    solved for exactly from Q's linear system (least squares: Q has rank at most the number of
    coordinates) when that stays in the box and does not raise the value. theta = -(g + A^T v) / beta.
    The projected-gradient tolerance follows the run's: 1e-8 sufficed for a relative gap of 1e-6 on
    the benchmark tables, 1e-7 did not; the gap of the whole problem decides in any case."""
    gtol = min(1e-8, max(1e-2 * tol, 1e-13))
    width = np.maximum(hi - lo, 1e-300)
    Aw = A * width[:, None]  # Q = Aw diag(1/beta) Aw^T has rank <= size: applied through Aw, never formed
    c = (A @ (g / beta) + kink) * width
    low, high = lo / width, hi / width

    def fun(x):
        Qx = Aw @ ((Aw.T @ x) / beta)
        return 0.5 * float(np.dot(x, Qx)) + float(np.dot(c, x)), Qx + c

    start = np.zeros(len(c)) if x0 is None else x0
    res = _scipy_optimize.minimize(fun, np.clip(start, low, high), jac=True, method="L-BFGS-B",
                                   bounds=list(zip(low, high)),
                                   options={"maxiter": 5000, "maxfun": 10000, "ftol": 0.0, "gtol": gtol,
                                            "maxcor": 10})
    x = np.clip(res.x, low, high)
    inside = (x > low + 1e-9) & (x < high - 1e-9)
    if np.any(inside):
        polished = x.copy()
        fixed = ~inside
        A_in = Aw[inside] / np.sqrt(beta)
        rhs = -(c[inside] + A_in @ ((Aw[fixed].T @ x[fixed]) / np.sqrt(beta)))
        polished[inside] = np.linalg.lstsq(A_in @ A_in.T, rhs, rcond=None)[0]
        if np.all(polished >= low - 1e-12) and np.all(polished <= high + 1e-12):
            polished = np.clip(polished, low, high)
            if fun(polished)[0] <= fun(x)[0]:
                x = polished
    v = x * width
    return -(g + A.T @ v) / beta, v, x


def _band_lp(pb, A, g, kink, lo, hi):
    """l1 case: the restricted problem min g.theta + sum_i max(lo_i (A_i theta - k_i), hi_i (A_i theta -
    k_i)) + alpha.|theta| as a linear program (HiGHS through SciPy), variables theta+ and theta- for
    the l1 coordinates, theta for the free ones, and t_i for each band row's loss; the band rows'
    dual values come from the multipliers of the two pieces."""
    P, m = pb.size, len(kink)
    l1 = pb.alpha > 0
    nl = int(np.sum(l1))
    # variables: q (P; >= 0 on the l1 coordinates, free elsewhere), r (one per l1 coordinate, >= 0) and t
    # (m, free), with theta = q - E r, so |theta| = q + r on the l1 coordinates at the optimum
    import scipy.sparse as sparse  # present whenever scipy.optimize is
    idx_l1 = np.flatnonzero(l1)
    E = np.zeros((P, nl))
    E[idx_l1, np.arange(nl)] = 1.0
    c = np.concatenate([g + np.where(l1, pb.alpha, 0.0), pb.alpha[idx_l1] - g[idx_l1], np.ones(m)])
    # lo_i (A_i theta - k_i) - t_i <= 0 and hi_i (A_i theta - k_i) - t_i <= 0 (the identity blocks sparse)
    AT = np.hstack([A, -A[:, idx_l1]])
    minus_eye = -sparse.identity(m, format="csr")
    A_ub = sparse.vstack([sparse.hstack([sparse.csr_matrix(lo[:, None] * AT), minus_eye]),
                          sparse.hstack([sparse.csr_matrix(hi[:, None] * AT), minus_eye])], format="csr")
    b_ub = np.concatenate([lo * kink, hi * kink])
    bounds = [(0.0, None) if l1[j] else (None, None) for j in range(P)] + [(0.0, None)] * nl + [(None, None)] * m
    res = _scipy_optimize.linprog(c, A_ub=A_ub, b_ub=b_ub, bounds=bounds, method="highs")
    if res.status != 0:
        return None, None
    q, r = res.x[:P], res.x[P:P + nl]
    theta = q - E @ r
    lam = -np.asarray(res.ineqlin.marginals)  # >= 0, one per piece; lam_lo + lam_hi = 1 per row
    lam_lo, lam_hi = lam[:m], lam[m:]
    total = lam_lo + lam_hi
    safe = np.where(total > 0, total, 1.0)
    v = np.where(total > 0, (lam_lo * lo + lam_hi * hi) / safe, 0.5 * (lo + hi))
    return theta, v


def exact_finish(run, theta, mu, rounds=3):
    """Certify a piecewise-linear loss exactly, from a smoothed point.

    At the optimum each row sits on one linear piece of its loss (its derivative known) or at a
    kink (its derivative, the dual value, lies between the two slopes). The smoothed point tells
    the rows far from every kink apart: their pieces are fixed and enter as one linear term
    g = A^T u (one pass). The rows near a kink (the band: where the prox of an envelope wider than
    mu lands on a kink; the widest of a few widths that keeps the band small) keep their loss, and
    this restricted problem is solved exactly without touching the data: a box-constrained QP in
    the band's dual values for a ridge penalty, a linear program for an l1 penalty. The candidate
    is certified by the duality gap of the whole problem; when rows outside the band crossed a
    kink they join the band and the restricted problem is solved again. Returns True when the run
    is certified.
    """
    pb = run.pb
    term = pb.row_terms[0]
    rho = term.rho
    s = score(pb, theta)
    # a band of a few times the coordinates, more on tall tables (more rows lie near each kink), with
    # its rows of A (band x size) below half the data array
    limit = min(max(8 * (pb.size + 1) + 100, pb.n // 50), 20 * (pb.size + 1) + 200,
                int(_data_bytes(pb) / (16.0 * pb.size)))
    band = None
    for width in (1000.0 * mu, 100.0 * mu, 10.0 * mu, mu):  # the widest band that is small enough
        p_point = term.prox(s, width, pb.cols, pb.tun)
        left, right = _one_sided_slopes(pb, term, p_point)
        band = left != right
        if np.sum(band) <= limit:
            break
    if np.sum(band) > limit:
        return False
    kink = p_point.copy()
    slope = term.value_and_derivative(p_point, pb.cols, pb.tun)[1].copy()
    for _ in range(rounds):
        rows = np.flatnonzero(band)
        if run.out_of_passes():
            return False
        g = adjoint(pb, np.where(band, 0.0, rho * slope))
        A = _design_rows(pb, rows)
        lo = rho[rows] * np.minimum(left[rows], right[rows])
        hi = rho[rows] * np.maximum(left[rows], right[rows])
        with np.errstate(all="ignore"):
            if pb.finish == "qp":
                candidate, v = _band_qp(pb, A, g, kink[rows], lo, hi, run.tol, theta)
            else:
                candidate, v = _band_lp(pb, A, g, kink[rows], lo, hi)
        if candidate is None or not np.all(np.isfinite(candidate)):
            return False
        s_new = score(pb, candidate)
        d = term.value_and_derivative(s_new, pb.cols, pb.tun)[1].copy()
        d[rows] = np.clip(v / rho[rows], lo / rho[rows], hi / rho[rows])
        d = term.inside(d)
        Atu = adjoint(pb, rho * d)
        P = objective_value(pb, candidate, s_new)
        gap = duality_gap(pb, candidate, P, [d], Atu)
        if run.record(candidate, P, "duality gap", gap):
            return True
        crossed = np.flatnonzero(~band & (d != slope))
        if not len(crossed) or np.sum(band) + len(crossed) > limit:
            return False
        # a crossing row's kink lies between a point of its old piece and its new point
        kink[crossed] = _kinks_between(pb, term, p_point, s_new, crossed, slope)
        lc, rc = _one_sided_slopes(pb, term, kink)
        left[crossed], right[crossed] = lc[crossed], rc[crossed]
        band[crossed] = True
    return False


def run_kind(pb):
    return "duality gap" if pb.use_gap else "optimality residual"


def method_subgradient(run, theta0):
    """Projected (prox) subgradient steps of length a / sqrt(k + 1), the best point kept (Polyak
    1987). For objectives that are not convex: the result is at best a local minimum."""
    pb = run.pb
    theta = prox(pb, np.asarray(theta0, dtype=np.float64), 0.0)
    ev = evaluate_smooth(pb, theta)
    a = 0.1 * (1.0 + float(np.sqrt(np.dot(theta, theta))))
    k = 0
    last = math.inf
    while not run.out_of_passes():
        g = ev.grad + _nonsmooth_subgradient(pb, theta)
        norm = float(np.sqrt(np.dot(g, g)))
        P = ev.f + nonsmooth_penalties(pb, theta)
        run.record(theta, P, "optimality residual", norm)
        if norm == 0.0:
            return "stationary"
        if relative(norm, P) <= run.tol:
            return "converged"
        step = a / math.sqrt(k + 1.0) / norm
        theta = prox(pb, theta - step * g, 0.0)
        ev = evaluate_smooth(pb, theta)
        k += 1
        if k % 200 == 0:
            if abs(last - run.objective) <= 1e-12 * max(1.0, abs(run.objective)):
                return "no progress"
            last = run.objective
    return "max passes"


def _nonconvex_starts(pb):
    """Deterministic starts for a non-convex run: zero (often a stationary point of a margin loss
    that is flat there, such as a ramp), a random point from a fixed seed scaled so that the score
    has unit spread, and the least-squares fit of the score to the target (a cheap guess at the
    direction of the data). Returns [(label, theta)]."""
    starts = [("zero", np.zeros(pb.size))]
    r = np.random.default_rng(0).normal(size=pb.size)
    spread = float(np.std(score(pb, r)))
    starts.append(("a seeded random point", r / spread if spread > 0 else r))
    y = pb.y
    # dense tables only: a sparse one would have to be copied densely for the solve
    if pb.standard and not _is_sparse(pb.X) and np.all(np.isfinite(y)) and np.any(y != 0):
        A = pb.X if pb.b_index is None else np.column_stack([pb.X, np.ones(pb.n)])
        pb.passes += 2
        sw = np.sqrt(pb.c)
        coef = np.linalg.lstsq(A * sw[:, None], y * sw, rcond=None)[0]
        theta = np.zeros(pb.size)
        theta[pb.w_index] = coef[:pb.p]
        if pb.b_index is not None:
            theta[pb.b_index] = coef[pb.p]
        if np.all(np.isfinite(theta)):
            starts.append(("the least-squares fit of the score to the target", theta))
    return starts


def _subgradient_from_starts(pb, tol, max_passes, progress):
    """The subgradient method from each of `_nonconvex_starts`, an equal share of the passes each;
    returns the run with the lowest objective, its status and the starts' labels."""
    starts = _nonconvex_starts(pb)
    best = None
    for k, (_label, theta) in enumerate(starts):
        share = max(1, (max_passes - pb.passes) // (len(starts) - k))
        run = _Run(pb, tol, pb.passes + share, progress)
        status = method_subgradient(run, theta)
        if run.theta is not None and (best is None or run.objective < best[0].objective):
            best = (run, status)
    if best is None:
        best = (run, status)
    return best[0], best[1], [label for label, _ in starts]


def _nonsmooth_subgradient(pb, theta):
    g = np.zeros(pb.size)
    for pen in pb.penalties:
        if not pen.smooth:
            np.add.at(g, pen.idx, pen.value_and_gradient(theta, pb.tun)[1])
    return g


# ---------------------------------------------------------------- threads

class _ThreadLimits:
    """Cap every BLAS/OpenMP pool except NumPy's at one thread while solving (REFERENCE.md,
    'Measuring speed': SciPy's and NumPy's OpenBLAS pools otherwise compete for the cores)."""

    def __enter__(self):
        self._limiter = None
        if _threadpoolctl is not None:
            try:
                controller = _threadpoolctl.ThreadpoolController()
                others = [lib.filepath for lib in controller.lib_controllers if "numpy" not in str(lib.filepath)]
                if others:
                    self._limiter = controller.select(filepath=others).limit(limits=1)
            except Exception:  # a thread cap is an optimisation only, never a reason to fail
                self._limiter = None
        return self

    def __exit__(self, *exc):
        if self._limiter is not None:
            self._limiter.restore_original_limits()
        return False


# ---------------------------------------------------------------- entry point

def _initial_theta(pb, theta0):
    if theta0 is None:
        return np.zeros(pb.size)
    if isinstance(theta0, dict):
        theta = np.zeros(pb.size)
        for name, (start, size, _vector) in pb.slots.items():
            if name in theta0:
                theta[start:start + size] = np.broadcast_to(np.asarray(theta0[name], dtype=np.float64), (size,))
        return theta
    theta = np.asarray(theta0, dtype=np.float64).ravel()
    if theta.shape[0] != pb.size:
        raise SolverInputError(f"theta0 has {theta.shape[0]} values; the spec learns {pb.size}")
    return theta.copy()


def _to_internal(pb, theta):
    if pb.center is None:
        return theta
    theta = theta.copy()
    theta[pb.b_index] += float(np.dot(pb.center, theta[pb.w_index]))
    return theta


def _to_external(pb, theta):
    if pb.center is None:
        return theta
    theta = theta.copy()
    theta[pb.b_index] -= float(np.dot(pb.center, theta[pb.w_index]))
    return theta


def _mu0(pb):
    """First smoothing parameter: about the spread of the loss arguments."""
    if pb.spec["task"] == "residual":
        spread = float(np.std(pb.y[np.isfinite(pb.y)])) if np.any(np.isfinite(pb.y)) else 1.0
        return 0.1 * spread if spread > 0 else 0.1
    return 1.0


def run_solver(spec, X, y, weights=None, input_names=None, tunables=None, tol=1e-6, max_passes=None,
               allow_nonconvex=False, theta0=None, progress=None, use_scipy=True):
    """Fit the spec's objective to the data; returns a dict of plain values (see `solve`)."""
    import time
    started = time.perf_counter()
    if not spec["trainable"]:
        raise SolverInputError(spec["refusal"])
    if not spec["accepted"] and not allow_nonconvex:
        raise SolverInputError(f"the objective is {spec['verdict']}: a minimum found is not certified global; "
                               "pass allow_nonconvex=True to run a local subgradient method anyway")
    pb = build_problem(spec, X, y, weights, input_names, tunables)
    method = spec["method"]
    if method != "subgradient" and pb.prox_problems:
        raise SolverInputError("the NumPy backend has no exact prox for this combination: "
                               + "; ".join(pb.prox_problems) + " (the cvxpy backend solves it)")
    if method in ("lbfgs", "smoothing") and pb.has_prox_part:
        method = "fista" if method == "lbfgs" else "smoothing+fista"
    if not spec["accepted"]:
        method = "subgradient"
    pb.balance = pb.b_index is not None and pb.b_index in _free_coordinates(pb)
    if pb.balance and method != "subgradient":
        # a free intercept: centre the columns inside the score (never copying X) so that w and b do
        # not fight over the mean (s = (X - 1 m^T) w + b' with b' = b + m.w)
        pb.center = np.asarray(pb.X.T @ pb.c, dtype=np.float64).ravel() / float(np.sum(pb.c))
        pb.passes += 1
    pb.use_gap = method != "subgradient" and gap_available(pb)
    pb.mu0 = _mu0(pb)
    pb.finish = finish_kind(pb) if method.startswith("smoothing") else None
    pb.finished_exactly = False
    if max_passes is None:
        max_passes = 20000
    run = _Run(pb, float(tol), int(max_passes), progress)
    theta = _to_internal(pb, _initial_theta(pb, theta0))
    if theta0 is not None:
        with np.errstate(all="ignore"):
            start = evaluate_smooth(pb, theta)
        if not (np.isfinite(start.f) and np.all(np.isfinite(start.grad))):
            theta = np.zeros(pb.size)  # the warm start overflows (an exponential loss): start from 0
    scipy_used = use_scipy and _scipy_optimize is not None
    lbfgs_name = "L-BFGS (SciPy L-BFGS-B)" if scipy_used else "L-BFGS (own two-loop recursion)"
    with _ThreadLimits():
        if method == "lbfgs":
            status = method_lbfgs(run, theta, use_scipy)
            name = lbfgs_name
        elif method == "fista" and gram_possible(pb):
            status = method_fista_gram(run, theta)
            name = "accelerated proximal gradient (FISTA with restart) on the Gram matrix"
        elif method == "fista":
            status = method_fista(run, theta)
            name = "accelerated proximal gradient (FISTA with restart, backtracking)"
        elif method == "smoothing":
            status = method_smoothing(run, theta, use_scipy, "lbfgs")
            name = f"smoothing with continuation (Moreau envelopes) + {lbfgs_name}"
        elif method == "smoothing+fista":
            status = method_smoothing(run, theta, use_scipy, "fista")
            name = "smoothing with continuation (Moreau envelopes) + accelerated proximal gradient"
        elif theta0 is not None:
            status = method_subgradient(run, theta)
            name = "subgradient method with diminishing steps from the given start (local result)"
        else:
            run, status, labels = _subgradient_from_starts(pb, float(tol), int(max_passes), progress)
            name = ("subgradient method with diminishing steps from " + ", ".join(labels)
                    + "; the lowest objective kept (local result)")
    if pb.finished_exactly:
        name += "; exact finish (the rows near a kink solved as a small QP or LP)"
    if run.theta is None:  # stopped before any iterate was certified: report the start
        ev = evaluate_smooth(pb, theta)
        P0 = ev.f + nonsmooth_penalties(pb, theta)
        run.record(theta, P0, *certificate(pb, ev, P0, float(np.sqrt(np.dot(ev.grad, ev.grad)))))
    theta = run.theta
    P = objective_value(pb, theta)
    theta = _to_external(pb, theta)
    rel = relative(run.cert_abs, P)
    if not spec["accepted"]:
        status = "local (non-convex)"
    elif rel <= tol:
        status = "optimal"
    elif status == "converged":
        status = "optimal (inaccurate)"
    elif status in ("no progress", "line search failed"):
        status = "stalled"
    notes = {
        "duality gap": "P(theta) - D(u) with the dual point from the per-row derivatives; bounds P(theta) - P*",
        "optimality residual": ("norm of the gradient (or prox-gradient mapping) at the point: zero exactly at "
                                "a minimum, but no bound on P(theta) - P*"),
    }
    note = notes.get(run.cert_kind, "")
    if not spec["accepted"]:
        note += "; the objective is not certified convex, so this is at best a local minimum"
    params = {}
    for pname, (start, size, vector) in pb.slots.items():
        params[pname] = theta[start:start + size].copy() if vector else float(theta[start])
    return {
        "theta": theta, "params": params, "objective": P, "term_values": term_values(pb, _to_internal(pb, theta)),
        "status": status, "method": name,
        "certificate": {"kind": run.cert_kind, "absolute": float(run.cert_abs), "relative": float(rel),
                        "tolerance": float(tol), "note": note},
        "iterations": run.iterations, "passes": pb.passes + pb.row_reads // pb.n,
        "seconds": time.perf_counter() - started,
        "input_names": pb.input_names,
    }


def decision_values(spec, params, X, input_names=None, tunables=None):
    """The score s for new rows, from fitted parameters (by name)."""
    pb = _Problem()
    pb.spec, pb.X = spec, as_data_matrix(X)
    pb.n, pb.p = pb.X.shape
    pb.input_names = tuple(input_names) if input_names is not None else _default_input_names(spec, pb.p)
    pb.tun = resolve_tunables(spec, tunables)
    pb.cols = _Columns(pb.X, pb.input_names)
    _bind_score(pb, spec)
    theta = np.zeros(pb.size)
    for name, (start, size, _vector) in pb.slots.items():
        theta[start:start + size] = np.broadcast_to(np.asarray(params[name], dtype=np.float64), (size,))
    return score(pb, theta)
