"""The objc command line: check, build, fit, eval, predict. No math here.

Exit codes: 0 success; 1 the spec, data or model is wrong (a message with its location); 2 usage.
Every command takes --json and then prints exactly one JSON document on standard output.
"""

from __future__ import annotations

import argparse
import contextlib
import json
import math
import sys
from dataclasses import replace
from pathlib import Path

from objc.diagnostics import Diagnostic, SpecError
from objc.model_io import dumps_strict
from objc.source_text import NO_SPAN

EXIT_OK, EXIT_SPEC, EXIT_USAGE = 0, 1, 2


class UsageError(Exception):
    pass


# ---------------------------------------------------------------- output helpers

def _emit_json(doc: dict) -> None:
    sys.stdout.write(dumps_strict(doc) + "\n")


def _diag_list(diags, source=None) -> list[dict]:
    return [d.to_json(source) for d in diags]


def _report_error(err: SpecError, as_json: bool, command: str) -> int:
    if as_json:
        _emit_json({"command": command, "ok": False, "errors": _diag_list(err.diagnostics, err.source)})
    else:
        sys.stderr.write(err.render() + "\n")
    return EXIT_SPEC


def _rule(title: str) -> str:
    return f"-- {title} " + "-" * max(0, 68 - len(title))


# ---------------------------------------------------------------- check

def _witness_json(w) -> dict | None:
    if w is None:
        return None
    return {"variable": w.variable, "a": w.a, "b": w.b, "value_at_midpoint": w.value_mid,
            "average_of_ends": w.value_avg, "point_a": dict(w.point_a), "point_b": dict(w.point_b),
            "inputs": list(w.inputs), "row": dict(w.row), "label": w.label, "tunables": dict(w.tunables)}


def _backend_warnings(checked) -> tuple:
    """W321 when the default (NumPy) backend cannot train an accepted spec, said before any training."""
    if not checked.accepted:
        return ()
    from objc.backends import numpy_module
    err = numpy_module.unsupported(checked)
    if err is None:
        return ()
    # the refusal's own code, so the warning here and the error `objc fit` gives are one diagnostic
    return (Diagnostic("W321", f"the NumPy backend (the default) cannot train this spec ({err.code} in `objc "
                       f"fit`): {err.what}", err.span or NO_SPAN, "warning",
                       "fit and build it with `--backend cvxpy`", (), checked.source.name),)


def _check_json(checked, extra_warnings: tuple = ()) -> dict:
    return {
        "command": "check",
        "ok": checked.accepted,
        "spec": checked.source.name,
        "sha256": checked.spec_hash,
        "verdict": checked.verdict,
        "accepted": checked.accepted,
        "smooth": checked.smooth,
        "subdifferentiable": checked.subdifferentiable,
        "task": checked.task,
        "terms": [{"index": t.index + 1, "text": t.text, "line": t.span.line, "column": t.span.column,
                   "kind": t.kind, "curvature": t.curvature.value, "smooth": t.smooth, "verdict": t.verdict,
                   "role": t.role, "losses": list(t.losses), "coefficient": t.coefficient,
                   "explanation": list(t.explanation), "witness": _witness_json(t.witness),
                   "collected_from": [{"term": k, "text": x} for k, x in zip(t.parts, t.part_texts)]}
                  for t in checked.terms],
        "witness": _witness_json(checked.witness),
        "constraints": [{"text": c.text, "line": c.span.line, "kind": c.kind, "keeps_convexity": c.curvature_ok}
                        for c in checked.constraints],
        "intercept": checked.intercept,
        "intercept_penalized": checked.penalizes_intercept,
        "expanded": checked.expanded,
        "errors": _diag_list(checked.errors, checked.source),
        "warnings": _diag_list(checked.warnings + tuple(extra_warnings), checked.source),
    }


def _check_text_report(checked, extra_warnings: tuple = ()) -> str:
    verdict = checked.verdict.upper()
    task = {"margin": "classification (losses of the margin y * s)",
            "residual": "regression (losses of the residual y - s)",
            "multiclass": "classification into classes (losses of a row's K scores s and its class y)"}.get(
                checked.task or "", "no per-row loss")
    lines = [f"spec      {checked.source.name}",
             f"verdict   {verdict}{'' if checked.accepted else '  (refused)'}",
             f"shape     {'smooth' if checked.smooth else 'nonsmooth'}, {task}", "", _rule("terms of the goal")]
    width = min(44, max([len(t.text) for t in checked.terms] + [4]))
    lines.append(f"  {'#':>2}  {'term':<{width}}  {'curvature':<12} {'smooth':<6}  line")
    for t in checked.terms:
        text = t.text if len(t.text) <= width else t.text[:width - 3] + "..."
        mark = "" if t.verdict in ("convex", "affine", "constant") else "   <- " + t.verdict
        lines.append(f"  {t.index + 1:>2}  {text:<{width}}  {t.curvature.value:<12} {'yes' if t.smooth else 'no':<6}"
                     f"  {t.span.line}{mark}")
    if checked.constraints:
        lines += ["", _rule("constraints")]
        for c in checked.constraints:
            lines.append(f"  line {c.span.line:<4} {c.text:<40} {c.kind}{'' if c.curvature_ok else '  <- breaks convexity'}")
    from objc.catalog import CATALOG
    ruled = {n for n, e in CATALOG.items() if e.convexity_rule}
    rules = [(t.index + 1, x) for t in checked.terms if t.verdict == "convex" for x in t.explanation
             if x.split(":", 1)[0] in ruled]
    if rules:
        lines += ["", _rule("why convex")]
        lines += [f"  term {k}, {x}" for k, x in rules]
    lines += ["", _rule("the objective, expanded")]
    lines += ["  " + ln for ln in checked.expanded.splitlines()]
    if checked.errors:
        lines += ["", _rule("why not")]
        lines += [d.render(checked.source) for d in checked.errors]
    warnings = tuple(checked.warnings) + tuple(extra_warnings)
    if warnings:
        lines += ["", _rule("warnings")]
        lines += [d.render(checked.source) for d in warnings]
    return "\n".join(lines) + "\n"


