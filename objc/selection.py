"""Choosing tunables: a grid over one or more tunables, seeded K-fold cross-validation (or the spec's
held-out rows), a stated choice rule, and the refit of the chosen setting on every training row.

No math of losses here: the held-out figures are `training.metrics`, the fits are the backends'.
Every stage is a pure function from frozen values to frozen values; `sweep_document` turns the
outcome into the one JSON document `objc sweep --json` prints and `objc plot sweep` reads back.
"""

from __future__ import annotations

import itertools
import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable, Literal, Sequence

import numpy as np

from objc import paths, tables, training
from objc import typed_tree as tt
from objc.checker import CheckedObjective
from objc.diagnostics import Diagnostic, SpecError
from objc.fit_result import FitResult
from objc.source_text import NO_SPAN

# the folds' seed when none is given: any fixed number makes a run repeatable; this one is ours
DEFAULT_SEED = 0
DEFAULT_STEPS = 9
# an L1 path runs from the value where every weight is zero down to this share of it: 1e-3 is
# common practice for regularization paths (no published source)
PATH_RATIO = 1e-3
# a weight counts as nonzero above this share of the largest one (at least of 1): common practice
# for telling solver round-off from a kept input, no published source
NONZERO_SHARE = 1e-8

Rule = Literal["best", "one-se"]
RULES: tuple[str, ...] = ("best", "one-se")
RULE_TEXT = {
    "best": "the setting with the lowest mean of the ranking metric (the first in grid order on a tie)",
    "one-se": "the simplest setting whose mean is within one standard error of the lowest mean (the "
              "one-standard-error rule: Hastie, Tibshirani & Friedman, The Elements of Statistical Learning, "
              "2nd ed., section 7.10)",
}


# ---------------------------------------------------------------- grid text

@dataclass(frozen=True)
class AxisText:
    """One tunable as written on the command line: `NAME`, `NAME:LOW..HIGH`, `NAME:LOW..HIGH:STEPS`,
    `NAME:LOW..HIGH:STEPS:lin|log`, `NAME::STEPS` (the declared range), or `NAME=V1,V2,...`."""

    text: str
    name: str
    low: float | None = None
    high: float | None = None
    steps: int | None = None
    spacing: Literal["log", "lin"] | None = None
    values: tuple[float, ...] | None = None


GRID_SYNTAX = "NAME, NAME:LOW..HIGH, NAME:LOW..HIGH:STEPS, NAME:LOW..HIGH:STEPS:lin|log or NAME=V1,V2,..."


def parse_axis(text: str) -> AxisText:
    """Read one tunable's grid text; a malformed text is a ValueError saying what was expected."""
    def bad(why: str) -> ValueError:
        return ValueError(f"'{text}': {why} (write {GRID_SYNTAX})")

    def number(raw: str, what: str) -> float:
        try:
            v = float(raw)
        except ValueError:
            raise bad(f"{what} '{raw}' is not a number") from None
        if not math.isfinite(v):
            raise bad(f"{what} '{raw}' is not a finite number")
        return v

    if "=" in text:
        name, _, listed = text.partition("=")
        if not name.strip().isidentifier():
            raise bad("a tunable's name comes before '='")
        raw = [v for v in listed.split(",")]
        if not listed.strip() or any(not v.strip() for v in raw):
            raise bad("give values separated by commas after '='")
        return AxisText(text, name.strip(), values=tuple(number(v.strip(), "value") for v in raw))
    parts = text.split(":")
    name = parts[0].strip()
    if not name.isidentifier():
        raise bad("it must start with a tunable's name")
    if len(parts) > 4:
        raise bad("too many ':' parts")
    low = high = None
    if len(parts) > 1 and parts[1].strip():
        lo, sep, hi = parts[1].partition("..")
        if not sep:
            raise bad(f"the span '{parts[1]}' takes LOW..HIGH, e.g. 0.001..10")
        low, high = number(lo.strip(), "LOW"), number(hi.strip(), "HIGH")
        if low > high:
            raise bad(f"LOW {low:g} is above HIGH {high:g}; write the smaller value first")
    steps = None
    if len(parts) > 2:
        try:
            steps = int(parts[2])
        except ValueError:
            raise bad(f"STEPS '{parts[2]}' is not a whole number") from None
        if steps < 1:
            raise bad("STEPS must be at least 1")
    spacing = None
    if len(parts) > 3:
        spacing = parts[3].strip().lower()
        if spacing not in ("lin", "log"):
            raise bad(f"the spacing '{parts[3]}' is neither lin nor log")
    return AxisText(text, name, low, high, steps, spacing)  # type: ignore[arg-type]


