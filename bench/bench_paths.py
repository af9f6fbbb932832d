"""Regularization paths with K-fold cross-validation: objc's fit_path per fold against scikit-learn's
cross-validated estimators, on the same table, the same folds, the same grid and the same thread caps.

    .venv/bin/python bench/bench_paths.py                 # 1e5 x 100, 5 folds, both cases
    .venv/bin/python bench/bench_paths.py --rows 20000 --cases lasso

The cases (the issue's targets):
- Lasso, `mean squared(y - s) + lam * l1(w)`, 50 values of lam from the path's start (the value
  above which every weight is zero, paths.path_start on all rows) down to 1e-3 of it, against
  LassoCV(alphas=the same values, cv=the same folds). LassoCV minimizes (1 / 2n) ||y - X w - b||^2 +
  alpha ||w||_1 on each training part of n rows; objc's `squared(r)` is r^2 / 2 and `mean` divides by
  n, so lam = alpha exactly.
- logistic + L2, `mean logistic(y * s) + lam * l2sq(w)`, 20 values of C = logspace(-4, 4) against
  LogisticRegressionCV(Cs=the same, cv=the same folds, solver lbfgs). scikit-learn minimizes
  C sum_i log(1 + exp(-y_i s_i)) + ||w||^2 / 2 (intercept free); dividing by C n gives objc's goal
  with lam = 1 / (2 C n), n the training part's rows (all parts have the same size here).

Both sides do the same work: per fold, the whole path on the training part (warm starts), the
held-out score of every point; then one refit at the chosen value on all rows (objc's Lasso side
forms the table's X^T X once from the held parts and each fold's from it, paths.fold_caches, as
`sweep --folds` does; the refit reuses the table's). scikit-learn's `tol` is chosen here, in this
run: the largest of a few values whose answers, on the first fold's path, reach objc's default
relative duality gap (1e-6) as measured by objc's own evaluator (the generated module's certificate
of the peer's parameters, no iterations); the gaps the chosen tol reached are printed. objc is then
asked for the same certified tolerance: the relative gap the peer's answers reached (not 1e-6, and
no parameter tolerance, which the peer does not certify); a second objc row runs at objc's default
certificate (relative gap 1e-6, parameter tolerance 1e-6). Ratios are objc's seconds over the
peer's (below 1: objc is faster); each side runs `--repeats` times, alternating, and the median is
reported.
"""

from __future__ import annotations

import argparse
import math
import os
import platform
import sys
import time
import warnings
from dataclasses import replace
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
sys.path.insert(0, str(Path(__file__).resolve().parent))

import objc  # noqa: E402
from objc import paths, selection, training  # noqa: E402
from objc.backends import numpy_module as nm  # noqa: E402
from bench_solvers import ThreadCap, make_data  # noqa: E402  (the same caps and the same seeded tables)

FOLDS = 5
SEED = 0


def spec_text(goal: str, margin: bool) -> str:
    target = "target y: yes -> +1, no -> -1" if margin else "target y"
    return (f'table t from "t.csv"\n  {target}\n  inputs all\ntune lam = 1 within 0 .. 1000000\n'
            f"learn w over inputs, b\nscore s = w . x + b\ngoal {goal}\n")


def bind(checked, X: np.ndarray, y: np.ndarray, margin: bool):
    import pandas as pd
    frame = pd.DataFrame(X, columns=[f"x{j}" for j in range(X.shape[1])])
    frame["y"] = np.where(y > 0, "yes", "no") if margin else y
    data, _held, _ = training.bind_training(checked, Path("."), frame=frame)
    return data


def folds_of(n: int) -> list[tuple[np.ndarray, np.ndarray]]:
    """Seeded folds: a permutation cut into FOLDS parts; (training rows, held-out rows) per fold."""
    order = np.random.default_rng(SEED).permutation(n)
    parts = np.array_split(order, FOLDS)
    return [(np.sort(np.concatenate(parts[:k] + parts[k + 1:])), np.sort(parts[k])) for k in range(FOLDS)]


def part(data, rows: np.ndarray):
    return replace(data, X=np.ascontiguousarray(data.X[rows]), y=data.y[rows], weights=data.weights[rows],
                   rows=data.rows[rows])