def cmd_check(args) -> int:
    from objc.frontend import check_file
    checked = check_file(args.spec)
    ok = checked.accepted or (args.local_ok and checked.subdifferentiable and not [
        d for d in checked.errors if d.code not in ("E311", "E312", "E313", "E314", "E315")])
    data_problems: tuple = ()
    data_summary = None
    if args.with_data and checked.spec.table is not None:
        # bind the table as fit would (labels, weights, missing values, standardization) without training
        from objc import training
        try:
            train, held, _ = training.bind_training(checked, Path(args.spec).parent)
            data_summary = {"rows": train.n_rows, "inputs": list(train.input_names),
                            "held_out_rows": None if held is None else held.n_rows, "task": train.task,
                            "warnings": _diag_list(train.warnings, checked.source)}
        except SpecError as err:
            data_problems = err.diagnostics
            ok = False
    extra = _backend_warnings(checked)
    if args.json:
        doc = _check_json(checked, extra)
        doc["ok"] = ok
        if args.with_data:
            doc["data"] = data_summary
            doc["errors"] += _diag_list(data_problems, checked.source)
        _emit_json(doc)
    else:
        sys.stdout.write(_check_text_report(checked, extra))
        if args.with_data:
            sys.stdout.write("\n" + _rule("the table") + "\n")
            if data_summary is not None:
                sys.stdout.write(f"  {data_summary['rows']} training rows x {len(data_summary['inputs'])} inputs"
                                 + (f", {data_summary['held_out_rows']} held out" if data_summary["held_out_rows"]
                                    else "") + ": the table binds cleanly\n")
            for d in data_problems:
                sys.stdout.write(d.render(checked.source) + "\n")
    return EXIT_OK if ok else EXIT_SPEC


# ---------------------------------------------------------------- build

def cmd_build(args) -> int:
    if args.lean and args.backend != "numpy":
        raise UsageError("--lean applies to the numpy backend (a cvxpy module imports cvxpy, not objc); "
                         "leave it out or use --backend numpy")
    from objc.frontend import check_file
    from objc import training
    checked = check_file(args.spec)
    training.require_trainable(checked, args.local_ok)
    if args.backend == "cvxpy":
        from objc.backends.cvxpy_problem import emit_module
        text = emit_module(checked)
    else:
        from objc.backends import numpy_module
        try:
            text = numpy_module.emit_module(checked, "import" if args.lean else "inline")
        except numpy_module.NotSupported as err:
            raise training.numpy_refusal(checked, err) from None
    out = Path(args.output)
    from objc.model_io import _atomic_write
    _atomic_write(out, text.encode("utf-8"))
    if args.json:
        _emit_json({"command": "build", "ok": True, "spec": args.spec, "backend": args.backend, "output": str(out),
                    "bytes": len(text.encode("utf-8")), "sha256_spec": checked.spec_hash,
                    "runtime": "imported from objc" if args.lean else "standalone"})
    else:
        kind = ", imports objc's solver code" if args.lean else ""
        print(f"wrote {out} ({args.backend} backend{kind}, {len(text.splitlines())} lines) from {args.spec}")
    return EXIT_OK


# ---------------------------------------------------------------- fit

def _parse_settings(pairs: list[str], checked) -> dict[str, float]:
    from objc.training import tunable_values
    given = {}
    for pair in pairs or []:
        if "=" not in pair:
            raise UsageError(f"--set takes NAME=VALUE, got '{pair}'")
        name, _, raw = pair.partition("=")
        try:
            given[name] = float(raw)
        except ValueError:
            raise UsageError(f"--set {name}={raw}: not a number") from None
    try:
        return tunable_values(checked, given)
    except ValueError as err:
        raise UsageError(f"--set {err}") from None


# a bar appears only once a run has taken this long, so quick commands print nothing extra
PROGRESS_DELAY = 1.0
PROGRESS_INTERVAL = 0.1  # seconds between redraws, at the most


def _progress_wanted(args) -> bool:
    """Progress goes to a person watching: never under --json, never when stderr is a file or a pipe."""
    return not getattr(args, "json", False) and sys.stderr.isatty()


@contextlib.contextmanager
def _progress_bar(enabled: bool, total: int | None, desc: str, unit: str):
    """A tqdm bar on stderr (None when disabled), removed when the work ends."""
    if not enabled:
        yield None
        return
    from tqdm import tqdm
    bar = tqdm(total=total, desc=desc, unit=unit, delay=PROGRESS_DELAY, mininterval=PROGRESS_INTERVAL,
               file=sys.stderr, leave=False, dynamic_ncols=True)
    try:
        yield bar
    finally:
        bar.close()


def _fit_progress(bar):
    """The solver's callback (passes, objective, relative certificate) drawn on a bar."""
    if bar is None:
        return None

    def show(passes: int, objective: float, gap: float | None) -> None:
        bar.set_postfix_str(f"objective {objective:.8g}" + ("" if gap is None else f", certificate {gap:.2e}"),
                            refresh=False)
        bar.update(max(0, int(passes) - bar.n))
    return show


def _reading_progress(bar):
    """The chunked reader's callback (rows read, rows in all) drawn on a bar."""
    if bar is None:
        return None

    def show(done: int, total: int | None) -> None:
        if total is not None and bar.total != total:
            bar.total = total
        bar.update(max(0, int(done) - bar.n))
    return show


def _memory_budget(text: str) -> int:
    from objc.chunked_tables import parse_budget
    try:
        return parse_budget(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"'{text}' is not a size; write e.g. 256M, 1G or 500000000") from None