# ---------------------------------------------------------------- grids

@dataclass(frozen=True)
class Axis:
    """One tunable's values (ascending, as reported), how they were spaced, and where the ends came from."""

    name: str
    values: tuple[float, ...]
    spacing: Literal["log", "linear", "listed"]
    origin: str


@dataclass(frozen=True)
class Grid:
    """The product of the axes; point k is the k-th of itertools.product (the last axis fastest)."""

    axes: tuple[Axis, ...]

    @property
    def names(self) -> tuple[str, ...]:
        return tuple(a.name for a in self.axes)

    @property
    def shape(self) -> tuple[int, ...]:
        return tuple(len(a.values) for a in self.axes)

    @property
    def size(self) -> int:
        return int(np.prod(self.shape))

    def settings(self) -> list[dict[str, float]]:
        return [dict(zip(self.names, combo)) for combo in itertools.product(*(a.values for a in self.axes))]


def weighs_l1(checked: CheckedObjective, tunable: str) -> bool:
    """Whether the tunable multiplies an L1 penalty term of the goal."""
    return any(t.kind == "params" and tunable in t.tunables and isinstance(t.core, tt.Apply)
               and t.core.entry == "l1" for t in checked.terms)


def has_l1(checked: CheckedObjective) -> bool:
    return any(t.kind == "params" and isinstance(t.core, tt.Apply) and t.core.entry == "l1" for t in checked.terms)


def resolve_axis(checked: CheckedObjective, request: AxisText, *, data: tables.BoundData | None = None,
                 base: dict[str, float] | None = None, default_steps: int = DEFAULT_STEPS,
                 default_linear: bool = False) -> Axis:
    """The values one tunable takes. Without a span: the declared range, except for a tunable that
    weighs an L1 term, whose grid starts where every weight of that term is zero (
    `paths.path_start`, clamped into the range) and ends PATH_RATIO below it (only where the declared
    range lies above zero). An unknown tunable is
    a ValueError; a value outside the declared range is E402 at the `tune` line."""
    known = {t.name: t for t in checked.spec.tunables}
    # a listed value or a span's end is refused as a value given to `fit` is (one rule, one wording)
    if request.values is not None:
        given = tuple(request.values)
    elif request.low is not None:
        given = (request.low, request.high)
    else:  # nothing given: any number, so an unknown name is refused in the same words
        given = () if request.name in known else (0.0,)
    for value in given:
        err = training.tunable_diagnostic(checked, request.name, value)
        if err is not None:
            raise err
    t = known[request.name]
    if request.values is not None:
        return Axis(t.name, tuple(sorted(set(request.values))), "listed", "listed")
    steps = request.steps or default_steps
    linear = request.spacing == "lin" or (request.spacing is None and default_linear)
    if request.low is not None:
        low, high, origin = request.low, request.high, "given"
    else:
        low, high, origin = t.low, t.high, "the declared range"
        # a range reaching down to 0 marks a share (an elastic-net mix), not a strength: no path for it
        if data is not None and t.low > 0 and weighs_l1(checked, t.name):
            start = paths.path_start(checked, data, dict(base or {}), t.name)
            if start is not None and start > 0:
                high = min(max(float(start), t.low), t.high)
                low = max(t.low, high * PATH_RATIO)
                origin = (f"the L1 path: from {high:.4g}, where every weight is zero (clamped into the declared "
                          f"range), down to {PATH_RATIO:g} of it")
    if request.spacing == "log" and not (low > 0 and high > 0):
        raise ValueError(f"'{request.text}': a log grid needs both ends above zero (got {low:g} .. {high:g}); "
                         "write :lin")
    values = tuple(training.sweep_grid(low, high, steps, linear))
    values = tuple(min(max(v, t.low), t.high) for v in values)  # geomspace may step past an end by round-off
    spacing = "linear" if (linear or not (low > 0 and high > 0)) and steps > 1 else "log"
    return Axis(t.name, values, spacing, origin)


