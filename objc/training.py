"""From a checked spec and its table to a trained, evaluated model: the steps the commands share.

No math of losses here: metrics call catalog kernels; solving is the backends' job.
"""

from __future__ import annotations

import contextlib
import hashlib
import time
from dataclasses import replace
from pathlib import Path
from typing import TYPE_CHECKING, Callable, Literal

import numpy as np

from objc import chunked_tables, tables
from objc.catalog import CATALOG
from objc.checker import CheckedObjective
from objc.diagnostics import Diagnostic, SpecError
from objc.fit_result import FitResult, theta_from_params
from objc.frontend import check_text
from objc.score_form import ClassScoreForm, ScoreForm, class_scores, design, score_form
from objc.source_text import NO_SPAN

if TYPE_CHECKING:  # pandas is imported by tables at run time; here only for the annotations
    import pandas as pd

    from objc.model_io import SavedModel

Backend = Literal["numpy", "cvxpy"]


def require_trainable(checked: CheckedObjective, allow_nonconvex: bool = False) -> None:
    """Refuse (SpecError) a spec the checker did not accept, unless a non-convex but
    subdifferentiable one is explicitly allowed."""
    if checked.accepted:
        return
    blocking = [d for d in checked.errors if not (allow_nonconvex and checked.subdifferentiable and
                                                    d.code in ("E311", "E312", "E313", "E314", "E315"))]
    if blocking:
        raise SpecError(tuple(blocking), checked.source)
    if checked.spec.table is None:
        raise SpecError((Diagnostic("E401", "the spec binds no table to train on", NO_SPAN,
                                    hint='add: table NAME from "file.csv"', source_name=checked.source.name),),
                        checked.source)


def declared_tunables(checked: CheckedObjective) -> dict[str, tuple[float, float, float]]:
    """Each tunable's (default, low, high), the shape `tunable_refusal` reads."""
    return {t.name: (t.default, t.low, t.high) for t in checked.spec.tunables}


def tunable_diagnostic(checked: CheckedObjective, name: str, value: object) -> SpecError | ValueError | None:
    """The refusal of one given value in objc's own terms: an unknown name is a ValueError (a usage
    mistake); a value outside the declared range is E402 at the `tune` line, since the convexity
    verdict was proved for that range only. The words are `tunable_refusal`'s, the generated modules' own."""
    # imported here: the runtime module imports SciPy's optimizers (a quarter second), which `check` never needs
    from objc.backends.numpy_solvers_src import tunable_refusal
    declared = declared_tunables(checked)
    refusal = tunable_refusal(name, value, declared)
    if refusal is None:
        return None
    if name not in declared:
        return ValueError(f"{refusal[0]}: {refusal[1]}")
    t = next(t for t in checked.spec.tunables if t.name == name)
    return SpecError((Diagnostic("E402", refusal[0], t.span, hint=refusal[1], source_name=checked.source.name),),
                     checked.source)


def tunable_values(checked: CheckedObjective, given: dict[str, float] | None = None) -> dict[str, float]:
    """Every tunable's value: its default unless given (refusals as `tunable_diagnostic` says)."""
    values = {name: float(default) for name, (default, _low, _high) in declared_tunables(checked).items()}
    for name, v in (given or {}).items():
        err = tunable_diagnostic(checked, name, v)
        if err is not None:
            raise err
        values[name] = float(v)
    return values


def task_of(checked: CheckedObjective) -> tables.Task:
    if checked.task is not None:
        return checked.task
    tb = checked.spec.table
    return "margin" if tb is not None and tb.label_map is not None else "residual"


Engine = Literal["memory", "chunks", "cluster"]
ENGINES: tuple[str, ...] = ("memory", "chunks", "cluster")


def bind_training(checked: CheckedObjective, spec_dir: Path, data_path: Path | None = None,
                  frame: pd.DataFrame | None = None, engine: Engine = "memory", budget: int | None = None,
                  progress: Callable[[int, int | None], None] | None = None, client=None,
                  scratch_dir: Path | None = None) -> tuple[tables.BoundData, tables.BoundData | None, str]:
    """(training rows, held-out rows or None, a phrase saying where the held-out rows came from).
    `frame` (a pandas DataFrame) replaces the spec's table file, like `data_path`. `engine="chunks"` reads
    the tables in chunks (objc/chunked_tables.py) and holds at most `budget` bytes of them at once;
    `progress(rows read, rows in all)` follows the reading. `engine="cluster"` binds them the same way,
    then hands the bound rows to the workers of `client` (a dask.distributed Client, objc/cluster_rows.py),
    which read them from `scratch_dir` (a folder they share; default: the system's temporary folder)."""
    if engine not in ENGINES:
        raise ValueError(f"engine must be one of {', '.join(ENGINES)}, not {engine!r}")
    if engine == "cluster" and client is None:
        raise ValueError("engine='cluster' needs a dask.distributed Client (objc.cluster_rows.connect)")
    try:
        if engine != "memory":
            if frame is not None:
                raise ValueError("a DataFrame is already in memory: train it with engine='memory'")
            train, held, label = _bind_in_chunks(checked, spec_dir, data_path, budget, progress, scratch_dir)
            if engine == "cluster":
                from objc import cluster_rows
                train = cluster_rows.on_cluster(train, client)
                held = None if held is None else cluster_rows.on_cluster(held, client)
            return train, held, label
        return _bind_training(checked, spec_dir, data_path, frame)
    except SpecError as err:  # show the spec line the data problem belongs to
        raise SpecError(err.diagnostics, err.source or checked.source) from None