def certify(checked, data, lam: float, w: np.ndarray, b: float) -> tuple[float, float, float]:
    """(relative duality gap, objective, proved distance to the optimum: inf where none is proved) of
    given parameters, by objc's evaluator (no iterations)."""
    r = nm.fit(checked, data.X, data.y, data.weights, data.input_names, {"lam": lam}, theta0=np.append(w, b),
               certify_only=True)
    distance = r.certificate.distance
    return float(r.certificate.relative), float(r.objective), math.inf if distance is None else float(distance)


def timed(fit) -> tuple[float, object]:
    start = time.perf_counter()
    out = fit()
    return time.perf_counter() - start, out


def alternate(sides: dict, repeats: int) -> tuple[dict, dict]:
    """Each side (a call giving (seconds, result)) in turn, `repeats` rounds, under the same thread caps:
    (every run's seconds by side, each side's last result). The sides alternate and the caller reports
    medians because the machine is shared: a run that meets another engineer's job can take several
    times as long."""
    runs: dict = {name: [] for name in sides}
    last: dict = {}
    for _ in range(repeats):
        for name, side in sides.items():
            with ThreadCap(), warnings.catch_warnings():
                warnings.simplefilter("ignore")
                seconds, last[name] = side()
            runs[name].append(seconds)
    return runs, last


def objc_cv(checked, data, folds, values: list[float], score, tol: float = 1e-6,
            param_tol: float | None = 1e-6) -> tuple[float, dict]:
    """objc: fit_path on each training part, the held-out score of every point (one matrix product per
    part, as selection.evaluate_grid does), the refit, each fit certified to `tol` (and `param_tol`).
    Seconds, facts."""
    start = time.perf_counter()
    table = np.zeros((len(folds), len(values)))
    passes, screened, worst_gap, first = 0, 0, 0.0, None
    form = training.form_for(checked, data.input_names)
    parts = [(part(data, tr), part(data, te)) for tr, te in folds]
    # one X^T X of the table for every fold where the fits go the Gram way (paths.fold_caches)
    caches, whole = paths.fold_caches(checked, parts, {"lam": values[0]}, data)
    passes += 0 if whole is None else 1  # the held parts' sums read the table once
    for k, (train, held) in enumerate(parts):
        results = paths.fit_path(checked, train, {}, "lam", values, cache=caches[k], tol=tol, param_tol=param_tol)
        table[k] = score(held, training.scores_of_fits(form, [r.params for r in results], held.X, held.y))
        for r in results:
            passes += r.passes
            screened += len(r.extra.get("screening", {}).get("screened", []))
            worst_gap = max(worst_gap, float(r.certificate.relative))
        if k == 0:
            first = results
    best = int(np.argmin(table.mean(axis=0)))
    final = training.run_backend(checked, data, "numpy", {"lam": values[best]}, prepared=whole, tol=tol,
                                 param_tol=param_tol)
    seconds = time.perf_counter() - start
    return seconds, {"best": best, "passes": passes, "screened": screened, "worst_gap": worst_gap,
                     "first_fold": first, "final": final}


def objc_selection(checked, data, folds, values: list[float], tol: float = 1e-6,
                   param_tol: float | None = 1e-6) -> tuple[float, dict]:
    """objc as `objc sweep --folds` runs it: selection.evaluate_grid over the same folds (each part's rows
    copied by tables.split_rows, a path per part, every point scored on the held rows), the choice by the
    lowest mean, the refit on all rows. Seconds, facts."""
    start = time.perf_counter()
    assignment = np.empty(data.n_rows, dtype=np.int64)
    for k, (_tr, te) in enumerate(folds):
        assignment[te] = k
    plan = selection.Folds(len(folds), SEED, False, tuple(int(a) for a in assignment))
    parts = tuple(selection.fold_part(checked, data, plan, k) for k in range(plan.k))
    validation = selection.Validation("folds", f"{plan.k} bench folds", parts, plan, data)
    grid = selection.Grid((selection.Axis("lam", tuple(sorted(values)), "listed", "listed"),))
    outcome = selection.evaluate_grid(checked, validation, grid, {},
                                      selection.FitOptions(tol=tol, param_tol=param_tol))
    choice = selection.choose_point(outcome, "best")
    chosen = outcome.points[choice.index].setting["lam"]
    # the refit as selection.refit_chosen runs it: on the table's sums kept from the folds' (no X^T X)
    final = training.run_backend(checked, data, "numpy", {"lam": chosen}, tol=tol, param_tol=param_tol,
                                 prepared=outcome.refit_cache)
    seconds = time.perf_counter() - start
    worst = max(max(c for c in p.certificates) for p in outcome.points)
    return seconds, {"chosen": chosen, "worst_gap": worst, "final": final,
                     "passes": sum(sum(p.passes) for p in outcome.points), "warm_start": outcome.warm_start}


