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
import sys

import numpy as np

try:  # optional: SciPy's L-BFGS-B; the module has its own L-BFGS when SciPy is missing
    import scipy.optimize as _scipy_optimize
except ImportError:  # pragma: no cover - exercised through use_scipy=False
    _scipy_optimize = None
try:  # optional: keeps BLAS thread pools from fighting over the cores
    import threadpoolctl as _threadpoolctl
except ImportError:  # pragma: no cover
    _threadpoolctl = None

# imported here so the file runs as a module of objc; a generated module drops every import of this file
# and carries the catalog's kernels themselves (numpy_module.py pastes them)
from objc.catalog import _k_l1_prox, _k_l2_prox


# ---------------------------------------------------------------- data

class SolverInputError(ValueError):
    """Data or settings the solver cannot use; the message says what and where."""


def _is_sparse(X):
    return hasattr(X, "tocsr") and hasattr(X, "nnz")


def _is_chunked(X):
    """A table read block by block (objc's chunked engine: `X @ w`, `X.T @ u`, row slices and gathers,
    `weighted_square_sums`, `squared_norm`), never an array whole."""
    return hasattr(X, "blocks") and hasattr(X, "take") and hasattr(X, "weighted_square_sums")


def as_data_matrix(X):
    """X as float64 (dense, any memory order, or CSR), copying at most once (float32 -> float64). A chunked
    table passes as it is: its binding checked every value chunk by chunk."""
    if _is_chunked(X):
        return X
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
    # a NaN or an infinity anywhere makes the sum NaN or infinite, so a finite sum proves every entry finite
    # without the table-sized temporary of isfinite (at 1e6 x 50: 15 ms against 30-90 ms); only a sum that
    # overflows from finite entries takes the entry-by-entry test
    if not math.isfinite(float(np.sum(values))) and not np.all(np.isfinite(values)):
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


class _BlockColumns:
    """The columns of `_Columns` restricted to a slice of rows (views, made when first asked)."""

    def __init__(self, cols, rows):
        self._cols, self._rows = cols, rows

    def __getitem__(self, name):
        return self._cols[name][self._rows]


# rows per block of the per-row work of a smooth term: its handful of temporaries then stay in cache and no
# row-sized array is allocated but the derivative (measured at 1e6 rows: the logistic term in 5.8 ms by
# blocks of 16384 against 10.6 ms on whole arrays; 8192 to 32768 were within 5 % of each other)
_ROW_BLOCK = 16384


def _row_blocks(n):
    return [slice(first, min(first + _ROW_BLOCK, n)) for first in range(0, n, _ROW_BLOCK)]


# ---------------------------------------------------------------- the problem

class _RowTerm:
    """One `mean`/`sum` term: rho_i phi(s_i) with phi generated from the spec."""

    def __init__(self, table, rho, y):
        self.index, self.line, self.text = table["index"], table["line"], table["text"]
        self.fn, self.smooth, self.rho, self.y = table["rows"], table["smooth"], rho, y
        self.loss, self.role, self.options = table.get("loss"), table.get("role"), table.get("options", {})
        self.prox_kernel, self.conj_kernel = table.get("prox"), table.get("conjugate")
        self.lipschitz = table.get("lipschitz")
        self.curv_floor = table.get("curv_floor")  # the catalog's least l'' over an interval, if known
        self.positive = rho > 0.0
        self.all_positive = bool(np.all(self.positive))
        # a margin row's label, with 1 where it is 0 (such a row's phi is constant): formed once, not per call
        # (y itself when no label is 0: no row-sized copy)
        self.safe_y = None if self.role != "margin" else y if np.all(y != 0.0) else np.where(y != 0.0, y, 1.0)
        # a `mean` or `sum` without row weights has one rho for every row: a scalar saves a row-sized
        # product per sum (at 1e6 rows a fresh temporary costs about as much as the product)
        self.uniform = float(rho[0]) if self.all_positive and rho.size and bool(np.all(rho == rho[0])) else None

    def value_and_derivative(self, s, cols, tun):
        value, d = self.fn(s, self.y, cols, tun)
        n = s.shape[0]
        value = np.broadcast_to(np.asarray(value, dtype=np.float64), (n,))
        d = np.broadcast_to(np.asarray(d, dtype=np.float64), (n,))
        return value, d

    def weighted_sum(self, value, rows=slice(None)):
        """sum_i rho_i value_i over the rows (a slice; all by default), 0 x inf counted as 0."""
        # np.sum of the product, not np.dot: BLAS's threaded dot was 10x slower on a busy machine
        if self.uniform is not None:
            return self.uniform * float(np.sum(value))
        rho = self.rho[rows]
        if self.all_positive:
            return float(np.sum(rho * value))
        positive = self.positive[rows]
        return float(np.dot(rho[positive], value[positive]))  # 0 x inf stays 0

    def value_sum(self, s, cols, tun):
        """sum_i rho_i phi(s_i), by blocks of rows like `sum_and_derivative` (no row-sized temporaries)."""
        total = 0.0
        for rows in _row_blocks(s.shape[0]):
            value, _slope = self.fn(s[rows], self.y[rows], _BlockColumns(cols, rows), tun)
            total += self.weighted_sum(np.broadcast_to(np.asarray(value, dtype=np.float64), s[rows].shape), rows)
        return total

    def sum_and_derivative(self, s, cols, tun):
        """(sum_i rho_i phi(s_i), phi'(s)) at s, computed by blocks of rows (`_ROW_BLOCK`)."""
        n = s.shape[0]
        total, d = 0.0, np.empty(n)
        for rows in _row_blocks(n):
            value, slope = self.fn(s[rows], self.y[rows], _BlockColumns(cols, rows), tun)
            d[rows] = slope  # broadcasts a constant slope
            total += self.weighted_sum(np.broadcast_to(np.asarray(value, dtype=np.float64), d[rows].shape), rows)
        return total, d

    def prox(self, v, g, cols, tun):
        """prox of g * phi at v, lifted from the catalog kernel of l (REFERENCE.md, 'Lifting'), or found
        by bisection for a loss the spec defines (phi convex: p + g phi'(p) - v increases in p)."""
        if self.prox_kernel is None:
            return self._prox_by_bisection(v, g, cols, tun)
        y = self.y
        if self.role == "margin":
            # phi(s) = l(y s): prox(v) = prox_{g y^2 l}(y v) / y; rows with y = 0 have phi constant
            safe = self.safe_y
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
        if self.role == "margin":
            return self.conj_kernel(v / self.safe_y[rows], **self.options)
        y = self.y[rows]
        with np.errstate(invalid="ignore"):
            return v * y + self.conj_kernel(-v, **self.options)

    def conjugate(self, v):
        """phi*(v) per row from the catalog conjugate of l (REFERENCE.md, 'Lifting')."""
        if self.role == "margin":
            return self.conj_kernel(v / self.safe_y, **self.options)
        y = self.y
        with np.errstate(invalid="ignore"):
            return v * y + self.conj_kernel(-v, **self.options)


class _Penalty:
    """A goal term on the parameters alone: coefficient x f(theta[idx])."""

    def __init__(self, table, idx, coef):
        self.index, self.line, self.text = table["index"], table["line"], table["text"]
        self.fn, self.form, self.smooth = table["penalty"], table.get("form"), table["smooth"]
        self.idx, self.coef = idx, coef

    def value_and_gradient(self, theta, tun):
        if self.form == "l2sq" and np.ndim(self.coef) == 1:  # a data-scaled ridge: sum_j coef_j theta_j^2
            th = theta[self.idx]
            return float(np.dot(self.coef, th * th)), 2.0 * self.coef * th
        value, grad = self.fn(theta[self.idx], tun)
        return self.coef * float(value), self.coef * np.broadcast_to(np.asarray(grad, dtype=np.float64),
                                                                     self.idx.shape)


def _dropout_ridge(pb, table, idx, coef, c):
    """A dropout penalty as the ridge it equals, sum_j d_j theta_j^2 with d_j = coef * p / (2 (1 - p)) * m2_j,
    m2 the second moments of the columns theta[idx] weighs (normalized like the goal's rows)."""
    p = float(table["drop"](pb.tun))
    if not 0.0 < p < 1.0:
        raise SolverInputError(f"spec line {table['line']}: the drop probability must lie in (0, 1), got {p:g}")
    start = pb.slots[table["param"]][0]
    cols = idx - start
    if _is_chunked(pb.X):  # one pass over every column, then the ones the penalty weighs
        return coef * table["factor"](p) * table["moments"](pb.X, c, table["rows"])[cols]
    X = pb.X if cols.size == pb.p and np.array_equal(cols, np.arange(pb.p)) else pb.X[:, cols]
    return coef * table["factor"](p) * table["moments"](X, c, table["rows"])


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


def tunable_refusal(name, value, declared):
    """Why `value` cannot be given to the tunable `name`, as (what is wrong, what to do), or None when
    it can. `declared` maps each tunable of the spec to (default, low, high). The one wording of this
    rule: objc's own stages (a `tune` line's E402) and every generated module (NumPy, multiclass, cvxpy)
    call it, so a value is refused in the same words wherever it is given."""
    if name not in declared:
        return (f"the spec has no tunable {name!r} (it declares: {', '.join(declared) or 'none'})",
                "give only the tunables the spec's `tune` lines declare")
    try:
        number = float(value)
    except (TypeError, ValueError):
        return f"tunable {name} must be a number, got {value!r}", "give a number inside its declared range"
    _default, low, high = declared[name]
    if not (low <= number <= high):  # NaN is refused here too
        # the convexity verdict was proved for the declared range only
        return (f"tunable {name} = {number:g} lies outside its declared range {low:g} .. {high:g}",
                f"pick a value inside {low:g} .. {high:g}, or widen the range on the spec's `tune {name}` line")
    return None


def settled_tunables(declared, given, error):
    """Each declared tunable's value: its default unless `given` names it. A value `tunable_refusal`
    refuses is raised as `error("what is wrong: what to do")`."""
    values = {name: float(default) for name, (default, _low, _high) in declared.items()}
    for name, value in (given or {}).items():
        refusal = tunable_refusal(name, value, declared)
        if refusal is not None:
            raise error(f"{refusal[0]}: {refusal[1]}")
        values[name] = float(value)
    return values


def resolve_tunables(spec, tunables):
    """Tunable values: the spec's defaults, overridden by `tunables`, each within its declared range."""
    declared = {name: (default, *spec["tunable_ranges"][name]) for name, default in spec["tunables"].items()}
    return settled_tunables(declared, tunables, SolverInputError)


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


def _checked_rows(spec, X, y, weights):
    """(X, y, c) as float64 arrays, every check of the data done: the sizes agree, nothing is NaN or
    infinite where it is read, row weights are nonnegative and not all zero."""
    X = as_data_matrix(X)
    n, p = X.shape
    if n == 0 or p == 0:
        raise SolverInputError(f"no data to fit: {n} rows and {p} inputs")
    y = np.asarray(y, dtype=np.float64).ravel() if y is not None else np.full(n, np.nan)
    if y.shape[0] != n:
        raise SolverInputError(f"the target has {y.shape[0]} values for {n} rows")
    if spec["needs_target"] and not np.all(np.isfinite(y)):
        raise SolverInputError("the target holds NaN or infinity")
    # reshape(-1), not ravel: a broadcast view of one weight (objc's chunked tables) stays a view
    c = np.ones(n) if weights is None else np.asarray(weights, dtype=np.float64).reshape(-1)
    if c.shape[0] != n:
        raise SolverInputError(f"{c.shape[0]} row weights for {n} rows")
    if not (np.all(np.isfinite(c)) and np.all(c >= 0.0)):
        raise SolverInputError("row weights must be finite and nonnegative")
    if not np.sum(c) > 0.0:
        raise SolverInputError("every row weight is zero")
    return X, y, c


def _rows_once(spec, X, y, weights, prepared):
    """`_checked_rows`, done once per table of a path: with `prepared` (a caller's cache across the fits
    of a path) the checked arrays of its table ("X") are kept and handed back while the same X, y and
    weights objects come in (the cache holds them, so no other object can take their ids). Returns
    (X, y, c, token), token naming the checked y and c for other cache keys (None when not kept)."""
    if prepared is None or X is not prepared.get("X"):
        return _checked_rows(spec, X, y, weights) + (None,)
    kept = prepared.get("checked rows")
    if kept is not None and kept[0] is X and kept[1] is y and kept[2] is weights and kept[3] is spec:
        return kept[4:]
    Xc, yc, cc = _checked_rows(spec, X, y, weights)
    token = ("rows", id(yc), id(cc))
    prepared["checked rows"] = (X, y, weights, spec, Xc, yc, cc, token)
    return Xc, yc, cc, token


def build_problem(spec, X, y, weights, input_names, tunables=None, prepared=None):
    """Bind the spec's terms to the data: row weights, index sets, bounds; checks every input (once per
    path's table with `prepared`, see `_rows_once`; the tunables are bound every time)."""
    pb = _Problem()
    pb.spec = spec
    pb.X, y, c, pb.rows_token = _rows_once(spec, X, y, weights, prepared)
    n, p = pb.X.shape
    pb.n, pb.p = n, p
    if input_names is None:
        input_names = _default_input_names(spec, p)
    pb.input_names = tuple(str(nm) for nm in input_names)
    if len(pb.input_names) != p:
        raise SolverInputError(f"{len(pb.input_names)} input names for {p} columns of data")
    if len(set(pb.input_names)) != p:
        raise SolverInputError("input names must be distinct")
    pb.y = y
    pb.c = c
    pb.tun = resolve_tunables(spec, tunables)
    pb.cols = _Columns(pb.X, pb.input_names)

    _bind_score(pb, spec)

    # ---- terms
    pb.row_terms, pb.penalties, pb.constant = [], [], 0.0
    total_c = float(np.sum(c))
    # one weight on every row (no row or class weights): each term's rho is one number, held as a read-only
    # view of it with the rows' shape (no row-sized array: at 1e7 rows 80 MB a term)
    same_c = c.strides == (0,) or bool(c[0] == c[-1] and np.all(c == c[0]))
    for table in spec["terms"]:
        coef = float(table["coefficient"](pb.tun))
        if table["kind"] == "rows":
            scale = {"mean": total_c, "perrow": float(n)}.get(table["aggregate"], 1.0)
            rho = np.broadcast_to(np.float64(coef * float(c[0]) / scale), (n,)) if same_c else coef * c / scale
            pb.row_terms.append(_RowTerm(table, rho, y))
            pb.row_terms[-1].rho_coefficient, pb.row_terms[-1].aggregate = coef, table["aggregate"]
            # settings given by tunables (huber's d = delta, ...) at this fit's values
            pb.row_terms[-1].options = dict(pb.row_terms[-1].options, **{
                k: pb.tun[name] for k, name in table.get("tuned_options", {}).items()})
        elif table["kind"] == "params":
            idx = _theta_indices(pb, table["param"], table["entries"])
            pb.penalties.append(_Penalty(table, idx, coef))
            if table.get("form") == "dropout":
                pb.penalties[-1].coef = _dropout_ridge(pb, table, idx, coef, c)
                pb.penalties[-1].form = "l2sq"
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
    """s = A theta + offset (one pass, none when w = 0, none when theta is the point last scored: a method's
    kept point is usually its last iterate, whose score the caller forms again for the final objective)."""
    memo = getattr(pb, "score_memo", None)
    if memo is not None and memo[1] is pb.center and np.array_equal(memo[0], theta):
        return memo[2]
    s = _score_product(pb, theta)
    pb.score_memo = (np.array(theta, dtype=np.float64, copy=True), pb.center, s)
    return s


