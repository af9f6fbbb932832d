"""Speed of objc's NumPy multiclass solver against scikit-learn and objc's cvxpy backend, same data, same run.

    .venv/bin/python bench/bench_multiclass.py                    # softmax 1e5 x 100 x 10, hinge 1e4 x 100 x 10
    .venv/bin/python bench/bench_multiclass.py --quick            # 1e4-row softmax, 2e3-row hinge
    .venv/bin/python bench/bench_multiclass.py --skip softmax --cvxpy-rows 10000   # the issue's 1e4-row ratio

softmax_ce + l2sq (C = 1: rho_i = 1, l2sq coefficient 1/2, free intercept): scikit-learn's
LogisticRegression(lbfgs) runs at several of its own tolerances; each of its answers is certified by
objc's evaluator (`multiclass_gap`, the duality gap at its point), and objc then runs to that same
relative gap, so both sides reach the same certified tolerance. The ratio is objc's seconds over the peer's.

cs_hinge / ww_hinge + l2sq (no intercept): objc at relative gap 1e-6 (or its --hinge-passes budget) against objc's cvxpy
backend on the same spec (the problem it builds, build time included, solved by Clarabel at its default
tolerances, about 1e-8). cvxpy is run once per loss, at --cvxpy-rows: 1000 by default, the largest size at which
it stays under a minute on the 2-core benchmark machine (17-29 s there; 38-100 s at 2000 rows, 180-376 s at 1e4),
so that a full benchmark stays under 15 minutes; the 1e4-row ratio the target names is a separate run.

Thread caps: every BLAS/OpenMP pool but NumPy's limited to one thread on every side (REFERENCE.md,
"Measuring speed"), when threadpoolctl is importable. No timing is asserted anywhere.
"""

from __future__ import annotations

import argparse
import os
import platform
import sys
import time
import warnings
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from objc import check_text  # noqa: E402
from objc.backends import cvxpy_problem  # noqa: E402
from objc.backends.numpy_multiclass_src import multiclass_gap, solve_multiclass  # noqa: E402
from objc.catalog import _k_mc_cs_hinge, _k_mc_ww_hinge  # noqa: E402

from bench_solvers import ThreadCap  # noqa: E402  (one cap for every bench, bench/ is on the path)


def table(n: int, p: int, K: int, seed: int = 0) -> tuple[np.ndarray, np.ndarray]:
    """An invented table: Gaussian inputs, classes drawn from a softmax of a random linear score."""
    rng = np.random.default_rng(seed)
    X = rng.standard_normal((n, p))
    S = X @ (0.3 * rng.standard_normal((p, K))) + rng.gumbel(size=(n, K))
    return X, np.argmax(S, axis=1)


def timed(fn):
    start = time.perf_counter()
    out = fn()
    return time.perf_counter() - start, out


def bench_softmax(n: int, p: int, K: int, tols: list[float]) -> list[str]:
    from sklearn.linear_model import LogisticRegression
    X, y = table(n, p, K)
    rho = np.ones(n)
    pen = [("l2sq", 0.5)]
    lines = [f"### softmax_ce + l2sq (C = 1, free intercept) at {n} x {p} x {K} classes", "",
             "| peer tol | peer s | peer certified gap | objc s | objc gap | objc passes | ratio objc/peer |",
             "|---:|---:|---:|---:|---:|---:|---:|"]
    for tol in tols:
        def peer():
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                return LogisticRegression(C=1.0, tol=tol, max_iter=100000).fit(X, y)
        with ThreadCap():
            t_peer, m = timed(peer)
            _P, gap = multiclass_gap(X, y, K, rho, "softmax_ce", pen, True, m.coef_.T, m.intercept_)
            t_objc, r = timed(lambda: solve_multiclass(X, y, K, rho, "softmax_ce", pen, True, tol=gap))
        lines.append(f"| {tol:g} | {t_peer:.2f} | {gap:.2e} | {t_objc:.2f} | {r['gap']:.2e} | {r['passes']} | "
                     f"{t_objc / t_peer:.2f} |")
        print(lines[-1], flush=True)
    return lines


