"""Tables larger than memory: objc's chunked engine and its Dask cluster engine against the in-memory floor.

    .venv/bin/python bench/bench_out_of_core.py                      # 1e7 x 50 (4 GB), scaling 1e5 .. 1e7
    .venv/bin/python bench/bench_out_of_core.py --rows 1000000 --scaling 100000,1000000

What it measures, each in a child process of its own (so that its peak resident memory, VmHWM, is its
own), on one seeded Parquet dataset per size (files of 1e6 rows, row groups of 131072, columns x0 .. x49
drawn N(0, 1), a +1/-1 `label` from a logistic model and a real `amount` from a sparse linear one):

1. out of core: `bind_in_chunks` (one streaming pass over the Parquet files, every data check) and the
   NumPy backend's fit on the bound rows read block by block within `--budget`, for logistic + L2 and the
   Lasso form; seconds, passes, seconds per pass, peak memory;
2. the in-memory floor at the largest size, same run: the same rows made in memory by the same seeded
   generator, the time of one X @ w and one X.T @ u (the work of one pass with the table in memory) and
   objc's in-memory fit of the same spec on that array;
3. a LocalCluster (2 worker processes of one thread, loopback) at the largest size: the same binding,
   the rows handed to the workers, every pass a distributed reduction;
4. time against rows: the out-of-core fits at each `--scaling` size, seconds per pass per million rows.

The Parquet files and the scratch files go to a temporary folder (`--dir` to choose it), removed at the end.
"""

from __future__ import annotations

import argparse
import multiprocessing as mp
import os
import platform
import resource
import shutil
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

FILE_ROWS = 1_000_000
SEED = 11

CASES = {
    "logistic_l2": ("label", "mean logistic(y * s) + 5e-05 * l2sq(w)", 1e-8),
    "lasso": ("amount", "mean squared(y - s) + 0.01 * l1(w)", 1e-8),
}


def spec_text(case: str) -> str:
    target, goal, _tol = CASES[case]
    return (f'table t from "rows"\n  target {target}\n  inputs like "x*"\n'
            f"learn w over inputs, b\nscore s = w . x + b\ngoal {goal}\n")


def _file_rows(rows: int) -> list[int]:
    return [min(FILE_ROWS, rows - first) for first in range(0, rows, FILE_ROWS)]