def _table_binding(checked: CheckedObjective):
    tb = checked.spec.table
    if tb is None:
        raise SpecError((Diagnostic("E401", "the spec binds no table to train on", NO_SPAN,
                                    hint='add: table NAME from "file.csv"', source_name=checked.source.name),),
                        checked.source)
    return tb


def _bind_in_chunks(checked: CheckedObjective, spec_dir: Path, data_path: Path | None, budget: int | None,
                    progress, scratch_dir: Path | None) -> tuple[tables.BoundData, tables.BoundData | None, str]:
    tb = _table_binding(checked)
    task = task_of(checked)
    size = chunked_tables.DEFAULT_BUDGET if budget is None else int(budget)
    data = chunked_tables.bind_in_chunks(tb, spec_dir, task, source_name=checked.source.name, data_path=data_path,
                                         budget=size, progress=progress, scratch_dir=scratch_dir)
    if tb.validation_path is None:
        return data, None, ""
    held = chunked_tables.bind_in_chunks(tb, spec_dir, task, source_name=checked.source.name,
                                         data_path=spec_dir / tb.validation_path, file_span=tb.validation_span,
                                         standardization=data.standardization, input_names=data.input_names,
                                         both_classes=False, budget=size, scratch_dir=scratch_dir)
    return data, held, f"the validation table {tb.validation_path}"


def _bind_training(checked: CheckedObjective, spec_dir: Path, data_path: Path | None, frame=None
                   ) -> tuple[tables.BoundData, tables.BoundData | None, str]:
    tb = _table_binding(checked)
    task = task_of(checked)
    # with a holdout, `standardize` is fitted on the training part alone (tables.split_rows)
    data = tables.bind_table(tb, spec_dir, task, source_name=checked.source.name, data_path=data_path, frame=frame,
                             defer_standardize=tb.holdout is not None)
    if tb.holdout is not None:
        train, held = tables.split_holdout(data, tb.holdout, tb.holdout_seed, span=tb.holdout_span or tb.span,
                                           source_name=checked.source.name)
        return train, held, f"the {tb.holdout * 100:g}% holdout (seed {tb.holdout_seed})"
    if tb.validation_path is not None:
        held = tables.bind_table(tb, spec_dir, task, source_name=checked.source.name,
                                 data_path=spec_dir / tb.validation_path, file_span=tb.validation_span,
                                 standardization=data.standardization, input_names=data.input_names,
                                 both_classes=False)
        return data, held, f"the validation table {tb.validation_path}"
    return data, None, ""


def numpy_refusal(checked: CheckedObjective, err) -> SpecError:
    """A spec the NumPy backend cannot train (a `numpy_module.NotSupported`), as a located error."""
    return SpecError((Diagnostic(err.code, f"the NumPy backend cannot train this spec: {err.what}",
                                 err.span or NO_SPAN, hint="use `--backend cvxpy` (Python: "
                                 "backend=\"cvxpy\")", source_name=checked.source.name),),
                     checked.source)