def cmd_fit(args) -> int:
    from objc.frontend import check_file
    from objc import training
    spec_path = Path(args.spec)
    _engine_options(args)
    if (args.cluster is not None or args.workers is not None) and args.engine != "cluster":
        raise UsageError("--cluster and --workers choose the cluster of --engine cluster")
    if args.scratch is not None and args.engine == "memory":
        raise UsageError("--scratch is the folder of a table read in chunks: give it with --engine chunks or "
                         "cluster")
    checked = check_file(spec_path)
    training.require_trainable(checked, args.local_ok)
    tunables = _parse_settings(args.set, checked)
    with contextlib.ExitStack() as stack:
        client = None
        if args.engine == "cluster":
            from objc import cluster_rows
            try:
                client = stack.enter_context(cluster_rows.connected(args.cluster or cluster_rows.LOCAL, args.workers))
            except cluster_rows.DaskMissing as exc:
                raise UsageError(str(exc)) from None
            except (RuntimeError, OSError, ValueError, TimeoutError) as exc:
                raise UsageError(f"cannot reach the cluster {args.cluster or cluster_rows.LOCAL!r}: "
                                 f"{str(exc).splitlines()[0] if str(exc) else type(exc).__name__}") from None
        return _fit_with(args, spec_path, checked, tunables, client)


def _fit_with(args, spec_path: Path, checked, tunables: dict, client) -> int:
    from objc import training
    from objc.model_io import save_model
    with _progress_bar(_progress_wanted(args) and args.engine != "memory", None, "reading", "row") as bar:
        train, held, held_label = training.bind_training(checked, spec_path.parent,
                                                         Path(args.data) if args.data else None,
                                                         engine=args.engine, budget=args.memory,
                                                         progress=_reading_progress(bar), client=client,
                                                         scratch_dir=Path(args.scratch) if args.scratch else None)
    with _progress_bar(_progress_wanted(args) and args.backend == "numpy", args.max_passes, "training",
                       "pass") as bar:
        result = training.run_backend(checked, train, args.backend, tunables, tol=args.tol, solver=args.solver,
                                      allow_nonconvex=args.local_ok, progress=_fit_progress(bar),
                                      param_tol=args.param_tol, max_passes=args.max_passes)
    training.require_finished(checked, result, args.max_passes)
    out = Path(args.output) if args.output else Path(spec_path.stem + ".model.json")
    doc = training.evaluated_document(checked, spec_path, train, held, held_label, result, tunables)
    train_metrics, held_metrics = doc["training_metrics"], doc["holdout_metrics"]
    json_path = save_model(out, doc, result.params)
    if args.json:
        _emit_json({"command": "fit", "ok": True, "model": str(json_path), "objective": result.objective,
                    "terms": doc["fit"]["terms"], "status": result.status, "backend": result.backend,
                    "method": result.method, "certificate": doc["fit"]["certificate"],
                    "passes": result.passes, "iterations": result.iterations, "seconds": result.seconds,
                    "params": result.params, "inputs": list(train.input_names), "tunables": tunables,
                    "engine": _engine_record(args.engine, train.X),
                    "training_metrics": train_metrics, "holdout_metrics": held_metrics,
                    "holdout_source": held_label or None, "warnings": _diag_list(checked.warnings, checked.source)
                    + _diag_list(train.warnings)})
        return EXIT_OK
    cert = result.certificate
    lines = [f"trained   {spec_path}  on {train.n_rows} rows x {len(train.input_names)} inputs"
             + (f" ({train.dropped} rows dropped for missing values)" if train.dropped else ""),
             *_engine_lines(args.engine, train.X),
             f"backend   {result.backend}: {result.method}  ->  {result.status}",
             f"time      {result.seconds:.3f} s" + (f", {result.passes} passes over the data" if result.passes else "")
             + f", {result.iterations} iterations",
             f"stopped   on the {cert.kind}" + (f": absolute {_gap_figure(cert.absolute)}, relative "
                                        f"{_gap_figure(cert.relative)}" if cert.absolute is not None else "") + (f" ({cert.note})" if cert.note else ""),
             _distance_line(cert),
             "", _rule("objective"), f"  {result.objective:.10g}  total"]
    for t, v in zip(checked.terms, result.term_values):
        lines.append(f"  {v:.10g}  {t.text}")
    lines += ["", _rule("on the training rows")] + _metric_lines(train_metrics)
    if held_metrics is not None:
        lines += ["", _rule(f"on {held_label}")] + _metric_lines(held_metrics)
    for w in checked.warnings + train.warnings:
        lines.append("")
        lines.append(w.render(checked.source))
    lines += ["", f"model     {json_path} (+ {json_path.with_suffix('.npz').name})"]
    print("\n".join(lines))
    return EXIT_OK


def _engine_record(engine: str, X) -> dict:
    """Where the rows lived while training, for --json."""
    record: dict = {"name": engine}
    if engine != "memory":
        record["block_rows"] = int(X.block_rows)
        record["blocks"] = -(-int(X.n) // int(X.block_rows))
    if engine == "cluster":
        record["scheduler"] = str(X.client.scheduler.address)
        record["workers"] = len(X.client.scheduler_info().get("workers", {}))
    return record


def _engine_lines(engine: str, X) -> list[str]:
    if engine == "memory":
        return []
    r = _engine_record(engine, X)
    where = (f"held by {r['workers']} worker(s) of {r['scheduler']}, each pass one reduction over"
             if engine == "cluster" else "read from a scratch file each pass, in")
    return [f"rows      bound chunk by chunk, then {where} {r['blocks']} blocks of {r['block_rows']} rows"]


def _gap_figure(value: float) -> str:
    """A duality gap as a claim: P - D cannot be negative, so a negative figure is the rounding of
    the two sums and is printed as 0 with what was computed."""
    return f"{value:.3g}" if value >= 0 else f"0 (within rounding: P - D came out {value:.2g})"


def _distance_line(cert) -> str:
    """How far the parameters may be from the optimum: 'certified' only for a proved bound; the
    solver's note (which bound, where mu comes from, or why there is none) on the lines below."""
    import textwrap
    wanted = "" if cert.param_tolerance is None else f" (asked: {cert.param_tolerance:g})"
    if cert.distance is not None:
        head = f"distance  ||params - optimum|| <= {cert.distance:.3g}, certified{wanted}"
    elif cert.weights_distance is not None:
        head = (f"distance  ||w - w*|| <= {cert.weights_distance:.3g}, certified for the weights{wanted}; "
                "no bound for the intercept")
    else:
        head = f"distance  none certified{wanted}"
    if not cert.distance_note:
        return head
    return head + "\n" + textwrap.fill(cert.distance_note, width=100, initial_indent=" " * 10,
                                       subsequent_indent=" " * 10)


def _at_least_one(things: str, too_few: str):
    """An argparse type: a whole number of `things`, at least 1 (`too_few` says what 0 would mean)."""
    def parse(text: str) -> int:
        try:
            n = int(text)
        except ValueError:
            raise argparse.ArgumentTypeError(f"expected a whole number of {things}, got '{text}'") from None
        if n < 1:
            raise argparse.ArgumentTypeError(f"{too_few}, got {n}")
        return n
    return parse


_positive_int = _at_least_one("passes", "the pass budget must be at least 1")
_worker_count = _at_least_one("worker processes", "a cluster needs at least one worker")


def _param_tol(text: str) -> float | None:
    """--param-tol: a positive number, or 'off' to stop on the certificate of the objective alone."""
    if text.strip().lower() == "off":
        return None
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"'{text}' is not a number; give a positive distance such as 1e-6, "
                                         "or off") from None
    if not (value > 0 and value != float("inf")):
        raise argparse.ArgumentTypeError(f"'{text}': the parameter tolerance must be a positive number "
                                         "(or off to switch the parameter stop off)")
    return value


