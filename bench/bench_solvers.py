"""Speed of objc's NumPy backend against scikit-learn, SciPy and objc's cvxpy backend, same data, same run.

    .venv/bin/python bench/bench_solvers.py --quick        # small tables, one repeat
    .venv/bin/python bench/bench_solvers.py                # 1e4 x 100, 1e5 x 100, 1e6 x 50
    .venv/bin/python bench/bench_solvers.py --sizes 100000x100 --cases hinge_l2 --repeats 1

Each case runs at the tolerance its target names (relative gap 1e-8 for logistic, Lasso and Huber,
1e-6 for hinge and pinball); pinball runs at 1e4 rows only and hinge up to 1e5 unless named in
--cases (their peers' times grow fastest).

Every solver of a row runs on the same seeded table under the same thread settings (REFERENCE.md,
"Measuring speed": every BLAS/OpenMP pool but NumPy's capped at one thread, when threadpoolctl is
importable). Each solution is scored by the same evaluator (the generated module's own objective),
and the table prints median seconds, the ratio to objc's time, the relative objective gap against
the best solution found in the row, objc's passes over the data (each X @ v or X.T @ u counts one)
and objc's peak traced memory as a multiple of the data array. No timing is asserted anywhere.
"""

from __future__ import annotations

import argparse
import os
import platform
import statistics
import sys
import time
import tracemalloc
import warnings
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

import objc  # noqa: E402
from objc.backends import numpy_module as nm  # noqa: E402

try:
    from threadpoolctl import ThreadpoolController
except ImportError:  # pragma: no cover
    ThreadpoolController = None

CVXPY_MAX_ROWS = 10_000  # cvxpy's default solvers took 41-130 s at 1e5 rows (REFERENCE.md): skip above


class ThreadCap:
    """The cap the generated module applies to itself, applied to every side of a comparison."""

    def __enter__(self):
        self.limiter = None
        if ThreadpoolController is not None:
            c = ThreadpoolController()
            others = [lib.filepath for lib in c.lib_controllers if "numpy" not in str(lib.filepath)]
            if others:
                self.limiter = c.select(filepath=others).limit(limits=1)
        return self

    def __exit__(self, *exc):
        if self.limiter is not None:
            self.limiter.restore_original_limits()


def spec_text(goal: str, margin: bool, intercept: bool) -> str:
    target = "target y: yes -> +1, no -> -1" if margin else "target y"
    learn = "learn w over inputs, b" if intercept else "learn w over inputs"
    score = "score s = w . x + b" if intercept else "score s = w . x"
    return f'table t from "t.csv"\n  {target}\n  inputs all\n{learn}\n{score}\ngoal {goal}\n'


def make_data(n: int, p: int, kind: str, seed: int = 0):
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(n, p))
    w = rng.normal(size=p) * (rng.random(p) < 0.3)
    s = X @ w + 0.5
    if kind == "margin":
        y = np.where(s + rng.normal(size=n) > 0, 1.0, -1.0)
    else:
        y = s + rng.standard_t(3, size=n)
    return X, y


def timed(fn, repeats: int):
    times, out = [], None
    for _ in range(repeats):
        start = time.perf_counter()
        with ThreadCap():
            out = fn()
        times.append(time.perf_counter() - start)
    return statistics.median(times), out


class Evaluator:
    """The objective of a spec at any parameters, by the generated module (one pass)."""

    def __init__(self, checked, X, y, names):
        self.ns = nm.load_module(nm.emit_module(checked))
        self.pb = self.ns["build_problem"](self.ns["SPEC"], X, y, None, names)

    def __call__(self, w, b=None) -> float:
        theta = np.asarray(w, dtype=float) if b is None else np.append(w, b)
        return float(self.ns["objective_value"](self.pb, theta))


