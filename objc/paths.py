"""Regularization paths: one tunable moved over a list of values, each fit warm-started from the one
before, every result certified on the full problem; where the path starts for an L1 weight; and safe
screening of inputs proved inactive (the Gap Safe sphere test).

No loss is written out here: gradients come from the generated NumPy module's row terms, which call
the catalog's derivative kernels, and the solving is the backends' job.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, replace
from typing import Any, Callable

import numpy as np

from objc import tables
from objc.checker import CheckedObjective
from objc.diagnostics import SpecError
from objc.fit_result import FitResult, theta_from_params
from objc.training import Backend, form_for


@dataclass(frozen=True)
class L1Weight:
    """How a tunable weighs an L1 term: on theta's coordinates `idx`, the L1 weight is
    `fixed + slope * value` (the tunable enters linearly)."""

    idx: np.ndarray  # positions in theta the tunable's L1 weight covers
    slope: np.ndarray  # d(alpha_j) / d(tunable), > 0 on every position of idx
    fixed: np.ndarray  # the L1 weight there that does not move with the tunable


def _numpy_problem(checked: CheckedObjective, data: tables.BoundData, tunables: dict[str, float],
                   prepared: dict[str, Any] | None = None) -> tuple[dict[str, Any], Any] | None:
    """(the generated module's namespace, the problem bound to these rows), or None where the NumPy
    backend cannot bind this spec. `prepared`: a path's cache (see `fit_path`)."""
    from objc.backends import numpy_module
    if checked.task == "multiclass":  # its module has its own solver, with no screening test or L1 start
        return None
    try:
        return numpy_module.bound_problem(checked, data.X, data.y, data.weights, data.input_names, tunables,
                                          prepared)
    except (numpy_module.NotSupported, ValueError):
        return None


def _coefficient(table: dict, tun: dict[str, float]) -> float:
    return float(table["coefficient"](tun))


def l1_weight(checked: CheckedObjective, data: tables.BoundData, tunables: dict[str, float], tunable: str,
              prepared: dict[str, Any] | None = None) -> tuple[L1Weight, Any, dict[str, Any]] | None:
    """How `tunable` weighs the goal's L1 terms, with the bound problem and namespace, or None when it
    weighs no L1 term, enters some other term too (the loss, a penalty on coordinates it does not
    zero), or enters nonlinearly. `prepared`: a path's cache (see `fit_path`)."""
    bound = _numpy_problem(checked, data, tunables, prepared)
    if bound is None:
        return None
    ns, pb = bound
    tun = dict(pb.tun)
    at = {v: dict(tun, **{tunable: v}) for v in (0.0, 1.0, 2.0)}
    slope, fixed = np.zeros(pb.size), np.zeros(pb.size)
    moving_elsewhere: list[dict] = []
    penalties = {pen.index: pen for pen in pb.penalties}
    for table in pb.spec["terms"]:
        c0, c1, c2 = (_coefficient(table, at[v]) for v in (0.0, 1.0, 2.0))
        moves = c1 != c0 or c2 != c1
        if table["kind"] == "params" and table.get("form") == "l1":
            idx = penalties[table["index"]].idx
            if moves and not math.isclose(c2 - c1, c1 - c0, rel_tol=1e-12, abs_tol=1e-300):
                return None  # not linear in the tunable
            np.add.at(slope, idx, c1 - c0)
            np.add.at(fixed, idx, c0)
        elif moves:
            moving_elsewhere.append(table)
    idx = np.flatnonzero(slope > 0)
    if idx.size == 0 or np.any(slope < 0):
        return None
    for table in moving_elsewhere:
        # a smooth penalty whose gradient vanishes at w = 0 on the zeroed coordinates does not change
        # the optimality condition there (a ridge part of an elastic net); anything else does
        pen = penalties.get(table["index"])
        if pen is None or table.get("form") != "l2sq" or not np.all(np.isin(pen.idx, idx)):
            return None
    return L1Weight(idx, slope[idx], fixed[idx]), pb, ns


def path_start(checked: CheckedObjective, data: tables.BoundData, tunables: dict[str, float], tunable: str
               ) -> float | None:
    """The smallest value of `tunable` at which every weight of the L1 (or elastic-net) term it weighs
    is zero at the optimum, or None when it weighs no L1 term (or the condition below is not exact here).

    The optimality condition at w = 0 with the other parameters (the intercept) fitted: for a goal
    L(w, b) + tunable * c * l1(w), 0 is optimal exactly when |grad_w L(0, b*)|_j <= tunable * c_j for
    every j, so the start is max_j |grad_j| / c_j (less any L1 weight that does not move with the
    tunable). Exact for smooth row terms without constraints; None for a nonsmooth loss (there a
    subgradient, not the gradient, decides), for constraints, or for a nonsmooth penalty on the
    parameters left free."""
    found = l1_weight(checked, data, tunables, tunable)
    if found is None:
        return None
    weight, pb, ns = found
    if not all(t.smooth for t in pb.row_terms) or np.any(np.isfinite(pb.lo)) or np.any(np.isfinite(pb.hi)) \
            or pb.l1_balls or pb.l2_balls:
        return None
    zeroed = np.zeros(pb.size, dtype=bool)
    zeroed[weight.idx] = True
    free = np.flatnonzero(~zeroed)
    if any(not pen.smooth and np.any(~zeroed[pen.idx]) for pen in pb.penalties):
        return None
    theta = _fit_free(pb, ns, free)
    if theta is None:
        return None
    grad = ns["evaluate_smooth"](pb, theta).grad[weight.idx]
    need = (np.abs(grad) - weight.fixed) / weight.slope
    return float(max(0.0, np.max(need)))


def _fit_free(pb: Any, ns: dict[str, Any], free: np.ndarray) -> np.ndarray | None:
    """theta minimizing the smooth part with every coordinate outside `free` at zero (Newton's method
    on the few free coordinates, the Hessian by differences of gradients; exact enough: the start is
    read from a gradient, which the free coordinates move only to second order near their optimum)."""
    theta = np.zeros(pb.size)
    if free.size == 0:
        return theta
    if free.size > 50:
        return None  # more than an intercept and a few unpenalized weights: not what a path start means
    evaluate = ns["evaluate_smooth"]
    with np.errstate(all="ignore"):
        ev = evaluate(pb, theta)
        for _ in range(100):
            g = ev.grad[free]
            norm = float(np.sqrt(np.dot(g, g)))
            if not np.isfinite(norm):
                return None
            if norm <= 1e-13 * max(1.0, abs(ev.f)):
                break
            h = 1e-6 * (1.0 + float(np.max(np.abs(theta[free]))))
            H = np.empty((free.size, free.size))
            for k, j in enumerate(free):
                step = theta.copy()
                step[j] += h
                H[:, k] = (evaluate(pb, step).grad[free] - g) / h
            H = 0.5 * (H + H.T)
            try:
                delta = -np.linalg.solve(H + 1e-14 * np.eye(free.size), g)
            except np.linalg.LinAlgError:
                return None
            for _halving in range(40):  # damped: accept a step that lowers the gradient's norm
                trial = theta.copy()
                trial[free] += delta
                ev_t = evaluate(pb, trial)
                gt = ev_t.grad[free]
                if np.isfinite(ev_t.f) and float(np.sqrt(np.dot(gt, gt))) < norm:
                    break
                delta = 0.5 * delta
            else:
                break  # rounding: no step lowers the gradient any more
            theta, ev = trial, ev_t
    return theta


def _row_sums(data: tables.BoundData) -> dict[str, Any]:
    """X^T X, X^T y and X^T 1 of the rows (one X^T X and one two-column product)."""
    X = np.asarray(data.X, dtype=np.float64)
    both = X.T @ np.column_stack([np.asarray(data.y, dtype=np.float64), np.ones(X.shape[0])])
    return {"G": X.T @ X, "Xy": both[:, 0], "X1": both[:, 1], "n": X.shape[0]}


def _sums_cache(data: tables.BoundData, sums: dict[str, Any]) -> dict[str, Any]:
    """A `fit_path` cache for `data` holding the uncentred sums of its rows (read by the solver's Gram
    path, which then forms no X^T X of its own: see `_uncentred_sums` in the solver runtime)."""
    return {"X": data.X, "uncentred sums": {"X": data.X, "y": data.y, "G": sums["G"], "Xy": sums["Xy"],
                                           "X1": sums["X1"]}}


def fold_caches(checked: CheckedObjective, parts: list[tuple[tables.BoundData, tables.BoundData]],
                tunables: dict[str, float], whole: tables.BoundData | None = None
                ) -> tuple[list[dict[str, Any]], dict[str, Any] | None]:
    """`fit_path` caches for the (training rows, held rows) parts of a K-fold cross-validation, and one
    for `whole` (the refit on every row), or empty caches where they do not apply.

    The parts' held rows must partition one table and each part's training rows be the other parts'
    rows, the same values (no per-fold standardization): then the table's X^T X is the sum of the held
    parts' and each fold's is that less its own held part's (one X^T X of the table in all, where each
    fold would otherwise form its own: Friedman, Hastie & Tibshirani 2010, sec. 2.2, cover the Gram form
    of a path's updates). Applies where every fit goes the solver's Gram way with equal row weights."""
    empty: tuple[list[dict[str, Any]], dict[str, Any] | None] = ([{} for _ in parts], None)
    if not parts:
        return empty
    first_train = parts[0][0]
    if whole is not None and whole.n_rows != sum(held.n_rows for _, held in parts):
        return empty
    caches: list[dict[str, Any]] = [{"X": train.X} for train, _ in parts]
    bound = _numpy_problem(checked, first_train, tunables, caches[0])  # its checked rows stay in the cache
    if bound is None:
        return empty
    ns, pb = bound
    if not ns["gram_possible"](pb) or np.ptp(pb.c) != 0.0 or any(np.ptp(held.weights) != 0.0 for _, held in parts):
        return empty
    held_sums = [_row_sums(held) for _, held in parts]
    total = {key: sum(s[key] for s in held_sums) for key in ("G", "Xy", "X1", "n")}
    if not (np.all(np.isfinite(total["G"])) and np.all(np.isfinite(total["Xy"]))):
        return empty  # a held row the checks would refuse: each fold checks and forms its own
    for k, ((train, held), own) in enumerate(zip(parts, held_sums)):
        if train.n_rows + held.n_rows != total["n"]:
            return empty
        fold = {key: total[key] - own[key] for key in ("G", "Xy", "X1")}
        cache = _sums_cache(train, fold)
        if k == 0:
            cache.update({key: v for key, v in caches[0].items() if key != "X"})
        caches[k] = cache
    return caches, None if whole is None else _sums_cache(whole, total)


def fit_path(checked: CheckedObjective, data: tables.BoundData, tunables: dict[str, float], tunable: str,
             values: list[float], *, backend: Backend = "numpy", tol: float = 1e-6, param_tol: float | None = 1e-6,
             screen: bool = True, progress: Callable[[int, int, FitResult], None] | None = None,
             solver: str | None = None, cache: dict[str, Any] | None = None) -> list[FitResult]:
    """Fit `values` of `tunable` in the given order (the other tunables at `tunables`), each fit
    warm-started from the previous answer; `progress(k, total, result)` after each fit (k from 1).
    `cache`: a dict the caller keeps across several paths on the same `data` (a fold's paths over a
    second tunable), so what no tunable changes is formed once for all of them; a new one by default.

    Every result is certified on the full problem. With `screen`, inputs the Gap Safe sphere test
    proves inactive are left out of a fit where the rule applies (see `screening_rule`); each result's
    `extra["screening"]` says what was screened, or why nothing was."""
    if tunable not in {t.name for t in checked.spec.tunables}:
        raise ValueError(f"the spec has no tunable '{tunable}' (tunables: "
                         f"{', '.join(t.name for t in checked.spec.tunables) or 'none'})")
    base = dict(tunables)
    results: list[FitResult] = []
    total = len(values)
    if backend == "cvxpy":
        from objc.backends import cvxpy_problem
        # one parametrized problem serves every path on these rows (a grid's paths over a second tunable)
        built = cache.get("cvxpy problem") if cache is not None and cache.get("X") is data.X else None
        if built is None:
            built = cvxpy_problem.build_problem(checked, data.X, data.y, data.weights, data.input_names,
                                                dict(base, **{tunable: float(values[0])}) if values else base)
            if cache is not None:
                cache.clear()
                cache.update({"X": data.X, "cvxpy problem": built})
        for k, v in enumerate(values):
            result = cvxpy_problem.solve_build(built, dict(base, **{tunable: float(v)}), solver=solver,
                                               warm_start=k > 0)
            result = replace(result, extra=dict(result.extra, screening={
                "rule": None, "screened": [], "note": "no screening: the cvxpy backend solves the whole problem"}))
            results.append(result)
            if progress is not None:
                progress(k + 1, total, result)
        return results
    if checked.task == "multiclass":
        return _class_path(checked, data, base, tunable, values, tol, param_tol, progress)
    from objc.backends import numpy_module
    form = form_for(checked, data.input_names)
    # the cache of the path (or of the caller's paths on these rows): what no tunable changes (the
    # checked table, the column centre, a squared loss's Gram matrix with its sums and extreme
    # eigenvalues, the screening test's column norms); every entry is keyed by the rows it came from
    prepared: dict[str, Any] = {} if cache is None else cache
    if prepared.get("X") is not data.X:
        prepared.clear()  # another table: nothing kept applies
        prepared["X"] = data.X
    plan = screening_rule(checked, data, base, tunable, prepared) if screen else "no screening asked"
    theta: np.ndarray | None = None
    # one thread cap for the whole path: entering it scans the loaded libraries, which cost more than a
    # warm-started Gram fit; each fit is told the cap is held
    with numpy_module._compiled(checked)["_ThreadLimits"]():
        prepared["threads capped"] = True
        try:
            for k, v in enumerate(values):
                setting = dict(base, **{tunable: float(v)})
                result = _fit_point(checked, data, form, setting, theta, plan, prepared, tol=tol, param_tol=param_tol)
                theta = theta_from_params(form, result.params)
                results.append(result)
                if progress is not None:
                    progress(k + 1, total, result)
        finally:
            prepared.pop("threads capped", None)  # the cap ends with this block; a later fit caps itself
    return results


def _class_path(checked: CheckedObjective, data: tables.BoundData, base: dict[str, float], tunable: str,
                values: list[float], tol: float, param_tol: float | None,
                progress: Callable[[int, int, FitResult], None] | None) -> list[FitResult]:
    """A path of a multiclass spec on the NumPy backend: its own solver, each fit warm-started from the
    previous (W, b); no screening (the Gap Safe test here is the binary solver's)."""
    from objc.training import run_backend
    form = form_for(checked, data.input_names)
    results: list[FitResult] = []
    start = None
    for k, v in enumerate(values):
        result = run_backend(checked, data, "numpy", dict(base, **{tunable: float(v)}), tol=tol, theta0=start,
                             param_tol=param_tol)
        result = replace(result, extra=dict(result.extra, screening={
            "rule": None, "screened": [], "note": "no screening: the multiclass solver fits every input"}))
        W = np.asarray(result.params[form.weights_name], dtype=np.float64)
        b = (np.asarray(result.params[form.intercept_name], dtype=np.float64) if form.intercept_name
             else np.zeros(W.shape[1]))
        start = (W, b)
        results.append(result)
        if progress is not None:
            progress(k + 1, len(values), result)
    return results


@dataclass(frozen=True)
class ScreeningRule:
    """Where the Gap Safe sphere test applies: the weight positions it may screen and each row term's
    derivative Lipschitz constant (its curvature ceiling), from the catalog."""

    candidates: np.ndarray  # positions in w (0-based inputs) an L1 weight covers
    curvature: tuple[float, ...]  # one per row term, in the goal's order


def screening_rule(checked: CheckedObjective, data: tables.BoundData, tunables: dict[str, float], tunable: str,
                   prepared: dict[str, Any] | None = None) -> ScreeningRule | str:
    """The Gap Safe rule's inputs for a path of `tunable`, or why it does not apply (a phrase).

    Checked here: the score is exactly w . x (+ b); the duality gap is available (every row term a
    catalog loss with a conjugate, a separable penalty); every row term is smooth with a Lipschitz
    derivative in the catalog (the dual's strong concavity rests on it); the screened weights carry an
    L1 weight and no bound, norm ball or group norm ties them; the tunable weighs that L1 term.
    `prepared`: a path's cache (see `fit_path`)."""
    from objc.catalog import CATALOG
    from objc import typed_tree as tt
    found = l1_weight(checked, data, tunables, tunable, prepared)
    if found is None:
        return f"no screening: {tunable} does not weigh an L1 term alone and linearly"
    weight, pb, ns = found
    if not pb.standard:
        return "no screening: the score is not w . x (+ b)"
    ns["setup_problem"](pb, "fista", prepared)
    if ns["gram_possible"](pb):
        # measured on the bench (20000 x 100, 50 points): screening made the Gram path four times slower,
        # since its iterations never touch the table and the test costs two passes plus a copy per point
        return ("no screening: the squared loss is solved on its Gram matrix, whose iterations touch no data; "
                "leaving inputs out would cost more passes than it saves")
    if not pb.use_gap:
        return "no screening: the duality gap is not available for this goal"
    curvature = []
    for term in checked.terms:
        if term.kind != "rows":
            continue
        if term.known_loss is None or not term.smooth:
            what = term.known_loss[0] if term.known_loss else "a loss written out in the spec"
            return f"no screening: term {term.index + 1} ({what}) is not a smooth catalog loss"
        opts = dict(term.known_loss[1])
        if isinstance(term.body, tt.Apply) and term.body.entry == term.known_loss[0]:
            opts = term.body.option_values(tunables)
        L = CATALOG[term.known_loss[0]].grad_lipschitz(opts)
        if L is None or not np.isfinite(L):
            return f"no screening: the catalog gives {term.known_loss[0]} no Lipschitz constant of its derivative"
        # a margin loss reads y s: phi'' = y^2 l'' (labels are +1/-1, but say it from the data)
        scale = float(np.max(data.y ** 2)) if term.role == "margin" else 1.0
        curvature.append(float(L) * scale)
    w = pb.w_index
    on_w = np.isin(weight.idx, w)
    if not np.all(on_w):
        return "no screening: the L1 term covers parameters other than the weights"
    tied = np.isfinite(pb.lo[w]) | np.isfinite(pb.hi[w])
    for idx, _ in pb.l1_balls + pb.l2_balls + pb.groups:
        tied[np.isin(w, idx)] = True
    positions = np.flatnonzero(np.isin(w, weight.idx) & ~tied)
    if positions.size == 0:
        return "no screening: no weight carries the L1 term free of other constraints"
    return ScreeningRule(positions, tuple(curvature))


# a fit is run on the inputs left after screening only when at least this share is screened out: below
# it, copying the remaining columns costs about what it saves (our own figure, measured on the bench)
_SCREEN_SHARE = 0.1


def _fit_point(checked: CheckedObjective, data: tables.BoundData, form, setting: dict[str, float],
               theta: np.ndarray | None, plan: ScreeningRule | str, prepared: dict[str, Any], *, tol: float,
               param_tol: float | None) -> FitResult:
    """One point of a NumPy path: screen, fit the inputs left (warm-started), certify on the full problem."""
    from objc.training import run_backend
    start = np.zeros(form.size) if theta is None else theta

    def solve(d: tables.BoundData, theta0, columns, certify_only=False) -> FitResult:
        prepared["columns"] = columns
        return run_backend(checked, d, "numpy", setting, tol=tol, theta0=theta0, param_tol=param_tol,
                           prepared=prepared, certify_only=certify_only)

    if isinstance(plan, str):
        result = solve(data, theta, None)
        return replace(result, extra=dict(result.extra, screening={"rule": None, "screened": [], "note": plan}))
    from objc.backends import numpy_module
    ns = numpy_module._compiled(checked)  # only the screening test reads the module here; the fit finds it itself
    mask, gap = ns["gap_safe_screen"](ns["SPEC"], data.X, data.y, data.weights, data.input_names, setting, start,
                                      plan.curvature, plan.candidates, prepared)
    screened = plan.candidates[mask]
    info = {"rule": "Gap Safe sphere (Fercoq, Gramfort & Salmon 2015; Ndiaye et al. 2017)",
            "screened": [data.input_names[j] for j in screened], "gap_at_start": float(gap)}
    if screened.size < max(1, _SCREEN_SHARE * data.n_inputs):
        result = solve(data, theta, None)
        info["note"] = (f"{screened.size} input(s) proved inactive; fitted on all inputs (too few to leave out)"
                        if screened.size else "no input proved inactive")
        return replace(result, extra=dict(result.extra, screening=info))
    keep = np.setdiff1d(np.arange(data.n_inputs), screened)
    if keep.size == 0:  # every weight is zero: only the unpenalized parameters move (one cheap fit)
        zeroed = start.copy()
        zeroed[np.concatenate([np.arange(s.start, s.start + s.size) for s in form.slots if s.vector])] = 0.0
        result = solve(data, zeroed, None)
        info["note"] = f"all {data.n_inputs} inputs proved inactive; fitted from zero weights on the full problem"
        return replace(result, extra=dict(result.extra, screening=info))
    small = replace(data, X=np.ascontiguousarray(data.X[:, keep]), input_names=tuple(data.input_names[j] for j in keep))
    small_form = form_for(checked, small.input_names)
    theta_small = _restrict(form, small_form, start, keep)
    try:
        part = solve(small, theta_small, keep)
    except (SpecError, ValueError):  # the spec names a screened input: no reduced problem, fit them all
        result = solve(data, theta, None)
        info["note"] = "the reduced problem does not bind (the spec names an input screened out); fitted on all"
        return replace(result, extra=dict(result.extra, screening=info))
    full_theta = _embed(form, small_form, theta_from_params(small_form, part.params), keep)
    certified = solve(data, full_theta, None, certify_only=True)
    if certified.status != "optimal":  # rounding on the full problem: finish there, warm-started
        certified = solve(data, full_theta, None)
        info["note"] = "the full problem's certificate missed at the reduced answer; finished on all inputs"
    else:
        info["note"] = f"{screened.size} of {data.n_inputs} inputs left out of the fit; certificate of the full problem"
    return replace(certified, status=certified.status, method=part.method + "; Gap Safe screening",
                   iterations=part.iterations + certified.iterations, passes=part.passes + certified.passes,
                   seconds=part.seconds + certified.seconds,
                   extra=dict(certified.extra, screening=info))


def _restrict(form, small_form, theta: np.ndarray, keep: np.ndarray) -> np.ndarray:
    """theta of the full problem cut to the inputs kept (every parameter slot, vectors by column)."""
    out = np.zeros(small_form.size)
    for slot, small in zip(form.slots, small_form.slots):
        piece = theta[slot.start:slot.start + slot.size]
        out[small.start:small.start + small.size] = piece[keep] if slot.vector else piece
    return out


def _embed(form, small_form, theta_small: np.ndarray, keep: np.ndarray) -> np.ndarray:
    """theta of the reduced problem put back into the full problem's layout (zeros for the screened)."""
    out = np.zeros(form.size)
    for slot, small in zip(form.slots, small_form.slots):
        piece = theta_small[small.start:small.start + small.size]
        if slot.vector:
            out[slot.start + keep] = piece
        else:
            out[slot.start:slot.start + slot.size] = piece
    return out