def _class_metric_lines(m: dict) -> list[str]:
    """K x K confusion counts (rows: the true class, columns: the predicted one) and per-class figures."""
    names = [c if isinstance(c, str) else f"{c:g}" for c in m["classes"]]
    width = max([len(n) for n in names] + [6])
    lines = [f"  0-1 error       {m['zero_one_error']:.4f}   (weighted {m['zero_one_error_weighted']:.4f}, "
             f"{m['rows']} rows)"]
    if "log_loss" in m:
        lines.append(f"  log loss        {m['log_loss']:.6g}   (mean of -log p of the true class)")
    lines.append("  confusion       rows: true class, columns: predicted class")
    lines.append("  " + " " * (width + 2) + "  ".join(f"{n:>{width}}" for n in names))
    for n, row in zip(names, m["class_confusion"]):
        lines.append(f"  {n:>{width}}  " + "  ".join(f"{v:>{width}}" for v in row))
    lines.append(f"  {'class':>{width}}  {'precision':>9}  {'recall':>9}  rows")
    for n, pc in zip(names, m["per_class"]):
        def fig(v):
            return "-" if v is None else f"{v:.4f}"
        lines.append(f"  {n:>{width}}  {fig(pc['precision']):>9}  {fig(pc['recall']):>9}  {pc['rows']}")
    lines.append("  mean loss       " + "   ".join(f"{k} {v:.4g}" for k, v in m["mean_losses"].items()))
    return lines


def _metric_lines(m: dict) -> list[str]:
    if "class_confusion" in m:
        return _class_metric_lines(m)
    if "zero_one_error" in m:
        c = m["confusion"]
        lines = [f"  0-1 error       {m['zero_one_error']:.4f}   (weighted {m['zero_one_error_weighted']:.4f}, "
                 f"{m['rows']} rows)",
                 f"  confusion       +1 called +1: {c['true_pos']}   -1 called +1: {c['false_pos']}   "
                 f"-1 called -1: {c['true_neg']}   +1 called -1: {c['false_neg']}"]
    else:
        lines = [f"  MAE {m['mae']:.6g}   RMSE {m['rmse']:.6g}   share at or below the prediction "
                 f"{m['coverage']:.4f}   ({m['rows']} rows)"]
    lines.append("  mean loss       " + "   ".join(f"{k} {v:.4g}" for k, v in m["mean_losses"].items()))
    return lines


# ---------------------------------------------------------------- eval / predict

def cmd_eval(args) -> int:
    from objc import training
    from objc.model_io import load_model
    model = load_model(Path(args.model))
    doc = model.document
    checked = training.checked_for_saved(model)
    _engine_options(args)
    if args.table:
        data = training.bind_for_model(checked, doc, Path(args.table), need_target=True, engine=args.engine,
                                       budget=args.memory)
        where = args.table
    elif args.engine != "memory":
        raise UsageError("--engine chunks reads the table given: name it (objc eval MODEL TABLE --engine chunks)")
    else:
        train, held, held_label = training.bind_training(checked, training.spec_dir_of(doc))
        if held is not None:
            data, where = held, held_label
        else:  # bound again by the model's schema, so its own standardization statistics apply
            data = training.bind_for_model(checked, doc, train.source, need_target=True)
            where = f"the training table {doc['schema']['training_table']} (the spec holds no rows out)"
    form = training.form_for(checked, tuple(doc["schema"]["inputs"]))
    s = training.scores(form, model.params, data.X, data.y)
    m = training.metrics(doc["task"], data.y, s, data.weights, checked, doc.get("tunables"))
    if args.json:
        _emit_json({"command": "eval", "ok": True, "model": str(model.path), "table": str(where), "metrics": m})
    else:
        print("\n".join([f"model     {model.path}", f"table     {where}", "", _rule("evaluation")] + _metric_lines(m)))
    return EXIT_OK


def cmd_predict(args) -> int:
    from objc import training
    from objc.model_io import atomic_write_files, load_model
    model = load_model(Path(args.model))
    doc = model.document
    checked = training.checked_for_saved(model)
    _engine_options(args)
    data = training.bind_for_model(checked, doc, Path(args.table), need_target=False, engine=args.engine,
                                   budget=args.memory)
    form = training.form_for(checked, tuple(doc["schema"]["inputs"]))
    s = training.scores(form, model.params, data.X, None)
    out = Path(args.output)
    atomic_write_files([(out, lambda f: _write_predictions(f, doc, checked, data, s))])
    if args.json:
        _emit_json({"command": "predict", "ok": True, "model": str(model.path), "table": args.table,
                    "output": str(out), "rows": int(len(s))})
    else:
        print(f"wrote {len(s)} predictions to {out}")
    return EXIT_OK


def _engine_options(args) -> None:
    if args.memory is not None and args.engine == "memory":
        engines = "chunks or cluster" if args.command == "fit" else "chunks"
        raise UsageError(f"--memory bounds a table read in chunks: give it with --engine {engines}")