def make_grid(checked: CheckedObjective, requests: Sequence[AxisText], **options) -> Grid:
    names = [r.name for r in requests]
    twice = sorted({n for n in names if names.count(n) > 1})
    if twice:
        raise ValueError(f"the tunable '{twice[0]}' is given twice")
    return Grid(tuple(resolve_axis(checked, r, **options) for r in requests))


# ---------------------------------------------------------------- folds

@dataclass(frozen=True)
class Folds:
    """Which fold each training row is held out in (0 .. k-1), seeded."""

    k: int
    seed: int
    stratified: bool
    assignment: tuple[int, ...]

    def held(self, f: int) -> np.ndarray:
        return np.flatnonzero(np.asarray(self.assignment) == f)

    def kept(self, f: int) -> np.ndarray:
        return np.flatnonzero(np.asarray(self.assignment) != f)


def make_folds(y: np.ndarray, k: int, seed: int = DEFAULT_SEED, *, stratify: bool = False) -> Folds:
    """Deal the rows into k folds in a seeded random order (numpy's default_rng(seed)). Stratified:
    each class is shuffled on its own and the classes are dealt one after the other round the folds,
    so every fold's count of each class is within one of every other fold's, and fold sizes are too."""
    n = len(y)
    if k < 2:
        raise ValueError(f"{k} folds: cross-validation needs at least 2")
    if k > n:
        raise ValueError(f"{k} folds need at least {k} training rows; there are {n}")
    rng = np.random.default_rng(seed)
    if stratify:
        order = np.concatenate([rng.permutation(np.flatnonzero(y == c)) for c in np.unique(y)])
    else:
        order = rng.permutation(n)
    assignment = np.empty(n, dtype=np.int64)
    assignment[order] = np.arange(n) % k
    return Folds(k, seed, stratify, tuple(int(a) for a in assignment))


# ---------------------------------------------------------------- validation parts

@dataclass(frozen=True)
class Part:
    """Rows to fit on and rows to score on (a fold, or the spec's held-out part)."""

    train: tables.BoundData
    held: tables.BoundData


@dataclass(frozen=True)
class Validation:
    kind: Literal["folds", "holdout", "training rows"]
    label: str
    parts: tuple[Part, ...]
    folds: Folds | None = None
    # the rows the folds partition (the refit's rows), where known: their sums serve the refit
    whole: tables.BoundData | None = field(default=None, compare=False, repr=False)


def fold_part(checked: CheckedObjective, data: tables.BoundData, folds: Folds, f: int) -> Part:
    """Fold f's rows; a standardization fitted on `data` is fitted again on the fold's training rows
    alone (tables.split_rows), so held-out rows never shape it."""
    tb = checked.spec.table
    span = (tb.inputs_span or tb.span) if tb is not None else NO_SPAN
    train, held = tables.split_rows(data, folds.kept(f), folds.held(f), span=span, source_name=checked.source.name,
                                    rows_label=f"the training rows of fold {f + 1} of {folds.k}",
                                    hint="use fewer folds, another --seed, or leave the input out")
    return Part(train, held)


def validation_plan(checked: CheckedObjective, train: tables.BoundData, held: tables.BoundData | None,
                    held_label: str, *, folds: int | None = None, seed: int = DEFAULT_SEED) -> Validation:
    """K folds of the training rows when `folds` is given (stratified by class for a classification task),
    else the spec's held-out rows, else the training rows themselves (said so in the label)."""
    if folds is None:
        if held is not None:
            return Validation("holdout", held_label, (Part(train, held),))
        return Validation("training rows", "the training rows (nothing is held out)", (Part(train, train),))
    stratify = train.task in ("margin", "multiclass")
    plan = make_folds(train.y, folds, seed, stratify=stratify)
    parts = []
    for f in range(plan.k):
        part = fold_part(checked, train, plan, f)
        if stratify and len(np.unique(part.train.y)) < 2:
            raise SpecError((Diagnostic("E406", f"the training rows of fold {f + 1} of {plan.k} hold one class "
                                        "only", NO_SPAN, hint="a class with fewer than 2 rows cannot be "
                                        "cross-validated: add rows of it", source_name=checked.source.name),),
                            checked.source)
        parts.append(part)
    how = "stratified by class" if stratify else "shuffled"
    return Validation("folds", f"{plan.k} folds of the {train.n_rows} training rows ({how}, seed {seed})",
                      tuple(parts), plan, train)