def _cvxpy_backend_hinge(X, y, K, loss):
    """The same goal on objc's cvxpy backend (the problem it builds from the spec, solved by Clarabel at its
    defaults): (objective, W)."""
    names = [f"x{j}" for j in range(X.shape[1])]
    text = (f'table t from "t.csv"\n  target c classes {", ".join(f"k{k}" for k in range(K))}\n'
            f"  inputs {', '.join(names)}\nlearn W over inputs by classes\nscore s = W . x\n"
            f"goal sum {loss}(s, y) + 0.5 * l2sq(W)\n")
    checked = check_text(text, "bench_hinge.objc")
    built = cvxpy_problem.build_problem(checked, X, np.asarray(y, dtype=np.float64), None, names)
    result = cvxpy_problem.solve_build(built, solver="CLARABEL")
    return result.objective, np.asarray(result.params["W"])


def bench_hinge(n: int, n_cvxpy: int, p: int, K: int, tol: float, max_passes: int) -> list[str]:
    lines = [f"### multiclass hinges + l2sq (C = 1, no intercept), p = {p}, K = {K}; objc at relative gap {tol:g}", "",
             "| loss | rows | side | seconds | objective | note |", "|---|---:|---|---:|---:|---|"]
    for loss in ("cs_hinge", "ww_hinge"):
        kern = _k_mc_cs_hinge if loss == "cs_hinge" else _k_mc_ww_hinge
        for rows in sorted({n, n_cvxpy}):
            X, y = table(rows, p, K, seed=1)
            with ThreadCap():
                t_objc, r = timed(lambda: solve_multiclass(X, y, K, np.ones(rows), loss, [("l2sq", 0.5)], False,
                                                           tol=tol, max_passes=max_passes))
            lines.append(f"| {loss} | {rows} | objc | {t_objc:.2f} | {r['objective']:.10g} | gap {r['gap']:.1e}, "
                         f"{r['passes']} passes, {r['status']} |")
            print(lines[-1], flush=True)
            if rows == n_cvxpy:
                with ThreadCap():
                    t_cvx, (value, W) = timed(lambda: _cvxpy_backend_hinge(X, y, K, loss))
                check = float(np.sum(kern(X @ W, y)) + 0.5 * np.sum(W * W))
                lines.append(f"| {loss} | {rows} | objc's cvxpy backend + Clarabel | {t_cvx:.2f} | {check:.10g} | "
                             f"ratio objc/cvxpy {t_objc / t_cvx:.3f} |")
                print(lines[-1], flush=True)
    return lines


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--quick", action="store_true")
    ap.add_argument("--softmax-rows", type=int, default=100_000)
    ap.add_argument("--hinge-rows", type=int, default=10_000)
    ap.add_argument("--cvxpy-rows", type=int, default=1_000)
    ap.add_argument("--hinge-passes", type=int, default=1000, help="objc's pass budget on the hinges")
    ap.add_argument("--skip", choices=("softmax", "hinge"), default=None)
    a = ap.parse_args()
    if a.quick:
        a.softmax_rows, a.hinge_rows, a.cvxpy_rows = 10_000, 2_000, 1_000
    load = os.getloadavg()[0] if hasattr(os, "getloadavg") else float("nan")
    print(f"machine: {platform.machine()} {platform.processor() or ''}, {os.cpu_count()} cores, "
          f"python {platform.python_version()}, numpy {np.__version__}, load {load:.2f}")
    if a.skip != "softmax":
        bench_softmax(a.softmax_rows, 100, 10, [1e-4, 1e-6, 1e-8])
    if a.skip != "hinge":
        bench_hinge(a.hinge_rows, a.cvxpy_rows, 100, 10, 1e-6, a.hinge_passes)


if __name__ == "__main__":
    main()