def _write_predictions(f, doc: dict, checked, data, s) -> None:
    """The predictions' CSV into the binary file f, row by row (a table of 1e7 rows is never one string)."""
    import csv
    import io
    from objc import training
    buf = io.TextIOWrapper(f, encoding="utf-8", newline="")
    writer = csv.writer(buf, lineterminator="\n")
    if doc["task"] == "multiclass":
        labels = training.predicted_labels(doc, s)
        names = [c if isinstance(c, str) else f"{c:g}" for c in doc["schema"]["classes"]]
        header = ["row"] + [f"score:{n}" for n in names] + ["label"]
        probs = None
        if training.trains_softmax(checked):
            from objc.catalog import _k_mc_probabilities
            probs = _k_mc_probabilities(s)
            header += [f"chance:{n}" for n in names]
        writer.writerow(header)
        for i, (r, lab) in enumerate(zip(data.rows, labels)):
            writer.writerow([int(r)] + [repr(float(v)) for v in s[i]]
                            + [f"{lab:g}" if isinstance(lab, float) else str(lab)]
                            + ([] if probs is None else [repr(float(v)) for v in probs[i]]))
    elif doc["task"] == "margin":
        labels = training.predicted_labels(doc, s)
        writer.writerow(["row", "score", "label"])
        for r, v, lab in zip(data.rows, s, labels):
            writer.writerow([int(r), repr(float(v)), f"{lab:+g}" if isinstance(lab, float) else str(lab)])
    else:
        writer.writerow(["row", "prediction"])
        for r, v in zip(data.rows, s):
            writer.writerow([int(r), repr(float(v))])
    buf.flush()
    buf.detach()  # f stays open: the staging closes it


# ---------------------------------------------------------------- sweep / plot

def _parse_span(text: str | None, t) -> tuple[float, float]:
    if text is None:
        return t.low, t.high
    lo, sep, hi = text.partition("..")
    try:
        if not sep:
            raise ValueError
        low, high = float(lo), float(hi)
    except ValueError:
        raise UsageError(f"--span takes LOW..HIGH, e.g. 0.01..100; got '{text}'") from None
    if low > high:
        raise UsageError(f"--span {text}: LOW is above HIGH; write the smaller value first, e.g. --span {hi}..{lo}")
    return low, high


def _sweep_requests(args, checked) -> list:
    """The tunables' grid texts, with --span/--steps/--linear applied to the one-tunable form."""
    from objc import selection
    try:
        requests = [selection.parse_axis(text) for text in args.tunables]
    except ValueError as err:
        raise UsageError(f"tunable {err}") from None
    if args.span is not None:
        if len(requests) > 1:
            raise UsageError("--span applies to a one-tunable sweep; give each tunable its own span, e.g. "
                             "lam:0.001..10 a:0..1:5:lin")
        if requests[0].low is not None or requests[0].values is not None:
            raise UsageError(f"'{args.tunables[0]}' has its own span; drop --span {args.span}")
        known = {t.name: t for t in checked.spec.tunables}
        if requests[0].name in known:
            low, high = _parse_span(args.span, known[requests[0].name])
            requests[0] = replace(requests[0], low=low, high=high)
    return requests


def _sweep_options(args) -> None:
    """Usage mistakes that need no data, refused before any table is read."""
    if args.steps is not None and args.steps < 1:
        raise UsageError("--steps must be at least 1")
    if args.folds is not None and args.folds < 2:
        raise UsageError(f"--folds {args.folds}: cross-validation needs at least 2 folds")
    if args.seed is not None and args.folds is None:
        raise UsageError("--seed shuffles the folds; give --folds K too")
    if args.choose == "one-se" and args.folds is None:
        raise UsageError("--choose one-se needs the standard error over folds: give --folds K (K >= 2)")
    if args.plot_weights and len(args.tunables) > 1:
        raise UsageError("--plot-weights draws a one-tunable sweep; sweep one tunable")
    if args.plot_weights:
        from objc import plots
        if not hasattr(plots, "weight_path"):
            raise UsageError("--plot-weights: this objc has no weight-path plot yet")


def cmd_sweep(args) -> int:
    from objc.frontend import check_file
    from objc import selection, training
    spec_path = Path(args.spec)
    _sweep_options(args)
    checked = check_file(spec_path)
    training.require_trainable(checked)
    requests = _sweep_requests(args, checked)
    base = _parse_settings(args.set, checked)
    data_path = Path(args.data) if args.data else None
    train, held, held_label = training.bind_training(checked, spec_path.parent, data_path)
    try:
        grid = selection.make_grid(checked, requests, data=train, base=base,
                                   default_steps=args.steps or selection.DEFAULT_STEPS, default_linear=args.linear)
    except ValueError as err:
        raise UsageError(str(err)) from None
    seed = selection.DEFAULT_SEED if args.seed is None else args.seed
    try:
        plan = selection.validation_plan(checked, train, held, held_label, folds=args.folds, seed=seed)
    except ValueError as err:
        raise UsageError(f"--folds {args.folds}: {err}") from None
    options = selection.FitOptions(args.backend, args.tol, args.param_tol, args.solver)
    total = grid.size * len(plan.parts)
    with _progress_bar(_progress_wanted(args), total, "sweeping", "fit") as bar:
        def progress(done: int, total: int, info: dict) -> None:
            cert = info["certificate"]
            bar.set_postfix_str(f"fold {info['part']}/{info['parts']}, setting {info['point']}/{info['points']}, "
                                f"objective {info['objective']:.5g}"
                                + ("" if cert is None else f", certificate {cert:.1e}"), refresh=False)
            bar.update(done - bar.n)
        outcome = selection.evaluate_grid(checked, plan, grid, base, options, progress if bar is not None else None)
    choice = selection.choose_point(outcome, args.choose)
    doc = selection.sweep_document(outcome, choice)
    written: list[str] = []
    refit = None
    if args.save_best or args.folds is not None:
        # the folds' fits each saw part of the rows: the answer is the chosen setting on all of them
        model_doc, fit = selection.refit_chosen(checked, spec_path, train, held, held_label, outcome, choice,
                                                options, args.max_passes)
        refit = {"setting": model_doc["tunables"], "rows": train.n_rows, "objective": fit.objective,
                 "status": fit.status, "certificate": model_doc["fit"]["certificate"],
                 "training_metrics": model_doc["training_metrics"], "holdout_metrics": model_doc["holdout_metrics"]}
        if args.save_best:
            from objc.model_io import save_model
            refit["model"] = str(save_model(Path(args.save_best), model_doc, fit.params))
            written.append(refit["model"])
    doc["refit"] = refit
    from objc import plots
    if args.plot:
        written.append(str(plots.sweep_curve(doc, Path(args.plot))))
    if args.plot_weights:
        values = [p["value"] for p in doc["points"]]
        weights = [p["mean_weights"] for p in doc["points"]]
        names = list(doc["input_names"])
        if checked.task == "multiclass":  # W row by row: each input's weight for each class
            names = [f"{n}:{c}" for n in names for c in checked.spec.table.classes]
        written.append(str(plots.weight_path(values, weights, names, doc["tunable"],
                                             doc["chosen"]["value"], Path(args.plot_weights))))
    if args.json:
        _emit_json(dict(doc, command="sweep", ok=True, written=written))
        return EXIT_OK
    print(_sweep_report(doc, written))
    return EXIT_OK