def _score_product(pb, theta):
    if pb.standard:
        w = theta[pb.w_index]
        if np.any(w):
            pb.passes += 1
            s = np.asarray(pb.X @ w, dtype=np.float64).ravel()
        else:  # the usual start: no product needed
            s = np.zeros(pb.n)
        if pb.b_index is not None:
            # with centring the intercept coordinate holds b' = b + m.w, and s = (X - 1 m^T) w + b'
            # (in place: s is this call's own array)
            s += (theta[pb.b_index] - float(np.dot(pb.center, w)) if pb.center is not None else theta[pb.b_index])
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
    """Sum of the row terms at s and each term's per-row derivative in s (`dual_adjoint_inputs` sums
    them into the vector whose adjoint is the gradient).

    With mu > 0 every nonsmooth row term is replaced by its Moreau envelope of parameter mu
    (Nesterov 2005): env(s) = phi(p) + (s - p)^2 / (2 mu) with p = prox_{mu phi}(s), whose
    derivative (s - p) / mu is a subgradient of phi at p.
    """
    total, derivs = 0.0, []
    for term in pb.row_terms:
        if mu > 0.0 and not term.smooth:
            p = term.prox(s, mu, pb.cols, pb.tun)
            value, _ = term.value_and_derivative(p, pb.cols, pb.tun)
            d = term.inside((s - p) / mu)
            value = value + 0.5 * mu * d * d
            total += term.weighted_sum(value)
        else:
            part, d = term.sum_and_derivative(s, pb.cols, pb.tun)
            total += part
        derivs.append(d)
    return total, derivs


def true_rows_value(pb, s):
    return sum(term.value_sum(s, pb.cols, pb.tun) for term in pb.row_terms)


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


def term_values(pb, theta, s=None):
    """Each goal term's value (coefficient included), in the spec's order (from s if given)."""
    if s is None:
        s = score(pb, theta)
    out = {}
    for term in pb.row_terms:
        out[term.index] = term.value_sum(s, pb.cols, pb.tun)
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


def _box_free(pb):
    """No bound on any coordinate (every lo -inf, every hi +inf): the penalty's conjugate and the dual
    rescaling then take the short forms below, the same figures with a few array operations where a
    path's Gram iterations otherwise spend most of their time (measured on bench_paths.py's Lasso)."""
    kept = pb.__dict__.get("box_free")
    if kept is None or kept[0] is not pb.lo or kept[1] is not pb.hi:
        kept = (pb.lo, pb.hi, bool(np.all(np.isneginf(pb.lo)) and np.all(np.isposinf(pb.hi))))
        pb.box_free = kept
    return kept[2]


def _dual_scale(pb, z):
    """The largest t <= 1 with R*(t z) finite (the rescaling of Kim et al. 2007)."""
    t = 1.0
    # alpha / |z| and then t z are each rounded: held a few units of rounding below the ratio, t |z| stays
    # within alpha (at an exact answer several |z_j| meet alpha_j, and one rounded above made R*(t z) infinite)
    below = 1.0 - 8.0 * 2.0 ** -53
    if not pb.groups and _box_free(pb):  # the two tests below with hi = +inf and lo = -inf everywhere
        over = (pb.beta == 0) & ((z > pb.alpha) | (z < -pb.alpha))
        if np.any(over):
            t = min(t, float(np.min(pb.alpha[over] / np.abs(z[over]))) * below)
        return t
    lin = pb.beta == 0
    for idx, _ in pb.groups:  # a group's coordinates are priced by its norm below
        lin[idx] = False
    up = lin & np.isposinf(pb.hi) & (z > pb.alpha)
    down = lin & np.isneginf(pb.lo) & (z < -pb.alpha)
    for mask in (up, down):
        if np.any(mask):
            t = min(t, float(np.min(pb.alpha[mask] / np.abs(z[mask]))) * below)
    for idx, lam in pb.groups:
        if pb.beta[idx[0]] == 0:
            norm = float(np.sqrt(np.sum(z[idx] ** 2)))
            if norm > lam:
                t = min(t, lam / norm)
    return t


def _penalty_conjugate(pb, z):
    if not pb.groups and _box_free(pb) and not np.any(pb.beta > 0):
        # _separable_conjugate with no bounds and no ridge: 0 where |z| <= alpha, else infinite (its best
        # candidate is x = 0, written the same way so that NaN spreads alike)
        return float(np.sum(np.where((z > pb.alpha) | (z < -pb.alpha), np.inf, z * 0.0 - pb.alpha * 0.0)))
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
    u = None
    for term, d in zip(pb.row_terms, derivs):
        part = term.rho * d if term.uniform is None else d * term.uniform
        if u is None and np.shape(part) == (pb.n,):
            u = np.asarray(part, dtype=np.float64)  # a fresh product: one pass, no zeros to add into
        else:
            u = (np.zeros(pb.n) if u is None else u) + part
    return np.zeros(pb.n) if u is None else u


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


def balanced_dual(pb, derivs, Atu):
    """(per-row derivatives, z = -A^T u) of a dual point with sum u = 0 where a free intercept needs it.

    `Atu` is A^T u, u = dual_adjoint_inputs(pb, derivs) (the gradient's own pass). A few rows on the
    side with the surplus shrink toward zero (`_balance_rows`), or, when that would take many rows,
    the whole side is scaled down at the price of one more pass."""
    if not pb.balance:
        return derivs, -Atu
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
    return derivs, z


def dual_value(pb, derivs, z):
    """(t, D) for the dual point scaled by t (Kim et al. 2007) so the penalty's conjugate is finite;
    D = -inf when no t > 0 does it."""
    t = _dual_scale(pb, z)
    if not t > 0.0:
        return t, -math.inf
    conj = 0.0
    with np.errstate(all="ignore"):
        for term, d in zip(pb.row_terms, derivs):
            for rows in _row_blocks(pb.n):  # by blocks, like `sum_and_derivative`: the temporaries stay in cache
                v = d[rows] if t == 1.0 else t * d[rows]
                conj += term.weighted_sum(term.conjugate_rows(v, rows), rows)
    return t, -conj - _penalty_conjugate(pb, t * z) + pb.constant


def duality_gap(pb, theta, P, derivs, Atu):
    """P(theta) - D(u) for the dual point u built from the per-row derivatives (REFERENCE.md), balanced
    for a free intercept (`balanced_dual`) and scaled (`dual_value`). Returns +inf when no finite dual
    value is found."""
    derivs, z = balanced_dual(pb, derivs, Atu)
    _t, dual = dual_value(pb, derivs, z)
    gap = P - dual
    return gap if np.isfinite(gap) else math.inf


def gap_safe_screen(spec, X, y, weights, input_names, tunables, theta, curvature, candidates, prepared=None):
    """The Gap Safe sphere test (Fercoq, Gramfort & Salmon, "Mind the duality gap: safer rules for the
    Lasso", ICML 2015; Ndiaye, Fercoq, Gramfort & Salmon, "Gap safe screening rules for sparsity
    enforcing penalties", JMLR 2017, for other smooth losses) at `theta` (any point, e.g. the answer
    at the previous value of a path): which of the weight coordinates `candidates` are zero at the
    optimum of this problem. Returns (a boolean mask over `candidates`, the duality gap at theta).

    The dual variables are the rows' derivatives d. Each row term phi_k has a derivative with
    Lipschitz constant curvature[k] (the catalog's grad_lipschitz, times y^2 for a margin loss), so
    phi_k* is 1/curvature[k]-strongly convex and the dual is strongly concave with Hessian at most
    -diag(rho_k / curvature[k]); at the dual optimum d*, for any feasible d with gap G,
    sum_k sum_i rho_ki (d_ki - d*_ki)^2 / curvature[k] <= 2 G. By Cauchy-Schwarz,
    |a_j^T (u - u*)| <= sqrt(2 G) ||a_j||_R, R_i = sum_k curvature[k] rho_ki, and with a free
    intercept (sum u = sum u* = 0) a_j may be centred by any constant, here the R-weighted mean. A
    weight with |a_j^T u| + sqrt(2 G) ||a_j||_R < alpha_j has |a_j^T u*| < alpha_j, so it is zero at
    the optimum (its optimality condition). Valid only for a separable L1 weight alpha_j > 0 with no
    bound, ball or group on the coordinate (the caller checks; here the gap must be available)."""
    pb = build_problem(spec, X, y, weights, input_names, tunables, prepared)
    setup_problem(pb, "fista", prepared)
    candidates = np.asarray(candidates, dtype=np.intp)
    none = np.zeros(candidates.shape[0], dtype=bool)
    if not pb.use_gap or not pb.standard or len(curvature) != len(pb.row_terms):
        return none, math.inf
    theta = _to_internal(pb, np.asarray(theta, dtype=np.float64))
    ev = evaluate_smooth(pb, theta)
    P = ev.f + nonsmooth_penalties(pb, theta)
    derivs, z = balanced_dual(pb, ev.derivs, ev.Atu)
    t, dual = dual_value(pb, derivs, z)
    gap = max(0.0, P - dual)
    if not (np.isfinite(gap) and t > 0.0):
        return none, math.inf
    R = np.zeros(pb.n)
    for term, L in zip(pb.row_terms, curvature):
        R += float(L) * term.rho
    key = ("column norms", id(pb.X), _fingerprint(R), bool(pb.balance))
    norms = None if prepared is None else prepared.get(key)
    if norms is None:
        if _is_chunked(pb.X):
            Xsq = pb.X.weighted_square_sums(R)
        elif _is_sparse(pb.X):
            Xsq = np.asarray(pb.X.multiply(pb.X).T @ R, dtype=np.float64).ravel()
        else:
            Xsq = np.einsum("ij,ij,i->j", pb.X, pb.X, R)
        pb.passes += 1
        if pb.balance:
            XR = np.asarray(pb.X.T @ R, dtype=np.float64).ravel()
            Xsq = Xsq - XR * XR / float(np.sum(R))
        norms = np.sqrt(np.maximum(Xsq, 0.0))
        if prepared is not None:
            prepared[key] = norms
    cols = pb.w_index[candidates] if pb.w_index is not None else candidates
    reach = t * np.abs(z[cols]) + math.sqrt(2.0 * gap) * norms[candidates]
    # a relative margin of 1e-9 against the rounding of a_j^T u (common practice, no source)
    return reach < pb.alpha[cols] * (1.0 - 1e-9), gap


def relative(value, objective):
    return value / max(1.0, abs(objective))


# ---------------------------------------------------------------- the smooth model

class _Evaluation:
    """Everything computed at one theta: score, value, gradient and the certificate's inputs."""

    def __init__(self, theta, s, f, grad, derivs, Atu):
        self.theta, self.s, self.f, self.grad, self.derivs, self.Atu = theta, s, f, grad, derivs, Atu


def evaluate_smooth(pb, theta, mu=0.0, s=None):
    """f (row terms, smoothed when mu > 0, plus smooth penalties) and its gradient at theta. The last
    evaluation from the point's own score is kept on pb and handed back for the same theta and mu (a warm
    start is evaluated by the caller's overflow check, then by the method's first step)."""
    memo = getattr(pb, "evaluation_memo", None)
    if s is None and memo is not None and memo[1] == mu and memo[2] is pb.center and np.array_equal(memo[0], theta):
        return memo[3]
    own_score = s is None
    if own_score:
        s = score(pb, theta)
    rows, derivs = rows_part(pb, s, mu)
    # a smooth term's derivative in this list is its exact one at s (smoothing touches nonsmooth terms only):
    # `distance_certificate` then need not form it again (the pair is compared by identity)
    pb.exact_rows = (s, derivs)
    only = pb.row_terms[0] if len(pb.row_terms) == 1 else None
    if only is not None and only.uniform is not None:
        # A^T (rho d) = rho A^T d for one rho on every row: a scaled p-vector, not a scaled row-sized copy
        Atu = adjoint(pb, derivs[0])
        Atu *= only.uniform
    else:
        Atu = adjoint(pb, dual_adjoint_inputs(pb, derivs))
    pen, pgrad = smooth_penalties(pb, theta)
    grad = Atu + pgrad
    if not own_score:
        return _Evaluation(theta, s, rows + pen + pb.constant, grad, derivs, Atu)
    kept = np.array(theta, dtype=np.float64, copy=True)  # the caller may reuse its array
    ev = _Evaluation(kept, s, rows + pen + pb.constant, grad, derivs, Atu)
    pb.evaluation_memo = (kept, mu, pb.center, ev)
    return ev


def certificate(pb, ev, P, residual):
    """('duality gap' or 'optimality residual', absolute value)."""
    if pb.use_gap:
        return "duality gap", duality_gap(pb, ev.theta, P, ev.derivs, ev.Atu)
    return "optimality residual", residual