def squared_error(held, S: np.ndarray) -> np.ndarray:
    """The mean squared error of each column of scores S (one column per fit)."""
    return np.mean((held.y[:, None] - S) ** 2, axis=0)


def log_loss(held, S: np.ndarray) -> np.ndarray:
    """The mean logistic loss of each column of scores S (one column per fit)."""
    return np.mean(np.logaddexp(0.0, -held.y[:, None] * S), axis=0)


def choose_tol(candidates, measure) -> tuple[float, float, float]:
    """The largest tol whose worst measured relative gap is within objc's default 1e-6 (else the
    smallest): (tol, the worst gap, the worst proved distance) on fold 1's path."""
    for tol in candidates:
        gap, distance = measure(tol)
        print(f"  peer tol {tol:g}: worst relative gap on fold 1's path {gap:.2e}, worst proved distance to the "
              f"optimum {distance:.2e}", flush=True)
        if gap <= 1e-6:
            return tol, gap, distance
    return tol, gap, distance


def worst_certificate(checked, data, points) -> tuple[float, float]:
    """(worst relative gap, worst proved distance) by objc's evaluator over (lam, w, b) points."""
    worst_gap, worst_distance = 0.0, 0.0
    for lam, w, b in points:
        gap, _objective, distance = certify(checked, data, lam, w, b)
        worst_gap, worst_distance = max(worst_gap, gap), max(worst_distance, distance)
    return worst_gap, worst_distance


def matched_certificate(gap: float, distance: float) -> tuple[float, float | None]:
    """(tol, param_tol) objc is asked for to match the peer: the relative gap and the distance to the
    optimum that the peer's answers on fold 1's path are proved to reach (by objc's evaluator), the
    same certificate, not more. Where no distance is proved for the peer, no parameter tolerance."""
    param_tol = distance if math.isfinite(distance) and distance > 0 else None
    print(f"  objc is asked for what the peer's answers reach: tol {gap:.2e}, param_tol "
          f"{'none' if param_tol is None else f'{param_tol:.2e}'} (a second objc row runs at objc's default "
          "certificate, tol 1e-6 and param_tol 1e-6)", flush=True)
    return gap, param_tol


def spread(runs: list[float]) -> str:
    return f"{len(runs)} runs {min(runs):.2f} .. {max(runs):.2f}"