def _sweep_report(doc: dict, written: list[str]) -> str:
    from objc.training import metric_label
    v = doc["validation"]
    names = doc["tunables"]
    sizes = [len(a["values"]) for a in doc["grid"]]
    lines = [f"sweep     {' x '.join(names)}: {' x '.join(str(n) for n in sizes)} = {len(doc['points'])} settings, "
             f"{doc['fits']} fits ({doc['backend']} backend; warm starts: {doc['warm_start']})"]
    for a in doc["grid"]:
        lo, hi = a["values"][0], a["values"][-1]
        lines.append(f"  {a['name']:<10} {len(a['values'])} values {lo:.4g} .. {hi:.4g}, {a['spacing']} ({a['origin']})")
    if doc["held_fixed"]:
        lines.append("  held at   " + ", ".join(f"{n} = {x:g}" for n, x in doc["held_fixed"].items()))
    lines.append(f"scored    on {v['label']}" + (f"; held-out rows per fold {', '.join(str(n) for n in v['part_rows'])}"
                                                 if v["kind"] == "folds" else ""))
    spread = " (mean +- standard error over the folds)" if v["kind"] == "folds" else ""
    others = [metric_label(m) for m in doc["metrics"][1:]]
    lines.append(f"ranked    by {doc['metric_label']}{spread}" + (f"; also {', '.join(others)}" if others else ""))
    rule = doc["rule"]
    lines.append(f"rule      {rule['name']}: {rule['text']}")
    if rule["simplest"]:
        lines.append(f"          simplest = {rule['simplest']}; within the lowest mean + its standard error "
                     f"= {rule['threshold']:.4g}")
    lines.append("")
    cols = [f"{n:>10}" for n in names]
    heads = [metric_label(m) for m in doc["metrics"]]
    widths = [max(len(h), 20 if v["kind"] == "folds" else 10) for h in heads]
    header = "  " + "  ".join(cols) + "  " + "  ".join(f"{h:>{w}}" for h, w in zip(heads, widths))
    if v["kind"] != "folds":
        header += f"  {'training':>10}"
    header += f"  {'nonzero':>7}  {'certificate':>11}"
    lines.append(header)
    short_of_tol = 0
    for k, p in enumerate(doc["points"]):
        cells = [f"{p['setting'][n]:>10.4g}" for n in names]
        figs = []
        for m, width in zip(doc["metrics"], widths):
            s = p["metrics"][m]
            figs.append(f"{s['mean']:.4g} +- {s['se']:.2g}".rjust(width) if s["se"] is not None
                        else f"{s['mean']:>{width}.4g}")
        row = "  " + "  ".join(cells) + "  " + "  ".join(figs)
        if v["kind"] != "folds":
            row += f"  {p['train']:>10.4g}"
        rel = p["certificate"]["relative"]
        row += f"  {p['nonzero']:>7.3g}  {'-' if rel is None else format(max(rel, 0.0), '.1e'):>11}"
        unfinished = [f["status"] for f in p.get("fits", []) if f["status"] != "optimal"]
        if unfinished:
            row += f"  ({len(unfinished)} of {len(p['fits'])} fits {', '.join(sorted(set(unfinished)))})"
            short_of_tol += 1
        if k == doc["chosen"]["index"]:
            row += "  <- chosen"
        elif k == doc["best"]["index"]:
            row += "  <- lowest mean"
        lines.append(row)
    if short_of_tol:
        lines.append(f"note      at {short_of_tol} setting(s) a fit stopped before its certificate reached --tol (the "
                     "certificate column is the worst over the fits); their figures are from where it stopped")
    refit = doc.get("refit")
    if refit is not None:
        cert = refit["certificate"]
        rel = "" if cert["relative"] is None else f", relative {_gap_figure(cert['relative'])}"
        if cert["distance"] is not None:
            dist = f"; ||params - optimum|| <= {cert['distance']:.3g}, certified"
        elif cert.get("weights_distance") is not None:
            dist = f"; ||w - w*|| <= {cert['weights_distance']:.3g}, certified for the weights (not the intercept)"
        else:
            dist = "; no distance to the optimum can be certified (the JSON's distance_note says why)"
        chosen = ", ".join(f"{n} = {refit['setting'][n]:.6g}" for n in names)
        lines += ["", f"refit     {chosen} on all "
                      f"{refit['rows']} training rows: {refit['status']}, {cert['kind']}{rel}{dist}"]
        if refit["holdout_metrics"] is not None:
            from objc.training import metric_value
            lines.append(f"          on the spec's held-out rows: {doc['metric_label']} "
                         f"{metric_value(refit['holdout_metrics'], doc['metric']):.4g}")
    lines += [f"wrote     {w}" for w in written]
    return "\n".join(lines)