# ---------------------------------------------------------------- distance to the optimum
#
# A small duality gap bounds P(theta) - P*, not theta - theta*: on an ill-conditioned table a relative gap
# of 1e-6 leaves the weights off by 1e-3. Where the objective F is mu-strongly convex, three bounds on
# D = ||theta - theta*|| hold (theta* the minimizer, 0 in the subdifferential there):
#
# (gap)  F(theta) - F* >= (mu / 2) D^2, so D <= sqrt(2 gap / mu)  (Boyd & Vandenberghe 2004, Convex
#        Optimization, sec. 9.1.2). The gap bottoms out at rounding (~1e-16 |P|), so with mu = 1e-4 this
#        cannot reach 1e-6.
# (subgradient)  for v in the subdifferential at theta, <v - 0, theta - theta*> >= mu D^2 (strong
#        monotonicity), so D <= ||v|| / mu  (Nesterov 2004, Kluwer,
#        Thm 2.1.10, for the gradient). Here v = A^T (rho d) + grad R(theta) + (l1, bounds, groups), and a
#        nonsmooth row's d_i is only an eps_i-subgradient of phi_i at s_i, eps_i = phi_i(s_i) + phi_i*(d_i)
#        - d_i s_i (Fenchel-Young). The curvature comes from smooth pieces whose derivatives are exact, so
#        F(t') >= F(t) + <v, t' - t> - eps + (mu/2)||t' - t||^2 with eps = sum_i rho_i eps_i; adding
#        F(t) >= F* + (mu/2) D^2 at t' = theta* gives mu D^2 <= ||v|| D + eps, that is
#        D <= (||v|| + sqrt(||v||^2 + 4 mu eps)) / (2 mu)  (= ||v|| / mu when eps = 0).
# (ball)  when mu(r) is a modulus only on the ball B(theta, r) (a logistic loss flattens far out), either
#        bound above, computed with mu(r), still holds when it comes out below r. Along the ray from theta
#        to theta*, g(t) = F(theta + t u): g is convex with its minimum at t = D, so g is nonincreasing on
#        [0, D]. For t1 = min(r, D): g(t1) >= g(0) - t1 ||v|| - eps + mu t1^2 / 2 (the inequality above,
#        inside the ball), and g(0) >= g(t1) + mu t1^2 / 2 (strong convexity on [0, t1] with g'(t1) <= 0);
#        so mu t1^2 <= t1 ||v|| + eps, t1 <= the subgradient bound b. If b < r then t1 < r, so t1 = D <= b.
#        For the gap bound: h(t) = F(theta* + t u) - F* is convex, nondecreasing on [0, D], and strongly
#        convex on [D - min(r, D), D]; so gap >= h(D) >= mu min(r, D)^2 / 2, and sqrt(2 gap / mu) < r
#        forces min(r, D) = D.
#
# mu: with Hessian >= diag(beta) + A^T D A, where beta holds the ridge weights (2c for c * l2sq) and D the
# rows' curvature floors (the catalog's `curv_floor` of each loss over the interval the row's score can
# reach inside the ball, |s_i' - s_i| <= ||a_i|| r), a cheap lower bound on the smallest eigenvalue for
# the standard score s = (X - 1 m^T) w + b' (rows a_i = (x_ci, 1)) is the larger of two 2x2 eigenvalues.
# For a unit direction (a, c) with u = ||a||, v = |c|, S = sum d_i, sigma^2 = sum d_i ||x_ci||^2 (Frobenius,
# >= ||D^1/2 X_c||_2^2) and gamma = ||X_c^T d||:
#   q(a, c) >= beta_w u^2 + beta_b v^2 + max(0, sqrt(S) v - sigma u)^2   (triangle inequality), and
#   q(a, c) >= beta_w u^2 + (beta_b + S) v^2 - 2 gamma u v              (X_c^T D X_c >= 0, Cauchy-Schwarz);
# the second is the quadratic form of [[beta_w, -gamma], [-gamma, beta_b + S]]; the first is the form of
# [[beta_w + sigma^2, -sqrt(S) sigma], [-sqrt(S) sigma, beta_b + S]] where sqrt(S) v >= sigma u, and
# beta_w u^2 + beta_b v^2 elsewhere, which is >= that form's least eigenvalue at the boundary when
# beta_w >= beta_b and >= beta_w otherwise.
#
# The solver works in centred coordinates (w, b' = b + m.w) for a free intercept; the user's are
# (w, b) = T (w, b') with T = [[I, 0], [-m^T, 1]], so their error is at most ||T||_2 times ours, with
# ||T||_2^2 = (2 + q^2 + q sqrt(4 + q^2)) / 2, q = ||m|| (the eigenvalues of T^T T on span(m, e_b)).

def _analysis_frame(pb, s):
    """The coordinates the modulus is proved in, formed once per fit (one pass on a dense table, two on a
    sparse one).

    With a free intercept: (w, b + c.w), c the mean of the rows weighted by their curvature d_ref at the
    first check, so that X_c^T d_ref = 0 and the weights-intercept block of the Hessian bound nearly
    vanishes (any c gives a valid bound; this one makes it tight; a penalized intercept keeps c = 0, since
    moving it would mix the ridge weights). Holds c, d_ref, ||x_i - c|| and ||a_i|| (the score map's rows)."""
    frame = getattr(pb, "frame", None)
    if frame is not None:
        return frame
    c, d_ref = None, None
    if pb.b_index is not None and pb.beta[pb.b_index] == 0.0:
        d_ref = _row_curvature(pb, s, np.zeros(pb.n))
        total = float(np.sum(d_ref)) if d_ref is not None else 0.0
        if not total > 0.0:
            d_ref = None
    X = pb.X
    if not _is_sparse(X):
        # one pass for both: X^T d_ref, and ||x_i - m|| about the solver's own centre m, then ||x_i - c|| <=
        # ||x_i - m|| + ||m - c|| (triangle inequality). Every use of the row norms wants an upper bound
        # (sigma, gamma and the reach only grow with them), so the bound stays valid
        m = None if d_ref is None else pb.center if pb.center is not None else np.zeros(pb.p)
        sq, acc = _centred_rows(X, m, d_ref)
        pb.passes += 1
        if d_ref is None:
            xnorm, reach_sq = np.sqrt(sq), sq
        else:
            c = acc / total
            gap_mc = float(np.sqrt(np.dot(m - c, m - c)))
            xnorm = np.sqrt(sq) + gap_mc * (1.0 + 1e-15) + 1e-15 * np.sqrt(sq)  # the sums' rounding, allowed for
            reach_sq = xnorm * xnorm
        frame = {"c": c, "d_ref": d_ref, "xnorm": xnorm,
                 "reach": np.sqrt(reach_sq + (1.0 if pb.b_index is not None else 0.0))}
        pb.frame = frame
        return frame
    if d_ref is not None:
        pb.passes += 1
        c = np.asarray(X.T @ d_ref, dtype=np.float64).ravel() / total
    sq = np.asarray(X.multiply(X).sum(axis=1), dtype=np.float64).ravel()
    if c is not None:  # the expansion can cancel: add its rounding allowance so it stays an upper bound
        xc = np.asarray(X @ c, dtype=np.float64).ravel()
        cc = float(np.dot(c, c))
        sq = np.maximum(sq - 2.0 * xc + cc, 0.0) + 1e-14 * (sq + 2.0 * np.abs(xc) + cc)
        pb.passes += 1
    pb.passes += 1
    frame = {"c": c, "d_ref": d_ref, "xnorm": np.sqrt(sq),
             "reach": np.sqrt(sq + (1.0 if pb.b_index is not None else 0.0))}
    pb.frame = frame
    return frame