def lasso_case(n: int, p: int, points: int, repeats: int) -> None:
    from sklearn.linear_model import LassoCV, lasso_path
    X, y = make_data(n, p, "residual")
    checked = objc.check_text(spec_text("mean squared(y - s) + lam * l1(w)", False), "lasso_path.objc")
    data = bind(checked, X, y, False)
    folds = folds_of(n)
    start = paths.path_start(checked, data, {}, "lam")
    values = [float(v) for v in np.geomspace(start, 1e-3 * start, points)]
    print(f"\n### Lasso path: `mean squared(y - s) + lam * l1(w)` at {n} x {p}, {points} values of lam from "
          f"{start:.4g} (path start) to {values[-1]:.3g}, {FOLDS} folds\n", flush=True)
    train0 = part(data, folds[0][0])

    def measure(tol: float) -> tuple[float, float]:
        Xc, yc = train0.X - train0.X.mean(axis=0), train0.y - train0.y.mean()
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            _alphas, coefs, _gaps = lasso_path(Xc, yc, alphas=values, tol=tol, precompute=True)
        return worst_certificate(checked, train0, [
            (lam, coefs[:, i], float(train0.y.mean() - train0.X.mean(axis=0) @ coefs[:, i]))
            for i, lam in enumerate(values)])

    with ThreadCap():
        tol, gap, distance = choose_tol([1e-4, 1e-5, 1e-6, 1e-7, 1e-8], measure)
    ask_tol, ask_param = matched_certificate(gap, distance)
    with ThreadCap():
        objc_cv(checked, part(data, folds[0][0][:2000]), [(np.arange(1500), np.arange(1500, 2000))], values[:3],
                squared_error)  # emit and compile the module once, outside the timing (as a second run would)
    runs, last = alternate({
        "ours": lambda: objc_cv(checked, data, folds, values, squared_error, ask_tol, ask_param),
        "selection": lambda: objc_selection(checked, data, folds, values, ask_tol, ask_param),
        "default": lambda: objc_cv(checked, data, folds, values, squared_error),
        "peer": lambda: timed(lambda: LassoCV(alphas=values, cv=folds, tol=tol).fit(X, y))}, repeats)
    (ours_runs, sel_runs, default_runs, peer_runs) = (runs[k] for k in ("ours", "selection", "default", "peer"))
    ours, chosen_seconds, default_seconds, theirs = (float(np.median(r)) for r in
                                                     (ours_runs, sel_runs, default_runs, peer_runs))
    facts, chosen, default, peer = (last[k] for k in ("ours", "selection", "default", "peer"))
    peer_best = int(np.argmin(np.abs(np.asarray(peer.alphas_) - peer.alpha_)))
    peer_mse = peer.mse_path_.mean(axis=1)
    print("| side | seconds (median) | ratio objc/peer | chosen lam | note |\n|---|---:|---:|---:|---|")
    print(f"| objc fit_path x {FOLDS} folds + refit | {ours:.2f} | {ours / theirs:.2f} | {values[facts['best']]:.4g} | "
          f"{spread(ours_runs)}; worst relative gap {facts['worst_gap']:.1e} (tol {ask_tol:.2e}, param_tol "
          f"{'none' if ask_param is None else f'{ask_param:.2e}'}); "
          f"{facts['passes']} passes in all; {facts['screened']} input-fits screened out (Gap Safe) |")
    print(f"| objc selection.evaluate_grid (what `sweep --folds` runs) + refit | {chosen_seconds:.2f} | "
          f"{chosen_seconds / theirs:.2f} | {chosen['chosen']:.4g} | {spread(sel_runs)}; fold copies included; worst "
          f"relative gap {chosen['worst_gap']:.1e}; {chosen['passes']} passes by the grid's fits "
          f"({chosen['warm_start']}; the held parts' sums, one read of the table, and the refit are not counted) |")
    print(f"| objc fit_path x {FOLDS} folds + refit at objc's default certificate | {default_seconds:.2f} | "
          f"{default_seconds / theirs:.2f} | {values[default['best']]:.4g} | {spread(default_runs)}; worst relative gap "
          f"{default['worst_gap']:.1e} (tol 1e-6, param_tol 1e-6); {default['passes']} passes in all |")
    print(f"| sklearn LassoCV(tol={tol:g}) | {theirs:.2f} |  | {peer.alpha_:.4g} | {spread(peer_runs)}; worst relative "
          f"gap of a lasso_path on fold 1 at this tol, by objc's evaluator: {gap:.1e}, worst proved distance {distance:.1e} |")
    final_gap = certify(checked, data, peer.alpha_, peer.coef_, float(peer.intercept_))[0]
    same = peer.alpha_ == values[facts["best"]]
    diff = float(np.max(np.abs(peer.coef_ - facts["final"].params["w"]))) if same else float("nan")
    print(f"\nrefit at the chosen value: the peer's relative gap by objc's evaluator {final_gap:.1e}; "
          f"max |w_peer - w_objc| {diff:.1e}; the peer's mean held-out MSE at its choice {peer_mse[peer_best]:.5g}")