def cmd_plot(args) -> int:
    from objc import plots
    out = Path(args.output)
    if args.kind == "losses":
        from objc.frontend import check_file
        checked = check_file(args.source)
        written = plots.loss_curves(checked, out)
    elif args.kind == "convergence":
        from objc import training
        model = training.load_trained(args.source)
        history = model.document["fit"].get("history") or []
        usable = [h for h in history if (h.get("gap") or 0) > 0 or (h.get("objective") is not None
                                                                     and math.isfinite(h["objective"]))]
        if len(history) < 2 or len(usable) < 2:
            raise SpecError((Diagnostic("P601", "this model holds no usable convergence history (the cvxpy "
                                        "backend records none; a null objective is not plotted)", NO_SPAN, hint="fit with the numpy backend",
                                        source_name=str(args.source)),))
        written = plots.convergence_curve(history, out, f"convergence of {Path(args.source).name}: "
                                          f"{model.document['fit']['method']}")
    else:
        try:
            doc = json.loads(Path(args.source).read_text(encoding="utf-8"))
            if doc.get("command") != "sweep":
                raise ValueError("not the output of `objc sweep --json`")
        except (OSError, ValueError) as err:
            raise SpecError((Diagnostic("P602", f"cannot read a sweep from {args.source}: {err}", NO_SPAN,
                                        hint="save `objc sweep SPEC T --json > sweep.json` first",
                                        source_name=str(args.source)),)) from None
        written = plots.sweep_curve(doc, out)
    if args.json:
        _emit_json({"command": "plot", "ok": True, "kind": args.kind, "output": str(written)})
    else:
        print(f"wrote {written}")
    return EXIT_OK


# ---------------------------------------------------------------- main

class _ArgumentError(Exception):
    """argparse's complaint, raised instead of its printing and exiting, so --json can report it."""

    def __init__(self, message: str, usage: str):
        super().__init__(message)
        self.usage = usage


class _Parser(argparse.ArgumentParser):
    def error(self, message: str):  # argparse's hook for every usage error
        raise _ArgumentError(message, self.format_usage())


def _parser() -> argparse.ArgumentParser:
    p = _Parser(prog="objc", description="Compile a training objective written in a spec file "
                                "into a checked solver, then train, evaluate and ship it.")
    sub = p.add_subparsers(dest="command", metavar="COMMAND")

    def common(sp):
        sp.add_argument("--json", action="store_true", help="print one JSON document instead of the report")

    def read_options(sp):
        sp.add_argument("--engine", choices=["memory", "chunks"], default="memory",
                        help="chunks: read a Parquet file or folder, or a .npy, in chunks (as `fit --engine chunks`)")
        sp.add_argument("--memory", type=_memory_budget, metavar="SIZE",
                        help="with --engine chunks: bytes of the table held at once (default 256M)")

    c = sub.add_parser("check", help="parse a spec and certify its convexity")
    c.add_argument("spec")
    c.add_argument("--local-ok", action="store_true",
                   help="accept a non-convex but subdifferentiable objective (its minimum is only local)")
    c.add_argument("--with-data", action="store_true",
                   help="also read the spec's table and check it as training would (labels, weights, values)")
    common(c)
    b = sub.add_parser("build", help="write a standalone solver module for a spec")
    b.add_argument("spec")
    b.add_argument("--backend", choices=["numpy", "cvxpy"], default="numpy")
    b.add_argument("-o", "--output", required=True, help="the .py file to write")
    b.add_argument("--lean", action="store_true",
                   help="numpy backend: write a small module that imports objc's kernels and solver code from the "
                        "installed objc instead of carrying them (default: a standalone module needing only NumPy)")
    b.add_argument("--local-ok", action="store_true", help=argparse.SUPPRESS)
    common(b)
    f = sub.add_parser("fit", help="train on the spec's table and save a model")
    f.add_argument("spec")
    f.add_argument("--data", help="train on this table instead of the one the spec names")
    f.add_argument("--backend", choices=["numpy", "cvxpy"], default="numpy")
    f.add_argument("--solver", help="cvxpy backend: the solver to use (e.g. CLARABEL, ECOS, SCS, HIGHS, OSQP)")
    f.add_argument("--tol", type=float, default=1e-6, help="relative certificate to stop at (numpy backend)")
    f.add_argument("--param-tol", type=_param_tol, default=1e-6, metavar="X",
                   help="numpy backend: also stop only once the learned parameters are within X (Euclidean norm) "
                        "of the exact optimum: a certified bound where the objective is strongly convex in all of "
                        "them, else an uncertified estimate; 'off' stops on --tol alone (default 1e-6)")
    f.add_argument("--max-passes", type=_positive_int, metavar="N",
                   help="numpy backend: a budget of passes over the data; a fit that runs out writes nothing")
    f.add_argument("--set", action="append", metavar="NAME=VALUE", help="give a tunable a value (repeatable)")
    f.add_argument("--engine", choices=["memory", "chunks", "cluster"], default="memory",
                   help="memory: read the table whole; chunks: read a Parquet file or folder, or a .npy, in "
                        "chunks, holding at most --memory of it at once; cluster: bind it in chunks, then "
                        "every pass runs on the workers of a Dask cluster (NumPy backend)")
    f.add_argument("--memory", type=_memory_budget, metavar="SIZE",
                   help="with --engine chunks or cluster: bytes of the table held at once here, and the "
                        "size of a block (default 256M)")
    f.add_argument("--scratch", metavar="DIR", help="with --engine chunks or cluster: the folder of the bound "
                   "rows (default: the system's temporary folder); a cluster's workers must see it")
    f.add_argument("--cluster", metavar="ADDRESS", help="with --engine cluster: the Dask scheduler, e.g. "
                   "tcp://10.0.0.5:8786 (default: local, a cluster of processes on this machine)")
    f.add_argument("--workers", type=_worker_count, metavar="N", help="with --cluster local: worker processes "
                   "(default 2)")
    f.add_argument("-o", "--output", help="model file to write (.json; the arrays go beside it as .npz)")
    f.add_argument("--local-ok", action="store_true",
                   help="train a non-convex but subdifferentiable objective (the result is a local minimum)")
    common(f)
    e = sub.add_parser("eval", help="evaluate a saved model on a table")
    e.add_argument("model")
    e.add_argument("table", nargs="?", help="default: the spec's held-out rows, else its training table")
    read_options(e)
    common(e)
    pr = sub.add_parser("predict", help="score every row of a table with a saved model")
    pr.add_argument("model")
    pr.add_argument("table")
    pr.add_argument("-o", "--output", required=True, help="CSV file to write")
    read_options(pr)
    common(pr)
    sw = sub.add_parser("sweep", help="fit over a grid of one or more tunables; rank by folds or held-out rows")
    sw.add_argument("spec")
    sw.add_argument("tunables", nargs="+", metavar="TUNABLE",
                    help="a tunable and optionally its grid: NAME (its declared range; an L1 weight from where "
                         "every weight is zero down), NAME:LOW..HIGH, NAME:LOW..HIGH:STEPS, "
                         "NAME:LOW..HIGH:STEPS:lin|log, NAME::STEPS, or NAME=V1,V2,...")
    sw.add_argument("--span", help="one tunable: LOW..HIGH (default: the tunable's declared range)")
    sw.add_argument("--steps", type=int, help="values per tunable without its own STEPS (default 9)")
    sw.add_argument("--linear", action="store_true", help="evenly spaced values instead of a log grid")
    sw.add_argument("--folds", type=int, metavar="K", help="K-fold cross-validation of the training rows "
                    "(stratified by class for classification); default: the spec's held-out rows")
    sw.add_argument("--seed", type=int, metavar="S", help="the folds' shuffle (default 0)")
    sw.add_argument("--choose", choices=["best", "one-se"], default="best",
                    help="best: the lowest mean (default); one-se: the simplest setting within one standard "
                         "error of it (needs --folds)")
    sw.add_argument("--data", help="use this table instead of the one the spec names")
    sw.add_argument("--backend", choices=["numpy", "cvxpy"], default="numpy")
    sw.add_argument("--solver", help="cvxpy backend: the solver to use")
    sw.add_argument("--tol", type=float, default=1e-6)
    sw.add_argument("--param-tol", type=_param_tol, default=1e-6, metavar="X",
                    help="as for fit: each fit stops once its parameters are within X of the optimum; 'off' "
                         "stops on --tol alone (default 1e-6)")
    sw.add_argument("--max-passes", type=_positive_int, metavar="N",
                    help="numpy backend: pass budget of the --save-best refit; running out writes nothing")
    sw.add_argument("--set", action="append", metavar="NAME=VALUE", help="hold another tunable at a value")
    sw.add_argument("--plot", metavar="PNG", help="also draw the validation curve to this PNG file")
    sw.add_argument("--plot-weights", metavar="PNG", help="one tunable: also draw each weight against it")
    sw.add_argument("--save-best", metavar="MODEL", help="refit the chosen setting on all training rows and "
                    "save the model (with how it was chosen)")
    common(sw)
    pl = sub.add_parser("plot", help="draw a PNG: a spec's losses, a model's convergence, or a sweep")
    pl.add_argument("kind", choices=["losses", "convergence", "sweep"])
    pl.add_argument("source", help="losses: a spec; convergence: a model; sweep: the JSON of `objc sweep --json`")
    pl.add_argument("-o", "--output", required=True, help="PNG file to write")
    common(pl)
    return p