def run_backend(checked: CheckedObjective, data: tables.BoundData, backend: Backend,
                tunables: dict[str, float] | None = None, *, tol: float = 1e-6, solver: str | None = None,
                allow_nonconvex: bool = False, progress: Callable | None = None,
                theta0: np.ndarray | None = None, param_tol: float | None = 1e-6,
                max_passes: int | None = None, prepared: dict | None = None,
                certify_only: bool = False) -> FitResult:
    """Train on bound data. The NumPy backend stops at a relative certificate of `tol` and, unless
    `param_tol` is None, once the parameters are within `param_tol` of the optimum (a certified bound
    where the objective is strongly convex in all of them); the cvxpy backend reports its solver's status.
    `prepared` and `certify_only` go to the NumPy solver (a cache kept across the fits of a path; only
    the certificate of theta0), see `numpy_module.fit`; the cvxpy backend takes neither."""
    start = time.perf_counter()
    if param_tol is not None and not (np.isfinite(param_tol) and param_tol > 0):
        raise ValueError(f"param_tol must be a positive number, or None to switch the parameter stop off; "
                         f"got {param_tol!r}")
    if backend not in ("numpy", "cvxpy"):
        raise ValueError(f"backend must be 'numpy' or 'cvxpy', not {backend!r}")
    if backend == "cvxpy" and chunked_tables.is_chunked(data.X):
        raise SpecError((Diagnostic("E409", "the cvxpy backend holds the whole problem in memory; a table read in "
                                    "chunks trains with the NumPy backend", NO_SPAN, hint="drop --backend cvxpy, or "
                                    "train in memory (--engine memory)", source_name=checked.source.name),),
                        checked.source)
    if backend == "cvxpy":
        if certify_only:
            raise ValueError("certify_only is the NumPy backend's (the cvxpy backend always solves)")
        from objc.backends import cvxpy_problem
        result = cvxpy_problem.fit(checked, data.X, data.y, data.weights, data.input_names, tunables,
                                   solver=solver)
        if not result.certificate.distance_note:
            result = replace(result, certificate=replace(
                result.certificate, distance_note="not formed: the cvxpy backend reports its solver's status, "
                                                  "no distance to the optimum"))
    else:
        from objc.backends import numpy_module
        history: list[dict] = []

        def record(passes: int, objective: float, gap: float | None) -> None:
            history.append({"passes": int(passes), "objective": float(objective),
                            "gap": None if gap is None else float(gap)})
            if progress is not None:
                progress(passes, objective, gap)
        try:
            result = numpy_module.fit(checked, data.X, data.y, data.weights, data.input_names, tunables, tol=tol,
                                      allow_nonconvex=allow_nonconvex, progress=record, theta0=theta0,
                                      param_tol=param_tol, max_passes=max_passes, prepared=prepared,
                                      certify_only=certify_only)
        except numpy_module.NotSupported as err:
            raise numpy_refusal(checked, err) from None
        step = max(1, len(history) // 200)  # a few hundred points draw the curve; keep the model file small
        result = replace(result, extra=dict(result.extra, history=history[::step] + history[-1:]))
    if not result.seconds:
        result = replace(result, seconds=time.perf_counter() - start)
    return result


# statuses that mean the solver stopped on its budget, not on its certificate
BUDGET_STATUSES = ("max passes", "max iterations")


def require_finished(checked: CheckedObjective, result: FitResult, max_passes: int | None) -> None:
    """Refuse to save a fit that ran out of passes (E404): a model file would claim a trained model.
    With an explicit pass budget, anything short of the asked certificate counts as running out."""
    short = result.status in BUDGET_STATUSES or (
        max_passes is not None and result.status not in ("optimal", "local (non-convex)"))
    if not short:
        return
    rel = result.certificate.relative
    reached = "" if rel is None else f" (relative certificate {rel:.3g}, asked {result.certificate.tolerance:g})"
    raise SpecError((Diagnostic("E404", f"training stopped after {result.passes} passes over the data without "
                                f"reaching its certificate{reached}: status '{result.status}'; nothing was "
                                "written", NO_SPAN,
                                hint="allow more passes (--max-passes), or loosen --tol",
                                source_name=checked.source.name),), checked.source)


def scores(form: ScoreForm | ClassScoreForm, params: dict, X: np.ndarray, y: np.ndarray | None = None
           ) -> np.ndarray:
    """The score of every row under the learned parameters (rows x K for a multiclass score)."""
    if isinstance(form, ClassScoreForm):
        return class_scores(form.checked, params, X)
    theta = theta_from_params(form, params)
    if form.standard:
        w = theta[form.slot(form.weights_name).start:][:len(form.input_names)]
        b = float(params[form.intercept_name]) if form.intercept_name else 0.0
        return np.asarray(X @ w, dtype=np.float64) + b
    A, off = design(form, X, np.zeros(X.shape[0]) if y is None else y)
    return A @ theta + off


def scores_of_fits(form: ScoreForm, params: list[dict], X: np.ndarray, y: np.ndarray | None = None) -> np.ndarray:
    """The scores of several fits on the same rows, one column per fit: one matrix product with the
    table (each fit's `scores` would read the table once)."""
    thetas = np.column_stack([theta_from_params(form, p) for p in params]) if params else np.zeros((form.size, 0))
    if form.standard:
        start = form.slot(form.weights_name).start
        W = thetas[start:start + len(form.input_names)]
        b = (np.array([float(p[form.intercept_name]) for p in params]) if form.intercept_name
             else np.zeros(len(params)))
        return np.asarray(X @ W, dtype=np.float64) + b
    A, off = design(form, X, np.zeros(X.shape[0]) if y is None else y)
    return A @ thetas + off[:, None]


def _trained_residual_losses(checked: CheckedObjective, tunables: dict[str, float] | None
                             ) -> dict[str, dict[str, float]]:
    """The residual losses the goal trains, with their settings at these tunable values (a setting a
    tunable gives, such as a pinball quantile, is the tunable's value, not its default)."""
    from objc import typed_tree as tt
    used: dict[str, dict[str, float]] = {}
    for t in checked.terms:
        if t.known_loss and CATALOG[t.known_loss[0]].role == "residual":
            opts = dict(t.known_loss[1])
            if isinstance(t.body, tt.Apply) and t.body.entry == t.known_loss[0]:
                opts = t.body.option_values(tunables)
            used.setdefault(t.known_loss[0], opts)
    return used


def _loss_key(name: str, opts: dict[str, float]) -> str:
    return name + ("(" + ", ".join(f"{k}={v:g}" for k, v in opts.items()) + ")" if opts else "")


def metrics(task: tables.Task, y: np.ndarray, s: np.ndarray, weights: np.ndarray,
            checked: CheckedObjective, tunables: dict[str, float] | None = None,
            losses_for: tuple[str, ...] | None = None) -> dict:
    """Evaluation figures: for classification the 0-1 error, confusion counts and the mean of every
    margin loss in the catalog; for regression MAE, RMSE, coverage and every residual loss (the
    trained ones at the settings `tunables` give them). With `losses_for` (sweep keys, see
    `metric_value`) only the figures those keys name are formed (a sweep scores many fits), and the
    0-1 error and accuracy for classification."""
    if task == "multiclass":
        return class_metrics(y, s, weights, checked)
    return metrics_of_fits(task, y, np.asarray(s, dtype=float)[:, None], weights, checked, tunables, losses_for)[0]


def trains_softmax(checked: CheckedObjective) -> bool:
    """Whether the goal trains softmax_ce (its scores are then log-odds of class probabilities)."""
    return any(t.known_loss is not None and t.known_loss[0] == "softmax_ce" for t in checked.terms)


def class_metrics(y: np.ndarray, S: np.ndarray, weights: np.ndarray, checked: CheckedObjective) -> dict:
    """Figures of K scores per row against each row's class (0 .. K-1): the K x K confusion counts
    (rows the true class, columns the predicted one, the highest score; ties go to the class listed
    first), per-class precision and recall, the 0-1 error (plain and weighted), the mean of every
    multiclass loss in the catalog (weighted) and, for a softmax_ce fit, the log loss (plain mean of
    -log p_y, the probabilities being the softmax of the scores)."""
    S = np.asarray(S, dtype=float)
    k = S.shape[1]
    labels = [c for c in checked.spec.table.classes]
    true = np.asarray(y).astype(np.int64)
    pred = np.argmax(S, axis=1)
    confusion = np.zeros((k, k), dtype=np.int64)
    np.add.at(confusion, (true, pred), 1)
    c = np.asarray(weights, dtype=float)
    wrong = (pred != true).astype(float)
    per_class = []
    for j in range(k):
        called, have = int(confusion[:, j].sum()), int(confusion[j, :].sum())
        per_class.append({"class": labels[j], "rows": have, "predicted": called,
                          "precision": float(confusion[j, j] / called) if called else None,
                          "recall": float(confusion[j, j] / have) if have else None})
    out: dict = {"rows": int(len(true)), "classes": labels,
                 "zero_one_error": float(np.mean(wrong)) if len(true) else float("nan"),
                 "zero_one_error_weighted": float(c @ wrong / np.sum(c)) if np.sum(c) > 0 else float("nan")}
    out["accuracy"] = 1.0 - out["zero_one_error"]
    out["class_confusion"] = confusion.tolist()
    out["per_class"] = per_class
    losses = {}
    for name, entry in CATALOG.items():
        if entry.role == "multiclass":
            losses[name] = float(c @ entry.value(S, true) / np.sum(c)) if np.sum(c) > 0 else float("nan")
    out["mean_losses"] = losses
    if trains_softmax(checked):
        out["log_loss"] = float(np.mean(CATALOG["softmax_ce"].value(S, true)))
    return out


def metrics_of_fits(task: tables.Task, y: np.ndarray, S: np.ndarray, weights: np.ndarray,
                    checked: CheckedObjective, tunables: dict[str, float] | None = None,
                    losses_for: tuple[str, ...] | None = None) -> list[dict]:
    """`metrics` of every column of scores S (rows x fits), one dict per column, formed a whole block
    of fits at a time (a sweep scores hundreds of fits on the same rows)."""
    wanted = None if losses_for is None else {k.split(":", 1)[1] for k in losses_for if k.startswith("mean_losses:")}
    k = S.shape[1]
    cols: dict = {}

    def need(key: str) -> bool:
        return losses_for is None or key in losses_for
    c = np.asarray(weights, dtype=float)
    wsum = float(np.sum(c))
    yc = np.asarray(y, dtype=float)[:, None]

    def wmean(v):
        return c @ v / wsum if wsum > 0 else np.full(k, np.nan)
    if task == "margin":
        m = yc * S
        err = CATALOG["zero_one"].value(m)
        pred = np.where(S > 0, 1.0, -1.0)
        cols["zero_one_error"] = np.mean(err, axis=0)
        if need("zero_one_error_weighted"):
            cols["zero_one_error_weighted"] = wmean(err)
        cols["accuracy"] = 1.0 - cols["zero_one_error"]
        confusion = None if losses_for is not None else {
            "true_pos": np.sum((yc > 0) & (pred > 0), axis=0), "false_pos": np.sum((yc < 0) & (pred > 0), axis=0),
            "true_neg": np.sum((yc < 0) & (pred < 0), axis=0), "false_neg": np.sum((yc > 0) & (pred < 0), axis=0)}
        losses = {}
        for name, entry in CATALOG.items():
            if entry.role == "margin" and (wanted is None or name in wanted):
                with np.errstate(over="ignore"):
                    losses[name] = wmean(entry.value(m))
    else:
        r = yc - S
        if need("mae"):
            cols["mae"] = np.mean(np.abs(r), axis=0)
        if need("rmse"):
            cols["rmse"] = np.sqrt(np.mean(r * r, axis=0))
        if need("coverage"):
            cols["coverage"] = np.mean(yc <= S, axis=0)  # share of rows at or below the prediction
        confusion = None
        used = _trained_residual_losses(checked, tunables)
        losses = {}
        for name, entry in CATALOG.items():
            if entry.role == "residual":
                opts = used.get(name, {})
                if wanted is None or _loss_key(name, opts) in wanted:
                    losses[_loss_key(name, opts)] = wmean(entry.value(r, **opts))
    out = []
    for j in range(k):
        one: dict = {"rows": int(len(y))}
        one.update({key: float(v[j]) for key, v in cols.items()})
        if confusion is not None:
            one["confusion"] = {key: int(v[j]) for key, v in confusion.items()}
        one["mean_losses"] = {key: float(v[j]) for key, v in losses.items()}
        out.append(one)
    return out


def fit_metrics(checked: CheckedObjective, params: dict, train: tables.BoundData, held: tables.BoundData | None,
                tunables: dict[str, float] | None) -> tuple[dict, dict | None]:
    """The evaluation figures of fitted parameters on the training rows and on the held-out rows."""
    form = form_for(checked, train.input_names)
    train_m = metrics(train.task, train.y, scores(form, params, train.X, train.y), train.weights, checked, tunables)
    held_m = None if held is None else metrics(held.task, held.y, scores(form, params, held.X, held.y),
                                               held.weights, checked, tunables)
    return train_m, held_m


def evaluated_document(checked: CheckedObjective, spec_path: Path, train: tables.BoundData,
                       held: tables.BoundData | None, held_label: str, result: FitResult,
                       tunables: dict[str, float]) -> dict:
    """The model document of a fit, with its figures on the training and held-out rows: the one path
    from a fit to what `objc fit`, `fit_spec` and `sweep --save-best` save."""
    train_m, held_m = fit_metrics(checked, result.params, train, held, tunables)
    return model_document(checked, spec_path, train, result, tunables, train_m, held_m, held_label)


def model_document(checked: CheckedObjective, spec_path: Path, data: tables.BoundData, result: FitResult,
                   tunables: dict[str, float], train_metrics: dict, held_metrics: dict | None,
                   held_label: str) -> dict:
    std = data.standardization
    return {
        "spec": {"path": str(spec_path), "resolved_path": str(Path(spec_path).resolve()),
                 "sha256": checked.spec_hash, "text": checked.spec.text},
        "verdict": checked.verdict,
        "smooth": checked.smooth,
        "task": data.task,
        "schema": {
            "inputs": list(data.input_names),
            "target": data.target,
            "label_map": [[v, l] for v, l in data.label_map.pairs] if data.label_map else None,
            **({"classes": list(data.classes)} if data.task == "multiclass" else {}),
            "standardization": None if std is None else {"means": list(std.means), "scales": list(std.scales)},
            "training_table": str(data.file_label or data.source),
            "training_table_sha256": _file_hash(data.source),
            **_fourier_draws(checked, data),
        },
        "tunables": tunables,
        "fit": {
            "backend": result.backend, "method": result.method, "status": result.status,
            "objective": result.objective,
            "terms": [{"text": t.text, "verdict": t.verdict, "value": v} for t, v in
                      zip(checked.terms, result.term_values)],
            "certificate": {"kind": result.certificate.kind, "absolute": result.certificate.absolute,
                            "relative": result.certificate.relative, "tolerance": result.certificate.tolerance,
                            "note": result.certificate.note, "distance": result.certificate.distance,
                            "curvature": result.certificate.curvature,
                            "distance_note": result.certificate.distance_note,
                            "param_tolerance": result.certificate.param_tolerance,
                            "weights_distance": result.certificate.weights_distance},
            # no wall-clock time here: a timing belongs to a run, not to the model, and the document's
            # digest must come out the same for the same spec, data and seed (docs/reliability.md)
            "iterations": result.iterations, "passes": result.passes,
            "history": result.extra.get("history", []),
        },
        "training_metrics": train_metrics,
        "holdout_metrics": held_metrics,
        "holdout_source": held_label or None,
    }


def _file_hash(path: Path) -> str | None:
    try:
        h = hashlib.sha256()
        with open(path, "rb") as f:
            for chunk in iter(lambda: f.read(1 << 20), b""):
                h.update(chunk)
        return h.hexdigest()
    except OSError:
        return None


def spec_dir_of(document: dict) -> Path:
    """The folder the model's spec was in (its table paths are relative to it): the path as given
    when it still exists from here, else the absolute path recorded at training time."""
    given = Path(document["spec"]["path"])
    if given.exists():
        return given.parent
    return Path(document["spec"].get("resolved_path", given)).parent


def checked_from_model(document: dict, model_path: Path) -> CheckedObjective:
    """Re-check the spec a model carries (its text is stored whole)."""
    return check_text(document["spec"]["text"], document["spec"]["path"])


def checked_for_saved(saved: SavedModel) -> CheckedObjective:
    """The spec a saved model carries, re-checked, with its arrays held to what that spec learns (a
    missing or resized array is refused here, not met as a KeyError while scoring)."""
    from objc.model_io import check_arrays
    from objc.score_form import layout
    checked = checked_from_model(saved.document, saved.path)
    check_arrays(saved, {s.name: s.size for s in layout(checked, saved.input_names)})
    return checked


def _fourier_draws(checked: CheckedObjective, data: tables.BoundData) -> dict:
    """The random draws of each `fourier` map by name, for the model document: predict rebuilds the map
    from them, not from the seed (NumPy does not promise the same random stream in every version)."""
    maps = checked.spec.table.maps if checked.spec.table is not None else ()
    draws = {m.name: {"W": state["W"], "b": state["b"]} for m, state in zip(maps, data.maps) if m.kind == "fourier"}
    return {"fourier_draws": draws} if draws else {}


def bind_for_model(checked: CheckedObjective, document: dict, table: Path, *, need_target: bool,
                   engine: Engine = "memory", budget: int | None = None) -> tables.BoundData:
    """Bind another table by a saved model's schema: same inputs in the same order, stored stats.
    `engine="chunks"` reads it in chunks (at most `budget` bytes of it at once), as `bind_training` does."""
    tb = checked.spec.table
    assert tb is not None  # a model is only ever saved from a spec with a table
    schema = document["schema"]
    std = None
    if schema["standardization"] is not None:
        std = tables.Standardization(tuple(schema["inputs"]), tuple(schema["standardization"]["means"]),
                                     tuple(schema["standardization"]["scales"]))
    if not need_target:
        tb = replace(tb, row_weight=None, row_weight_span=None, class_weights=())
    if engine == "chunks":
        # a holdout split belongs to training: a table read for a model has none
        return chunked_tables.bind_in_chunks(replace(tb, holdout=None), Path("."), document["task"],
                                             source_name=str(document["spec"]["path"]), data_path=table,
                                             standardization=std, input_names=tuple(schema["inputs"]),
                                             need_target=need_target, both_classes=False,
                                             budget=chunked_tables.DEFAULT_BUDGET if budget is None else budget)
    # the spans are the stored spec's, so the location names the spec (the message names the table)
    return tables.bind_table(tb, Path("."), document["task"], source_name=str(document["spec"]["path"]),
                             data_path=table,
                             standardization=std, input_names=tuple(schema["inputs"]), need_target=need_target,
                             both_classes=False, fourier_draws=schema.get("fourier_draws"))


def form_for(checked: CheckedObjective, input_names: tuple[str, ...]) -> ScoreForm | ClassScoreForm:
    from objc.checker import multiclass_form
    if checked.task == "multiclass":
        form = multiclass_form(checked.spec)
        assert form is not None  # the checker accepts a multiclass spec only with this score
        return ClassScoreForm(checked, tuple(input_names), form[0], form[1])
    return score_form(checked, input_names)


# ---------------------------------------------------------------- the Python API's model

from dataclasses import dataclass  # noqa: E402


def predicted_labels(document: dict, s: np.ndarray) -> np.ndarray:
    """The label of each score (s > 0 is +1) as the table writes it: the first value the spec's label
    map sends to that label, or +1.0 / -1.0 when the target was already +1/-1. For K scores per row
    (a multiclass model) the class of the highest score, as the `classes` clause lists it."""
    if document["task"] == "multiclass":
        classes = document["schema"]["classes"]
        picked = np.argmax(np.asarray(s, dtype=np.float64), axis=1)
        out = np.empty(len(picked), dtype=object)
        out[:] = [classes[int(k)] for k in picked]
        return out.astype(np.float64) if all(not isinstance(c, str) for c in classes) else out
    back: dict[float, object] = {1.0: 1.0, -1.0: -1.0}
    for raw, lab in reversed(document["schema"]["label_map"] or []):
        back[float(lab)] = raw
    out = np.empty(len(s), dtype=object)
    out[:] = [back[1.0] if v > 0 else back[-1.0] for v in np.asarray(s, dtype=np.float64)]
    if all(isinstance(v, float) for v in back.values()):
        return out.astype(np.float64)
    return out


@dataclass(frozen=True)
class TrainedModel:
    """A trained model: the saved document (schema, verdict, fit report) and the learned parameters.

    `decision_function(X)` and `predict(X)` take raw (unstandardized) arrays whose columns follow
    `input_names`; `predict_table(path)` reads a table by the model's schema (columns by name)."""

    document: dict
    params: dict
    checked: CheckedObjective

    @property
    def input_names(self) -> tuple[str, ...]:
        return tuple(self.document["schema"]["inputs"])

    @property
    def task(self) -> str:
        return self.document["task"]

    def _standardize(self, X: np.ndarray) -> np.ndarray:
        X = np.asarray(X, dtype=np.float64)
        if X.ndim != 2 or X.shape[1] != len(self.input_names):
            raise ValueError(f"X must have {len(self.input_names)} columns ({', '.join(self.input_names)})")
        std = self.document["schema"]["standardization"]
        if std is None:
            return X
        return (X - np.asarray(std["means"])) / np.asarray(std["scales"])

    def decision_function(self, X: np.ndarray) -> np.ndarray:
        X = np.asarray(X, dtype=np.float64)
        if X.ndim == 2 and not np.all(np.isfinite(X)):
            bad = np.flatnonzero(~np.all(np.isfinite(X), axis=1))
            raise ValueError(f"X holds NaN or infinite values in row(s) {', '.join(str(i) for i in bad[:10])}"
                             f"{', ...' if len(bad) > 10 else ''} (0-based); a score there would be meaningless: "
                             "drop or fill those rows first")
        return scores(form_for(self.checked, self.input_names), self.params, self._standardize(X))

    def predict(self, X: np.ndarray) -> np.ndarray:
        """Labels in the table's own values (through the spec's label map) for a margin loss, the
        prediction itself for a residual loss."""
        s = self.decision_function(X)
        return predicted_labels(self.document, s) if self.task in ("margin", "multiclass") else s

    def predict_table(self, path: str | Path) -> np.ndarray:
        data = bind_for_model(self.checked, self.document, Path(path), need_target=False)
        s = scores(form_for(self.checked, self.input_names), self.params, data.X)
        return predicted_labels(self.document, s) if self.task in ("margin", "multiclass") else s

    def save(self, path: str | Path) -> Path:
        from objc.model_io import save_model
        return save_model(Path(path), self.document, self.params)


def fit_spec(spec: str | Path, *, data: str | Path | pd.DataFrame | None = None, backend: Backend = "numpy",
             tunables: dict[str, float] | None = None, tol: float = 1e-6, solver: str | None = None,
             allow_nonconvex: bool = False, param_tol: float | None = 1e-6, engine: Engine = "memory",
             budget: int | None = None, cluster: str = "local", workers: int | None = None) -> TrainedModel:
    """Check a spec file, bind its table (or `data`), train, and evaluate on the training rows and
    the held-out part. Raises SpecError for a wrong spec or table. `param_tol` (NumPy backend): stop
    only once the parameters are within it of the optimum; None switches that stop off. `engine="chunks"`
    reads the table in chunks, at most `budget` bytes of it at once (see `bind_training`); `engine="cluster"`
    also trains on the Dask scheduler at `cluster` ("local": a cluster of `workers` processes started here and
    closed after the fit; objc/cluster_rows.py)."""
    from objc.frontend import check_file
    spec_path = Path(spec)
    checked = check_file(spec_path)
    require_trainable(checked, allow_nonconvex)
    values = tunable_values(checked, tunables)
    with contextlib.ExitStack() as stack:
        client = None
        if engine == "cluster":
            from objc import cluster_rows
            client = stack.enter_context(cluster_rows.connected(cluster, workers))
        if data is None or isinstance(data, (str, Path)):
            train, held, held_label = bind_training(checked, spec_path.parent, Path(data) if data else None,
                                                    engine=engine, budget=budget, client=client)
        else:  # a DataFrame in place of the spec's table file
            train, held, held_label = bind_training(checked, spec_path.parent, frame=data, engine=engine)
        result = run_backend(checked, train, backend, values, tol=tol, solver=solver,
                             allow_nonconvex=allow_nonconvex, param_tol=param_tol)
        doc = evaluated_document(checked, spec_path, train, held, held_label, result, values)
    return TrainedModel(doc, dict(result.params), checked)


def load_trained(path: str | Path) -> TrainedModel:
    """Read a model that `objc fit` or TrainedModel.save wrote."""
    from objc.model_io import load_model
    saved = load_model(Path(path))
    return TrainedModel(saved.document, saved.params, checked_for_saved(saved))


# ---------------------------------------------------------------- sweeps

def sweep_grid(low: float, high: float, steps: int, linear: bool = False) -> list[float]:
    """`steps` values from low to high: evenly spaced on a log scale when both ends are positive
    (hyperparameters that weigh terms act multiplicatively), else evenly spaced."""
    if steps < 2:
        return [float(low)]
    if not linear and low > 0 and high > 0:
        return [float(v) for v in np.geomspace(low, high, steps)]
    return [float(v) for v in np.linspace(low, high, steps)]


def validation_metric(checked: CheckedObjective, task: str, tunables: dict[str, float] | None = None) -> str:
    """What a sweep ranks by: the 0-1 error for classification (two classes or more); for regression the mean of the
    trained residual loss where there is one (pinball at its quantile, Huber at its threshold, at
    the values `tunables` give them), else RMSE."""
    if task in ("margin", "multiclass"):
        tb = checked.spec.table
        weighted = tb is not None and (tb.row_weight is not None or bool(tb.class_weights))
        # with row or class weights the goal counts rows unequally, and so must the ranking
        return "zero_one_error_weighted" if weighted else "zero_one_error"
    for name, opts in _trained_residual_losses(checked, tunables).items():
        return "mean_losses:" + _loss_key(name, opts)
    return "rmse"


def metric_label(metric: str) -> str:
    """A sweep metric's name as a report prints it."""
    return {"zero_one_error": "0-1 error", "zero_one_error_weighted": "weighted 0-1 error",
            "rmse": "RMSE", "mae": "MAE", "mean_losses:logistic": "log loss",
            "log_loss": "log loss (softmax)"}.get(
                metric, metric.replace("mean_losses:", "mean ") + " loss")


def metric_value(m: dict, metric: str) -> float:
    """One figure of a `metrics` dict by its sweep key (`mean_losses:NAME` for a loss's mean)."""
    if metric.startswith("mean_losses:"):
        return float(m["mean_losses"][metric.split(":", 1)[1]])
    return float(m[metric])


def sweep(checked: CheckedObjective, spec_dir: Path, tunable: str, values: list[float], *,
          backend: Backend = "numpy", data_path: Path | None = None, tunables: dict[str, float] | None = None,
          tol: float = 1e-6, solver: str | None = None, progress: Callable | None = None,
          param_tol: float | None = 1e-6) -> dict:
    """Fit once per value of one tunable, warm-starting each fit from the previous answer, and rank
    the values by the held-out figure (or the training figure when the spec holds nothing out).
    The one home of grids, folds and choice rules is objc.selection; this keeps the one-tunable call."""
    from objc import selection  # selection builds on this module, so it is imported when used
    return selection.one_tunable_sweep(checked, spec_dir, tunable, values, backend=backend, data_path=data_path,
                                       tunables=tunables, tol=tol, solver=solver, progress=progress,
                                       param_tol=param_tol)
