"""Tables read in chunks: a table larger than memory bound to a spec, and the data matrix solvers read
block by block.

`bind_in_chunks` reads a Parquet file or a folder of Parquet files (row group by row group, in file-name
order) or a `.npy` array (memory-mapped, a block of rows at a time) and binds each chunk with
`tables.bind_table`, so every data check and message is the in-memory one, rows numbered in the whole
table. The bound inputs go to a scratch file of float64 rows beside the system's temporary files (or in
`scratch_dir`); `standardize` takes its statistics in the same streaming pass (Chan, Golub & LeVeque 1983,
the pairwise update of means and sums of squared deviations) and a second pass scales the file in place.
The target, the weights and the row numbers stay in memory: three numbers a row.

Memory while binding: a chunk's copies within the budget, and one Parquet row group at a time (the least
a Parquet reader decodes; a file written with huge row groups needs that much).

`ChunkedRows` is that file as an n x p matrix: `X @ w`, `X.T @ u`, `X.T @ X`, row slices, row gathers and
column sums, each computed one block at a time in one reused buffer of at most `budget` bytes, so that
the solver's memory for the table does not grow with the rows (its per-row vectors do: a few float64 a
row). It never turns into an array whole (`np.asarray` of it raises), so a code path that would read the
table into memory fails loudly instead of quietly exceeding the budget.

| code | problem |
| --- | --- |
| T180 | a table read in chunks is not Parquet (a file or a folder) or `.npy` |
| T181 | the spec asks for what needs every row at once: a feature map (`onehot`, `spline`, `fourier`, ...), a `holdout` |
| T182 | the memory budget cannot hold one row of the table |
"""

from __future__ import annotations

import fnmatch
import mmap
import shutil
import tempfile
import weakref
from pathlib import Path
from typing import Callable, Iterator

import numpy as np
import pandas as pd

from objc import tables
from objc.diagnostics import SpecError
from objc.source_text import Span
from objc.typed_tree import TableBinding

DEFAULT_BUDGET = 256 << 20  # bytes of the table held at once while binding (and the most a block may take)
# a pass reads blocks of about 1 MB into one buffer, which then stays in the processor's cache for the product
# (measured at 2e6 x 50 from the system's file cache: X @ w 0.145 s in blocks of 1 MB, 0.153 s of 16 MB,
# 0.190 s of 256 MB; 0.115 s on the array in memory)
BLOCK_BYTES = 1 << 20
# a chunk of the source passes through pandas and bind_table as several copies of itself (the frame, the
# floats, the kept rows, the matrix): rows per chunk allow for that many
_BINDING_COPIES = 8