# ---------------------------------------------------------------- fitting the grid

def fit_order(checked: CheckedObjective, grid: Grid) -> tuple[int, tuple[tuple[int, ...], ...]]:
    """(the axis each path runs along, the paths as lists of grid point indices in fitting order).

    The path axis is the first one weighing an L1 term, else the first; a tunable that only weighs
    penalty terms runs from large to small (the most regularized answer, nearest zero, first), any
    other from small to large. Consecutive paths differ by one step of the other axes, so the first
    fit of a path starts from the first fit of the one before, its nearest neighbour."""
    l1 = [i for i, a in enumerate(grid.axes) if weighs_l1(checked, a.name)]
    along = l1[0] if l1 else 0
    name = grid.axes[along].name
    kinds = {t.kind for t in checked.terms if name in t.tunables}
    steps = list(range(grid.shape[along]))
    if kinds and kinds <= {"params"}:
        steps.reverse()
    others = [range(n) if i != along else [0] for i, n in enumerate(grid.shape)]
    paths = []
    for combo in itertools.product(*others):
        idx = list(combo)
        path = []
        for j in steps:
            idx[along] = j
            path.append(int(np.ravel_multi_index(tuple(idx), grid.shape)))
        paths.append(tuple(path))
    return along, tuple(paths)


Progress = Callable[[int, int, dict], None]


@dataclass(frozen=True)
class FitOptions:
    backend: training.Backend = "numpy"
    tol: float = 1e-6
    param_tol: float | None = 1e-6
    solver: str | None = None


def _fold_caches(checked: CheckedObjective, validation: Validation, setting: dict[str, float],
                 options: FitOptions) -> tuple[list[dict | None], dict | None]:
    """(one path cache per part, one for the refit on `validation.whole`): for K folds of a table whose
    fits go the Gram way, each part's holds its fold's sums formed from the table's and the refit's the
    table's own (`paths.fold_caches`); else Nones (each fit forms its own)."""
    none: tuple[list[dict | None], dict | None] = ([None] * len(validation.parts), None)
    if validation.kind != "folds" or options.backend != "numpy":
        return none
    # a standardization fitted again on each fold's rows (tables.split_rows) makes the folds' columns
    # differ from the table's: the table's sums do not apply
    if any(p.train.standardization is not None and p.train.standardization_fitted for p in validation.parts):
        return none
    caches, whole = paths.fold_caches(checked, [(p.train, p.held) for p in validation.parts], setting,
                                      validation.whole)
    return [c if c else None for c in caches], whole


def _fit_part(checked: CheckedObjective, part: Part, grid: Grid, base: dict[str, float], options: FitOptions,
              on_fit: Callable[[int, FitResult], None], cache: dict | None = None) -> tuple[list[FitResult], str]:
    """Every grid point fitted on the part's training rows, warm-started along the paths of
    `fit_order`; (results by grid index, which warm-start machinery ran). `cache`: the part's path cache
    (`_fold_caches`), a new one by default."""
    settings = grid.settings()
    along, order = fit_order(checked, grid)
    name = grid.axes[along].name
    results: list[FitResult | None] = [None] * grid.size
    if cache is None:
        cache = {}  # one per part: its Gram matrix or column centre serves every path of the part
    for path in order:
        def relay(j: int, total: int, res: FitResult, path: tuple[int, ...] = path) -> None:
            results[path[j - 1]] = res
            on_fit(path[j - 1], res)
        fitted = paths.fit_path(checked, part.train, dict(base, **settings[path[0]]), name,
                                [settings[k][name] for k in path], backend=options.backend, tol=options.tol,
                                param_tol=options.param_tol, progress=relay, solver=options.solver, cache=cache)
        for k, res in zip(path, fitted):
            results[k] = res
    return results, "paths.fit_path"  # type: ignore[return-value]