def _centred_rows(X, center, weights):
    """(||x_i - center||^2 per row, X^T weights or None; center None: no shift) in one read of a dense
    table: block by block for an array (no copy of the whole table), by the table itself for one read in
    blocks (objc's chunked tables: the same sums, block by block or on a cluster's workers)."""
    if _is_chunked(X):
        return X.centred_rows(center, weights)
    n, p = X.shape
    acc, sq = None if weights is None else np.zeros(p), np.empty(n)
    chunk = max(1, (8 << 20) // (8 * p))
    for first in range(0, n, chunk):
        block = X[first:first + chunk]
        if acc is not None:
            acc += block.T @ weights[first:first + chunk]
        if center is not None:
            block = block - center
        sq[first:first + chunk] = np.einsum("ij,ij->i", block, block)
    return sq, acc


def _row_curvature(pb, s, reach, rows=None):
    """d_i, a lower bound on the second derivative in the score of row i's terms (rho included) wherever
    row i's score lies within reach_i of s_i, from the catalog's curvature floors; None when a row term
    has no curvature fact (a loss the spec defines) or a negative weight. With `rows`, s and reach hold
    those rows only and so does the result."""
    k = pb.n if rows is None else len(rows)
    d = np.zeros(k)
    reach = np.broadcast_to(np.asarray(reach, dtype=np.float64), (k,))
    for term in pb.row_terms:
        floor_fn = term.curv_floor
        if floor_fn is None or np.any(term.rho < 0):
            return None
        y_all = term.y if rows is None else term.y[rows]
        rho_all = term.rho if rows is None else term.rho[rows]
        for b in _row_blocks(k):  # by blocks, like `sum_and_derivative`: a dozen temporaries, kept in cache
            y, rho, s_b, reach_b = y_all[b], rho_all[b], s[b], reach[b]
            with np.errstate(invalid="ignore", over="ignore"):
                if term.role == "margin":  # phi(s) = l(y s): phi'' = y^2 l''(y s); m moves by |y| |ds|
                    m, spread = y * s_b, np.where(y != 0.0, np.abs(y) * reach_b, 0.0)
                    floor = y * y * floor_fn(m - spread, m + spread, **term.options)
                elif term.role == "residual":  # phi(s) = l(y - s): phi'' = l''(y - s)
                    res = y - s_b
                    floor = floor_fn(res - reach_b, res + reach_b, **term.options)
                else:
                    return None
            floor = np.where(np.isfinite(floor) & (floor > 0.0), floor, 0.0)
            d[b] += rho * floor
    return d


def _least_eigenvalue_2x2(a, b, c):
    """The smaller eigenvalue of [[a, -b], [-b, c]] (a, c >= 0), as det / the larger one."""
    big = 0.5 * (a + c) + math.sqrt(0.25 * (a - c) ** 2 + b * b)
    return (a * c - b * b) / big if big > 0 else 0.0


def _modulus(pb, frame, d):
    """A strong-convexity modulus from the ridge weights and the rows' curvature d, in the frame's
    coordinates (the argument above); gamma is bounded without a pass: X_c^T d_ref = 0 by the choice of
    c (up to rounding, allowed for), so ||X_c^T d|| <= sum_i |d_i - d_ref_i| ||x_ci||."""
    beta = pb.beta
    beta_w = float(np.min(beta[pb.w_index]))
    if pb.b_index is None:
        return beta_w  # A^T D A >= 0 adds nothing provable cheaply without an intercept
    beta_b = float(beta[pb.b_index])
    xnorm = frame["xnorm"]
    S = float(np.sum(d))
    sigma2 = float(np.dot(d, xnorm * xnorm))
    det = beta_w * beta_b + beta_w * S + beta_b * sigma2  # of the first matrix, expanded: nothing cancels
    big = 0.5 * (beta_w + sigma2 + beta_b + S) + math.sqrt(0.25 * (beta_w + sigma2 - beta_b - S) ** 2 + S * sigma2)
    first = det / big if big > 0 else 0.0
    if beta_w < beta_b:
        first = min(first, beta_w)
    second = 0.0
    if frame["d_ref"] is not None and S > 0:
        d_ref = frame["d_ref"]
        gamma = float(np.dot(np.abs(d - d_ref), xnorm)) + 1e-14 * float(np.dot(d_ref, xnorm))
        second = _least_eigenvalue_2x2(beta_w, gamma, beta_b + S)
    return max(first, second, 0.0)


# A modulus from a sample of the Hessian. For any set S of rows, A^T D A >= A_S^T D_S A_S in the Loewner order
# (the rows left out add the terms d_i a_i a_i^T, PSD for d_i >= 0), and the least eigenvalue is monotone in
# that order (Weyl's inequality), so the least eigenvalue of M + diag(beta), M = A_S^T D_S A_S in the solver's
# own coordinates (rows a_i = (x_i - m, 1)), is a modulus of the whole objective. M is formed once per fit,
# with D0 the curvature at the first point checked; at a later point and radius r, the floors d_i(r) over the
# ball (as above) give kappa = min_S d_i(r) / d0_i, so A_S^T D(r) A_S >= kappa M, and for kappa <= 1,
# kappa M + diag(beta) >= kappa (M + diag(beta)): the modulus on the ball is kappa times the one formed.
# Unlike the cheap frame above it sees the loss's curvature in the weights' directions: on the logistic
# benchmark table (1e-4 ridge) the frame proves 1e-4, the Hessian's least eigenvalue is 1.6e-3 at 1e5 rows
# and 1.2e-3 at 1e4 (measured), and a sample of a fifth of the rows proves about a fifth of it.
#
# Rounding: M's entries are sums of k products of entries of D^1/2 A_S (each rounded three times: the
# centring, the square root, the product), off by at most gamma_{k+8} sum_i d_i |a_ij| |a_il| (Higham 2002,
# Accuracy and Stability of Numerical Algorithms, 2nd ed., sec. 3.1, gamma_n = n u / (1 - n u)), so the
# error matrix has Frobenius norm at most gamma_{k+8} sum_i d_i ||a_i||^2 (the triangle inequality over the
# rows, ||a a^T||_F = ||a||^2); the symmetric eigensolver is backward stable (its eigenvalues are exact for a
# matrix within a small multiple of size x u x ||H|| of H; the factor 10 is our own margin, the same as
# `_gram_modulus`). Both are taken off.
#
# The sample: every (n / k)-th row (deterministic; a table sorted by class still yields a spread), with
# k = max(50 size, 20 n / size), or every row once that reaches n / 2. The rule: M costs k size^2
# multiply-adds at matrix-matrix speed, measured on the benchmark machine at about ten times a pass's
# memory-bound rate per operation, so k rows cost about k size / (10 n) passes (20 n / size rows about two);
# a sample dearer than 20 passes is not formed (after the gap passed, the parameter stop's own iterations
# cost 4-45 passes on the benchmark tables, so more would rarely pay; our own limit, from those
# measurements). At least 50 size rows keep a sample's least eigenvalue near its share of the whole (for a
# k x size Gaussian sample it is about (1 - sqrt(size / k))^2 times that share: a textbook random-matrix
# value, recalled from memory). With every row, M + diag(beta) is the exact Hessian at the first point
# checked (the one-point floor is l'' itself) and L-BFGS hands over to Newton steps with it (`method_lbfgs`).
# Dense tables only: a sparse table's rows would be densified.

# The runtime's one process-wide value, on purpose: which shared libraries are loaded is a fact of the
# process, not of a fit or a problem, so no argument could carry it better (see `_blas_controller`).
_LOADED_LIBRARIES = {"key": None, "controller": None}


def _blas_controller():
    """threadpoolctl's view of the loaded BLAS/OpenMP libraries, scanned once per set of imported modules.
    A scan reads the process's whole map of shared objects (measured: about 2 ms a scan with SciPy and
    scikit-learn loaded, three scans a fit, a sixth of a 1e4 x 100 logistic fit), and a new library comes
    only with a new import, so the count of imported modules keys the one kept scan. None without
    threadpoolctl or when the scan fails: a thread cap is an optimisation only, never a reason to fail."""
    if _threadpoolctl is None:
        return None
    key = len(sys.modules)
    if _LOADED_LIBRARIES["key"] != key:
        try:
            _LOADED_LIBRARIES["controller"] = _threadpoolctl.ThreadpoolController()
        except Exception:
            _LOADED_LIBRARIES["controller"] = None
        _LOADED_LIBRARIES["key"] = key
    return _LOADED_LIBRARIES["controller"]


class _BlasCap:
    """A thread cap held inside a `with` block and restored after; `_limit(controller)` says which pools
    get which cap. A thread cap is an optimisation only, never a reason to fail: any error leaves the
    threads as they are."""

    def _limit(self, controller):
        raise NotImplementedError

    def __enter__(self):
        controller = _blas_controller()
        try:
            self._cap = None if controller is None else self._limit(controller)
        except Exception:
            self._cap = None
        return self

    def __exit__(self, *exc):
        if self._cap is not None:
            self._cap.restore_original_limits()
        return False


class _OneBlasThread(_BlasCap):
    """NumPy's BLAS at one thread inside the block (restored after): for many small products, whose
    thread hand-offs dominate. Measured on the 2-core benchmark machine, 12 rank-1300 updates of a 100 x 100
    matrix took 11-12 ms on one thread and 12-57 ms on two, up to 400 ms while another process held a core
    (an idle core is needed at every hand-off); one thread was as fast as two when the machine was idle."""

    def _limit(self, controller):
        return controller.limit(limits=1, user_api="blas")


def _hessian_block_rows(p):
    """Rows in one block of `_sample_hessian`: about 1 MB."""
    return max(1, (1 << 20) // (8 * p))


def _sample_rows(n, k, run):
    """About k of n rows (k <= n / 2) as evenly spaced runs of `run` consecutive rows (the last run may be
    cut short to k): each run is one block of `_sample_hessian`, copied as one contiguous slice rather than
    gathered row by row (gathering 4e5 scattered rows of 50 took 50 ms at 1e6 x 50, a quarter of the
    Hessian's time)."""
    run = min(run, k)
    count = -(-k // run)
    # count * run < k + run <= 2 k <= n, so the spacing (n - run) / (count - 1) is at least run: no overlap
    starts = (np.arange(count, dtype=np.intp) * (n - run)) // max(count - 1, 1)
    return (starts[:, None] + np.arange(run, dtype=np.intp)).ravel()[:k]


def _sample_hessian(pb, rows, d):
    """(A_S^T D A_S in the solver's coordinates, ||x_i - m||^2 per sampled row) for the rows `rows` (None: all)
    with curvature d (one value per sampled row): rows a_i = (x_i - m, 1), m the solver's centre. Reads the
    sampled rows once."""
    w, m, X = pb.w_index, pb.center, pb.X
    k = pb.n if rows is None else len(rows)
    root = np.sqrt(d)
    if _is_chunked(X):
        Mww, h, sq = X.sampled_gram(rows, root, m)
    else:
        Mww, h, sq = _sample_gram_in_memory(X, rows, root, m, k, pb.p)
    pb.row_reads += k
    H = np.zeros((pb.size, pb.size))
    H[np.ix_(w, w)] = Mww
    if pb.b_index is not None:
        H[w, pb.b_index] = H[pb.b_index, w] = h
        H[pb.b_index, pb.b_index] = float(np.sum(d))
    return H, sq


def _sample_gram_in_memory(X, rows, root, m, k, p):
    """S^T S with S = D^1/2 (X_S - 1 m^T), S^T root and the rows' ||x_i - m||^2, one block of about 1 MB at a
    time in one reused buffer: the product then runs as a symmetric rank-k update on cached rows (measured:
    about six times faster than (B * d)^T B over 8 MB blocks at 1e6 x 50 on a busy machine)."""
    Mww, h, sq = np.zeros((p, p)), np.zeros(p), np.empty(k)
    chunk = _hessian_block_rows(p)
    buf = np.empty((min(chunk, k), p))
    with _OneBlasThread():
        for first in range(0, k, chunk):
            last = min(first + chunk, k)
            block = buf[:last - first]
            if rows is None:
                block[...] = X[first:last]
            elif rows[last - 1] - rows[first] == last - first - 1:  # one run of `_sample_rows`: a slice
                block[...] = X[rows[first]:rows[first] + last - first]
            else:
                np.take(X, rows[first:last], axis=0, out=block)
            if m is not None:
                block -= m
            sq[first:last] = np.einsum("ij,ij->i", block, block)
            r = root[first:last]
            block *= r[:, None]
            Mww += block.T @ block
            h += block.T @ r
    return Mww, h, sq


def _sampled_curvature(pb, s):
    """The sample's (rows or None for all, d0, reach_i = ||a_i|| (an upper bound), least eigenvalue of
    M + diag(beta) less its rounding allowance), formed once per fit at the first check; None where the
    argument does not apply (sparse table, a loss without a curvature fact, no curvature on the sample)."""
    cached = getattr(pb, "sampled", None)
    if cached is not None:
        return cached or None
    pb.sampled = False
    if _is_sparse(pb.X) or not pb.standard or pb.size > 2000:
        return None
    n, size, unit = pb.n, pb.size, 2.0 ** -53
    k = max(50 * size, (20 * n) // size)
    k = n if 2 * k >= n else k  # at most twice the cost for the exact Hessian, which also gives a Newton step
    if k * size > 200 * n:  # over about 20 passes (k size / (10 n), the rule below): the frame is cheaper
        return None
    rows = None if k >= n else _sample_rows(n, k, _hessian_block_rows(pb.p))
    key = _sample_key(pb, k)
    kept = None if key is None or rows is None else pb.prepared.get(key)
    d0 = None
    if kept is not None:
        # a sample of the path's table formed at an earlier point: reused while the rows' curvature here is
        # still at least 0.8 of what it was there (the ball argument's kappa, the least ratio, covers any
        # change, so this only decides when a fresh sample pays: 0.8 is our own choice)
        d0 = _row_curvature(pb, s[rows], np.zeros(k), rows)  # the curvature here: a fresh sample's too
        used = kept["d0"] > 0.0
        if d0 is not None and float(np.min(d0[used] / kept["d0"][used])) >= 0.8:
            least = _sample_least(pb, kept["M"], kept["d0"], kept["norms2"], k)
            if least > 0.0:
                pb.sampled = {"rows": rows, "d0": kept["d0"], "reach": kept["reach"], "least": least, "k": k,
                              "H": None, "reused": True}
                return pb.sampled
    if kept is None:
        d0 = _row_curvature(pb, s if rows is None else s[rows], np.zeros(k), rows)
    if d0 is None or not np.any(d0 > 0.0):
        return None
    M, sq = _sample_hessian(pb, rows, d0)
    intercept = 1.0 if pb.b_index is not None else 0.0
    norms2 = sq * (1.0 + 4.0 * unit) + intercept  # ||a_i||^2, rounded up
    reach = np.sqrt(norms2) * (1.0 + 2.0 * unit)
    least = _sample_least(pb, M, d0, norms2, k)
    if key is not None and rows is not None:
        pb.prepared[key] = {"M": M, "d0": d0, "norms2": norms2, "reach": reach}
    if not least > 0.0:
        return None
    pb.sampled = {"rows": rows, "d0": d0, "reach": reach, "least": least, "k": k,
                  "H": M + np.diag(pb.beta) if rows is None else None}  # all rows: the exact Hessian here
    return pb.sampled


def _sample_key(pb, k):
    """The key of a Hessian sample of this problem's table in its path's cache, or None (no cache, or the
    cache is another table's). The sample's data part depends only on the rows read, the centre and the
    curvature it was formed with (kept beside it): not on the target, the ridge weights or any tunable."""
    prepared = getattr(pb, "prepared", None)
    if prepared is None or prepared.get("X") is not pb.X:
        return None
    centre = None if pb.center is None else _fingerprint(pb.center)
    return ("hessian sample", id(pb.X), k, centre, pb.b_index is not None)


def _sample_least(pb, M, d0, norms2, k):
    """The least eigenvalue of M + diag(beta) less its rounding allowance: M = A_S^T D0 A_S as computed,
    off the exact one by at most gamma_k sum_i d0_i ||a_i||^2, and the eigenvalue's own rounding."""
    unit, size = 2.0 ** -53, pb.size
    H = M + np.diag(pb.beta)
    gamma = (k + 8) * unit / (1.0 - (k + 8) * unit)  # k products, each entry of S off by at most 3u
    allowance = gamma * float(np.dot(d0, norms2)) * (1.0 + 1e-10) + \
        10.0 * size * unit * float(np.sqrt(np.sum(H * H)))
    with _OneBlasThread():  # a small eigenproblem: the same hand-offs
        return float(np.linalg.eigvalsh(H)[0]) - allowance


def _sampled_modulus(pb, sampled, s, r):
    """kappa(r) times the sample's least eigenvalue: a modulus on the ball of radius r about the point whose
    score is s (the argument above)."""
    rows, d0 = sampled["rows"], sampled["d0"]
    d = _row_curvature(pb, s if rows is None else s[rows], sampled["reach"] * r, rows)
    if d is None:
        return 0.0
    used = d0 > 0.0
    kappa = float(np.min(d[used] / d0[used])) * (1.0 - 4.0 * 2.0 ** -53)  # the division's rounding
    return min(max(kappa, 0.0), 1.0) * sampled["least"]


def _table_norm(pb):
    """||X||_F (rounded up), once per fit: one read of the table, no copy."""
    norm = getattr(pb, "table_norm", None)
    prepared = getattr(pb, "prepared", None)
    # a path's cache holds its table (prepared["X"]), so that table's id names it while the cache lives
    shared = prepared is not None and prepared.get("X") is pb.X
    if norm is None and shared:
        norm = prepared.get(("table norm", id(pb.X)))
        pb.table_norm = norm
    if norm is None:
        X = pb.X
        if _is_sparse(X):
            total = float(np.dot(X.data, X.data))
        elif _is_chunked(X):
            total = X.squared_norm()
        elif X.flags.c_contiguous or X.flags.f_contiguous:
            flat = X.ravel(order="K")  # a view for a contiguous table
            total = float(np.dot(flat, flat))
        else:
            total = float(np.einsum("ij,ij->", X, X))
        # a sum of n p squares, off by at most gamma_{np} times itself (Higham 2002, sec. 3.1)
        unit = 2.0 ** -53 * (X.shape[0] * X.shape[1] + 2)
        norm = math.sqrt(total * (1.0 + unit / (1.0 - unit))) * (1.0 + 2.0 ** -52)
        pb.table_norm = norm
        if shared:
            prepared[("table norm", id(pb.X))] = norm
    return norm


def _least_subgradient(pb, theta, grad):
    """The minimum-norm element of the subdifferential at theta of the whole objective, given the gradient
    of its smooth part: coordinate-wise for l1 weights and bounds (at a zero coordinate the soft
    threshold of the gradient; a bound adds its normal cone), per group for group norms. None where a
    norm ball leaves only the gap bound."""
    if pb.l1_balls or pb.l2_balls or pb.other_nonsmooth:
        return None
    a = pb.alpha
    zero = theta == 0.0
    low = np.where(zero, grad - a, grad + a * np.sign(theta))
    high = np.where(zero, grad + a, low)
    low = np.where(theta <= pb.lo, -np.inf, low)   # at a lower bound the cone adds (-inf, 0]
    high = np.where(theta >= pb.hi, np.inf, high)  # at an upper bound [0, inf)
    v = np.clip(0.0, low, high)
    for idx, lam in pb.groups:
        if np.any(a[idx] > 0):
            return None
        th, g = theta[idx], grad[idx]
        norm = float(np.sqrt(np.dot(th, th)))
        if norm > 0:
            v[idx] = g + lam * th / norm
        else:
            gn = float(np.sqrt(np.dot(g, g)))
            v[idx] = g * max(0.0, 1.0 - lam / gn) if gn > 0 else 0.0
    return v


def _subgradient_slack(pb, s, derivs):
    """eps = sum_i rho_i (phi_i(s_i) + phi_i*(d_i) - d_i s_i) over the rows whose d_i is not the catalog's
    derivative at s_i (those rows' d_i are eps_i-subgradients, Fenchel-Young); None when such a row's
    term has no conjugate or d_i lies outside its domain."""
    eps = 0.0
    for term, d in zip(pb.row_terms, derivs):
        value, exact = term.value_and_derivative(s, pb.cols, pb.tun)
        off = (d != exact) & (term.rho != 0.0)
        if not np.any(off):
            continue
        if term.conj_kernel is None:
            return None
        with np.errstate(all="ignore"):
            fy = value[off] + term.conjugate_rows(d[off], off) - d[off] * s[off]
        if not np.all(np.isfinite(fy)):
            return None
        eps += float(np.sum(np.abs(term.rho[off]) * np.maximum(fy, 0.0)))
    return eps


def _shift_norm(c):
    """||T||_2 for T = [[I, 0], [-c^T, 1]], the map (w, b + c.w) -> (w, b); 1 for no shift."""
    if c is None:
        return 1.0
    q = float(np.sqrt(np.dot(c, c)))
    return math.sqrt(0.5 * (2.0 + q * q + q * math.sqrt(4.0 + q * q)))


def _coordinate_factor(pb):
    """||T||_2 from the solver's centred coordinates to the user's (1 without centring)."""
    return _shift_norm(pb.center)


def _gradient_in(pb, grad, c):
    """The gradient in the coordinates (w, b + c.w) from the solver's (w, b + m.w), m its centre: only
    the weights' part moves, by (m - c) times the intercept's."""
    if pb.b_index is None:
        return grad
    m = pb.center if pb.center is not None else 0.0
    shift = m - (c if c is not None else 0.0)
    if np.all(np.asarray(shift) == 0.0):
        return grad
    out = grad.copy()
    out[pb.w_index] = grad[pb.w_index] + shift * grad[pb.b_index]
    return out


def _gram_modulus(pb):
    """The least eigenvalue of the exact Hessian H + diag(beta) of a squared-loss problem held as a Gram
    matrix, less a rounding allowance (the eigensolver is backward stable: its eigenvalues are exact for
    a matrix within a few size x eps x ||H|| of H; forming H from X rounds by about sqrt(n) eps ||H||)."""
    def least():
        H = pb.gram["H"] + np.diag(pb.beta)
        if H.shape[0] > 600:
            return 0.0
        value = float(np.linalg.eigvalsh(H)[0])
        allowance = 10.0 * (H.shape[0] + math.sqrt(pb.n)) * 2.2e-16 * float(np.sqrt(np.sum(H * H)))
        return max(value - allowance, 0.0)
    return _gram_cached(pb, "modulus", least)


def distance_certificate(pb, theta, P, gap, s=None, derivs=None, Atu=None, grad=None):
    """A bound on ||theta - theta*|| in the user's coordinates (theta in the solver's own): returns
    (bound or None, mu or None, note, residual) with residual the norm of the least subgradient in the
    user's coordinates (the optimality residual reported where no bound is proved). `derivs`/`Atu` give
    the dual point the certificate used (a nonsmooth row's derivative there counts with its
    Fenchel-Young slack); `grad` the exact gradient of a smooth objective (the Gram path)."""
    if not pb.standard:
        pb.last_least_subgradient = None
        return None, None, "no bound: the score is not of the form w . x + b", None
    eps = 0.0
    u_rows, frame = None, None
    gram = getattr(pb, "gram", None) is not None and grad is not None
    if grad is None:
        if s is None:
            s = score(pb, theta)
        fresh = []
        known = getattr(pb, "exact_rows", None)
        known = known is not None and known[0] is s and known[1] is derivs  # from `evaluate_smooth` at s
        for k, term in enumerate(pb.row_terms):
            d = None if derivs is None else derivs[k]
            if (term.smooth and not known) or d is None:  # a smooth row's own derivative at s: exact, no slack
                exact = term.sum_and_derivative(s, pb.cols, pb.tun)[1]
                d = exact if d is None or not np.array_equal(d, exact) else d
            fresh.append(d)
        if Atu is None or derivs is None or any(a is not b for a, b in zip(fresh, derivs)):
            Atu = adjoint(pb, dual_adjoint_inputs(pb, fresh))
        # a smooth row's d in `fresh` is its derivative at s by construction: slack only from the others
        eps = 0.0 if all(term.smooth for term in pb.row_terms) else _subgradient_slack(pb, s, fresh)
        grad = Atu + smooth_penalties(pb, theta)[1]
        u_rows = dual_adjoint_inputs(pb, fresh)
    v_int = _least_subgradient(pb, theta, grad)
    pb.last_least_subgradient = v_int  # the run's curvature estimate reads it where no bound is proved
    v_user = None if v_int is None else _least_subgradient(pb, theta, _gradient_in(pb, grad, None))
    residual = None if v_user is None else float(np.sqrt(np.dot(v_user, v_user)))
    # the gap is a difference of two sums rounded to about eps |P| each: allow for that
    gap = max(gap, 0.0) + 1e-15 * abs(P) if np.isfinite(gap) else math.inf
    sampled = None
    if not gram:
        if s is None:
            s = score(pb, theta)
        sampled = _sampled_curvature(pb, s) if v_int is not None and eps is not None else None
        if sampled is None:
            frame = _analysis_frame(pb, s)
    # the computed gradient is off the exact one by at most g_round, and the least subgradient moves with
    # it by no more (a projection of 0 onto a box or ball shifted by the gradient): add it to ||v||
    g_round = _gradient_rounding(pb, theta, grad, u_rows, frame)

    def bounds(mu, v):
        """(subgradient bound, gap bound) for a modulus mu and the least subgradient v (its frame's)."""
        if not mu > 0:
            return math.inf, math.inf
        sub = math.inf
        if v is not None and eps is not None:
            norm = float(np.sqrt(np.dot(v, v))) + g_round
            sub = (norm + math.sqrt(norm * norm + 4.0 * mu * eps)) / (2.0 * mu)
        return sub, math.sqrt(2.0 * gap / mu)

    def better(best, mu, v, factor, ball, source):
        sub, by_gap = bounds(mu, v)
        kind = "subgradient" if sub <= by_gap else "gap"
        value = min(sub, by_gap)
        if ball is not None and not value < ball:
            return best, value
        if value * factor < best[0]:
            return (value * factor, mu, kind, factor, ball, source), value
        return best, value

    best = (math.inf, None, "", 1.0, None, "")
    pb.last_rounding = None
    if gram:
        best, _ = better(best, _gram_modulus(pb), v_int, _coordinate_factor(pb), None,
                         "the least eigenvalue of the exact Hessian (the Gram matrix), less a rounding allowance")
    if not gram and sampled is not None:
        # the sample's Hessian, on a ball grown until the bound fits (the ball argument above)
        factor = _coordinate_factor(pb)
        reused = ", formed at an earlier point of the path" if sampled.get("reused") else ""
        r = max(2.0 * min(bounds(sampled["least"], v_int)), 1e-300)
        for _ in range(6):
            if not np.isfinite(r):
                break
            best, value = better(best, _sampled_modulus(pb, sampled, s, r), v_int, factor, r,
                                 f"the least eigenvalue of the Hessian over {sampled['k']} of the {pb.n} rows (a "
                                 f"lower bound{reused}), times the loss's curvature floor over a ball of radius "
                                 f"{r:.2g}")
            if value < r:
                break
            r = 4.0 * value
        # the cheap frame's modulus never exceeds the least ridge weight on w (it adds to it only through the
        # intercept's 2 x 2 block): needed only when the sample proved less
        if best[1] is None or best[1] < float(np.min(pb.beta[pb.w_index])):
            frame = _analysis_frame(pb, s)
            g_round = min(g_round, _gradient_rounding(pb, theta, grad, u_rows, frame))
    if not gram and frame is not None:
        c = frame["c"]
        v = None if v_int is None else _least_subgradient(pb, theta, _gradient_in(pb, grad, c))
        factor = _shift_norm(c)
        d_all = _row_curvature(pb, s, np.full(pb.n, np.inf))
        everywhere = d_all is not None and np.any(d_all > 0)
        source = ("the ridge weights and the loss's curvature floor on the data" if everywhere
                  else "the ridge weights on every learned parameter")
        best, _ = better(best, _modulus(pb, frame, d_all if d_all is not None else np.zeros(pb.n)), v, factor,
                         None, source)
        d0 = _row_curvature(pb, s, np.zeros(pb.n))
        if d0 is not None and pb.b_index is not None and np.any(d0 > (d_all if d_all is not None else 0.0)):
            # curvature that holds near the answer only: prove it on a ball, grown until the bound fits
            r = max(2.0 * min(bounds(_modulus(pb, frame, d0), v)), 1e-300)
            for _ in range(6):
                if not np.isfinite(r):
                    break
                mu_r = _modulus(pb, frame, _row_curvature(pb, s, frame["reach"] * r))
                best, value = better(best, mu_r, v, factor, r, "the ridge weights and the loss's curvature floor "
                                     f"over a ball of radius {r:.2g} around the answer")
                if value < r:
                    break
                r = 4.0 * value
    bound, mu, kind, factor, ball, source = best
    pb.last_weights_bound = None
    if not np.isfinite(bound):
        reason = _no_bound_reason(pb, v_int, eps)
        weights = _weights_bound(pb, gap)
        if weights is not None:
            pb.last_weights_bound = weights[0]
            reason += (f"; certified for the weights alone: ||w - w*|| <= {weights[0]:.3g} by sqrt(2 gap / mu), "
                       f"mu = {weights[1]:.3g} from the ridge weights on w (the intercept is not covered)")
        return None, None, reason, residual
    # the figure's rounding level: the least either bound can show when the gradient is only known up to
    # g_round and the gap up to its 1e-15 |P| allowance
    pb.last_rounding = factor * min(g_round / mu, math.sqrt(2e-15 * abs(P) / mu))
    text = {"subgradient": "||v|| / mu, v the least subgradient" + (" (with its Fenchel-Young slack)" if eps else ""),
            "gap": "sqrt(2 gap / mu)"}[kind]
    note = f"certified: {text}; mu = {mu:.3g} from {source}"
    if factor > 1.0 + 1e-12:
        note += f"; times {factor:.4g}, the norm of the change of intercept coordinates"
    return bound, mu, note, residual


def _weights_bound(pb, gap):
    """(bound on ||w - w*||, mu) for a free intercept with a ridge weight on every weight, else None.

    F(w, b) = G(w, b) + (mu/2)||w||^2 with G convex (the rows' loss and the other ridge weights' excess over
    mu) is strongly convex in w alone: F(theta) >= F(theta*) + <g, theta - theta*> + (mu/2)||w - w*||^2 for g
    in the subdifferential at theta*, where 0 lies (Boyd & Vandenberghe 2004, Convex Optimization, sec. 9.1.2,
    applied to the seminorm ||w||). So ||w - w*|| <= sqrt(2 gap / mu) whatever the intercept does; the
    weights are the same in the solver's coordinates and the user's (only the intercept moves)."""
    if pb.b_index is None or not pb.standard or not np.isfinite(gap):
        return None
    mu = float(np.min(pb.beta[pb.w_index])) if len(pb.beta[pb.w_index]) else 0.0
    if not mu > 0:
        return None
    return math.sqrt(2.0 * gap / mu), mu


def _gradient_rounding(pb, theta, grad, u, frame):
    """A bound on the rounding error of the computed gradient's norm. A sum of k terms is off by at most
    k u times the sum of their magnitudes in the worst case (Higham 2002, Accuracy and Stability of
    Numerical Algorithms, 2nd ed., sec. 3.1), which at 1e5 rows already exceeds a 1e-6 distance; with
    rounding errors independent and of mean zero it is off by at most lambda sqrt(k) u times that sum
    with probability at least 1 - 2k exp(-lambda^2 / 2) (Higham & Mary 2019, SIAM J. Sci. Comput. 41(5),
    A new approach to probabilistic rounding error analysis, Thm 2.4; recalled from memory). lambda = 10
    here: a failure probability below 1e-20 per term. The Gram path sums n terms into H and q, then size
    terms into H theta - q; the data path n terms u_i a_i, with ||a_i|| <= ||x_i - c|| + ||c|| + ||m|| + 1
    (c the frame's centre, m the solver's). 0 where nothing is known (u and the Gram matrix both missing)."""
    unit = 2.0 ** -53

    def per_term(k):
        return 10.0 * math.sqrt(k) * unit

    pgrad = smooth_penalties(pb, theta)[1]
    extra = float(np.sqrt(np.dot(pgrad, pgrad))) + float(np.sqrt(np.dot(grad, grad)))
    if u is None:
        G = getattr(pb, "gram", None)
        if G is None or frame is not None:
            return 0.0  # nothing known: never blame rounding
        scale = float(np.sqrt(np.sum(G["H"] * G["H"]))) * float(np.sqrt(np.dot(theta, theta))) + \
            float(np.sqrt(np.dot(G["q"], G["q"])))
        return (per_term(pb.n) + per_term(pb.size + 1)) * (scale + extra)
    shift = 1.0
    if frame is None:
        # no row norms at hand: sum_i |u_i| ||a_i|| <= ||u|| sqrt(sum_i ||a_i||^2) (Cauchy-Schwarz), and
        # ||a_i|| <= ||x_i|| + ||m|| + 1 gives sqrt(sum_i ||a_i||^2) <= ||X||_F + sqrt(n) (||m|| + 1) (Minkowski)
        if pb.center is not None:
            shift += float(np.sqrt(np.dot(pb.center, pb.center)))
        scale = float(np.sqrt(np.dot(u, u))) * (_table_norm(pb) + math.sqrt(pb.n) * shift) * (1.0 + 1e-12)
        return per_term(pb.n + 1) * (scale + extra)
    for c in (frame["c"], pb.center):
        if c is not None:
            shift += float(np.sqrt(np.dot(c, c)))
    scale = float(np.dot(np.abs(u), frame["xnorm"] + shift))
    return per_term(pb.n + 1) * (scale + extra)


def _no_bound_reason(pb, v, eps):
    if v is None:
        return "no bound: a norm-ball constraint leaves only the duality gap, and no curvature is known"
    if eps is None:
        return "no bound: a nonsmooth row term has no conjugate to price its subgradient"
    if any(t.curv_floor is None for t in pb.row_terms) and not np.all(pb.beta > 0):
        return "no bound: a row term has no curvature fact (a loss the spec defines) and not every parameter has a ridge weight"
    if not np.all(pb.beta[pb.w_index] > 0):
        return "no bound: not every weight has a ridge weight, so nothing proves strong convexity in all of them"
    return ("no bound: the intercept is free and the loss has no curvature on the data (flat, or flat where "
            "the rows lie)")


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

    def __init__(self, pb, tol, max_passes, progress, param_tol=None):
        self.pb, self.tol, self.max_passes, self.progress = pb, tol, max_passes, progress
        self.iterations, self.cert_kind, self.cert_abs, self.objective = 0, None, math.inf, math.inf
        self.theta = None
        self.smoothing = None
        self.param_tol = param_tol
        self.distance = None   # (bound or None, mu or None, note, residual) of the kept point, once formed
        self.checks = []       # the distance figure of each point that passed the gap, in order
        self.floors = []       # the rounding level of each figure (None where unknown)
        self.window = 20       # checks without progress before a stall is declared; a method may lengthen it
        self.stop_reason = None
        self.distance_floor = None  # the rounding level of the kept point's figure, where known

    def record(self, theta, P, kind, absolute, s=None, derivs=None, Atu=None, grad=None, final=False):
        """Keep the point if it is the best so far; True when the run may stop: the relative certificate
        is within tol and, with a parameter tolerance, the distance to the optimum is within it (certified
        where a bound exists, else estimated), or stopped improving (rounding), or `final` says no better
        point can come (an exact finish)."""
        self.iterations += 1
        passed = relative(absolute, P) <= self.tol
        check = None
        if passed and self.param_tol is not None:
            check = self.distance_check(theta, P, absolute, s, derivs, Atu, grad)
        kept_passed = self.theta is not None and relative(self.cert_abs, self.objective) <= self.tol
        if passed and check is not None:
            keep = not kept_passed or self.distance is None or check[0] <= self._figure(self.distance)
        elif passed:
            keep = not kept_passed or absolute <= self.cert_abs
        else:
            keep = not kept_passed and (self.theta is None or absolute <= self.cert_abs or
                                        not np.isfinite(self.cert_abs))
        if keep:
            self.theta, self.objective, self.cert_kind, self.cert_abs = np.array(theta, copy=True), P, kind, absolute
            self.distance = None if check is None else check[1]
            self.distance_floor = None if check is None else check[2]
        if self.progress is not None:
            self.progress(self.pb.passes, P, relative(absolute, P))
        if not passed:
            return False
        if check is None or final:
            return True
        figure = check[0]
        self.checks.append(figure)
        self.floors.append(check[2])
        if figure <= self.param_tol:
            return True
        return self._stalled()

    def _stalled(self):
        """True, with `stop_reason` set, when the figure has not bettered the best before by a tenth over
        the last `window` checks (the figure of a converging run is noisy, so a shorter window stops runs
        that still progress). Rounding is blamed only when the best figure is within ten times its
        rounding level (`_gradient_rounding`; the ten is our own margin); a stall above
        that level waits five windows, then stops and says the method stalled."""
        checks, window = self.checks, self.window
        if len(checks) <= window or min(checks[-window:]) < 0.9 * min(checks[:-window]):
            return False
        best = min(range(len(checks)), key=checks.__getitem__)
        floor = self.floors[best]
        if floor is not None and checks[best] <= 10.0 * floor:
            self.stop_reason = (f"the figure stopped improving at its rounding level ({checks[best]:.2g}, within ten "
                                f"times the rounding of the gradient and gap, {floor:.2g})")
            return True
        if len(checks) <= 5 * window or min(checks[-5 * window:]) < 0.9 * min(checks[:-5 * window]):
            return False
        level = (f"more than ten times its rounding level {floor:.2g}" if floor is not None
                 else "an uncertified estimate, whose rounding level is not known")
        self.stop_reason = (f"the figure stopped improving over {5 * window} checks at {checks[best]:.2g}, {level}: "
                            "the method stalled, not rounding")
        return True

    @staticmethod
    def _figure(distance):
        """What the stop compares with param_tol: the proved bound, else ten times the estimate (the
        secants overestimate the least curvature, so the estimate runs low; a factor of ten is our own
        margin, with no source: on the test tables it kept the weights within the tolerance). Where only
        the weights have a proved bound (a free intercept, a flat loss), that bound too must pass."""
        bound, estimate, weights = distance[0], distance[4], distance[5]
        if bound is not None:
            return bound
        guess = 10.0 * estimate if estimate is not None else math.inf
        if weights is not None:
            return max(weights, guess) if estimate is not None else weights
        return guess

    def distance_check(self, theta, P, gap, s, derivs, Atu, grad):
        """(figure compared with param_tol, the distance record). Without a proved bound the figure is an
        estimate, ||v|| / mu_hat, with mu_hat the least curvature seen along the last steps (secants of
        the least subgradient): uncertified, and said so."""
        pb = self.pb
        with np.errstate(all="ignore"):
            bound, mu, note, residual = distance_certificate(pb, theta, P, gap if pb.use_gap else math.inf, s, derivs,
                                                             Atu, grad)
        estimate = None
        if bound is None and residual is not None:
            last = getattr(self, "_last_subgradient", None)
            v_now = getattr(pb, "last_least_subgradient", None)
            if last is not None and v_now is not None:
                step = theta - last[0]
                ss = float(np.dot(step, step))
                if ss > 0:
                    curv = float(np.dot(v_now - last[1], step)) / ss
                    if curv > 0:
                        self._mu_hat = min(getattr(self, "_mu_hat", math.inf), curv)
            if v_now is not None:
                self._last_subgradient = (np.array(theta, copy=True), v_now)
            mu_hat = getattr(self, "_mu_hat", None)
            if mu_hat is not None:
                estimate = residual / mu_hat
        record = (bound, mu, note, residual, estimate, getattr(pb, "last_weights_bound", None))
        floor = getattr(pb, "last_rounding", None) if bound is not None else None
        return self._figure(record), record, floor

    def note(self, P):
        """An iteration whose certificate was not formed (progress gets None for it)."""
        self.iterations += 1
        if self.progress is not None:
            self.progress(self.pb.passes, P, None)

    def out_of_passes(self):
        return self.pb.passes >= self.max_passes


def _lbfgs_driver(run, theta0, mu, inner_stop, use_scipy, scale=None):
    """Minimize the smooth model (smoothed with mu) by L-BFGS; inner_stop(ev, P) ends the run.

    With `scale` (sigma from `_first_step_scale`) L-BFGS runs in z = theta / sigma: the same objective and
    minimizer, and after the first step the same iterates (see there); only the first step's length
    changes."""
    pb = run.pb
    cache = {}
    start = theta0 if scale is None else theta0 / scale

    def point(z):
        """theta for L-BFGS's z: theta0 itself at the start (its evaluation is at hand), the same array for
        the same z (the stop then finds the evaluation of the step just taken)."""
        if scale is None:
            return z
        if np.array_equal(z, start):
            return theta0
        last = cache.get("z")
        if last is None or not np.array_equal(last[0], z):
            last = (np.array(z, copy=True), z * scale)
            cache["z"] = last
        return last[1]

    def fun(z):
        theta = point(z)
        with np.errstate(over="ignore", invalid="ignore"):
            ev = evaluate_smooth(pb, theta, mu)
        cache["ev"] = ev
        if not (np.isfinite(ev.f) and np.all(np.isfinite(ev.grad))):
            # overflow (an exponential loss far out): a value too large to accept, so the line search
            # steps back; the gradient is never used at a rejected point
            return 1e300, np.zeros_like(z)
        return ev.f, (ev.grad if scale is None else ev.grad * scale)

    def stop(z, f):
        theta = point(z)
        ev = cache.get("ev")
        if ev is None or not np.array_equal(ev.theta, theta):
            ev = evaluate_smooth(pb, theta, mu)
            cache["ev"] = ev
        return inner_stop(ev) or run.out_of_passes()

    max_iter = max(1, run.max_passes)
    if use_scipy and _scipy_optimize is not None:
        z, iterations, status = lbfgs_scipy(fun, start, stop, max_iter)
    else:
        z, iterations, status = lbfgs_own(fun, start, stop, max_iter)
    return point(z), iterations, status


def _first_step_scale(pb, ev):
    """sigma = min(||g|| / c, 1), c = g^T H g / g^T g the curvature along the gradient g at ev, so that a step of unit
    length in z = theta / sigma along -g (L-BFGS's first step, SciPy's and ours alike) is the minimizer of
    the quadratic model along it. Without it that step has length 1 in theta, far too long from a warm
    start, and its line search costs two or three evaluations. L-BFGS is invariant under a scalar scaling
    of the variables after its first step (its initial matrix is rescaled by s^T y / y^T y at every step,
    Nocedal & Wright 2006, Numerical Optimization, eq. 7.20), so nothing else changes. g^T A^T D A g is
    estimated from every (n / k)-th row (k = 50 size: a fraction of a pass), D the rows' l'' (the catalog's
    curvature floor over the one-point interval). None where that fact, a dense table or a standard score
    is missing (the first step is then L-BFGS's own)."""
    if _is_sparse(pb.X) or not pb.standard or pb.other_smooth:
        return None
    if any(t.curv_floor is None for t in pb.row_terms) or not np.all(np.isfinite(ev.s)):
        return None
    g = ev.grad
    gg = float(np.dot(g, g))
    if not (gg > 0.0 and np.isfinite(gg)):
        return None
    n = pb.n
    k = 50 * pb.size
    rows = None if 2 * k >= n else (np.arange(k, dtype=np.intp) * n) // k
    k = n if rows is None else k
    d = _row_curvature(pb, ev.s if rows is None else ev.s[rows], np.zeros(k), rows)
    if d is None:
        return None
    gw = g[pb.w_index]
    Xs = pb.X if rows is None else pb.X[rows]
    along = np.asarray(Xs @ gw, dtype=np.float64).ravel()  # a_i . g, rows a_i = (x_i - m, 1)
    if pb.center is not None:
        along -= float(np.dot(pb.center, gw))
    if pb.b_index is not None:
        along += g[pb.b_index]
    if rows is None:
        pb.passes += 1
    else:
        pb.row_reads += k
    c = ((n / k) * float(np.dot(d, along * along)) + float(np.dot(pb.beta, g * g))) / gg
    if not (c > 0.0 and np.isfinite(c)):
        return None
    # never longer than L-BFGS's own first step: the curvature at one point can be far below what the step
    # meets (a Huber loss is flat beyond its threshold, where every row of a cold start may lie)
    return min(math.sqrt(gg) / c, 1.0)


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
        ended = run.record(ev.theta, P, kind, absolute, s=ev.s, derivs=ev.derivs, Atu=ev.Atu)
        sampled = getattr(pb, "sampled", None)
        if ended or force or done.get("newton") or not run.checks or not sampled or sampled["H"] is None:
            return ended
        # the gap passed but the distance did not, and the exact Hessian of the first check is at hand (formed
        # for the modulus): Newton steps with it converge faster than L-BFGS's last iterations, at one
        # evaluation each. Tried once; when they fail, L-BFGS goes on.
        done["newton"] = True
        return newton_polish(run, lambda e: inner_stop(e, force=True), steps=3, H=sampled["H"], ev=ev)

    with np.errstate(over="ignore", invalid="ignore"):
        start = evaluate_smooth(pb, theta0)  # L-BFGS's first evaluation (kept on pb): no extra pass
    scale = _first_step_scale(pb, start) if np.isfinite(start.f) and np.all(np.isfinite(start.grad)) else None
    theta, _, status = _lbfgs_driver(run, theta0, 0.0, inner_stop, use_scipy, scale)
    if run.theta is None or done["skipped"]:
        inner_stop(evaluate_smooth(pb, theta), force=True)
    if _polish_wanted(run) and newton_polish(run, lambda ev: inner_stop(ev, force=True)):
        return "converged"
    return status


def _polish_wanted(run):
    """The kept point misses the parameter tolerance (or the gap) and an exact Hessian is at hand: a
    standard score, every row term with a curvature fact, ridge as the only smooth penalty."""
    pb = run.pb
    if run.param_tol is None or run.theta is None or run.out_of_passes() or not pb.standard or pb.other_smooth:
        return False
    if pb.size > 2000 or any(t.curv_floor is None for t in pb.row_terms):
        return False
    passed = relative(run.cert_abs, run.objective) <= run.tol
    return not passed or run.distance is None or run._figure(run.distance) > run.param_tol


def _newton_hessian(pb, s):
    """The exact Hessian A^T D A + diag(beta) in the solver's coordinates (one pass), with D the rows'
    second derivatives: the catalog's least l'' over the one-point interval [s_i, s_i] is l''(s_i)
    (tests/test_catalog.py checks that fact by finite differences). None without a curvature fact."""
    d = _row_curvature(pb, s, np.zeros(pb.n))
    if d is None:
        return None
    w, m, X = pb.w_index, pb.center, pb.X
    if not _is_sparse(X):
        return _sample_hessian(pb, None, d)[0] + np.diag(pb.beta)  # every row: the exact Hessian
    Hww = np.asarray((X.T @ X.multiply(d[:, None])).todense(), dtype=np.float64)
    h = np.asarray(X.T @ d, dtype=np.float64).ravel()
    if m is not None:  # (X - 1 m^T)^T D (X - 1 m^T), expanded
        Hww = Hww - np.outer(m, h) - np.outer(h, m) + float(np.sum(d)) * np.outer(m, m)
        h = h - m * float(np.sum(d))
    pb.passes += 1
    H = np.zeros((pb.size, pb.size))
    H[np.ix_(w, w)] = Hww
    if pb.b_index is not None:
        H[w, pb.b_index] = H[pb.b_index, w] = h
        H[pb.b_index, pb.b_index] = float(np.sum(d))
    return H + np.diag(pb.beta)


def newton_polish(run, stop, steps=4, H=None, ev=None):
    """A few Newton steps from the kept point, accepted on a decrease of the gradient's norm rather than
    of the objective: near the optimum the objective's changes fall below its rounding (L-BFGS-B's line
    search then gives up) while the gradient still carries digits. Newton's method converges
    quadratically there (Nocedal & Wright 2006, Numerical Optimization, Thm 3.5). `stop(ev)` certifies a
    point (the run keeps the better one) and says whether the run may end. A given `H` is used for every
    step (a Hessian formed near the point: the steps then converge linearly, fast when it is close)."""
    pb = run.pb
    if ev is None or not np.array_equal(ev.theta, run.theta):  # `ev`: the kept point's evaluation, if at hand
        ev = evaluate_smooth(pb, np.array(run.theta, copy=True))
    norm = float(np.sqrt(np.dot(ev.grad, ev.grad)))
    fixed = H
    for _ in range(steps):
        if run.out_of_passes() or not norm > 0:
            return False
        H = fixed if fixed is not None else _newton_hessian(pb, ev.s)
        if H is None:
            return False
        try:
            delta = -np.linalg.solve(H, ev.grad)
        except np.linalg.LinAlgError:
            delta = -np.linalg.lstsq(H, ev.grad, rcond=None)[0]
        for _halving in range(4):
            with np.errstate(over="ignore", invalid="ignore"):
                trial = evaluate_smooth(pb, ev.theta + delta)
            trial_norm = float(np.sqrt(np.dot(trial.grad, trial.grad)))
            if np.isfinite(trial.f) and trial_norm < norm:
                break
            delta = 0.5 * delta
        else:
            return False
        ev, norm = trial, trial_norm
        if stop(ev):
            return True
    return False


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
        elif run.record(x_new, P_new, kind, absolute, s=s_new):
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
    """H = A^T diag(rho) A, q = A^T rho y and the sums the gap needs, A the (centred) design [X, 1].

    With `pb.prepared` (a caller's cache across the fits of a path) the matrix and its sums are formed
    once per row weights and target and reused (H, q and h are shared: nothing writes to them); when it
    names a larger table ("X") and the columns of it that pb.X holds ("columns", an input screened out
    of this fit), the blocks of the whole table are formed once and these columns picked out (centring
    is per column, so the pick is exact)."""
    rho = pb.row_terms[0].rho if len(pb.row_terms) == 1 else np.sum([t.rho for t in pb.row_terms], axis=0)
    y = pb.y
    prep = getattr(pb, "prepared", None)
    if prep is None:
        pb.gram = dict(_gram_assembled(pb, _gram_weight_blocks(pb, rho, y), rho, y), key=None)
        return
    source = prep.get("X", pb.X)
    columns = prep.get("columns")
    token = _rows_token(pb)
    key = ("gram", id(source), _rho_key(pb, rho), _fingerprint(y) if token is None else token, pb.center is not None)
    picked = key if columns is None or source is pb.X else key + (_fingerprint(np.asarray(columns)),)
    assembled = prep.get(("gram assembled",) + picked)
    if assembled is None:
        blocks = prep.get(key)
        if blocks is None:
            whole = pb if source is pb.X else _columns_problem(pb, source)
            blocks = _gram_weight_blocks(whole, rho, y, _uncentred_sums(pb))
            prep[key] = blocks
            pb.passes += whole.passes if whole is not pb else 0
        if picked is not key:
            cols = np.asarray(columns, dtype=np.intp)
            blocks = (blocks[0][np.ix_(cols, cols)], blocks[1][cols], blocks[2][cols])
        assembled = _gram_assembled(pb, blocks, rho, y)
        prep[("gram assembled",) + picked] = assembled
    pb.gram = dict(assembled, key=picked)


def _gram_assembled(pb, blocks, rho, y):
    """The Gram matrix of theta's layout from its weight blocks, with the sums of rho the gap reads."""
    P, w = pb.size, pb.w_index
    H, q, h = np.zeros((P, P)), np.zeros(P), np.zeros(P)
    Hww, qw, hw = blocks
    H[np.ix_(w, w)] = Hww
    q[w], h[w] = qw, hw
    rho_sum, rho_y = float(np.sum(rho)), float(np.dot(rho, y))
    if pb.b_index is not None:
        b = pb.b_index
        H[w, b] = H[b, w] = h[w]
        H[b, b] = h[b] = rho_sum
        q[b] = rho_y
    return {"H": H, "q": q, "h": h, "yy": float(np.dot(rho, y * y)), "rho_sum": rho_sum, "rho_y": rho_y}


def _rho_key(pb, rho):
    """What names the summed row weights rho in a cache key: with the rows checked once (a token), rho is
    fixed by the row terms' coefficients and aggregates (rho = coefficient x c / sum c, / n, or x c), so
    no digest of its n values is needed; else the digest."""
    if _rows_token(pb) is None:
        return _fingerprint(rho)
    return tuple((float(t.rho_coefficient), t.aggregate) for t in pb.row_terms)


def _rows_token(pb):
    """The token of rows checked once per path (`_rows_once`), or None (a problem bound without it)."""
    return getattr(pb, "rows_token", None)


def _gram_cached(pb, name, compute):
    """A figure of the Gram matrix H + diag(beta) (its least or largest eigenvalue) that no tunable moves
    once H and beta are the same: kept in the path's cache under the Gram key and beta's digest."""
    G, prep = pb.gram, getattr(pb, "prepared", None)
    if name in G:
        return G[name]
    key = None if prep is None or G.get("key") is None else (name, G["key"], _fingerprint(pb.beta))
    value = None if key is None else prep.get(key)
    if value is None:
        value = compute()
        if key is not None:
            prep[key] = value
    G[name] = value
    return value


def _columns_problem(pb, X):
    """A stand-in for pb on the whole table X (the weight blocks read only X, its centre and sizes)."""
    whole = _Problem()
    whole.X, whole.n, whole.p = X, X.shape[0], X.shape[1]
    whole.w_index = np.arange(whole.p, dtype=np.intp)
    whole.passes = 1 if pb.center is not None else 0
    whole.center = (np.asarray(X.T @ pb.c, dtype=np.float64).ravel() / float(np.sum(pb.c))
                    if pb.center is not None else None)
    return whole


def _uncentred_sums(pb):
    """The caller's uncentred sums of this table, or None. A caller that fits several row subsets of one
    table (the folds of a cross-validation) may put into its cache, under "uncentred sums", a dict with
    G = X^T X, Xy = X^T y, X1 = X^T 1 of the very X and y objects it hands in ("X", "y"): formed from the
    whole table's sums less the held rows' (one X^T X of the table instead of one per fold). Valid only
    for those objects and equal row weights (rho constant), which is what reading them needs."""
    prep = getattr(pb, "prepared", None)
    sums = None if prep is None else prep.get("uncentred sums")
    if sums is None or sums.get("X") is not prep.get("X") or prep.get("columns") is not None:
        return None
    kept = prep.get("checked rows")
    if kept is None or kept[0] is not sums["X"] or kept[1] is not sums["y"] or kept[4] is not pb.X:
        return None
    if np.ptp(pb.c) != 0.0:
        return None
    return sums


def _gram_weight_blocks(pb, rho, y, sums=None):
    """(H_ww, q_w, h_w): the weight blocks of the Gram matrix and its two vectors (one or two passes;
    none with the caller's uncentred `sums`, see `_uncentred_sums`)."""
    m = pb.center if pb.center is not None else np.zeros(pb.p)
    size = pb.p
    H, q, h = np.zeros((size, size)), np.zeros(size), np.zeros(size)
    view = _Problem()
    view.X, view.n, view.p, view.w_index = pb.X, pb.n, pb.p, np.arange(size, dtype=np.intp)
    view.passes = 0
    view.sums = sums
    if not _is_sparse(pb.X) and np.ptp(rho) == 0.0 and _gram_uncentred(view, rho, y, m, H, q, h):
        pb.passes += view.passes + (0 if sums is not None else 1)  # X^T X counts one pass, the caller's none
    else:
        _gram_centred_blocks(view, rho, y, m, H, q, h)
        pb.passes += view.passes + 1
    return H, q, h


def _gram_uncentred(pb, rho, y, m, H, q, h):
    """Equal row weights r: H_ww = r (X^T X - n m m^T), one matrix product with no copy of the table
    (about half the time of the centred blocks). Used only when centring cancels at most two digits
    (sum x^2 <= 100 sum (x - m)^2 in every column); returns False otherwise."""
    w = pb.w_index
    sums = getattr(pb, "sums", None)
    G = pb.X.T @ pb.X if sums is None else sums["G"]
    n, r = pb.n, float(rho[0])
    diag = np.diag(G)
    centred = diag - n * m * m
    if not np.all(centred > 0) or np.any(diag > 100.0 * centred):
        return False
    H[np.ix_(w, w)] = r * (G - n * np.outer(m, m))
    if sums is None:
        both = pb.X.T @ np.column_stack([rho * y, rho])
        pb.passes += 1
    else:  # rho is the constant r here (the caller of `_gram_uncentred` checked it)
        both = np.column_stack([r * sums["Xy"], r * sums["X1"]])
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


def _active_set_ready(pb):
    """Whether the Gram path may try sign-pattern solves: a quadratic with L1 and ridge weights only (no
    bound, group norm, ball or other penalty), where a fixed sign pattern makes the optimum one linear solve."""
    return bool(pb.use_gap and np.any(pb.alpha > 0) and not pb.groups and not pb.l1_balls and not pb.l2_balls
                and not pb.other_nonsmooth and not pb.other_smooth and _box_free(pb))


def _active_set_candidate(pb, x, g, tried):
    """The minimizer of the quadratic with a sign pattern held, or None (a pattern tried before, a singular
    system, or an answer whose signs disagree with the pattern).

    On a fixed pattern s of the nonzero penalized weights (and the unpenalized coordinates free), the
    optimality condition is linear: (H + diag(beta))_FF theta_F = q_F - alpha_F s_F, the rest zero; the
    Lasso's answer is piecewise linear in its weight, with one such system per piece (the homotopy of
    Osborne, Presnell & Turlach 2000, "A new approach to variable selection in least squares problems";
    recalled from memory). The pattern is that of x, with the zero weights whose gradient exceeds their
    L1 weight added at the sign that lowers the objective (the weights a warm start from a larger value
    is about to admit). A candidate proves nothing by itself: the caller certifies it like any iterate."""
    signs = np.sign(x)
    enter = (x == 0.0) & (pb.alpha > 0) & (np.abs(g) > pb.alpha)
    signs[enter] = -np.sign(g[enter])
    free = (pb.alpha == 0.0) | (signs != 0.0)
    key = (signs * free + 2.0 * (pb.alpha == 0.0)).astype(np.int8).tobytes()
    if key in tried:
        return None
    tried.add(key)
    F = np.flatnonzero(free)
    G = pb.gram
    A = G["H"][np.ix_(F, F)] + np.diag(pb.beta[F])
    try:
        theta_F = np.linalg.solve(A, G["q"][F] - pb.alpha[F] * signs[F])
    except np.linalg.LinAlgError:
        return None
    if not np.all(np.isfinite(theta_F)):
        return None
    held = pb.alpha[F] > 0
    if np.any(np.sign(theta_F[held]) != signs[F][held]):
        return None
    out = np.zeros(pb.size)
    out[F] = theta_F
    return out


def method_fista_gram(run, theta0):
    """FISTA with restart on the quadratic of a squared loss: each iteration costs O(size^2), no pass.
    Where the nonsmooth part is L1 alone, each new sign pattern of the iterates is also solved exactly
    (`_active_set_candidate`) and the answer certified like an iterate: on a path, neighbouring points
    mostly share a pattern, so a warm-started point is often certified by its first solve."""
    pb = run.pb
    build_gram(pb)
    x = prox(pb, np.asarray(theta0, dtype=np.float64), 1.0)
    y, t = x, 1.0
    patterns = set() if _active_set_ready(pb) else None

    def try_pattern(x_at, g_at):
        """(converged, candidate or None): the sign-pattern solve at x_at, certified."""
        cand = _active_set_candidate(pb, x_at, g_at, patterns)
        if cand is None:
            return False, None
        f_c, g_c, Ht_c = _gram_smooth(pb, cand)
        P_c = f_c + nonsmooth_penalties(pb, cand)
        return run.record(cand, P_c, "duality gap", gram_gap(pb, cand, P_c, Ht_c), grad=g_c), (cand, P_c)
    L = _gram_cached(pb, "largest", lambda: _largest_eigenvalue(pb.gram["H"])) + float(np.max(pb.beta, initial=0.0)) \
        + 1e-300
    mu = _gram_modulus(pb)
    if mu > 0:
        # restarted FISTA shrinks the error by a constant factor every O(sqrt(L / mu)) iterations (O'Donoghue
        # & Candes 2015, Adaptive restart for accelerated gradient schemes, sec. 3), so on an ill-conditioned
        # Gram matrix twenty checks can pass without a tenth's progress while the run still converges
        run.window = max(run.window, int(math.ceil(10.0 * math.sqrt(L / mu))))
    if patterns is not None:
        # the warm start's own pattern first (not its prox, which would drop its smallest weights)
        start = np.asarray(theta0, dtype=np.float64)
        done, cand = try_pattern(start, _gram_smooth(pb, start)[1])
        if done:
            return "converged"
        if cand is not None:
            x = y = cand[0]
    iterations = 0
    while True:
        f_y, g_y, _ = _gram_smooth(pb, y)
        while True:
            x_new = prox(pb, y - g_y / L, 1.0 / L)
            f_new, g_new, Ht_new = _gram_smooth(pb, x_new)
            diff = x_new - y
            if f_new <= f_y + float(np.dot(g_y, diff)) + 0.5 * L * float(np.dot(diff, diff)) + 1e-12 * abs(f_new):
                break
            L *= 2.0
        P_new = f_new + nonsmooth_penalties(pb, x_new)
        if pb.use_gap:
            kind, absolute = "duality gap", gram_gap(pb, x_new, P_new, Ht_new)
        else:
            kind, absolute = "optimality residual", L * float(np.sqrt(np.dot(diff, diff)))
        if run.record(x_new, P_new, kind, absolute, grad=g_new):
            return "converged"
        iterations += 1
        if patterns is not None:
            done, cand = try_pattern(x_new, g_new)
            if done:
                return "converged"
            if cand is not None and cand[1] < P_new:  # a better point: restart the momentum from it
                x = y = cand[0]
                t = 1.0
                continue
        if iterations >= 20 * max(run.max_passes, 1):
            return "max iterations"
        if iterations % 1000 == 0 and _stalled(run, iterations):
            if run.stop_reason is None:
                run.stop_reason = (f"the kept point's certificate did not improve over a thousand iterations, at "
                                   f"{run.cert_abs:.2g} ({run.cert_abs / max(1e-300, 1e-15 * abs(P_new)):.2g} times the "
                                   "gap's rounding allowance 1e-15 |P|)")
            return "no progress"
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
            if final and run.record(ev.theta, P, run_kind(pb), absolute, s=ev.s, derivs=ev.derivs, Atu=ev.Atu):
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
            if run.theta is None:
                # a stage that took no step recorded no point (its L-BFGS stopped at once): its start is the
                # answer so far, which must not fall back to the first point of the whole run
                lbfgs_stop(evaluate_smooth(pb, theta, mu))
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
    if _is_chunked(X):
        return 8.0 * X.shape[0] * X.shape[1]
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
    a, fa, twa, va, best = b0, f0, tw0, v0, (abs(f0), b0, tw0, v0)
    for _ in range(80):
        b = a + direction * step
        fb, twb, vb = slope(b)
        if abs(fb) < best[0]:
            best = (abs(fb), b, twb, vb)
        if fb == 0.0 or (fb > 0) != (fa > 0):
            break
        a, fa, twa, va, step = b, fb, twb, vb, 2.0 * step
    else:
        return None, None
    if fb == 0.0:
        return candidate(b, twb, vb)
    # the two ends of the bracket with their true F' values (the Illinois halving below changes
    # only the copies f_low / f_high that steer the secant)
    ends = {-1: (a, fa, twa, va), 1: (b, fb, twb, vb)} if fa < 0 else {-1: (b, fb, twb, vb), 1: (a, fa, twa, va)}
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
        ends[side] = (mid, fm, twm, vm)
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
    if best[0] > 1e-14 * scale:
        # F' jumps over zero (F has a kink at its minimum: band rows sit exactly at their kinks, so the
        # restricted dual at that b has many optimal v): the ends of the bracket are optimal duals on
        # either side of the jump, and the convex combination of them with g_k + sum v = 0 meets the
        # equality exactly, stays in the box, and theta_w (linear in v) follows the same combination
        (b_lo, f_lo, tw_lo, v_lo), (b_hi, f_hi, tw_hi, v_hi) = ends[-1], ends[1]
        lam = f_hi / (f_hi - f_lo)
        b = lam * b_lo + (1.0 - lam) * b_hi
        v = np.clip(lam * v_lo + (1.0 - lam) * v_hi, lo, hi)
        tw = lam * tw_lo + (1.0 - lam) * tw_hi
    polished = _polish_with_intercept(Aw, gw, bw, kink, lo, hi, float(g[k]), v)
    if polished is not None:
        tw, b, v = polished
    return candidate(b, tw, v)


def _polish_with_intercept(Aw, gw, bw, kink, lo, hi, gk, v):
    """The band problem's KKT system solved exactly for the rows strictly inside their box: those rows sit
    at their kinks (Aw_i w + b = kink_i) with w = -(gw + Aw^T v) / bw, and g_k + sum v = 0, a linear system
    in (v_inside, b). Returns (w, b, v), or None when it leaves the box (the search's point stays; the
    gap of the whole problem judges either)."""
    width = hi - lo
    inside = (v > lo + 1e-12 * width) & (v < hi - 1e-12 * width)
    m = int(np.sum(inside))
    if m == 0:
        return None
    fixed = ~inside
    w0 = -(gw + Aw[fixed].T @ v[fixed]) / bw
    A_in = Aw[inside]
    K = np.zeros((m + 1, m + 1))
    K[:m, :m] = -(A_in / bw) @ A_in.T
    K[:m, m] = 1.0
    K[m, :m] = 1.0
    rhs = np.concatenate([kink[inside] - A_in @ w0, [-gk - float(np.sum(v[fixed]))]])
    solution = np.linalg.lstsq(K, rhs, rcond=None)[0]
    v_in, b = solution[:m], float(solution[m])
    slack = 1e-12 * width[inside]
    if not (np.all(np.isfinite(solution)) and np.all(v_in >= lo[inside] - slack) and
            np.all(v_in <= hi[inside] + slack)):
        return None
    v = v.copy()
    v[inside] = np.clip(v_in, lo[inside], hi[inside])
    return -(gw + Aw.T @ v) / bw, b, v


def _box_qp(A, g, kink, lo, hi, beta, tol, x0=None):
    """Ridge case: the band rows' dual values v in [lo, hi] maximize the restricted dual
    -||g + A^T v||^2 / (2 beta) - kink.v, a box-constrained QP in a few hundred variables,
    min v.Qv/2 + c.v with Q = A diag(1/beta) A^T and c = A (g / beta) + kink, solved in units of the
    box widths by L-BFGS-B (no pass over the data); then the variables strictly inside the box are
    solved for exactly from Q's linear system (least squares: Q has rank at most the number of
    coordinates) when that stays in the box and does not raise the value. theta = -(g + A^T v) / beta.
    The projected-gradient tolerance follows the run's: 1e-8 sufficed for a relative gap of 1e-6 on
    the benchmark tables, 1e-7 did not; the gap of the whole problem decides in any case."""
    if len(kink) == 0:
        # no row near a kink: nothing to optimize (SciPy refuses an empty list of bounds)
        return -g / beta, np.zeros(0), np.zeros(0)
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
            # within rounding of the iterate's value counts as no worse: near the optimum the two values
            # differ in their last digits either way, and the solved point is the exact one (at --tol 1e-8 on
            # bike_dock_classweight a strict test kept L-BFGS-B's point: whole-problem gap 2.7e-11 and a
            # certified distance 3.7e-5, against 1e-15 and 2e-8 from the solved point)
            f_x = fun(x)[0]
            if fun(polished)[0] <= f_x + 1e-12 * max(1.0, abs(f_x)):
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
        # an exact finish is as good as this point gets: its distance is reported, not chased further
        if run.record(candidate, P, "duality gap", gap, s=s_new, derivs=[d], Atu=Atu, final=True):
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
    if pb.standard and not _is_sparse(pb.X) and not _is_chunked(pb.X) and np.all(np.isfinite(y)) and np.any(y != 0):
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

class _ThreadLimits(_BlasCap):
    """Cap every BLAS/OpenMP pool except NumPy's at one thread while solving (REFERENCE.md,
    'Measuring speed': SciPy's and NumPy's OpenBLAS pools otherwise compete for the cores)."""

    def _limit(self, controller):
        others = [lib.filepath for lib in controller.lib_controllers if "numpy" not in str(lib.filepath)]
        return controller.select(filepath=others).limit(limits=1) if others else None


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


def setup_problem(pb, method, prepared=None):
    """The choices a method needs before it starts: whether a free intercept balances the dual point, the
    column centring that goes with it, and whether the duality gap can be formed. `prepared` (a dict a
    caller keeps across fits on the same rows, or None) supplies the centre when it holds one."""
    pb.prepared = prepared
    pb.balance = pb.b_index is not None and pb.b_index in _free_coordinates(pb)
    if pb.balance and method != "subgradient":
        # a free intercept: centre the columns inside the score (never copying X) so that w and b do
        # not fight over the mean (s = (X - 1 m^T) w + b' with b' = b + m.w)
        # with a cache: the centre of the whole table ("X"), of which pb.X holds "columns" (or all)
        source = pb.X if prepared is None else prepared.get("X", pb.X)
        columns = None if prepared is None or source is pb.X else prepared.get("columns")
        key = ("center", id(source), _fingerprint(pb.c) if _rows_token(pb) is None else _rows_token(pb))
        center = None if prepared is None else prepared.get(key)
        sums = None if center is not None or source is not pb.X else _uncentred_sums(pb)
        if center is None and sums is not None:  # equal row weights: the centre is X^T 1 / n
            center = np.asarray(sums["X1"], dtype=np.float64) / float(pb.n)
        elif center is None:
            center = np.asarray(source.T @ pb.c, dtype=np.float64).ravel() / float(np.sum(pb.c))
            pb.passes += 1
            if prepared is not None:
                prepared[key] = center
        pb.center = center if columns is None else center[np.asarray(columns, dtype=np.intp)]
    pb.use_gap = method != "subgradient" and gap_available(pb)


def _fingerprint(v):
    """A digest of an array's bytes: what a `prepared` cache compares (row weights, targets)."""
    import hashlib
    return hashlib.sha1(np.ascontiguousarray(v).view(np.uint8)).hexdigest()


class _HeldLimits:
    """No thread cap of its own: the caller holds a `_ThreadLimits` across several fits."""

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        return False


def _gram_objective(pb, theta, tol):
    """(objective, term values) at the internal theta from the Gram sums (no pass), or None where they do
    not give it exactly enough: no Gram matrix, more than one row term (the Gram matrix holds their sum),
    a point outside the constraints, or cancellation. The quadratic 0.5 t.Ht - t.q + 0.5 yy is a sum of
    terms of size M = 0.5 |t.Ht| + |t.q| + 0.5 yy, each formed from sums over n rows: rounded by about
    10 sqrt(n) u M (the probabilistic bound of `_gradient_rounding`); used only when that is within a
    hundredth of tol |P|, so the relative certificate the gap gives keeps its meaning."""
    G = getattr(pb, "gram", None)
    if G is None or len(pb.row_terms) != 1 or not feasible(pb, theta):
        return None
    Ht = G["H"] @ theta
    tHt, tq = float(np.dot(theta, Ht)), float(np.dot(theta, G["q"]))
    rows = 0.5 * tHt - tq + 0.5 * G["yy"]
    values = {pb.row_terms[0].index: rows}
    for pen in pb.penalties:
        values[pen.index] = pen.value_and_gradient(theta, pb.tun)[0]
    for table in pb.spec["terms"]:
        if table["kind"] == "constant":
            values[table["index"]] = float(table["coefficient"](pb.tun)) * float(table["constant"](pb.tun))
    P = float(sum(values.values()))
    rounding = 10.0 * math.sqrt(pb.n) * 2.0 ** -53 * (0.5 * abs(tHt) + abs(tq) + 0.5 * abs(G["yy"]))
    if not (np.isfinite(P) and rounding <= 0.01 * tol * abs(P)):
        return None
    return P, tuple(values[k] for k in sorted(values))


def run_solver(spec, X, y, weights=None, input_names=None, tunables=None, tol=1e-6, max_passes=None,
               allow_nonconvex=False, theta0=None, progress=None, use_scipy=True, param_tol=1e-6, *,
               prepared=None, certify_only=False):
    """Fit the spec's objective to the data; returns a dict of plain values (see `solve`).

    The run stops when the relative certificate is within `tol` and, unless `param_tol` is None, the
    distance of the parameters to the optimum is within `param_tol` (a proved bound where the objective
    is strongly convex in every learned parameter, else an uncertified estimate).

    `prepared`: a dict the caller keeps across fits on the same rows (a regularization path), where
    summaries that do not depend on the tunables are kept (the column centre, a squared loss's Gram
    matrix); its "X" and "columns" entries, when given, say that X is those columns of a larger
    table whose Gram matrix is computed once. `certify_only`: no iterations, only the certificate of
    theta0 (status "optimal" when it passes `tol`, else "not certified")."""
    import time
    started = time.perf_counter()
    param_tol = _parameter_tolerance(param_tol)
    if not spec["trainable"]:
        raise SolverInputError(spec["refusal"])
    if not spec["accepted"] and not allow_nonconvex:
        raise SolverInputError(f"the objective is {spec['verdict']}: a minimum found is not certified global; "
                               "pass allow_nonconvex=True to run a local subgradient method anyway")
    pb = build_problem(spec, X, y, weights, input_names, tunables, prepared)
    method = spec["method"]
    if method != "subgradient" and pb.prox_problems:
        raise SolverInputError("the NumPy backend has no exact prox for this combination: "
                               + "; ".join(pb.prox_problems) + " (the cvxpy backend solves it)")
    if method in ("lbfgs", "smoothing") and pb.has_prox_part:
        method = "fista" if method == "lbfgs" else "smoothing+fista"
    if not spec["accepted"]:
        method = "subgradient"
    setup_problem(pb, method, prepared)
    pb.mu0 = _mu0(pb) if method.startswith("smoothing") else None  # only smoothing reads it (a pass over y)
    pb.finish = finish_kind(pb) if method.startswith("smoothing") else None
    pb.finished_exactly = False
    if max_passes is None:
        max_passes = 20000
    run = _Run(pb, float(tol), int(max_passes), progress, param_tol if spec["accepted"] else None)
    theta = _to_internal(pb, _initial_theta(pb, theta0))
    if theta0 is not None and not (method == "fista" and gram_possible(pb)):  # a squared loss cannot overflow
        with np.errstate(all="ignore"):
            start = evaluate_smooth(pb, theta)
        if not (np.isfinite(start.f) and np.all(np.isfinite(start.grad))):
            theta = np.zeros(pb.size)  # the warm start overflows (an exponential loss): start from 0
    scipy_used = use_scipy and _scipy_optimize is not None
    lbfgs_name = "L-BFGS (SciPy L-BFGS-B)" if scipy_used else "L-BFGS (own two-loop recursion)"
    # a caller that holds the cap across a path's fits says so (entering it costs a scan of the loaded libraries)
    with (_HeldLimits() if prepared is not None and prepared.get("threads capped") else _ThreadLimits()):
        if certify_only:
            status, name = "not certified", "certificate of the given point (no iterations)"
        elif method == "lbfgs":
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
    theta_internal = theta
    from_gram = _gram_objective(pb, theta, tol)
    s_final = None if from_gram is not None else score(pb, theta)  # one pass for the objective and the terms
    P = objective_value(pb, theta, s_final) if from_gram is None else from_gram[0]
    theta = _to_external(pb, theta)
    reported = float(run.cert_abs)
    if run.cert_kind == "duality gap" and np.isfinite(reported):
        # P and D are sums rounded to about 1e-16 |P| each: a gap below 1e-15 max(1, |P|) (our own floor, the
        # multiclass solver's too) is not resolved, and is reported as that floor, never as 0 or negative (the
        # distance certificate adds its own allowance for the same rounding)
        reported = max(reported, 1e-15 * max(1.0, abs(P)))
    rel = relative(reported, P)
    method_status = status
    if not spec["accepted"]:
        status = "local (non-convex)"
    elif rel <= tol:
        status = "optimal"
    elif run.out_of_passes():
        # the method stops itself when the budget runs out and calls that converged: say which it was
        status = "max passes"
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
    distance = _distance_report(pb, run, P, method, param_tol, rel <= tol, method_status)
    params = {}
    for pname, (start, size, vector) in pb.slots.items():
        params[pname] = theta[start:start + size].copy() if vector else float(theta[start])
    return {
        "theta": theta, "params": params, "objective": P,
        "term_values": term_values(pb, theta_internal, s_final) if from_gram is None else from_gram[1],
        "status": status, "method": name,
        "certificate": dict({"kind": run.cert_kind, "absolute": reported, "relative": float(rel),
                             "tolerance": float(tol), "note": note}, **distance),
        "iterations": run.iterations, "passes": pb.passes + pb.row_reads // pb.n,
        "seconds": time.perf_counter() - started,
        "input_names": pb.input_names,
    }


# why a method ended, for a parameter tolerance not reached (the stall detector gives its own reason)
_STOP_REASONS = {
    "max passes": "the pass budget ran out",
    "max iterations": "the iteration budget ran out",
    "no progress": "the method's line search could not lower the objective further (common once its changes "
                   "approach the objective's rounding)",
    "line search failed": "the method's line search could not lower the objective further (common once its changes "
                          "approach the objective's rounding)",
    "converged": "the method's own stop",
}


def _parameter_tolerance(param_tol):
    """The parameter tolerance as a float, or None (the parameter stop switched off)."""
    if param_tol is None:
        return None
    try:
        value = float(param_tol)
    except (TypeError, ValueError):
        raise SolverInputError(f"param_tol must be a positive number or None (off), not {param_tol!r}") from None
    if not (math.isfinite(value) and value > 0.0):
        raise SolverInputError(f"param_tol must be a positive number (a distance can only be certified down to "
                               f"rounding), or None to switch the parameter stop off; got {value:g}")
    return value


def _distance_report(pb, run, P, method, param_tol, gap_passed, method_status=""):
    """The certificate's distance fields for the kept point (formed now when the run never formed them)."""
    record = run.distance
    if record is None and pb.spec["accepted"] and method != "subgradient":
        gap = run.cert_abs if run.cert_kind == "duality gap" else math.inf
        with np.errstate(all="ignore"):
            record = distance_certificate(pb, run.theta, P, gap) + (None, getattr(pb, "last_weights_bound", None))
    if record is None:
        record = (None, None, "no bound: the objective is not certified convex (a local result)", None, None, None)
    bound, mu, note, residual, estimate, weights = record
    if bound is None:
        if residual is not None:
            note += f"; optimality residual (norm of the least subgradient) {residual:.3g}"
        if estimate is not None:
            note += (f"; estimated distance {estimate:.3g}, uncertified (the residual over the least curvature "
                     "seen along the last steps)")
    figure = _Run._figure(record)  # what the stop compared with param_tol
    if param_tol is not None and gap_passed and np.isfinite(figure) and figure > param_tol:
        why = run.stop_reason or _STOP_REASONS.get(method_status, f"the method ended: {method_status}")
        floor = run.distance_floor if run.stop_reason is None else None
        if floor is not None:  # say where the figure stood against its rounding level
            why += (f"; the figure {figure:.2g} is {'within' if figure <= 10.0 * floor else 'more than'} ten times its "
                    f"rounding level {floor:.2g}")
        note += f"; the parameter tolerance {param_tol:g} was not reached ({why})"
    return {"distance": None if bound is None else float(bound), "curvature": None if mu is None else float(mu),
            "distance_note": note, "param_tolerance": param_tol,
            "residual": None if residual is None else float(residual),
            "distance_estimate": None if estimate is None else float(estimate),
            "weights_distance": float(bound) if bound is not None else (None if weights is None else float(weights))}


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