def case_rows(name, goal, margin, intercept, n, p, peers, repeats, tol, run_cvxpy):
    X, y = make_data(n, p, "margin" if margin else "residual")
    names = tuple(f"x{j}" for j in range(p))
    checked = objc.check_text(spec_text(goal, margin, intercept), f"{name}.objc")
    ev = Evaluator(checked, X, y, names)
    rows = []

    # the shipped module's solver is what is timed; emitting and compiling it is timed apart
    start = time.perf_counter()
    solve = nm.load_module(nm.emit_module(checked))["solve"]
    build_seconds = time.perf_counter() - start

    def ours():
        return solve(X, y, None, names, None, tol)

    tracemalloc.start()
    with ThreadCap():
        ours()
    peak = tracemalloc.get_traced_memory()[1]
    tracemalloc.stop()
    t, res = timed(ours, repeats)
    cert = res["certificate"]
    rows.append(("objc numpy", t, res["objective"], res["passes"], peak / X.nbytes,
                 f"{res['status']}; {cert['kind']} {cert['relative']:.1e} (tol {tol:g}); {_short(res['method'])}; "
                 f"emit+compile {build_seconds:.2f} s"))
    for label, fn in peers:
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                tp, params = timed(lambda: fn(X, y), repeats)
            rows.append((label, tp, ev(*params), None, None, ""))
        except Exception as err:  # a peer failing is a result to print, not a crash
            rows.append((label, float("nan"), float("nan"), None, None, f"failed: {type(err).__name__}: {err}"[:60]))
    if run_cvxpy and n <= CVXPY_MAX_ROWS:
        try:
            from objc.backends import cvxpy_problem
            tc, rc = timed(lambda: cvxpy_problem.fit(checked, X, y, None, names), 1)
            theta = [rc.params["w"]] + ([rc.params["b"]] if intercept else [])
            rows.append(("objc cvxpy", tc, ev(*theta), None, None, f"{rc.status}; {rc.method}"))
        except Exception as err:
            rows.append(("objc cvxpy", float("nan"), float("nan"), None, None, f"failed: {err}"[:60]))
    elif run_cvxpy:
        rows.append(("objc cvxpy", float("nan"), float("nan"), None, None, f"skipped above {CVXPY_MAX_ROWS} rows"))
    best = min(r[2] for r in rows if np.isfinite(r[2]))
    ours_t = rows[0][1]
    print(f"\n### {name}: `{goal}` at {n} x {p}\n")
    print("| solver | median s | ratio objc/peer | rel. objective gap to best | passes | peak mem / data | note |")
    print("|---|---:|---:|---:|---:|---:|---|")
    for label, t, obj, passes, mem, note in rows:
        ratio = "" if label == "objc numpy" or not np.isfinite(t) else f"{ours_t / t:.3f}"
        gap = (obj - best) / max(1.0, abs(best)) if np.isfinite(obj) else float("nan")
        print(f"| {label} | {t:.3f} | {ratio} | {gap:.1e} | {'' if passes is None else passes} | "
              f"{'' if mem is None else f'{mem:.2f}'} | {note} |")
    sys.stdout.flush()


def _short(method: str) -> str:
    """The method's name without its parenthesised details (an exact finish stays visible)."""
    out, depth = "", 0
    for ch in method:
        depth += ch == "("
        if depth == 0:
            out += ch
        depth -= ch == ")"
    return " ".join(out.split())[:90]