def metric_keys(checked: CheckedObjective, task: str, base: dict[str, float]) -> tuple[str, ...]:
    """The ranking metric (training.validation_metric) first, then the others reported beside it:
    the 0-1 error and log loss (the mean logistic loss) for margin losses, MAE and RMSE for residual ones."""
    rank = training.validation_metric(checked, task, base)
    if task == "multiclass":  # the log loss of the softmax probabilities where the goal trains them
        others = ["zero_one_error"] + (["log_loss"] if training.trains_softmax(checked) else [])
    else:
        others = (["zero_one_error", "mean_losses:logistic"] if task == "margin" else ["mae", "rmse"])
    return tuple(dict.fromkeys([rank] + others))


def _weight_vector(params: dict, intercept: str | None = None) -> np.ndarray:
    """Every learned vector's entries but the intercept's (a scalar, or by classes: `intercept`)."""
    vecs = [np.ravel(np.asarray(v, dtype=float)) for k, v in params.items() if np.ndim(v) >= 1 and k != intercept]
    return np.concatenate(vecs) if vecs else np.zeros(0)


def nonzero_count(w: np.ndarray) -> int:
    if not len(w):
        return 0
    return int(np.sum(np.abs(w) > NONZERO_SHARE * max(1.0, float(np.max(np.abs(w))))))


@dataclass(frozen=True)
class PointScore:
    """One grid point over the validation parts: each metric's value on each part's held rows."""

    setting: dict[str, float]
    values: dict[str, tuple[float, ...]]  # metric key -> one value per part
    train_values: tuple[float, ...]  # the ranking metric on each part's training rows
    objectives: tuple[float, ...]
    statuses: tuple[str, ...]
    certificates: tuple[float | None, ...]
    passes: tuple[int, ...]
    seconds: tuple[float, ...]
    norms: tuple[float, ...]  # Euclidean norm of the learned weight vector(s), per part
    nonzeros: tuple[int, ...]
    mean_weights: tuple[float, ...]  # the weight vector averaged over the parts
    params: dict | None  # the fit's parameters when there is one part


@dataclass(frozen=True)
class Outcome:
    grid: Grid
    validation: Validation
    metrics: tuple[str, ...]
    base: dict[str, float]
    points: tuple[PointScore, ...]
    warm_start: str
    backend: str
    input_names: tuple[str, ...]
    l1: bool
    # a NumPy fit cache holding the sums of `validation.whole` (formed with the folds' sums, no extra
    # read of the table), for the refit on those rows; None where the folds' sums did not apply
    refit_cache: dict | None = field(default=None, compare=False, repr=False)

    @property
    def metric(self) -> str:
        return self.metrics[0]

    def stats(self, key: str | None = None) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """(mean, standard deviation, standard error) of a metric over the parts, one per grid point.
        The deviation is the sample one (ddof 1) and the standard error deviation / sqrt(K), as in
        The Elements of Statistical Learning, section 7.10; with one part both are NaN."""
        v = np.array([p.values[key or self.metric] for p in self.points], dtype=float)
        mean = v.mean(axis=1)
        if v.shape[1] < 2:
            nan = np.full(len(mean), np.nan)
            return mean, nan, nan
        sd = v.std(axis=1, ddof=1)
        return mean, sd, sd / math.sqrt(v.shape[1])


# scores of at most this many table cells are held at once while a part's fits are scored (our own
# figure: 32 MB of float64, small beside the table a path is fitted on)
_SCORE_CELLS = 4 << 20