class RowTable:
    """What a solver reads of a table it never holds whole: n x p float64 by blocks of rows. Subclasses
    give `read`, `take`, `columns`, the products and `blocks`; indexing, `.T` and the refusal to become an
    array are shared."""

    ndim = 2
    dtype = np.dtype(np.float64)
    n: int
    p: int

    @property
    def shape(self) -> tuple[int, int]:
        return (self.n, self.p)

    def __array__(self, dtype=None, copy=None):
        raise TypeError(f"a table read in blocks ({self.n} x {self.p}) is read block by block, never into "
                        "memory whole")

    def __len__(self) -> int:
        return self.n

    def __getitem__(self, key):
        if isinstance(key, tuple):
            if len(key) != 2:
                raise IndexError("a table read in blocks takes [rows] or [rows, columns]")
            rows, cols = key
            if isinstance(rows, slice) and rows == slice(None):
                return self.columns(cols)
            return self[rows][:, cols]
        if isinstance(key, slice):
            first, last, step = key.indices(self.n)
            if step != 1:
                return self.take(np.arange(first, last, step))
            return self.read(first, last)
        if isinstance(key, (int, np.integer)):
            return self.take(np.asarray([key]))[0]
        key = np.asarray(key)
        if key.dtype == bool:
            key = np.flatnonzero(key)
        return self.take(key)

    def _checked_rows(self, rows) -> np.ndarray:
        rows = np.asarray(rows, dtype=np.intp).ravel()
        if rows.size and (rows.min() < -self.n or rows.max() >= self.n):
            raise IndexError(f"row index out of range for a table of {self.n} rows")
        return np.where(rows < 0, rows + self.n, rows)

    @property
    def T(self) -> "_TransposedRows":
        return _TransposedRows(self)

    # the subclasses' part
    def read(self, first: int, last: int) -> np.ndarray:
        raise NotImplementedError

    def take(self, rows, out: np.ndarray | None = None) -> np.ndarray:
        raise NotImplementedError

    def columns(self, cols) -> np.ndarray:
        raise NotImplementedError

    def transposed_product(self, u: np.ndarray) -> np.ndarray:
        raise NotImplementedError

    def gram(self) -> np.ndarray:
        raise NotImplementedError

    def centred_rows(self, center: np.ndarray | None, weights: np.ndarray | None = None
                     ) -> tuple[np.ndarray, np.ndarray | None]:
        """(||x_i - center||^2 for every row, X^T weights or None) in one pass."""
        raise NotImplementedError

    def sampled_gram(self, rows: np.ndarray | None, root: np.ndarray, center: np.ndarray | None
                     ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """(S^T S, S^T root, ||x_i - center||^2 per sampled row) with S = diag(root) (X_rows - 1 center^T), the
        rows `rows` (increasing; None: all): the solver's Hessian sample, read once."""
        raise NotImplementedError


def centred_block_sums(block: np.ndarray, center: np.ndarray | None, weights: np.ndarray | None
                       ) -> tuple[np.ndarray, np.ndarray | None]:
    """`centred_rows` of one block (also what a cluster's worker computes on its own)."""
    acc = None if weights is None else block.T @ weights
    shifted = block if center is None else block - center
    return np.einsum("ij,ij->i", shifted, shifted), acc


def sampled_block_gram(block: np.ndarray, root: np.ndarray, center: np.ndarray | None
                       ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """`sampled_gram` of the sampled rows `block` (a fresh array, changed in place)."""
    if center is not None:
        block -= center
    sq = np.einsum("ij,ij->i", block, block)
    block *= root[:, None]
    return block.T @ block, block.T @ root, sq


class _TransposedRows:
    """X.T of a `RowTable`, for `X.T @ u` (u of n rows, one or more columns) and `X.T @ X`."""

    ndim = 2

    def __init__(self, base: RowTable):
        self.base = base
        self.shape = (base.p, base.n)

    def __matmul__(self, u):
        if u is self.base:
            return self.base.gram()
        u = np.asarray(u, dtype=np.float64)
        if u.shape[0] != self.base.n:
            raise ValueError(f"matmul: the transpose of a {self.base.n}-row table times {u.shape[0]} rows")
        return self.base.transposed_product(u)


class ChunkedRows(RowTable):
    """An n x p float64 matrix stored as rows in a file, read one block of rows at a time."""

    def __init__(self, path: Path, n: int, p: int, budget: int = DEFAULT_BUDGET, owner_dir: Path | None = None):
        self.path, self.n, self.p = Path(path), int(n), int(p)
        self.budget = int(budget)
        self.block_rows = max(1, min(self.n, min(self.budget, BLOCK_BYTES) // max(1, 8 * self.p)))
        self._file = open(self.path, "rb", buffering=0)
        self._buffer = np.empty((self.block_rows, self.p))
        self.reads = 0  # blocks read, all passes
        if owner_dir is not None:  # the scratch folder goes when the matrix does (or at exit)
            weakref.finalize(self, _remove, self._file, owner_dir)

    def __repr__(self) -> str:
        return f"ChunkedRows({self.n} x {self.p}, blocks of {self.block_rows} rows, {self.path.name})"

    def _read_into(self, first: int, last: int, out: np.ndarray) -> np.ndarray:
        view = memoryview(out).cast("B")
        self._file.seek(8 * self.p * first)
        got = self._file.readinto(view)
        if got != 8 * self.p * (last - first):
            raise OSError(f"the scratch file {self.path} ended early (read {got} bytes of rows {first}..{last})")
        self.reads += 1
        return out

    def blocks(self) -> Iterator[tuple[int, int, np.ndarray]]:
        """(first, last, rows first..last-1): the block is the shared buffer, valid until the next one."""
        for first in range(0, self.n, self.block_rows):
            last = min(first + self.block_rows, self.n)
            yield first, last, self._read_into(first, last, self._buffer[:last - first])

    def read(self, first: int, last: int) -> np.ndarray:
        first, last = max(0, first), min(self.n, last)
        out = np.empty((max(0, last - first), self.p))
        return self._read_into(first, last, out) if last > first else out

    def take(self, rows, out: np.ndarray | None = None) -> np.ndarray:
        """The rows `rows` (any order, repeats allowed): each contiguous run read once, or whole blocks
        when the rows are spread thinly over many of them."""
        rows = self._checked_rows(rows)
        out = np.empty((rows.size, self.p)) if out is None else out
        if not rows.size:
            return out
        order = np.argsort(rows, kind="stable")
        sorted_rows = rows[order]
        breaks = np.flatnonzero(np.diff(sorted_rows) > 1) + 1
        starts = np.concatenate([[0], breaks])
        ends = np.concatenate([breaks, [rows.size]])
        if len(starts) <= 64 or len(starts) * 8 < self.n // self.block_rows + 1:
            for a, b in zip(starts, ends):
                lo, hi = int(sorted_rows[a]), int(sorted_rows[b - 1]) + 1
                run = self.read(lo, hi)
                out[order[a:b]] = run[sorted_rows[a:b] - lo]
            return out
        for first, last, block in self.blocks():
            a, b = np.searchsorted(sorted_rows, [first, last])
            if b > a:
                out[order[a:b]] = block[sorted_rows[a:b] - first]
        return out

    def columns(self, cols) -> np.ndarray:
        """Whole columns (one pass): an n-vector for one index, n x k for several."""
        one = isinstance(cols, (int, np.integer))
        picked = np.arange(self.p)[cols]
        out = np.empty((self.n,) + (() if one else (np.size(picked),)))
        for first, last, block in self.blocks():
            out[first:last] = block[:, picked]
        return out

    def __matmul__(self, v):
        v = np.asarray(v, dtype=np.float64)
        if v.shape[0] != self.p:
            raise ValueError(f"matmul: {self.n} x {self.p} table times a vector of {v.shape[0]}")
        out = np.empty((self.n,) + v.shape[1:])
        for first, last, block in self.blocks():
            np.matmul(block, v, out=out[first:last])
        return out

    def transposed_product(self, u: np.ndarray) -> np.ndarray:
        out = np.zeros((self.p,) + u.shape[1:])
        for first, last, block in self.blocks():
            out += block.T @ u[first:last]
        return out

    def gram(self) -> np.ndarray:
        G = np.zeros((self.p, self.p))
        for _first, _last, block in self.blocks():
            G += block.T @ block
        return G

    def weighted_square_sums(self, weights: np.ndarray) -> np.ndarray:
        """sum_i weights_i x_ij^2 for every column j (one pass)."""
        out = np.zeros(self.p)
        for first, last, block in self.blocks():
            out += np.einsum("ij,ij,i->j", block, block, weights[first:last])
        return out

    def squared_norm(self) -> float:
        total = 0.0
        for _first, _last, block in self.blocks():
            flat = block.ravel()
            total += float(np.dot(flat, flat))
        return total

    def centred_rows(self, center, weights=None):
        sq, acc = np.empty(self.n), None if weights is None else np.zeros(self.p)
        for first, last, block in self.blocks():
            sq[first:last], part = centred_block_sums(block, center, None if weights is None else weights[first:last])
            if part is not None:
                acc += part
        return sq, acc

    def sampled_gram(self, rows, root, center):
        k = self.n if rows is None else len(rows)
        M, h, sq = np.zeros((self.p, self.p)), np.zeros(self.p), np.empty(k)
        for first in range(0, k, self.block_rows):
            last = min(first + self.block_rows, k)
            block = self.read(first, last) if rows is None else self.take(rows[first:last])
            Mb, hb, sq[first:last] = sampled_block_gram(block, root[first:last], center)
            M += Mb
            h += hb
        return M, h, sq


def _remove(handle, folder: Path) -> None:
    try:
        handle.close()
    finally:
        shutil.rmtree(folder, ignore_errors=True)


def is_chunked(X: object) -> bool:
    return isinstance(X, RowTable)


# ---------------------------------------------------------------- the sources

def _source_chunks(path: Path, shown: str, where: tables._Where, span: Span, budget: int
                   ) -> tuple[list[str], int, Callable[[list[str]], Iterator[pd.DataFrame]]]:
    """(column names, rows in all, chunks(columns): the chunks as DataFrames of those columns) of a Parquet
    file or folder or a .npy."""
    name = path.name.lower()
    if name.endswith(".npy"):
        try:
            array = np.load(path, mmap_mode="r", allow_pickle=False)
        except (ValueError, OSError) as exc:
            reason = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
            if "pickle" in reason.lower():
                reason = "it is not a plain array file (objc never loads pickled Python objects)"
            raise where.error("T102", f"cannot read {tables._q(shown)} as npy: {reason}", span) from None
        if array.ndim != 2 or array.dtype.kind not in "biuf":
            raise where.error("T102", f"cannot read {tables._q(shown)} in chunks: it holds a "
                              f"{array.ndim}-D {array.dtype} array, not a 2-D numeric one", span)
        names = [f"c{j}" for j in range(array.shape[1])]

        def npy_chunks(columns: list[str]) -> Iterator[pd.DataFrame]:
            return _npy_chunks(array, columns, max(1, budget // (_BINDING_COPIES * 8 * max(1, len(columns)))))
        return names, int(array.shape[0]), npy_chunks
    if path.is_dir() or name.endswith((".parquet", ".pq")):
        import pyarrow.parquet as pq
        files = tables.parquet_dataset_files(path)
        if not files:
            raise where.error("T103", f"the folder {tables._q(shown)} holds no .parquet or .pq file", span)
        try:
            schemas = [pq.read_schema(f) for f in files]
            total = sum(pq.ParquetFile(f).metadata.num_rows for f in files)
        except (OSError, ValueError) as exc:
            raise where.error("T102", f"cannot read {tables._q(shown)} as Parquet: {str(exc).splitlines()[0]}",
                              span) from None
        names = list(schemas[0].names)
        tables.same_parquet_columns(path, shown, files, [list(s.names) for s in schemas], where, span)
        def parquet_chunks(columns: list[str]) -> Iterator[pd.DataFrame]:
            rows = max(1, budget // (_BINDING_COPIES * 8 * max(1, len(columns))))
            return _parquet_chunks(files, columns, rows, where, shown, span)
        return names, total, parquet_chunks
    raise where.error("T180", f"a table read in chunks (--engine chunks or cluster) is Parquet (a .parquet or .pq file, or a folder of them) "
                      f"or .npy, not {tables._q(shown)}", span,
                      "convert the table to Parquet, or train in memory (--engine memory)")


def _columns_read(binding: TableBinding, names: list[str], input_names: tuple[str, ...] | None,
                  need_target: bool) -> list[str]:
    """The columns of the source the binding can read, in the source's order: the target, the row weights,
    the inputs named or matched by a pattern, the columns a feature reads, those `except` names (a wide table
    is read a few columns at a time). Every column for `all`, or where a name is not in the source, so that
    the message about it (and its did-you-mean) is the in-memory one."""
    from objc.feature_formula import check_formula
    named = [binding.row_weight] + ([binding.target] if need_target else [])
    named += [e.text for e in binding.excluded] + [nm.id for f in binding.features for nm in check_formula(f.expr).reads]
    if input_names is not None:
        named += [n for n in input_names if n not in {f.name for f in binding.features}]
    else:
        for item in binding.inputs:
            if item.kind == "all":
                return list(names)
            if item.kind == "column":
                named.append(item.text)
            else:
                named += [c for c in names if fnmatch.fnmatchcase(c, item.text)]
    feature_names = {f.name for f in binding.features}
    wanted = {n for n in named if n is not None and n not in feature_names}
    if not wanted <= set(names):
        return list(names)
    return [c for c in names if c in wanted]


def _npy_chunks(array: np.memmap, names: list[str], rows: int) -> Iterator[pd.DataFrame]:
    handle = getattr(array, "_mmap", None)
    picked = [int(n[1:]) for n in names]  # the columns c0, c1, ... asked for
    every = picked == list(range(array.shape[1]))
    for first in range(0, array.shape[0], rows):
        block = np.array(array[first:first + rows] if every else array[first:first + rows, picked], dtype=np.float64)
        # the mapped pages stay in the system's file cache; dropping them from this process keeps its
        # resident memory at one block
        if handle is not None and hasattr(handle, "madvise") and hasattr(mmap, "MADV_DONTNEED"):
            handle.madvise(mmap.MADV_DONTNEED)
        yield pd.DataFrame(block, columns=names, copy=False)


def _parquet_chunks(files: list[Path], columns: list[str], rows: int, where: tables._Where, shown: str, span: Span
                    ) -> Iterator[pd.DataFrame]:
    import pyarrow.parquet as pq
    for f in files:
        try:
            # one row group at a time (the least Parquet decodes at once; iter_batches read a whole 1e6-row file
            # ahead, 490 MB, where this holds one group of 131072 rows), cut into chunks of `rows`
            handle = pq.ParquetFile(f)
            for group in range(handle.num_row_groups):
                table = handle.read_row_group(group, columns=columns)
                for batch in table.to_batches(max_chunksize=rows):
                    yield batch.to_pandas()
                del table
        except (OSError, ValueError) as exc:
            raise where.error("T102", f"cannot read {tables._q(str(f))} of {tables._q(shown)} as Parquet: "
                              f"{str(exc).splitlines()[0]}", span) from None


# ---------------------------------------------------------------- binding

class _Moments:
    """Streaming column means and sums of squared deviations (Chan, Golub & LeVeque 1983), and max |x|."""

    def __init__(self, p: int):
        self.count, self.mean, self.m2, self.top = 0, np.zeros(p), np.zeros(p), np.zeros(p)
        self.first: np.ndarray | None = None

    def add(self, X: np.ndarray) -> None:
        k = X.shape[0]
        if not k:
            return
        if self.first is None:
            self.first = X[0].copy()
        with np.errstate(over="ignore", invalid="ignore"):
            mean_k = X.mean(axis=0)
            m2_k = ((X - mean_k) ** 2).sum(axis=0)
            total = self.count + k
            delta = mean_k - self.mean
            self.mean = self.mean + delta * (k / total)
            self.m2 = self.m2 + m2_k + delta * delta * (self.count * k / total)
        self.top = np.maximum(self.top, np.max(np.abs(X), axis=0))
        self.count = total


def _refuse_whole_table_needs(binding: TableBinding, where: tables._Where) -> None:
    diags = []
    for m in binding.maps:
        diags.append(where.diag("T181", f"`{m.kind}` is fitted on every row of the table at once (its categories, "
                                "knots or draws), which a table read in chunks cannot give", m.span,
                                "compute the map's columns into the table, or train in memory (--engine memory)"))
    if binding.holdout is not None:
        diags.append(where.diag("T181", "a `holdout` draws its rows from the whole table at once, which a table read "
                                "in chunks cannot give", binding.holdout_span or binding.span,
                                "write the held-out rows to a table of their own and name it with `validate on`"))
    if diags:
        raise SpecError(tuple(diags))


def bind_in_chunks(binding: TableBinding, spec_dir: Path, task: tables.Task, *, source_name: str = "",
                   data_path: Path | None = None, standardization: tables.Standardization | None = None,
                   input_names: tuple[str, ...] | None = None, file_span: Span | None = None,
                   need_target: bool = True, both_classes: bool = True, budget: int = DEFAULT_BUDGET,
                   scratch_dir: Path | None = None, progress: Callable[[int, int | None], None] | None = None
                   ) -> tables.BoundData:
    """`tables.bind_table` for a table read in chunks: the same arguments (those that apply), the same
    checks and messages, and a `BoundData` whose X is a `ChunkedRows` of its own scratch file. `budget`
    bounds the bytes of the table held at once, while binding and in every pass after; `progress(rows
    read, rows in all or None)` is called after each chunk."""
    if data_path is not None:
        path, shown = Path(data_path), str(data_path)
    else:
        path, shown = Path(spec_dir) / binding.path, binding.path
    where = tables._Where(shown, source_name)
    span = file_span or binding.span
    if task == "multiclass":
        raise where.error("E409", "a table read in chunks holds +1/-1 or real targets; this one's target has classes",
                          binding.target_span or binding.span, "read it in memory (--engine memory)")
    if file_span is None:
        _refuse_whole_table_needs(binding, where)
    if not path.exists():
        raise where.error("T100", f"data file {tables._q(shown)} not found", span,
                          "check the path given with the command" if data_path is not None
                          else "paths in a spec are relative to the spec file's folder")
    names, total, open_chunks = _source_chunks(path, shown, where, span, budget)
    needed = _columns_read(binding, names, input_names, need_target)
    if budget < 8 * max(1, len(needed)) * _BINDING_COPIES:
        raise where.error("T182", f"a memory budget of {budget} bytes cannot hold one row of {tables._q(shown)} "
                          f"({len(needed)} columns) while it is bound", span, "give a budget of a megabyte or more")
    chunks = open_chunks(needed)
    folder = Path(tempfile.mkdtemp(prefix="objc-chunks-", dir=scratch_dir))
    matrix_path = folder / "rows.f64"
    try:
        return _bind_chunks(binding, spec_dir, task, source_name, path, shown, span, standardization, input_names,
                            need_target, both_classes, budget, chunks, total, matrix_path, folder, progress, where)
    except BaseException:
        shutil.rmtree(folder, ignore_errors=True)  # nothing half-written stays behind
        raise


def _bind_chunks(binding, spec_dir, task, source_name, path, shown, span, standardization, input_names,
                 need_target, both_classes, budget, chunks, total, matrix_path, folder, progress, where
                 ) -> tables.BoundData:
    # the target, weights and row numbers of every kept row, filled chunk by chunk (the sources know their
    # row count: no list of chunks to join, which would hold them twice)
    y_all, c_all, rows_all = np.empty(total), np.empty(total), np.empty(total, dtype=np.int64)
    first_row, n, first_bound = 0, 0, None
    dropped: list[np.ndarray] = []
    moments = None
    fit_stats = binding.standardize and standardization is None
    with open(matrix_path, "wb") as out:
        for frame in chunks:
            m = len(frame)
            part = tables.bind_table(binding, spec_dir, task, source_name=source_name, frame=frame,
                                     frame_label=shown, first_row=first_row, whole_table=False,
                                     need_target=need_target, both_classes=False, standardization=standardization,
                                     input_names=input_names if first_bound is None else first_bound.input_names,
                                     file_span=span, defer_standardize=True)
            if first_bound is None:
                first_bound = part
                moments = _Moments(part.n_inputs) if fit_stats else None
            if part.dropped:
                gone = np.setdiff1d(np.arange(first_row + 1, first_row + m + 1), part.rows, assume_unique=True)
                dropped.append(gone[:tables.MAX_ROWS_LISTED] if sum(map(len, dropped)) < tables.MAX_ROWS_LISTED
                               else gone[:0])
            X = np.ascontiguousarray(part.X, dtype=np.float64)
            if moments is not None:
                moments.add(X)
            out.write(memoryview(X).cast("B"))
            k = part.n_rows
            if n + k > total:
                raise where.error("T102", f"{tables._q(shown)} holds more rows than its metadata says ({total})", span)
            rows_all[n:n + k], y_all[n:n + k], c_all[n:n + k] = part.rows, part.y, part.weights
            n += k
            first_row += m
            if progress is not None:
                progress(first_row, total)
    if first_bound is None:
        raise where.error("T103", f"data file {tables._q(shown)} has no data rows", span)
    rows, y, c = rows_all[:n], y_all[:n], c_all[:n]
    p, n_all = first_bound.n_inputs, first_row
    if not n:
        raise SpecError((tables.no_row_left(where, binding),))
    diags = []
    if binding.row_weight is not None and not (c > 0).any():
        diags.append(tables.weights_all_zero(where, binding))
    if both_classes and task == "margin" and need_target:
        diags += [d for d in (tables.one_class(where, binding, y),) if d is not None]
    tables._raise_all(diags)
    warnings = [w for w in first_bound.warnings if w.code != "T191"]
    if n < n_all:
        listed = np.concatenate(dropped)
        warnings.append(where.diag("T191", f"dropped {n_all - n} of {n_all} rows of {tables._q(shown)} with missing "
                                   f"values ({tables._rows_text(listed)}{', ...' if n_all - n > len(listed) else ''})",
                                   binding.span, rows=True, severity="warning"))
    fitted = False
    if moments is not None:
        scales = np.sqrt(np.maximum(moments.m2, 0.0) / n)
        problems = tables.scale_problems(moments.mean, scales, moments.top)
        standardization = tables.stats_from_scales(first_bound.input_names, [span] * p, moments.mean, scales,
                                                   problems, moments.first, where)
        _scale_in_place(matrix_path, n, p, budget, np.asarray(standardization.means),
                        np.asarray(standardization.scales))
        fitted = True
    X = ChunkedRows(matrix_path, n, p, budget, owner_dir=folder)
    if c.size and bool(np.all(c == 1.0)):  # no row or class weights: one read-only view of 1 (no 8 bytes a row)
        c = np.broadcast_to(np.float64(1.0), (n,))
    _release_freed_memory()
    return tables.BoundData(X=X, y=tables._read_only(y), weights=c if c.strides == (0,) else tables._read_only(c),
                            input_names=first_bound.input_names,
                            target=first_bound.target, label_map=first_bound.label_map,
                            standardization=standardization if (fitted or standardization is not None) else None,
                            source=path, rows=tables._read_only(rows), task=task, dropped=n_all - n, file_label=shown,
                            standardization_fitted=fitted, warnings=tuple(warnings),
                            classes=first_bound.classes)


def _release_freed_memory() -> None:
    """Hand the chunks' freed memory back to the system before training: the allocators keep it (pyarrow's
    pool for the decoded row groups, C's heap for pandas' copies), 250-300 MB after binding 1e6 rows, which
    would stay in the process's resident memory through the fit."""
    try:
        import pyarrow
        pyarrow.default_memory_pool().release_unused()
    except (ImportError, AttributeError):
        pass
    try:
        import ctypes
        ctypes.CDLL("libc.so.6").malloc_trim(0)
    except (OSError, AttributeError):  # not glibc: nothing to ask
        pass


def _scale_in_place(path: Path, n: int, p: int, budget: int, means: np.ndarray, scales: np.ndarray) -> None:
    block_rows = max(1, min(n, budget // (8 * p)))
    buffer = np.empty((block_rows, p))
    with open(path, "r+b", buffering=0) as f:
        for first in range(0, n, block_rows):
            block = buffer[:min(first + block_rows, n) - first]
            f.seek(8 * p * first)
            f.readinto(memoryview(block).cast("B"))
            block -= means
            block /= scales
            f.seek(8 * p * first)
            f.write(memoryview(block).cast("B"))


def parse_budget(text: str) -> int:
    """'256M', '1G', '512k' or a number of bytes."""
    t = text.strip().upper().removesuffix("B")
    factor = {"K": 1 << 10, "M": 1 << 20, "G": 1 << 30}.get(t[-1:], 1)
    number = t[:-1] if t[-1:] in ("K", "M", "G") else t
    value = float(number)
    if not (value > 0 and np.isfinite(value)):
        raise ValueError(f"a memory budget must be a positive size, got {text!r}")
    return int(value * factor)