def peers_for(name, n, p, lam_or_alpha):
    from scipy.optimize import minimize
    from sklearn.linear_model import Lasso, LogisticRegression, QuantileRegressor
    from sklearn.svm import LinearSVC
    if name == "logistic_l2":
        # mean logistic + lam/2 ||w||^2  <->  C = 1/(n lam)
        return [("sklearn LogisticRegression(lbfgs, tol=1e-8)",
                 lambda X, y: (lambda m: (m.coef_.ravel(), float(m.intercept_[0])))(
                     LogisticRegression(C=1 / (n * lam_or_alpha), tol=1e-8, max_iter=10000).fit(X, y)))]
    if name == "hinge_l2":
        return [("sklearn LinearSVC(hinge, tol=1e-6)",
                 lambda X, y: (LinearSVC(loss="hinge", C=1 / (n * lam_or_alpha), fit_intercept=False, tol=1e-6,
                                         max_iter=1000, dual=True).fit(X, y).coef_.ravel(),))]
    if name == "lasso":
        return [("sklearn Lasso", lambda X, y: (lambda m: (m.coef_, float(m.intercept_)))(
            Lasso(alpha=lam_or_alpha).fit(X, y)))]
    if name == "pinball_l1":
        return [("sklearn QuantileRegressor(highs)", lambda X, y: (lambda m: (m.coef_, float(m.intercept_)))(
            QuantileRegressor(quantile=0.8, alpha=lam_or_alpha, solver="highs").fit(X, y)))]
    if name == "huber_l2":
        d = 1.35

        def hand(X, y):
            def f(theta):
                w, b = theta[:-1], theta[-1]
                r = y - X @ w - b
                a = np.abs(r)
                dr = np.clip(r, -d, d)
                value = np.where(a <= d, 0.5 * r * r, d * (a - 0.5 * d)).mean() + lam_or_alpha * w @ w
                return value, np.append(-X.T @ dr / len(y) + 2 * lam_or_alpha * w, -dr.mean())
            res = minimize(f, np.zeros(X.shape[1] + 1), jac=True, method="L-BFGS-B",
                           options={"maxiter": 10000})
            return res.x[:-1], float(res.x[-1])
        return [("scipy L-BFGS-B, hand-written gradient", hand)]
    raise KeyError(name)


CASES = [
    # name, goal, margin, intercept, parameter, largest row count to run it at, tolerance (the targets')
    ("logistic_l2", "mean logistic(y * s) + {h} * l2sq(w)", True, True, 1e-4, None, 1e-8),
    # not run at 1e6 rows by default: REFERENCE.md saw LinearSVC take 30 s at 1e5 rows on another table
    ("hinge_l2", "mean hinge(y * s) + {h} * l2sq(w)", True, False, 1e-4, 100_000, 1e-6),
    ("lasso", "mean squared(y - s) + {a} * l1(w)", False, True, 0.01, None, 1e-8),
    # QuantileRegressor(highs) takes 14-41 s already at 1e4 rows (REFERENCE.md): the first size only
    ("pinball_l1", "mean pinball(y - s, 0.8) + {a} * l1(w)", False, True, 0.01, 10_000, 1e-6),
    ("huber_l2", "mean huber(y - s, 1.35) + {a} * l2sq(w)", False, True, 1e-4, None, 1e-8),
]


def machine() -> str:
    import scipy
    mem = ""
    try:
        with open("/proc/meminfo") as f:
            mem = f.readline().split(":")[1].strip()
    except OSError:
        pass
    return (f"{platform.platform()}, {os.cpu_count()} cores (nproc), memory {mem}, Python {platform.python_version()}, "
            f"NumPy {np.__version__}, SciPy {scipy.__version__}")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="small tables, one repeat")
    parser.add_argument("--repeats", type=int, default=3)
    parser.add_argument("--sizes", default=None, help="e.g. 10000x100,100000x100")
    parser.add_argument("--cases", default=None, help="comma-separated case names")
    args = parser.parse_args()
    if args.sizes:
        sizes = [tuple(int(v) for v in s.split("x")) for s in args.sizes.split(",")]
    elif args.quick:
        sizes = [(2000, 20)]
    else:
        sizes = [(10_000, 100), (100_000, 100), (1_000_000, 50)]
    repeats = 1 if args.quick else args.repeats
    wanted = set(args.cases.split(",")) if args.cases else None
    print(f"machine: {machine()}")
    print(f"thread cap: {'every pool but NumPy at 1 thread (threadpoolctl)' if ThreadpoolController else 'none'}")
    for n, p in sizes:
        for name, goal, margin, intercept, value, max_rows, tol in CASES:
            if wanted and name not in wanted:
                continue
            if max_rows is not None and n > max_rows and not wanted:
                print(f"\n### {name} at {n} x {p}: skipped (run above {max_rows} rows only when named in --cases)")
                continue
            g = goal.format(h=value / 2, a=value)
            case_rows(name, g, margin, intercept, n, p, peers_for(name, n, p, value), repeats, tol, run_cvxpy=True)


if __name__ == "__main__":
    main()