def _block(k: int, m: int, cols: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """File k's rows: the same numbers whichever size asks for them."""
    rng = np.random.default_rng([SEED, k])
    X = rng.normal(size=(m, cols))
    w = np.random.default_rng(SEED).normal(size=cols) * 0.3
    w_sparse = np.where(np.arange(cols) % 3 == 0, w * 3.0, 0.0)
    p = 1.0 / (1.0 + np.exp(-(X @ w + 0.2)))
    label = np.where(rng.random(m) < p, 1.0, -1.0)
    amount = X @ w_sparse + 1.5 + rng.normal(size=m)
    return X, label, amount


def write_dataset(folder: Path, rows: int, cols: int) -> Path:
    import pyarrow as pa
    import pyarrow.parquet as pq
    folder.mkdir(parents=True)
    names = [f"x{j}" for j in range(cols)]
    for k, m in enumerate(_file_rows(rows)):
        X, label, amount = _block(k, m, cols)
        arrays = [pa.array(X[:, j]) for j in range(cols)] + [pa.array(label), pa.array(amount)]
        pq.write_table(pa.table(arrays, names=names + ["label", "amount"]), folder / f"part{k:03d}.parquet",
                       row_group_size=131072)
    return folder


def _pass_times(X, rows: int, cols: int) -> tuple[float, float]:
    """Median seconds of X @ w and of X.T @ u over three runs: the work of two passes."""
    w, u = np.random.default_rng(1).normal(size=cols), np.random.default_rng(2).normal(size=rows)
    times = []
    for _ in range(3):
        t0 = time.perf_counter()
        X @ w
        t1 = time.perf_counter()
        X.T @ u
        times.append((t1 - t0, time.perf_counter() - t1))
    return float(np.median([t[0] for t in times])), float(np.median([t[1] for t in times]))


def _peak_mb() -> float:
    """This process's peak resident memory: VmHWM, which starts afresh at exec (ru_maxrss of a spawned child
    can carry its parent's peak), else ru_maxrss."""
    try:
        for line in Path("/proc/self/status").read_text().splitlines():
            if line.startswith("VmHWM:"):
                return float(line.split()[1]) / 1024.0
    except OSError:
        pass
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0  # kB on Linux


def _checked(case: str, folder: Path):
    from objc.frontend import check_text
    spec = folder.parent / f"{case}.objc"
    spec.write_text(spec_text(case))
    return check_text(spec_text(case), source_name=str(spec)), spec


def child_chunks(case: str, folder: str, budget: int, scratch: str, queue) -> None:
    from objc import chunked_tables, training
    checked, _ = _checked(case, Path(folder))
    t0 = time.perf_counter()
    data = chunked_tables.bind_in_chunks(checked.spec.table, Path(folder).parent, training.task_of(checked),
                                         data_path=Path(folder), budget=budget,
                                         scratch_dir=Path(scratch))
    bind_s = time.perf_counter() - t0
    t0 = time.perf_counter()
    fit = training.run_backend(checked, data, "numpy", tol=CASES[case][2])
    fit_s = time.perf_counter() - t0
    peak = _peak_mb()  # the fit's: the products timed below allocate their own vectors
    matvec, rmatvec = _pass_times(data.X, data.n_rows, data.n_inputs)
    queue.put({"bind_s": bind_s, "fit_s": fit_s, "passes": fit.passes, "objective": fit.objective,
               "gap": fit.certificate.relative, "distance": fit.certificate.distance, "status": fit.status,
               "method": fit.method, "peak_mb": peak, "blocks": data.X.reads, "block_rows": data.X.block_rows,
               "rows": data.n_rows, "matvec_s": matvec, "rmatvec_s": rmatvec})


def child_memory(case: str, folder: str, rows: int, cols: int, queue) -> None:
    from objc.backends import numpy_module
    checked, _ = _checked(case, Path(folder))
    X = np.empty((rows, cols))
    y = np.empty(rows)
    first = 0
    for k, m in enumerate(_file_rows(rows)):
        Xk, label, amount = _block(k, m, cols)
        X[first:first + m], y[first:first + m] = Xk, (amount if case == "lasso" else label)
        first += m
    del Xk
    matvec, rmatvec = _pass_times(X, rows, cols)
    t0 = time.perf_counter()
    fit = numpy_module.fit(checked, X, y, np.ones(rows), tuple(f"x{j}" for j in range(cols)), tol=CASES[case][2])
    fit_s = time.perf_counter() - t0
    queue.put({"matvec_s": matvec, "rmatvec_s": rmatvec, "fit_s": fit_s, "passes": fit.passes,
               "objective": fit.objective, "gap": fit.certificate.relative, "peak_mb": _peak_mb(),
               "status": fit.status})


def child_cluster(case: str, folder: str, budget: int, scratch: str, queue) -> None:
    from objc import chunked_tables, cluster_rows, training
    checked, _ = _checked(case, Path(folder))
    client = cluster_rows.connect(cluster_rows.LOCAL, workers=2)
    try:
        t0 = time.perf_counter()
        data = chunked_tables.bind_in_chunks(checked.spec.table, Path(folder).parent, training.task_of(checked),
                                             data_path=Path(folder), budget=budget,
                                             scratch_dir=Path(scratch))
        data = cluster_rows.on_cluster(data, client)
        bind_s = time.perf_counter() - t0
        t0 = time.perf_counter()
        fit = training.run_backend(checked, data, "numpy", tol=CASES[case][2])
        fit_s = time.perf_counter() - t0
        queue.put({"bind_s": bind_s, "fit_s": fit_s, "passes": fit.passes, "reductions": data.X.passes,
                   "objective": fit.objective, "gap": fit.certificate.relative, "status": fit.status,
                   "peak_mb": _peak_mb()})
    finally:
        cluster_rows.close(client)


def run_child(target, *args) -> dict:
    ctx = mp.get_context("spawn")
    queue = ctx.Queue()
    proc = ctx.Process(target=target, args=args + (queue,))
    proc.start()
    out = queue.get()
    proc.join()
    return out


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--rows", type=int, default=10_000_000)
    ap.add_argument("--cols", type=int, default=50)
    ap.add_argument("--scaling", default="100000,1000000,10000000", help="row counts for time against rows")
    ap.add_argument("--budget", default="256M", help="the chunked engine's memory budget")
    ap.add_argument("--cases", default="logistic_l2,lasso")
    ap.add_argument("--skip", default="", help="comma list of: memory, cluster, scaling")
    ap.add_argument("--dir", help="folder for the Parquet and scratch files (default: a temporary one)")
    args = ap.parse_args()
    from objc.chunked_tables import parse_budget
    budget = parse_budget(args.budget)
    cases = [c for c in args.cases.split(",") if c]
    skip = set(filter(None, args.skip.split(",")))
    sizes = sorted({int(s) for s in args.scaling.split(",") if s} | {args.rows})
    if "scaling" in skip:
        sizes = [args.rows]
    root = Path(tempfile.mkdtemp(prefix="objc-bench-ooc-", dir=args.dir))
    import numpy
    import pyarrow
    print(f"machine: {platform.platform()}, {os.cpu_count()} cores, Python {platform.python_version()}, "
          f"NumPy {numpy.__version__}, pyarrow {pyarrow.__version__}; budget {args.budget} ({budget} bytes)")
    try:
        datasets = {}
        for n in sizes:
            t0 = time.perf_counter()
            datasets[n] = write_dataset(root / f"rows_{n}" / "rows", n, args.cols)
            size_gb = sum(f.stat().st_size for f in datasets[n].iterdir()) / 1e9
            print(f"dataset {n} x {args.cols}: {size_gb:.2f} GB of Parquet, written in {time.perf_counter() - t0:.1f} s")
        scratch = root / "scratch"
        scratch.mkdir()
        for case in cases:
            print(f"\n### {case}: `{CASES[case][1]}`, relative gap {CASES[case][2]:g}, {args.cols} inputs\n")
            print("| engine | rows | bind s | fit s | passes | fit s / pass | s / pass / 1e6 rows | peak MB | "
                  "status, gap, distance |")
            print("|---|---:|---:|---:|---:|---:|---:|---:|---|")
            results = {}
            for n in sizes:
                r = run_child(child_chunks, case, str(datasets[n]), budget, str(scratch))
                results[n] = r
                per = r["fit_s"] / max(1, r["passes"])
                dist = "none" if r["distance"] is None else f"{r['distance']:.1e}"
                print(f"| chunks | {n} | {r['bind_s']:.2f} | {r['fit_s']:.2f} | {r['passes']} | {per:.3f} | "
                      f"{per / (n / 1e6):.3f} | {r['peak_mb']:.0f} | {r['status']}, {r['gap']:.1e}, {dist} |",
                      flush=True)
            big = results[args.rows]
            if "memory" not in skip:
                m = run_child(child_memory, case, str(datasets[args.rows]), args.rows, args.cols)
                per = m["fit_s"] / max(1, m["passes"])
                print(f"| memory (objc fit on the array) | {args.rows} | | {m['fit_s']:.2f} | {m['passes']} | {per:.3f} "
                      f"| {per / (args.rows / 1e6):.3f} | {m['peak_mb']:.0f} | {m['status']}, {m['gap']:.1e} |")
                floor = m["matvec_s"] + m["rmatvec_s"]
                chunked = big["matvec_s"] + big["rmatvec_s"]
                print(f"\nat {args.rows} rows, two passes (X @ w + X.T @ u): in memory {m['matvec_s']:.3f} + "
                      f"{m['rmatvec_s']:.3f} = {floor:.3f} s (the floor), out of core {big['matvec_s']:.3f} + "
                      f"{big['rmatvec_s']:.3f} = {chunked:.3f} s: ratio **{chunked / floor:.2f}**. Whole fits: "
                      f"out of core {big['fit_s']:.2f} s over in memory {m['fit_s']:.2f} s = "
                      f"**{big['fit_s'] / m['fit_s']:.2f}** (the same {big['passes']} / {m['passes']} passes); "
                      f"objectives {big['objective']:.12g} / {m['objective']:.12g}")
            if "cluster" not in skip:
                c = run_child(child_cluster, case, str(datasets[args.rows]), budget, str(scratch))
                per = c["fit_s"] / max(1, c["passes"])
                print(f"\n| cluster (LocalCluster, 2 workers) | {args.rows} | {c['bind_s']:.2f} | {c['fit_s']:.2f} | "
                      f"{c['passes']} ({c['reductions']} reductions) | {per:.3f} | {per / (args.rows / 1e6):.3f} | "
                      f"{c['peak_mb']:.0f} (client) | {c['status']}, {c['gap']:.1e} |")
                print(f"cluster objective {c['objective']:.12g} against out of core {big['objective']:.12g}")
            if len(sizes) > 1:
                first = results[sizes[0]]
                slope = [(results[n]["fit_s"] / results[n]["passes"]) / (n / 1e6) for n in sizes]
                print(f"\ntime against rows: s / pass / 1e6 rows {' -> '.join(f'{s:.3f}' for s in slope)} "
                      f"({sizes[0]} -> {sizes[-1]} rows; linear growth keeps it flat); bind s / 1e6 rows "
                      + " -> ".join(f"{results[n]['bind_s'] / (n / 1e6):.2f}" for n in sizes)
                      + f" (first {first['bind_s']:.2f} s)")
    finally:
        shutil.rmtree(root, ignore_errors=True)


if __name__ == "__main__":
    main()