COMMANDS = {"check": cmd_check, "build": cmd_build, "fit": cmd_fit, "eval": cmd_eval, "predict": cmd_predict,
            "sweep": cmd_sweep, "plot": cmd_plot}


def _interrupt_in_a_callback(unraisable) -> None:
    """sys.unraisablehook of the command line: a Ctrl-C that lands inside a callback Python cannot raise from
    (seen: the import machinery's module-lock weakref callback) is printed by the interpreter as "Exception
    ignored in ..." with a traceback, and swallowed. Here it is delivered again to the main thread a moment
    later, from another thread (raised from inside this hook it would be swallowed the same way), so `main`
    stops with its own message; any other unraisable exception goes to the default hook."""
    if isinstance(unraisable.exc_value, KeyboardInterrupt):
        import _thread
        import threading
        threading.Timer(0.01, _thread.interrupt_main).start()
        return
    sys.__unraisablehook__(unraisable)


def main(argv: list[str] | None = None) -> int:
    if argv is None:  # the process is objc's own (not a caller's): its interrupts are objc's to report
        sys.unraisablehook = _interrupt_in_a_callback
    parser = _parser()
    words = sys.argv[1:] if argv is None else [str(a) for a in argv]
    try:
        args = parser.parse_args(words)
    except SystemExit as exit_:  # --help
        return int(exit_.code or 0)
    except _ArgumentError as err:
        command = next((w for w in words if w in COMMANDS), None)
        if "--json" in words:
            _emit_json({"command": command, "ok": False, "usage_error": str(err)})
        else:
            sys.stderr.write(f"{err.usage}objc{' ' + command if command else ''}: error: {err}\n")
        return EXIT_USAGE
    if not args.command:
        parser.print_help(sys.stderr)
        return EXIT_USAGE
    as_json = getattr(args, "json", False)
    try:
        return COMMANDS[args.command](args)
    except SpecError as err:
        return _report_error(err, as_json, args.command)
    except UsageError as err:
        if as_json:
            _emit_json({"command": args.command, "ok": False, "usage_error": str(err)})
        else:
            sys.stderr.write(f"objc {args.command}: {err}\n")
        return EXIT_USAGE
    except BrokenPipeError:
        # the reader of our output went away (e.g. `| head`): stop quietly, as other command-line tools do
        import os
        os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
        return EXIT_OK
    except KeyboardInterrupt:
        # every output is staged and renamed into place whole, so whatever was written is complete
        sys.stderr.write("objc: interrupted; no output was left half-written\n")
        return 130
    except Exception as err:  # noqa: BLE001 - the promise is: never a traceback
        msg = f"objc {args.command}: internal error ({type(err).__name__}: {err}); nothing was written. " \
              "Please report this with the spec and data that caused it."
        if as_json:
            _emit_json({"command": args.command, "ok": False, "internal_error": msg})
        else:
            sys.stderr.write(msg + "\n")
        return EXIT_SPEC


if __name__ == "__main__":
    sys.exit(main())