def logistic_case(n: int, p: int, points: int, repeats: int) -> None:
    from sklearn.linear_model import LogisticRegression, LogisticRegressionCV
    X, y = make_data(n, p, "margin")
    checked = objc.check_text(spec_text("mean logistic(y * s) + lam * l2sq(w)", True), "logistic_path.objc")
    data = bind(checked, X, y, True)
    folds = folds_of(n)
    n_train = len(folds[0][0])
    assert all(len(tr) == n_train for tr, _ in folds)
    Cs = np.logspace(-4, 4, points)
    values = [float(1.0 / (2.0 * C * n_train)) for C in Cs]  # C ascending = lam descending: a path from the top
    print(f"\n### logistic + L2 C path: `mean logistic(y * s) + lam * l2sq(w)` at {n} x {p}, {points} values of "
          f"C = logspace(-4, 4) (lam = 1 / (2 C n)), {FOLDS} folds\n", flush=True)
    train0 = part(data, folds[0][0])
    y01 = (y > 0).astype(int)

    def measure(tol: float) -> tuple[float, float]:
        model = LogisticRegression(C=Cs[0], tol=tol, max_iter=10000, warm_start=True)
        answers = []
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            for C, lam in zip(Cs, values):
                model.set_params(C=C)
                model.fit(train0.X, y01[folds[0][0]])
                answers.append((lam, model.coef_.ravel().copy(), float(model.intercept_[0])))
        return worst_certificate(checked, train0, answers)

    with ThreadCap():
        tol, gap, distance = choose_tol([1e-4, 1e-6, 1e-8, 1e-10], measure)
    ask_tol, ask_param = matched_certificate(gap, distance)
    with ThreadCap():
        objc_cv(checked, part(data, folds[0][0][:2000]), [(np.arange(1500), np.arange(1500, 2000))], values[:3],
                log_loss)
    runs, last = alternate({
        "ours": lambda: objc_cv(checked, data, folds, values, log_loss, ask_tol, ask_param),
        "default": lambda: objc_cv(checked, data, folds, values, log_loss),
        "peer": lambda: timed(lambda: LogisticRegressionCV(Cs=Cs, cv=folds, solver="lbfgs", tol=tol, max_iter=10000,
                                                           scoring="neg_log_loss").fit(X, y01))}, repeats)
    ours_runs, default_runs, peer_runs = (runs[k] for k in ("ours", "default", "peer"))
    ours, default_seconds, theirs = (float(np.median(r)) for r in (ours_runs, default_runs, peer_runs))
    facts, default, peer = (last[k] for k in ("ours", "default", "peer"))
    # the peer's fold paths, scored by objc's evaluator: coefs_paths_[class][fold, C, weights + intercept]
    paths_arr = next(iter(peer.coefs_paths_.values()))
    worst, worst_distance = worst_certificate(checked, train0, [
        (lam, paths_arr[0, i, :-1], float(paths_arr[0, i, -1])) for i, lam in enumerate(values)])
    print("| side | seconds (median) | ratio objc/peer | chosen C | note |\n|---|---:|---:|---:|---|")
    print(f"| objc fit_path x {FOLDS} folds + refit | {ours:.2f} | {ours / theirs:.2f} | {Cs[facts['best']]:.4g} | "
          f"{spread(ours_runs)}; worst relative gap {facts['worst_gap']:.1e} (tol {ask_tol:.2e}, param_tol "
          f"{'none' if ask_param is None else f'{ask_param:.2e}'}); "
          f"{facts['passes']} passes in all |")
    print(f"| objc fit_path x {FOLDS} folds + refit at objc's default certificate | {default_seconds:.2f} | "
          f"{default_seconds / theirs:.2f} | {Cs[default['best']]:.4g} | {spread(default_runs)}; worst relative gap "
          f"{default['worst_gap']:.1e} (tol 1e-6, param_tol 1e-6); {default['passes']} passes in all |")
    print(f"| sklearn LogisticRegressionCV(lbfgs, tol={tol:g}) | {theirs:.2f} |  | {float(peer.C_[0]):.4g} | "
          f"{spread(peer_runs)}; worst relative gap of its fold-1 path by objc's evaluator {worst:.1e}, worst proved "
          f"distance {worst_distance:.1e} |")


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--rows", type=int, default=100_000)
    ap.add_argument("--inputs", type=int, default=100)
    ap.add_argument("--cases", default="lasso,logistic")
    ap.add_argument("--repeats", type=int, default=3, help="runs of each side (the median is reported)")
    args = ap.parse_args(argv)
    load = os.getloadavg() if hasattr(os, "getloadavg") else None
    print(f"machine: {platform.platform()}, {os.cpu_count()} cores, Python {platform.python_version()}, "
          f"NumPy {np.__version__}; load average at start {load}")
    print("thread cap: every pool but NumPy at 1 thread (threadpoolctl), the same for both sides")
    cases = args.cases.split(",")
    if "lasso" in cases:
        lasso_case(args.rows, args.inputs, 50, args.repeats)
    if "logistic" in cases:
        logistic_case(args.rows, args.inputs, 20, args.repeats)
    if load is not None:
        print(f"\nload average at the end {os.getloadavg()}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