def _part_figures(checked: CheckedObjective, part: Part, fitted: list[FitResult], keys: tuple[str, ...],
                  base: dict[str, float]) -> tuple[list[dict[str, float]], list[float]]:
    """(each fit's metrics `keys` on the part's held rows, each fit's ranking metric on its training
    rows). The scores of the fits come a block of fits at a time from one matrix product with each
    table (`training.scores_of_fits`), not one pass per fit; only the losses the keys name are formed."""
    form = training.form_for(checked, part.train.input_names)
    held_out: list[dict[str, float]] = []
    on_train: list[dict[str, float]] = []
    for rows, wanted, sink in ((part.held, keys, held_out), (part.train, keys[:1], on_train)):
        if rows.task == "multiclass":  # K scores a row: one product per fit, the figures of `class_metrics`
            for r in fitted:
                m = training.metrics(rows.task, rows.y, training.scores(form, r.params, rows.X), rows.weights, checked)
                sink.append({key: training.metric_value(m, key) for key in wanted})
            continue
        block = max(1, _SCORE_CELLS // max(1, rows.n_rows))
        for start in range(0, len(fitted), block):
            S = training.scores_of_fits(form, [r.params for r in fitted[start:start + block]], rows.X, rows.y)
            for m in training.metrics_of_fits(rows.task, rows.y, S, rows.weights, checked, base, losses_for=wanted):
                sink.append({key: training.metric_value(m, key) for key in wanted})
    return held_out, [figures[keys[0]] for figures in on_train]


def evaluate_grid(checked: CheckedObjective, validation: Validation, grid: Grid, base: dict[str, float] | None = None,
                  options: FitOptions = FitOptions(), progress: Progress | None = None) -> Outcome:
    """Fit every grid point on every part's training rows and score it on that part's held rows."""
    base = dict(base or {})
    first = validation.parts[0].train
    keys = metric_keys(checked, first.task, base)
    settings = grid.settings()
    total, done = grid.size * len(validation.parts), 0
    per_part: list[list[FitResult]] = []
    warm = ""
    caches, refit_cache = _fold_caches(checked, validation, dict(base, **settings[0]), options)
    for f, part in enumerate(validation.parts):
        def on_fit(k: int, res: FitResult, f: int = f) -> None:
            nonlocal done
            done += 1
            if progress is not None:
                progress(done, total, {"part": f + 1, "parts": len(validation.parts), "point": k + 1,
                                       "points": grid.size, "setting": settings[k], "objective": res.objective,
                                       "certificate": res.certificate.relative})
        fitted, warm = _fit_part(checked, part, grid, base, options, on_fit, caches[f])
        per_part.append(fitted)
    figures = [_part_figures(checked, part, fitted, keys, base) for part, fitted in zip(validation.parts, per_part)]
    points = []
    form = training.form_for(checked, first.input_names)
    intercept = form.intercept_name if checked.task == "multiclass" else None
    for k, setting in enumerate(settings):
        values = {key: [held[k][key] for held, _train in figures] for key in keys}
        train_values = [train[k] for _held, train in figures]
        weights = [_weight_vector(fitted[k].params, intercept) for fitted in per_part]
        runs = [fitted[k] for fitted in per_part]
        points.append(PointScore(
            setting=setting, values={key: tuple(v) for key, v in values.items()}, train_values=tuple(train_values),
            objectives=tuple(r.objective for r in runs), statuses=tuple(r.status for r in runs),
            certificates=tuple(r.certificate.relative for r in runs), passes=tuple(r.passes for r in runs),
            seconds=tuple(r.seconds for r in runs), norms=tuple(float(np.linalg.norm(w)) for w in weights),
            nonzeros=tuple(nonzero_count(w) for w in weights),
            mean_weights=tuple(float(v) for v in np.mean(weights, axis=0)) if weights[0].size else (),
            params=dict(runs[0].params) if len(runs) == 1 else None))
    return Outcome(grid, validation, keys, base, tuple(points), warm, options.backend, first.input_names,
                   has_l1(checked), refit_cache)


# ---------------------------------------------------------------- the choice

SIMPLEST_TEXT = {True: "fewest nonzero weights (mean over the folds), then the smallest mean Euclidean norm "
                       "of the weights, then grid order",
                 False: "the smallest mean Euclidean norm of the weights over the folds, then grid order"}


@dataclass(frozen=True)
class Choice:
    rule: str
    index: int  # the chosen grid point
    best_index: int  # the point with the lowest mean
    threshold: float | None  # one-se: the best mean plus its standard error
    within: tuple[int, ...]  # one-se: the points whose mean is at or below the threshold


def choose(means: Sequence[float], ses: Sequence[float], rule: str, *, nonzeros: Sequence[float] | None = None,
           norms: Sequence[float] | None = None) -> Choice:
    """Apply a rule to the points' means (and standard errors). `best`: the lowest mean, the first on
    a tie. `one-se`: among the points whose mean is at most the lowest mean plus that point's
    standard error, the simplest: fewest nonzero weights (when `nonzeros` is given), then the
    smallest weight norm, then the first in grid order."""
    m = np.asarray(means, dtype=float)
    best = int(min(range(len(m)), key=lambda i: (m[i] if np.isfinite(m[i]) else np.inf, i)))
    if rule == "best":
        return Choice("best", best, best, None, ())
    if rule != "one-se":
        raise ValueError(f"unknown rule '{rule}' (rules: {', '.join(RULES)})")
    se = float(np.asarray(ses, dtype=float)[best])
    if not np.isfinite(se):
        raise ValueError("the one-standard-error rule needs a standard error: cross-validate with --folds")
    threshold = float(m[best] + se)
    within = tuple(i for i in range(len(m)) if m[i] <= threshold)
    nz = np.zeros(len(m)) if nonzeros is None else np.asarray(nonzeros, dtype=float)
    nm = np.zeros(len(m)) if norms is None else np.asarray(norms, dtype=float)
    pick = min(within, key=lambda i: (nz[i], nm[i], i))
    return Choice("one-se", int(pick), best, threshold, within)


def choose_point(outcome: Outcome, rule: str) -> Choice:
    mean, _, se = outcome.stats()
    nonzeros = [float(np.mean(p.nonzeros)) for p in outcome.points] if outcome.l1 else None
    return choose(mean, se, rule, nonzeros=nonzeros, norms=[float(np.mean(p.norms)) for p in outcome.points])


# ---------------------------------------------------------------- documents

def _axis_json(a: Axis) -> dict:
    return {"name": a.name, "values": list(a.values), "spacing": a.spacing, "origin": a.origin}


def _finite(v: float) -> float | None:
    return float(v) if np.isfinite(v) else None


def selection_record(outcome: Outcome, choice: Choice) -> dict:
    """How a setting was chosen, as a saved model records it (no timings: the model's bytes must
    come out the same for the same spec, data and seed)."""
    mean, sd, se = outcome.stats()
    v = outcome.validation
    return {"grid": [_axis_json(a) for a in outcome.grid.axes], "fits": outcome.grid.size * len(v.parts),
            "validation": v.kind, "validated_on": v.label,
            "folds": None if v.folds is None else v.folds.k, "seed": None if v.folds is None else v.folds.seed,
            "stratified": None if v.folds is None else v.folds.stratified,
            "metric": outcome.metric, "rule": choice.rule, "rule_text": RULE_TEXT[choice.rule],
            "simplest": SIMPLEST_TEXT[outcome.l1] if choice.rule == "one-se" else None,
            "chosen": {"setting": outcome.points[choice.index].setting, "mean": _finite(mean[choice.index]),
                       "std": _finite(sd[choice.index]), "se": _finite(se[choice.index])},
            "held_fixed": {n: x for n, x in outcome.base.items() if n not in outcome.grid.names}}


def sweep_document(outcome: Outcome, choice: Choice) -> dict:
    """The whole sweep as one JSON-ready document: grid, validation, rule, every point with its
    per-part values and their mean, deviation and standard error, the best and the chosen point.
    For a one-tunable sweep each point also carries `value`, and on one part `train` and `held`."""
    v = outcome.validation
    single = len(outcome.grid.axes) == 1
    stats = {key: outcome.stats(key) for key in outcome.metrics}
    points = []
    for k, p in enumerate(outcome.points):
        entry: dict = {"setting": p.setting}
        if single:
            entry["value"] = p.setting[outcome.grid.names[0]]
        mean, sd, se = (s[k] for s in stats[outcome.metric])
        entry.update({"mean": float(mean), "std": _finite(sd), "se": _finite(se),
                      "metrics": {key: {"mean": float(stats[key][0][k]), "std": _finite(stats[key][1][k]),
                                        "se": _finite(stats[key][2][k]), "parts": list(p.values[key])}
                                  for key in outcome.metrics},
                      "train": float(np.mean(p.train_values)), "held": float(mean) if v.kind == "holdout" else None,
                      "objective": float(np.mean(p.objectives)), "status": p.statuses[0] if len(set(p.statuses)) == 1
                      else "mixed: " + ", ".join(sorted(set(p.statuses))),
                      "certificate": {"relative": None if any(c is None for c in p.certificates)
                                      else float(max(p.certificates))},
                      "passes": int(sum(p.passes)), "seconds": float(sum(p.seconds)),
                      "nonzero": float(np.mean(p.nonzeros)), "norm": float(np.mean(p.norms)),
                      "mean_weights": list(p.mean_weights),
                      "fits": [{"objective": o, "status": s, "relative": c, "passes": n}
                               for o, s, c, n in zip(p.objectives, p.statuses, p.certificates, p.passes)]})
        if p.params is not None:
            entry["params"] = p.params
        points.append(entry)
    mean = stats[outcome.metric][0]
    ranked_key = "held" if v.kind == "holdout" else "mean"

    def summary(i: int) -> dict:
        out = {"index": i, "setting": outcome.points[i].setting, "mean": float(mean[i]),
               ranked_key: float(mean[i])}
        if single:
            out["value"] = outcome.points[i].setting[outcome.grid.names[0]]
        if v.kind == "training rows":
            out["train"] = float(mean[i])
        return out
    return {
        "tunable": outcome.grid.names[0], "tunables": list(outcome.grid.names),
        "grid": [_axis_json(a) for a in outcome.grid.axes], "fits": outcome.grid.size * len(v.parts),
        "validation": {"kind": v.kind, "label": v.label, "parts": len(v.parts),
                       "folds": None if v.folds is None else v.folds.k,
                       "seed": None if v.folds is None else v.folds.seed,
                       "stratified": None if v.folds is None else v.folds.stratified,
                       "part_rows": [part.held.n_rows for part in v.parts]},
        "ranked_on": v.label, "metric": outcome.metric, "metric_label": training.metric_label(outcome.metric),
        "metrics": list(outcome.metrics),
        "rule": {"name": choice.rule, "text": RULE_TEXT[choice.rule],
                 "simplest": SIMPLEST_TEXT[outcome.l1] if choice.rule == "one-se" else None,
                 "threshold": choice.threshold, "within": list(choice.within)},
        "held_fixed": {n: x for n, x in outcome.base.items() if n not in outcome.grid.names},
        "backend": outcome.backend, "warm_start": outcome.warm_start,
        "points": points, "best": summary(choice.best_index), "chosen": summary(choice.index),
        "input_names": list(outcome.input_names),
    }


def refit_chosen(checked: CheckedObjective, spec_path: Path, train: tables.BoundData, held: tables.BoundData | None,
                 held_label: str, outcome: Outcome, choice: Choice, options: FitOptions = FitOptions(),
                 max_passes: int | None = None) -> tuple[dict, FitResult]:
    """The chosen setting fitted on every training row: (its model document, with the selection
    record under `selection`, and the fit). A fit that runs out of passes is E404 (nothing saved)."""
    setting = dict(outcome.base, **outcome.points[choice.index].setting)
    kept = outcome.refit_cache
    # the table's sums kept from the folds serve only the very rows they were formed from
    prepared = kept if options.backend == "numpy" and kept is not None and kept.get("X") is train.X else None
    fit = training.run_backend(checked, train, options.backend, setting, tol=options.tol, solver=options.solver,
                               param_tol=options.param_tol, max_passes=max_passes, prepared=prepared)
    training.require_finished(checked, fit, max_passes)
    doc = training.evaluated_document(checked, spec_path, train, held, held_label, fit, setting)
    doc["selection"] = selection_record(outcome, choice)
    return doc, fit


def one_tunable_sweep(checked: CheckedObjective, spec_dir: Path, tunable: str, values: list[float], *,
                      backend: training.Backend = "numpy", data_path: Path | None = None,
                      tunables: dict[str, float] | None = None, tol: float = 1e-6, solver: str | None = None,
                      progress: Callable | None = None, param_tol: float | None = 1e-6) -> dict:
    """`training.sweep`: one tunable over given values, ranked on the spec's held-out rows (or the
    training rows), the lowest figure chosen; `progress(k, n, point)` after each fit."""
    known = {t.name: t for t in checked.spec.tunables}
    base = {n: t.default for n, t in known.items()}
    base.update(tunables or {})
    train, held, held_label = training.bind_training(checked, spec_dir, data_path)
    grid = Grid((resolve_axis(checked, AxisText(tunable, tunable, values=tuple(float(v) for v in values))),))
    plan = validation_plan(checked, train, held, held_label)

    def relay(done: int, total: int, info: dict) -> None:
        if progress is not None:
            progress(done, total, {"value": info["setting"][tunable], "objective": info["objective"]})
    outcome = evaluate_grid(checked, plan, grid, base, FitOptions(backend, tol, param_tol, solver), relay)
    return sweep_document(outcome, choose_point(outcome, "best"))
