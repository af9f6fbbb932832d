"""Reading tables and binding their columns to a spec's inputs, target and weights: all data checks.

This is the only module that opens data files. `read_table` turns a file into named columns;
`bind_table` turns those columns, by a spec's `TableBinding`, into the arrays a solver needs
(`BoundData`); `split_holdout` carves a seeded held-out part off them.

File formats, chosen by the file's suffix:

| suffix | how it is read |
| --- | --- |
| `.csv` (also `.csv.gz`, `.csv.bz2`, `.csv.xz`, `.csv.zip`), `.tsv` | `pandas.read_csv`; the first line holds the column names |
| `.npy` | one 2-D numeric array; its columns are named `c0`, `c1`, ... |
| `.npz` | either exactly two arrays, `data` (2-D) and `columns` (1-D strings, one name per column of `data`), or else one 1-D array per column, named by its key, all of one length, in archive order |
| `.parquet`, `.pq` | `pandas.read_parquet` (pyarrow) |
| a folder | a Parquet dataset: every `.parquet`/`.pq` file under it, in path order, one table (same columns in each) |

Nothing pickled is ever loaded, and column names are only ever compared as strings, so a name that
looks like code stays a name. Row numbers in messages count data records from 1; a CSV header line
is not counted.

Every problem is a `SpecError` whose diagnostics point at the spec clause involved (the `table`
line for file problems, the `inputs` item for an input column, the `target` clause, ...), name the
file and column, and list the first offending rows (at most five). Checks run in stages (names,
types, missing values, labels and weights, derived features, standardization); every problem of a
stage is reported together.

| code | problem |
| --- | --- |
| T100 | the data file does not exist |
| T101 | the file's suffix names no format objc reads |
| T102 | the file exists but cannot be read as its format says (bad CSV, pickled or non-2-D array, ...) |
| T103 | the table has no rows or no columns |
| T104 | two columns share a name |
| T110 | a column named in the spec (or the model's input schema) is not in the table (nor made by a feature map) |
| T111 | an input pattern, or `all`, selects no column; or every input was excluded |
| T112 | an input, feature, row-weight column, or a column under a numeric feature map, is not numeric |
| T113 | the target or the row-weight column is also named as an input |
| T114 | a derived feature's name is taken (a table column, an input or another feature) |
| T120 | missing (NaN) or infinite values while `missing fail` is in force |
| T121 | no row is left once rows with missing values are dropped |
| T130 | a target value the label map does not list |
| T131 | a margin target without a label map holds values other than -1 and +1 |
| T132 | a margin target has only one class |
| T133 | a residual (real) target is not numeric |
| T134 | the label map itself is wrong (a label other than +1/-1, one value mapped twice, a map on a real target) |
| T140 | negative row weights |
| T141 | every row weight is zero |
| T142 | class weights that cannot apply (real target, label other than +1/-1, weight negative or not finite) |
| T150 | a constant input column under `standardize` |
| T151 | saved standardization stats lack an input, or hold an unusable scale |
| (E217-E239) | a derived feature built outside a spec (the Python API) breaks the formula rules: the resolver's codes, from objc/feature_formula.py |
| T161 | a derived feature, or an input a feature map makes, is NaN or infinite on some rows (log of 0, division by 0, an overflowing power) |
| T163 | a `onehot` column holds one category only on the training rows |
| T164 | a `onehot` column holds a category not seen in training (under `unseen fail`, the default) |
| T165 | the knots of a `spline` collapse on the training rows (two meet, or one sits at an end of the column) |
| T166 | a feature map makes an input whose name is already a column or an input, or one a saved model would read back as another category or knot (docs/language.md, section 6a) |
| T170 | a holdout fraction outside (0, 1), or one that leaves a part empty |
| T171 | the training part of a holdout split holds only one class |
| T190 | (warning) `all` passed over non-numeric columns |
| T191 | (warning) rows dropped under `missing drop` |
"""

from __future__ import annotations

import difflib
import fnmatch
import re
import warnings
import zipfile
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Literal, Mapping, Sequence

import numpy as np
import pandas as pd

from objc.cells import MISSING_CELLS
from objc.diagnostics import Diagnostic, SpecError
from objc.feature_formula import check_formula, evaluate
from objc.source_text import NO_SPAN, Span
from objc.typed_tree import (DerivedFeature, LabelMap, TableBinding, map_exponents, map_knot_name, map_knot_of,
                              map_product_name)

Task = Literal["margin", "residual", "multiclass"]

MAX_ROWS_LISTED = 5
_ROW_NOTE = "rows count data records from 1 (a CSV header line is not counted)"
_THOUSANDS = re.compile(r"[-+]?\d{1,3}([,.' ]\d{3})+([.,]\d+)?")
_CSV_SUFFIXES = (".csv", ".csv.gz", ".csv.bz2", ".csv.xz", ".csv.zip")


# ---------------------------------------------------------------- results

@dataclass(frozen=True)
class Standardization:
    """Per-input centre and scale: x' = (x - mean) / scale, matched to inputs by name."""

    names: tuple[str, ...]
    means: tuple[float, ...]
    scales: tuple[float, ...]

    def as_dict(self) -> dict[str, list]:
        """Plain lists, ready for a JSON model file."""
        return {"names": list(self.names), "means": list(self.means), "scales": list(self.scales)}

    @staticmethod
    def from_dict(d: Mapping[str, Sequence]) -> "Standardization":
        return Standardization(tuple(str(n) for n in d["names"]), tuple(float(m) for m in d["means"]),
                               tuple(float(s) for s in d["scales"]))


@dataclass(frozen=True, eq=False)
class BoundData:
    """A table bound to a spec: what a solver reads. Arrays are read-only."""

    X: np.ndarray  # n x p float64, C-contiguous, already standardized when `standardization` is set
    y: np.ndarray  # (n,) float64: +1/-1 for margin tasks, real for residual ones (NaN when no target)
    weights: np.ndarray  # (n,) float64: row weight times class weight, ones when neither is given
    input_names: tuple[str, ...]  # the columns of X, plain inputs first, then derived features
    target: str | None
    label_map: LabelMap | None  # the map applied to the target (None: the target held -1/+1 itself)
    standardization: Standardization | None
    source: Path
    rows: np.ndarray  # (n,) int64: the original 1-based data row of each row kept
    task: Task
    dropped: int = 0  # rows removed under `missing drop`
    file_label: str = ""  # the file as the user wrote it, for messages
    standardization_fitted: bool = False  # stats computed from these rows (not applied from a model)
    warnings: tuple[Diagnostic, ...] = ()
    unscaled: tuple[str, ...] = ()  # inputs `standardize` leaves as they are (onehot's 0/1 indicators)
    maps: tuple[dict, ...] = ()  # each feature map's fitted state as plain data (categories, knots, draws)
    classes: tuple[str | float, ...] = ()  # multiclass: the class labels in order; y holds 0 .. K-1
    # `standardize` still to be fitted: X is as read, and the split that follows (split_rows) fits the
    # statistics on its training part alone and applies them to both parts
    standardize_pending: bool = False

    @property
    def n_rows(self) -> int:
        return int(self.X.shape[0])

    @property
    def n_inputs(self) -> int:
        return int(self.X.shape[1])


# ---------------------------------------------------------------- message helpers

def _q(name: object) -> str:
    """A column or file name quoted on one line, whatever characters it holds."""
    return repr(str(name))


def _value(v: object) -> str:
    if isinstance(v, (float, np.floating)):
        return f"{float(v):g}"
    if isinstance(v, (int, np.integer, bool, np.bool_)):
        return str(v)
    text = repr(str(v))  # a cell of text: shown whole unless it is long
    return text if len(text) <= 40 else text[:37] + "..."


def _spec_literal(v: object) -> str:
    """A table value written as the spec would write it in a label map."""
    if isinstance(v, (bool, np.bool_)):
        return "true" if v else "false"
    if isinstance(v, (int, float, np.integer, np.floating)):
        return f"{float(v):g}"
    text = str(v)
    return text if text.isidentifier() else '"' + text.replace("\\", "\\\\").replace('"', '\\"') + '"'


def _rows_text(rows: np.ndarray) -> str:
    """'row 3', 'rows 3, 7, 9' or 'rows 3, 7, 9, 12, 15, ... (9 rows in all)'."""
    rows = [int(r) for r in np.asarray(rows).ravel()]
    if len(rows) == 1:
        return f"row {rows[0]}"
    shown = ", ".join(str(r) for r in rows[:MAX_ROWS_LISTED])
    if len(rows) <= MAX_ROWS_LISTED:
        return f"rows {shown}"
    return f"rows {shown}, ... ({len(rows)} rows in all)"


def _did_you_mean(name: str, candidates: Sequence[str]) -> str:
    close = difflib.get_close_matches(name, list(candidates), n=3, cutoff=0.6)
    if close:
        return "did you mean " + " or ".join(_q(c) for c in close) + "?"
    listed = ", ".join(_q(c) for c in list(candidates)[:10])
    more = ", ..." if len(candidates) > 10 else ""
    return f"the columns are {listed}{more}" if listed else "the table has no columns"


@dataclass(frozen=True)
class _Where:
    """Who is reporting: the file as written and the spec's name."""

    file: str
    source_name: str

    def diag(self, code: str, message: str, span: Span | None, hint: str = "", rows: bool = False,
             severity: Literal["error", "warning"] = "error") -> Diagnostic:
        notes = (_ROW_NOTE,) if rows else ()
        return Diagnostic(code, message, span or NO_SPAN, severity, hint, notes, self.source_name)

    def error(self, code: str, message: str, span: Span | None, hint: str = "", rows: bool = False) -> SpecError:
        return SpecError((self.diag(code, message, span, hint, rows),))


def _raise_all(diags: list[Diagnostic]) -> None:
    if diags:
        raise SpecError(tuple(diags))


# ---------------------------------------------------------------- reading

def read_table(path: Path, *, span: Span, source_name: str) -> dict[str, np.ndarray]:
    """Every column of a data file by name, in file order; text columns stay object arrays."""
    return _read(Path(path), str(path), span, source_name, "check the path")


def _format_of(path: Path) -> str | None:
    name = path.name.lower()
    if name.endswith(_CSV_SUFFIXES):
        return "csv"
    if name.endswith(".tsv"):
        return "tsv"
    if name.endswith(".npy"):
        return "npy"
    if name.endswith(".npz"):
        return "npz"
    if name.endswith((".parquet", ".pq")):
        return "parquet"
    return None


def _read(path: Path, shown: str, span: Span, source_name: str, not_found_hint: str) -> dict[str, np.ndarray]:
    where = _Where(shown, source_name)
    if not path.exists():
        raise where.error("T100", f"data file {_q(shown)} not found", span, not_found_hint)
    if path.is_dir():
        return _read_parquet_folder(path, shown, where, span)
    kind = _format_of(path)
    if kind is None:
        raise where.error("T101", f"cannot tell the format of {_q(shown)} from its name", span,
                          "use a .csv, .tsv, .npy, .npz, .parquet or .pq file")
    try:
        if kind in ("csv", "tsv"):
            columns = _read_csv(path, "\t" if kind == "tsv" else ",", where, span)
        elif kind == "npy":
            columns = _read_npy(path, where, span)
        elif kind == "npz":
            columns = _read_npz(path, where, span)
        else:
            columns = _frame_columns(pd.read_parquet(path), where, span)
    except SpecError:
        raise
    except pd.errors.EmptyDataError:
        raise where.error("T103", f"data file {_q(shown)} is empty", span) from None
    except (ValueError, OSError, UnicodeDecodeError, zipfile.BadZipFile, pd.errors.ParserError, EOFError) as exc:
        reason = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
        if "pickle" in reason.lower():
            reason = "it is not a plain array file (objc never loads pickled Python objects)"
        raise where.error("T102", f"cannot read {_q(shown)} as {kind}: {reason}", span) from None
    if not columns or min(len(a) for a in columns.values()) == 0:
        raise where.error("T103", f"data file {_q(shown)} has no data rows" if columns
                          else f"data file {_q(shown)} has no columns", span)
    return columns


def parquet_dataset_files(path: Path) -> list[Path]:
    """The files of a Parquet dataset (a folder, searched to any depth), in the order their rows are read:
    by path. A file is its own dataset."""
    if path.is_dir():
        return sorted(p for p in path.rglob("*") if p.is_file() and p.name.lower().endswith((".parquet", ".pq")))
    return [path]


def same_parquet_columns(path: Path, shown: str, files: list[Path], names: list[list[str]], where: _Where,
                         span: Span) -> None:
    """T102 unless every file of a Parquet dataset has the first file's columns, in its order."""
    for f, cols in zip(files[1:], names[1:]):
        if cols != names[0]:
            raise where.error("T102", f"the Parquet file {_q(str(f.relative_to(path)))} of {_q(shown)} has columns "
                              f"{cols}, the first file {names[0]}", span,
                              "every file of a dataset must have the same columns in the same order")


def _read_parquet_folder(path: Path, shown: str, where: _Where, span: Span) -> dict[str, np.ndarray]:
    files = parquet_dataset_files(path)
    if not files:
        raise where.error("T102", f"{_q(shown)} is a folder without .parquet or .pq files, not a data file", span,
                          "name a data file, or a folder of Parquet files (read as one table, files in name order)")
    try:
        frames = [pd.read_parquet(f) for f in files]
    except (ValueError, OSError) as exc:
        raise where.error("T102", f"cannot read {_q(shown)} as Parquet: {str(exc).strip().splitlines()[0]}",
                          span) from None
    same_parquet_columns(path, shown, files, [[str(c) for c in f.columns] for f in frames], where, span)
    columns = _frame_columns(pd.concat(frames, ignore_index=True) if len(frames) > 1 else frames[0], where, span)
    if not columns or min(len(a) for a in columns.values()) == 0:
        raise where.error("T103", f"the Parquet files of {_q(shown)} have no data rows" if columns
                          else f"the Parquet files of {_q(shown)} have no columns", span)
    return columns


def _frame_table(frame, where: _Where, span: Span) -> dict[str, np.ndarray]:
    """A pandas DataFrame given in place of the spec's file, read by the same column rules."""
    if not isinstance(frame, pd.DataFrame):
        raise where.error("T102", f"data must be a path or a pandas DataFrame, not {type(frame).__name__}", span)
    columns = _frame_columns(frame, where, span)
    if not columns or len(frame) == 0:
        raise where.error("T103", "the DataFrame given has no data rows" if columns
                          else "the DataFrame given has no columns", span)
    return columns


def _read_csv(path: Path, sep: str, where: _Where, span: Span) -> dict[str, np.ndarray]:
    try:
        # pandas renames a repeated header name ("a", "a.1"); read the header line raw to catch that
        header = pd.read_csv(path, sep=sep, header=None, nrows=1, dtype=str, keep_default_na=False)
    except UnicodeDecodeError as exc:
        raise _not_utf8(path, exc, where, span) from None
    raw_names = [str(v) for v in header.iloc[0].tolist()] if len(header) else []
    for j, n in enumerate(raw_names):
        if not n.strip():
            # pandas would invent a name ("Unnamed: 1") the user never wrote and `all` would pick it
            raise where.error("T104", f"column {j + 1} of {_q(where.file)} has no name", span,
                              "give every column a name in the header line (a trailing separator makes "
                              "an empty last column)")
    _check_unique(raw_names, where, span)
    with warnings.catch_warnings():
        # a record with more fields than the header: by default pandas would silently make the first
        # column the index and shift every name one column over; index_col=False keeps the names in
        # place, and its warning (fields dropped) is made an error here
        warnings.simplefilter("error", pd.errors.ParserWarning)
        try:
            frame = pd.read_csv(path, sep=sep, keep_default_na=False, na_values=list(MISSING_CELLS),
                                index_col=False)
        except pd.errors.ParserWarning:
            line = _first_long_line(path, sep, len(raw_names))
            raise where.error("T102", f"cannot read {_q(where.file)} as csv: "
                              + (f"line {line}" if line else "a record") + f" has more fields than the "
                              f"{len(raw_names)} names of the header", span,
                              "give every record one field per header name (quote fields holding "
                              "the separator)") from None
        except UnicodeDecodeError as exc:
            raise _not_utf8(path, exc, where, span) from None
    return _frame_columns(frame, where, span)


def _first_long_line(path: Path, sep: str, width: int) -> int | None:
    """The file line where the first record with more than `width` fields starts (plain files only)."""
    if _format_of(path) not in ("csv", "tsv") or not path.name.lower().endswith((".csv", ".tsv")):
        return None
    import csv
    with open(path, newline="", encoding="utf-8", errors="replace") as f:
        reader = csv.reader(f, delimiter=sep)
        start = 1
        for record in reader:
            if len(record) > width:
                return start
            start = reader.line_num + 1
    return None


def _not_utf8(path: Path, exc: UnicodeDecodeError, where: _Where, span: Span) -> SpecError:
    """A CSV that is not UTF-8: say which line holds the first bad byte, and how to convert."""
    line = None
    if not path.name.lower().endswith((".gz", ".bz2", ".xz", ".zip")):
        raw = path.read_bytes()
        try:
            raw.decode("utf-8")
        except UnicodeDecodeError as e:
            line = raw.count(b"\n", 0, e.start) + 1
            exc = e
    utf16 = exc.object[:2] in (b"\xff\xfe", b"\xfe\xff") if isinstance(exc.object, bytes) else False
    at = f" at line {line}" if line else ""
    hint = ("it looks like UTF-16 text: save it as UTF-8" if utf16 else
            "save the file as UTF-8 (a spreadsheet's 'CSV UTF-8' export, or iconv -f latin1 -t utf-8 for "
            "a Latin-1 file)")
    return where.error("T102", f"cannot read {_q(where.file)} as csv: byte 0x{exc.object[exc.start]:02x}{at} "
                       "is not UTF-8 text", span, hint)


def _check_unique(names: Sequence[str], where: _Where, span: Span) -> None:
    seen: set[str] = set()
    for n in names:
        if n in seen:
            raise where.error("T104", f"column name {_q(n)} appears twice in {_q(where.file)}", span,
                              "give every column its own name")
        seen.add(n)


def _frame_columns(frame: pd.DataFrame, where: _Where, span: Span) -> dict[str, np.ndarray]:
    names = [str(c) for c in frame.columns]
    _check_unique(names, where, span)
    out: dict[str, np.ndarray] = {}
    for name, (_, series) in zip(names, frame.items()):
        dtype = series.dtype
        if isinstance(dtype, np.dtype):
            out[name] = series.to_numpy()
        elif pd.api.types.is_bool_dtype(dtype) and not series.isna().any():
            out[name] = series.to_numpy(dtype=bool)
        elif pd.api.types.is_numeric_dtype(dtype):
            # nullable integers and floats: missing cells become NaN
            out[name] = series.to_numpy(dtype=np.float64, na_value=np.nan)
        else:
            out[name] = series.to_numpy(dtype=object)
    return out


def _plain_array(a: np.ndarray) -> np.ndarray:
    # byte strings read as text so that labels compare with the spec's strings
    return a.astype(str) if a.dtype.kind == "S" else a


def _read_npy(path: Path, where: _Where, span: Span) -> dict[str, np.ndarray]:
    arr = np.load(path, allow_pickle=False)
    if not isinstance(arr, np.ndarray) or arr.ndim != 2:
        raise where.error("T102", f"{_q(where.file)} holds a {getattr(arr, 'ndim', '?')}-D array; "
                          "a .npy table must be 2-D (rows x columns)", span)
    if arr.dtype.kind not in "biuf":
        raise where.error("T102", f"{_q(where.file)} holds {arr.dtype} values; a .npy table must be numeric", span,
                          "use .npz, CSV or Parquet for tables with text columns")
    return {f"c{j}": np.ascontiguousarray(arr[:, j]) for j in range(arr.shape[1])}


def _read_npz(path: Path, where: _Where, span: Span) -> dict[str, np.ndarray]:
    with np.load(path, allow_pickle=False) as archive:
        keys = list(archive.files)
        if set(keys) == {"data", "columns"}:
            data, names = archive["data"], archive["columns"]
            if data.ndim != 2 or names.ndim != 1 or len(names) != data.shape[1]:
                raise where.error("T102", f"{_q(where.file)}: `data` must be 2-D and `columns` must hold one "
                                  f"name per column (got shapes {data.shape} and {names.shape})", span)
            names = [str(n) for n in _plain_array(names)]
            _check_unique(names, where, span)
            return {n: _plain_array(np.ascontiguousarray(data[:, j])) for j, n in enumerate(names)}
        out: dict[str, np.ndarray] = {}
        for k in keys:
            a = archive[k]
            if a.ndim != 1:
                raise where.error("T102", f"{_q(where.file)}: array {_q(k)} is {a.ndim}-D; store one 1-D array per "
                                  "column, or a 2-D `data` with its `columns` names", span)
            out[k] = _plain_array(a)
        lengths = {len(a) for a in out.values()}
        if len(lengths) > 1:
            raise where.error("T102", f"{_q(where.file)}: its column arrays differ in length "
                              f"({', '.join(str(x) for x in sorted(lengths))})", span)
        return out


# ---------------------------------------------------------------- column types

def _is_numeric(a: np.ndarray) -> bool:
    return a.dtype.kind in "biuf"


def _mostly_numbers(a: np.ndarray) -> bool:
    """More than half of the column's non-missing cells read as numbers."""
    converted, text = _as_float(a)
    numbers = int(np.count_nonzero(np.isfinite(converted)))
    return numbers > 0 and numbers > len(text)


def _as_float(a: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """The column as float64, and the 0-based positions of cells that are text, not numbers.

    Missing cells become NaN and are not counted as text; a text column of numerals converts."""
    if _is_numeric(a):
        return a.astype(np.float64), np.empty(0, dtype=np.int64)
    if a.dtype.kind not in "OUS":  # dates, complex numbers: nothing a linear model can read
        return np.full(len(a), np.nan), np.arange(len(a))
    obj = pd.Series(a.astype(object))
    missing = obj.isna().to_numpy()
    converted = pd.to_numeric(obj, errors="coerce").to_numpy(dtype=np.float64, na_value=np.nan)
    return converted, np.flatnonzero(np.isnan(converted) & ~missing)


def _missing_mask(a: np.ndarray) -> np.ndarray:
    if a.dtype.kind in "f":
        return ~np.isfinite(a)
    if a.dtype.kind in "biu":
        return np.zeros(len(a), dtype=bool)
    return pd.isna(pd.Series(a.astype(object))).to_numpy()


# ---------------------------------------------------------------- derived features

def _formula_rules(feature: DerivedFeature, where: _Where) -> list[Diagnostic]:
    """A feature built outside the resolver (the Python API) meets the resolver's rules and codes."""
    return [replace(d, message=f"feature {_q(feature.name)}: {d.message}", source_name=where.source_name)
            for d in check_formula(feature.expr).diagnostics]


# ---------------------------------------------------------------- feature maps
# Plain functions of NumPy arrays and plain-data maps (FeatureMap.plain()): the generated NumPy module
# copies them by source (numpy_module.py), so objc and the module compute every map the same way.

def map_category_text(cell) -> str:
    """A cell as the name of its category: a number in one form (1, 1.0, "1.0" and " 1" are one
    category, "1"), any other text as written (without surrounding blanks)."""
    if isinstance(cell, (bool, np.bool_)):
        return str(bool(cell))
    text = cell.strip() if isinstance(cell, str) else None
    try:
        v = float(text if text is not None else cell)
    except (TypeError, ValueError):
        return text if text is not None else str(cell)
    if not np.isfinite(v):
        return text if text is not None else repr(v)
    return str(int(v)) if v.is_integer() and abs(v) < 2.0 ** 53 else repr(v)


def map_sorted_categories(texts) -> list:
    """The distinct categories, sorted: by value when every one is a number, else as text."""
    distinct = sorted(set(texts))
    try:
        return sorted(distinct, key=float)
    except ValueError:
        return distinct


def map_fourier_draws(m: dict, n_columns: int):
    """W (count x columns) ~ N(0, 1 / bandwidth^2) and b (count) ~ U[0, 2 pi] from the map's seed:
    the random features of Rahimi & Recht (2007), the same draws for the same seed."""
    rng = np.random.default_rng(m["seed"])
    W = rng.normal(0.0, 1.0 / m["bandwidth"], size=(m["count"], n_columns))
    b = rng.uniform(0.0, 2.0 * np.pi, size=m["count"])
    return W, b


def map_fit(m: dict, cols) -> dict:
    """What a map takes from the training rows: a onehot map's categories (`cols[c]`: the category
    texts of column c), a spline's knots at its quantiles, a fourier map's draws."""
    if m["kind"] == "onehot":
        return {"categories": {c: map_sorted_categories(cols[c]) for c in m["columns"]}}
    if m["kind"] == "spline":
        return {"knots": [float(k) for k in np.quantile(cols[m["columns"][0]], list(m["quantiles"]))]}
    if m["kind"] == "fourier":
        W, b = map_fourier_draws(m, len(m["columns"]))
        return {"W": W, "b": b}
    return {}


def map_state_from_names(m: dict, names, maps=()) -> dict:
    """A map's fitted state as a saved input list holds it: `city=Lyon` names a category, `(temp-12.5)+^3` a knot.

    `maps` are all the table's maps (m among them; m alone when none are given). A product one of them
    makes (`a=b^2` of `powers "a=b"`) is no category or knot, and a name that reads as the input of
    several columns (`a=b=cat`: category `b=cat` of `a`, or `cat` of `a=b`) is the longest column's:
    a fit whose names would read back otherwise is refused (T166), so the reading is the fit's."""
    maps = maps or (m,)
    polynomial = [o for o in maps if o["kind"] in ("powers", "monomials", "pairs", "spline")]
    products = {map_product_name(o["columns"], e) for o in polynomial
                for e in map_exponents("powers" if o["kind"] == "spline" else o["kind"], len(o["columns"]),
                                       o["degree"])}

    def owner(n):
        readers = [c for o in maps for c in o["columns"]
                   if (o["kind"] == "onehot" and n.startswith(c + "="))
                   or (o["kind"] == "spline" and map_knot_of(n, c, o["degree"]) is not None)]
        return max(readers, key=len, default=None) if n not in products else None

    if m["kind"] == "onehot":
        return {"categories": {c: [n[len(c) + 1:] for n in names if n.startswith(c + "=") and owner(n) == c]
                               for c in m["columns"]}}
    if m["kind"] == "spline":
        c = m["columns"][0]
        found = [map_knot_of(n, c, m["degree"]) for n in names if owner(n) == c]
        return {"knots": [k for k in found if k is not None]}
    return map_fit(m, {})


def map_outputs(m: dict, state: dict, cols) -> list:
    """The inputs a map makes, as (name, values) pairs; `cols[c]` holds column c's floats (its
    category texts for onehot). A onehot row of a category outside `state` is all zeros here; the
    caller decides whether that is an error (`unseen fail`)."""
    kind, columns = m["kind"], m["columns"]
    out = []
    if kind == "onehot":
        for c in columns:
            texts = np.asarray(cols[c], dtype=object)
            for cat in state["categories"][c]:
                out.append((c + "=" + cat, (texts == cat).astype(np.float64)))
    elif kind in ("powers", "monomials", "pairs", "spline"):
        degree = m["degree"]
        # a product may overflow: the callers refuse a map input that is not finite (T161), so NumPy's own
        # warning would only repeat that before the message
        with np.errstate(over="ignore", invalid="ignore"):
            for e in map_exponents("powers" if kind == "spline" else kind, len(columns), degree):
                value = np.ones(len(cols[columns[0]]))
                for c, p in zip(columns, e):
                    if p:
                        value = value * cols[c] ** p
                out.append((map_product_name(columns, e), value))
            if kind == "spline":
                x = cols[columns[0]]
                for k in state["knots"]:
                    out.append((map_knot_name(columns[0], k, degree), np.maximum(x - k, 0.0) ** degree))
    elif kind == "fourier":
        X = np.column_stack([cols[c] for c in columns])
        z = np.sqrt(2.0 / m["count"]) * np.cos(X @ np.asarray(state["W"]).T + np.asarray(state["b"]))
        out += [(f"{m['name']}_{j + 1}", np.ascontiguousarray(z[:, j])) for j in range(m["count"])]
    return out


def map_unseen_rows(m: dict, state: dict, cols) -> list:
    """(column, row positions, values) of the cells of a onehot map's columns outside its categories."""
    found = []
    if m["kind"] == "onehot":
        for c in m["columns"]:
            texts = np.asarray(cols[c], dtype=object)
            bad = np.flatnonzero(~np.isin(texts, np.asarray(state["categories"][c], dtype=object)))
            if len(bad):
                found.append((c, bad, list(dict.fromkeys(texts[bad].tolist()))))
    return found


def _map_state_plain(m: dict, state: dict) -> dict:
    """A map's fitted state as JSON-ready data."""
    out = {"kind": m["kind"], "columns": list(m["columns"])}
    for key, value in state.items():
        out[key] = value.tolist() if isinstance(value, np.ndarray) else value
    return out


# ---------------------------------------------------------------- binding

@dataclass(frozen=True)
class _Pick:
    """One column of X: a table column or a derived feature, and the clause that chose it."""

    name: str
    span: Span
    feature: DerivedFeature | None = None
    mapped: bool = False  # named by a saved schema, made by a feature map


def bind_table(binding: TableBinding, spec_dir: Path, task: Task, *, source_name: str = "",
               data_path: Path | None = None, standardization: Standardization | None = None,
               input_names: tuple[str, ...] | None = None, file_span: Span | None = None,
               need_target: bool = True, both_classes: bool = True, frame: pd.DataFrame | None = None,
               fourier_draws: Mapping[str, Mapping[str, object]] | None = None,
               defer_standardize: bool = False, frame_label: str | None = None, first_row: int = 0,
               whole_table: bool = True) -> BoundData:
    """Read the binding's table and return checked solver arrays.

    `data_path` replaces the spec's path (taken as given, not relative to `spec_dir`); `file_span`
    is the clause that named it (default: the `table` line). `standardization` applies saved stats
    instead of computing them; `input_names` selects exactly those inputs in that order (a saved
    model's schema), and `fourier_draws` the draws it saved for each `fourier` map by name (else they
    come from the map's seed). `need_target=False` ignores the target (y is NaN; for predicting on new rows);
    `both_classes=False` accepts a margin target holding one class (evaluating on a slice).
    `defer_standardize=True` leaves `standardize` to the split that follows (`standardize_pending`), so
    that the held-out rows neither shape the statistics nor pass through them twice.
    A chunk of a larger table (objc/chunked_tables.py) comes as `frame` with `frame_label` (the table as
    the user named it), `first_row` (the records before it, so that messages number rows in the whole
    table) and `whole_table=False` (the checks that need every row, none left or every weight zero, are
    the caller's).
    """
    if task not in ("margin", "residual", "multiclass"):
        raise ValueError(f"task must be 'margin', 'residual' or 'multiclass', not {task!r}")
    if frame is not None:
        path, shown = Path("<DataFrame>"), frame_label or "the DataFrame given"
    elif data_path is not None:
        path, shown = Path(data_path), str(data_path)
    else:
        path, shown = Path(spec_dir) / binding.path, binding.path
    where = _Where(shown, source_name)
    if frame is not None:
        table = _frame_table(frame, where, file_span or binding.span)
    else:
        table = _read(path, shown, file_span or binding.span, source_name,
                      "check the path given with the command" if data_path is not None and file_span is None
                      else "paths in a spec are relative to the spec file's folder")
    n_all = len(next(iter(table.values())))
    columns = list(table)

    target_span = binding.target_span or binding.span
    weight_span = binding.row_weight_span or binding.span
    inputs_span = binding.inputs_span or binding.span

    # ---- stage 1: every name resolves
    diags: list[Diagnostic] = []
    target = binding.target if need_target else None
    if target is not None and target not in table:
        diags.append(where.diag("T110", f"target column {_q(target)} is not in {_q(shown)}", target_span,
                                _did_you_mean(target, columns)))
        target = None
    if binding.row_weight is not None and binding.row_weight not in table:
        diags.append(where.diag("T110", f"row-weight column {_q(binding.row_weight)} is not in {_q(shown)}",
                                weight_span, _did_you_mean(binding.row_weight, columns)))
    feature_names = [f.name for f in binding.features]
    for i, f in enumerate(binding.features):
        if f.name in table:
            diags.append(where.diag("T114", f"feature name {_q(f.name)} is already a column of {_q(shown)}",
                                    f.span, "give the feature a name of its own"))
        elif f.name in feature_names[:i]:
            diags.append(where.diag("T114", f"feature {_q(f.name)} is defined twice", f.span))
        diags.extend(_formula_rules(f, where))
        for nm in check_formula(f.expr).reads:
            if nm.id not in table and nm.id not in feature_names[:i]:
                diags.append(where.diag("T110", f"feature {_q(f.name)} reads column {_q(nm.id)}, which is not "
                                        f"in {_q(shown)}", nm.span, _did_you_mean(nm.id, columns + feature_names[:i])))

    for m in binding.maps:
        for c in m.columns:
            if c not in table:
                diags.append(where.diag("T110", f"column {_q(c)} of `{m.kind}` is not in {_q(shown)}", m.span,
                                        _did_you_mean(c, columns)))
    map_plain = [m.plain() for m in binding.maps]
    may_map = bool(binding.maps)

    picks: list[_Pick] = []
    skipped: list[str] = []
    if input_names is not None:
        by_feature = {f.name: f for f in binding.features}
        for name in input_names:
            if name in by_feature:
                picks.append(_Pick(name, by_feature[name].span, by_feature[name]))
            elif name in table:
                picks.append(_Pick(name, inputs_span))
            elif may_map:
                picks.append(_Pick(name, inputs_span, mapped=True))  # made by a map: checked once maps are computed
            else:
                diags.append(where.diag("T110", f"input {_q(name)} of the model's schema is not in {_q(shown)}",
                                        inputs_span, _did_you_mean(name, columns + list(by_feature))))
    else:
        picks, skipped = _select(binding, table, target, where, diags)
        for f in binding.features:
            picks.append(_Pick(f.name, f.span, f))
    _raise_all(diags)

    # ---- stage 2: types
    floats: dict[str, np.ndarray] = {}
    used: dict[str, tuple[str, Span]] = {}  # every column the spec reads: how to call it, where it was named

    def numeric(name: str, what: str, span: Span, code: str = "T112") -> None:
        if name in floats:
            return
        used[name] = (what, span)
        values, text_rows = _as_float(table[name])
        if len(text_rows):
            examples = ", ".join(_value(table[name][i]) for i in text_rows[:3])
            cells = [str(table[name][i]) for i in text_rows[:3]]
            hint = ("remove the thousands separators (write 1000, not 1,000)"
                    if any(_THOUSANDS.fullmatch(c.strip()) for c in cells) else "")
            diags.append(where.diag(code, f"{what} {_q(name)} in {_q(shown)} is not numeric at "
                                    f"{_rows_text(text_rows + 1 + first_row)} (values {examples})", span, hint, rows=True))
        floats[name] = values

    for p in picks:
        if p.feature is None and not p.mapped:
            numeric(p.name, "input column", p.span)
    for m in binding.maps:
        for c in m.columns:
            if m.kind == "onehot":
                used.setdefault(c, ("onehot column", m.span))
            else:
                numeric(c, f"column read by `{m.kind}`,", m.span)
    for f in binding.features:
        for nm in check_formula(f.expr).reads:
            if nm.id in table:
                numeric(nm.id, f"column read by feature {_q(f.name)},", nm.span)
    if binding.row_weight is not None:
        numeric(binding.row_weight, "row-weight column", weight_span)
    if target is not None:
        if task == "residual":
            numeric(target, "real target", target_span, code="T133")
        else:
            used.setdefault(target, ("target column", target_span))
    _raise_all(diags)

    # ---- stage 3: missing and infinite values
    drop = np.zeros(n_all, dtype=bool)
    for name, (what, span) in used.items():
        bad = _missing_mask(floats[name] if name in floats else table[name])
        if not bad.any():
            continue
        if binding.missing == "drop":
            drop |= bad
        else:
            diags.append(where.diag("T120", f"{what.rstrip(',')} {_q(name)} in {_q(shown)} has missing or infinite "
                                    f"values at {_rows_text(np.flatnonzero(bad) + 1 + first_row)}", span,
                                    "fix the data, or write `missing drop` in the table block to skip those rows",
                                    rows=True))
    _raise_all(diags)
    keep = np.flatnonzero(~drop)
    warnings: list[Diagnostic] = []
    if drop.any():
        if not len(keep) and whole_table:
            raise SpecError((no_row_left(where, binding),))
        warnings.append(where.diag("T191", f"dropped {int(drop.sum())} of {n_all} rows of {_q(shown)} with "
                                   f"missing values ({_rows_text(np.flatnonzero(drop) + 1 + first_row)})", binding.span,
                                   rows=True, severity="warning"))
    if skipped:
        warnings.append(where.diag("T190", "`all` passed over non-numeric column(s) "
                                   + ", ".join(_q(s) for s in skipped), inputs_span, severity="warning"))
    rows = keep.astype(np.int64) + 1 + first_row
    n = len(keep)

    # ---- stage 4: target and weights
    if target is None:
        y = np.full(n, np.nan)
    elif task == "residual":
        if binding.label_map is not None and binding.label_map.pairs:
            diags.append(where.diag("T134", f"target {_q(target)} is real (residual losses); a label map does "
                                    "not apply", binding.label_map.span, "remove the `: value -> label` part"))
        y = floats[target][keep]
    elif task == "multiclass":
        y = _class_target(table[target][keep], rows, target, binding, where, diags)
    else:
        y = _margin_target(table[target][keep], rows, target, binding, where, diags, both_classes)
    weights = np.ones(n)
    if binding.row_weight is not None:
        rw = floats[binding.row_weight][keep]
        negative = np.flatnonzero(rw < 0)
        if len(negative):
            diags.append(where.diag("T140", f"row-weight column {_q(binding.row_weight)} in {_q(shown)} is "
                                    f"negative at {_rows_text(rows[negative])}", weight_span,
                                    "row weights must be zero or more", rows=True))
        elif not (rw > 0).any() and whole_table:
            diags.append(weights_all_zero(where, binding))
        weights = weights * rw
    if binding.class_label_weights and task == "multiclass" and target is not None:
        index = {_class_key(c): k for k, c in enumerate(binding.classes)}
        for label, w in binding.class_label_weights:
            weights = np.where(y == index[_class_key(label)], weights * w, weights)
    if binding.class_weights:
        cw_span = binding.class_weights_span or binding.span
        if task == "residual":
            diags.append(where.diag("T142", "class weights need a +1/-1 target; this target is real", cw_span))
        else:
            for label, w in binding.class_weights:
                if label not in (1.0, -1.0):
                    diags.append(where.diag("T142", f"class weight given for label {label:g}; labels are +1 and -1",
                                            cw_span))
                elif not (np.isfinite(w) and w >= 0):
                    diags.append(where.diag("T142", f"class weight {w:g} for label {label:+g} must be a finite "
                                            "number, zero or more", cw_span))
                elif target is not None:
                    weights = np.where(y == label, weights * w, weights)
    _raise_all(diags)

    # ---- stage 5: derived features, on the kept rows
    values: dict[str, np.ndarray] = {name: v[keep] for name, v in floats.items()}
    for f in binding.features:
        v = evaluate(f.expr, values, n)
        bad = np.flatnonzero(~np.isfinite(v))
        if len(bad):
            diags.append(where.diag("T161", f"feature {_q(f.name)} is NaN or infinite at {_rows_text(rows[bad])} "
                                    f"of {_q(shown)}", f.span,
                                    "change the formula so it is defined on every row (log1p instead of log, ...)",
                                    rows=True))
        values[f.name] = v
    _raise_all(diags)

    unscaled: list[str] = []
    fitted_maps: list[dict] = []
    if binding.maps:
        picks = _map_inputs(binding, map_plain, picks, values, table, keep, rows, input_names, where, unscaled,
                            fitted_maps, fourier_draws or {})

    names = tuple(p.name for p in picks)
    X = np.empty((n, len(names)), dtype=np.float64)
    for j, name in enumerate(names):
        X[:, j] = values[name]

    # ---- stage 6: standardization
    fitted = False
    if standardization is not None:
        means, scales = _saved_stats(standardization, names, where, inputs_span)
        X = (X - means) / scales
    elif binding.standardize and not defer_standardize:
        standardization = _fit_stats(X, names, [p.span for p in picks], where, unscaled=frozenset(unscaled))
        X = (X - np.asarray(standardization.means)) / np.asarray(standardization.scales)
        fitted = True

    return BoundData(X=_frozen(np.ascontiguousarray(X, dtype=np.float64)), y=_frozen(np.asarray(y, np.float64)),
                     weights=_frozen(np.asarray(weights, np.float64)), input_names=names, target=target,
                     label_map=binding.label_map if (target is not None and task == "margin" and binding.label_map
                                                     and binding.label_map.pairs) else None,
                     standardization=standardization, source=path, rows=_frozen(rows), task=task,
                     dropped=n_all - n, file_label=shown, standardization_fitted=fitted, warnings=tuple(warnings),
                     unscaled=tuple(unscaled), maps=tuple(fitted_maps),
                     classes=tuple(binding.classes) if task == "multiclass" else (),
                     standardize_pending=bool(binding.standardize and defer_standardize and standardization is None))


def _map_inputs(binding: TableBinding, map_plain: list[dict], picks: list[_Pick], values: dict[str, np.ndarray],
                table: Mapping[str, np.ndarray], keep: np.ndarray, rows: np.ndarray,
                input_names: tuple[str, ...] | None, where: _Where, unscaled: list[str],
                fitted_maps: list[dict], fourier_draws: Mapping[str, Mapping[str, object]]) -> list[_Pick]:
    """Compute every map on the kept rows into `values`; the picks with the maps' inputs (appended,
    or, for a saved schema, those it names). A map's state comes from these rows when fitting, from
    the saved input names otherwise (categories and knots are written in them; fourier's draws from
    `fourier_draws`, which a saved model holds so that no change of NumPy's random streams can alter
    them, else from the map's seed)."""
    diags: list[Diagnostic] = []
    taken = {p.name for p in picks if not p.mapped}
    made: dict[str, Span] = {}
    for m, mp in zip(binding.maps, map_plain):
        cols: dict[str, object] = {}
        for c in m.columns:
            cols[c] = [map_category_text(v) for v in table[c][keep]] if m.kind == "onehot" else values[c]
        if input_names is None:
            state = map_fit(mp, cols)
            for c in (m.columns if m.kind == "onehot" else ()):
                if len(state["categories"][c]) < 2:
                    diags.append(where.diag("T163", f"column {_q(c)} of `onehot` holds one category only "
                                            f"({_q(state['categories'][c][0])}) in {_q(where.file)}: its indicator "
                                            "would be 1 on every row", m.span, "leave the column out of `onehot`"))
            if m.kind == "spline":
                x, knots = cols[m.columns[0]], state["knots"]
                if any(b <= a for a, b in zip(knots, knots[1:])) or knots[0] <= np.min(x) or knots[-1] >= np.max(x):
                    shown = ", ".join(f"{q * 100:g}% at {_value(k)}" for q, k in zip(m.quantiles, knots))
                    diags.append(where.diag("T165", f"the knots of `spline` {_q(m.columns[0])} collapse on the "
                                            f"training rows of {_q(where.file)} ({shown}; the column runs from "
                                            f"{_value(np.min(x))} to {_value(np.max(x))}): two knots meet, or one "
                                            "sits at an end, so a basis column repeats another", m.span,
                                            "choose quantiles where the column takes distinct values, or fewer "
                                            "knots"))
                    continue
        else:
            state = map_state_from_names(mp, input_names, map_plain)
            if m.kind == "fourier" and m.name in fourier_draws:
                W = np.asarray(fourier_draws[m.name]["W"], dtype=np.float64)
                b = np.asarray(fourier_draws[m.name]["b"], dtype=np.float64)
                if W.shape != (m.count, len(m.columns)) or b.shape != (m.count,):
                    raise SpecError((where.diag("T167", f"the saved draws of `fourier` {m.name} hold {W.shape} and "
                                                f"{b.shape} numbers, not {m.count} x {len(m.columns)} and {m.count}",
                                                m.span, "refit the model: its file was edited or damaged"),))
                state = {"W": W, "b": b}
            for c, bad, cells in map_unseen_rows(mp, state, cols) if m.unseen == "fail" else ():
                listed = ", ".join(_q(v) for v in cells[:5]) + (", ..." if len(cells) > 5 else "")
                diags.append(where.diag("T164", f"column {_q(c)} of {_q(where.file)} holds categories not seen in "
                                        f"training: {listed} at {_rows_text(rows[bad])}", m.span,
                                        "write `unseen zeros` after the `onehot` columns to give such rows all-zero "
                                        "indicators, or refit on rows that hold them", rows=True))
        fitted_maps.append(_map_state_plain(mp, state))
        for name, v in map_outputs(mp, state, cols):
            # before the one-input-per-name rule: a column another map made as its own first power is
            # still a column, and a saved schema binds it as one
            if name not in m.columns and (name in table or name in taken):
                diags.append(where.diag("T166", f"`{m.kind}` makes an input named {_q(name)}, which is already "
                                        f"{'a column of ' + _q(where.file) if name in table else 'an input'}", m.span,
                                        "rename the column or the feature"))
                continue
            if name in made or (name in taken and name in m.columns):
                continue  # one input per name: the same product made twice, or a column as its own first power
            if not np.all(np.isfinite(v)):
                bad = np.flatnonzero(~np.isfinite(v))
                diags.append(where.diag("T161", f"input {_q(name)} made by `{m.kind}` overflows at "
                                        f"{_rows_text(rows[bad])} of {_q(where.file)}", m.span,
                                        "rescale the column first (a `feature`) or lower the degree", rows=True))
                continue
            values[name] = v
            made[name] = m.span
            if m.kind == "onehot":
                unscaled.append(name)
    _raise_all(diags)
    if input_names is None:
        _raise_all(_misread_names(binding, map_plain, fitted_maps, [p.name for p in picks] + list(made), where))
        return picks + [_Pick(name, span) for name, span in made.items()]
    missing = [p.name for p in picks if p.mapped and p.name not in made]
    if missing:
        raise where.error("T110", "input(s) " + ", ".join(_q(n) for n in missing) + " of the model's schema are "
                          f"neither columns of {_q(where.file)} nor made by the spec's maps",
                          binding.inputs_span or binding.span)
    return picks


def _state_inputs(mp: dict, state: Mapping) -> list[tuple[str, str]]:
    """(name, what it is) of each input a map's categories or knots make."""
    if mp["kind"] == "onehot":
        return [(c + "=" + v, f"category {_q(v)} of column {_q(c)}") for c in mp["columns"]
                for v in state["categories"][c]]
    if mp["kind"] == "spline":
        c = mp["columns"][0]
        return [(map_knot_name(c, k, mp["degree"]), f"knot {k!r} of column {_q(c)}") for k in state["knots"]]
    return []


def _misread_names(binding: TableBinding, map_plain: list[dict], fitted_maps: list[dict], names: list[str],
                   where: _Where) -> list[Diagnostic]:
    """A saved model keeps its maps' categories and knots in its input names alone (`names`): T166 for
    each map whose names would not read back (map_state_from_names) as the state fitted on these rows,
    at its first such input."""
    read = [_state_inputs(mp, map_state_from_names(mp, names, map_plain)) for mp in map_plain]
    want = [_state_inputs(mp, fitted) for mp, fitted in zip(map_plain, fitted_maps)]
    read_sets, want_sets = [set(r) for r in read], [set(w) for w in want]
    lost = [[p for p in w if p not in r] for w, r in zip(want, read_sets)]
    lost_names = {n for ps in lost for n, _what in ps}
    # an input read as this map's though it is not: reported here unless it is another map's lost one
    extra = [[p for p in r if p not in w and p[0] not in lost_names] for w, r in zip(want_sets, read)]
    diags: list[Diagnostic] = []
    for m, lost_here, extra_here in zip(binding.maps, lost, extra):
        more = len(lost_here) + len(extra_here) - 1
        tail = f" ({more} more input name(s) of this clause likewise)" if more > 0 else ""
        hint = "rename one of the columns so that no input name reads two ways"
        if lost_here:
            name, what = lost_here[0]
            other = next((w for r in read for n, w in r if n == name), "the name of a product another map makes")
            diags.append(where.diag("T166", f"`{m.kind}` makes an input named {_q(name)} ({what}), which a saved "
                                    f"model would read back as {other}{tail}", m.span, hint))
        elif extra_here:
            name, what = extra_here[0]
            diags.append(where.diag("T166", f"input {_q(name)} would read back from a saved model as {what} of "
                                    f"`{m.kind}`, which it is not{tail}", m.span, hint))
    return diags


def _select(binding: TableBinding, table: Mapping[str, np.ndarray], target: str | None, where: _Where,
            diags: list[Diagnostic]) -> tuple[list[_Pick], list[str]]:
    """The plain input columns by the `inputs` clause: names, patterns, `all`, minus `except`."""
    columns = list(table)
    reserved = {c for c in (target, binding.row_weight) if c is not None}
    excluded = set()
    for e in binding.excluded:
        if e.text not in table:
            diags.append(where.diag("T110", f"excluded column {_q(e.text)} is not in {_q(where.file)}", e.span,
                                    _did_you_mean(e.text, columns)))
        excluded.add(e.text)
    picks: dict[str, _Pick] = {}
    skipped: list[str] = []
    for item in binding.inputs:
        if item.kind == "column":
            if item.text not in table:
                diags.append(where.diag("T110", f"input column {_q(item.text)} is not in {_q(where.file)}", item.span,
                                        _did_you_mean(item.text, columns)))
            elif item.text in reserved:
                role = "target" if item.text == target else "row-weight column"
                diags.append(where.diag("T113", f"{_q(item.text)} is the {role}; it cannot also be an input",
                                        item.span, "remove it from the inputs"))
            else:
                picks.setdefault(item.text, _Pick(item.text, item.span))
        elif item.kind == "pattern":
            matched = [c for c in columns if fnmatch.fnmatchcase(c, item.text) and c not in reserved]
            if not matched:
                diags.append(where.diag("T111", f"pattern {_q(item.text)} matches no column of {_q(where.file)}",
                                        item.span, _did_you_mean(item.text, columns)))
            for c in matched:
                picks.setdefault(c, _Pick(c, item.span))
        else:
            found = False
            for c in columns:
                if c in reserved or c in excluded:
                    continue
                if _is_numeric(table[c]) or _mostly_numbers(table[c]):
                    # a column of numbers with a few stray text cells is meant as an input: pick it so
                    # the numeric check reports those rows, instead of silently leaving it out
                    picks.setdefault(c, _Pick(c, item.span))
                    found = True
                else:
                    skipped.append(c)
            if not found:
                diags.append(where.diag("T111", f"`all` finds no numeric column in {_q(where.file)} besides the "
                                        "target and row weights", item.span))
    chosen = [p for name, p in picks.items() if name not in excluded]
    if binding.inputs and picks and not chosen:
        diags.append(where.diag("T111", "every selected input is excluded", binding.inputs_span or binding.span))
    return chosen, skipped


def _margin_target(raw: np.ndarray, rows: np.ndarray, target: str, binding: TableBinding, where: _Where,
                   diags: list[Diagnostic], both_classes: bool) -> np.ndarray:
    """+1/-1 per row: through the label map (text to text, numbers to numbers), or as written."""
    span = binding.target_span or binding.span
    y = np.full(len(raw), np.nan)
    lm = binding.label_map
    if lm is not None and lm.pairs:
        seen: dict[object, float] = {}
        wrong = []
        for value, label in lm.pairs:
            if label not in (1.0, -1.0):
                wrong.append(where.diag("T134", f"label map sends {_value(value)} to {label:g}; labels are +1 and -1",
                                        lm.span))
            elif seen.get(value, label) != label:
                wrong.append(where.diag("T134", f"label map sends {_value(value)} to both +1 and -1", lm.span))
            seen[value] = label
        if wrong:
            diags.extend(wrong)
            return y
        for value, label in lm.pairs:
            y[_matches(raw, value)] = label
        unmatched = np.flatnonzero(np.isnan(y))
        if len(unmatched):
            firsts = list(dict.fromkeys(raw[unmatched].tolist()))
            listed = ", ".join(_value(v) for v in firsts[:5]) + (", ..." if len(firsts) > 5 else "")
            unused = [v for v, _lab in lm.pairs if not _matches(raw, v).any()]
            if len(unused) == len(lm.pairs):
                # nothing in the map occurs in the column: the map names other values, so show the
                # column's own values rather than extending a map that cannot match
                distinct = list(dict.fromkeys(raw.tolist()))
                listing = ", ".join(_spec_literal(v) for v in distinct[:5]) + (", ..." if len(distinct) > 5 else "")
                hint = (f"none of the map's values occur in the column, whose values are {listing}: map those, "
                        f"and choose which of them is +1 (objc cannot know)")
            else:
                hint = ("add each listed value to the map with the label it should get, +1 or -1 (objc cannot "
                        "know which), e.g. " + ", ".join(f"`{_spec_literal(v)} -> -1`" for v in firsts[:3]))
                if unused:
                    hint += "; the map's " + ", ".join(_q(str(v)) for v in unused) + " matches no row (a typo?)"
            diags.append(where.diag("T130", f"target {_q(target)} in {_q(where.file)} holds value(s) the label map "
                                    f"does not list: {listed} at {_rows_text(rows[unmatched])}", span, hint,
                                    rows=True))
            return y
    else:
        values, text_rows = _as_float(raw)
        outside = np.flatnonzero(~np.isin(values, (-1.0, 1.0)))
        if len(outside):
            distinct = list(dict.fromkeys(raw.tolist()))
            listed = ", ".join(_value(v) for v in distinct[:5]) + (", ..." if len(distinct) > 5 else "")
            example = ", ".join(f"{_spec_literal(v)} -> {'+1' if i == 0 else '-1'}" for i, v in enumerate(distinct[:2]))
            diags.append(where.diag("T131", f"target {_q(target)} in {_q(where.file)} must be -1 or +1 for a margin "
                                    f"loss, but holds {listed} (not -1/+1 at {_rows_text(rows[outside])})", span,
                                    f"map its values to labels: `target {_spec_literal(target)}: {example}`", rows=True))
            return y
        y = values
    if both_classes:
        problem = one_class(where, binding, y)
        if problem is not None:
            diags.append(problem)
    return y


# the checks that need every row of the table (a table read in chunks makes them once all chunks are in)

def no_row_left(where: _Where, binding: TableBinding) -> Diagnostic:
    return where.diag("T121", f"every row of {_q(where.file)} has a missing value in a column the spec uses",
                      binding.span)


def weights_all_zero(where: _Where, binding: TableBinding) -> Diagnostic:
    return where.diag("T141", f"every row weight in {_q(binding.row_weight)} of {_q(where.file)} is zero",
                      binding.row_weight_span or binding.span)


def one_class(where: _Where, binding: TableBinding, y: np.ndarray) -> Diagnostic | None:
    """T132 when a margin target's labels y (+1/-1) hold one class only."""
    present = set(np.unique(y).tolist())
    if len(present) >= 2:
        return None
    only = "+1" if 1.0 in present else "-1"
    return where.diag("T132", f"target {_q(binding.target)} in {_q(where.file)} has one class only (every row "
                      f"is {only}); a margin loss needs both +1 and -1", binding.target_span or binding.span)


def _class_key(v: str | float) -> tuple[str, str | float]:
    return ("text", v) if isinstance(v, str) else ("number", float(v))


def _class_target(raw: np.ndarray, rows: np.ndarray, target: str, binding: TableBinding, where: _Where,
                  diags: list[Diagnostic]) -> np.ndarray:
    """Each row's class as 0 .. K-1 (in the order the `classes` clause lists them), as floats."""
    span = binding.target_span or binding.span
    y = np.full(len(raw), np.nan)
    for k, label in enumerate(binding.classes):
        y[_matches(raw, label)] = float(k)
    unmatched = np.flatnonzero(np.isnan(y))
    if len(unmatched):
        firsts = list(dict.fromkeys(raw[unmatched].tolist()))
        listed = ", ".join(_value(v) for v in firsts[:5]) + (", ..." if len(firsts) > 5 else "")
        classes = ", ".join(_spec_literal(c) for c in binding.classes)
        diags.append(where.diag("T135", f"target {_q(target)} in {_q(where.file)} holds value(s) that are not among "
                                f"its classes ({classes}): {listed} at {_rows_text(rows[unmatched])}", span,
                                "add each listed value to the `classes` list (in the order the classes should take), "
                                "or fix the table; text matches text exactly and numbers match numbers",
                                rows=True))
    return y


def _matches(raw: np.ndarray, value: str | float) -> np.ndarray:
    """Cells equal to a label-map value: text against text, numbers against numbers."""
    if raw.dtype.kind == "b":
        if isinstance(value, str):
            return raw == (value.strip().lower() == "true") if value.strip().lower() in ("true", "false") \
                else np.zeros(len(raw), dtype=bool)
        return raw.astype(np.float64) == float(value)
    if _is_numeric(raw):
        return raw.astype(np.float64) == float(value) if not isinstance(value, str) else np.zeros(len(raw), bool)
    if isinstance(value, str):
        return np.array([isinstance(c, str) and c == value for c in raw], dtype=bool)
    return np.array([isinstance(c, (int, float, np.number)) and not isinstance(c, (bool, np.bool_))
                     and float(c) == float(value) for c in raw], dtype=bool)


def standard_scales(X, unscaled=None):
    """(means, scales, problems) of `standardize` on the rows X: each column's mean and population
    standard deviation (ddof 0, as scikit-learn's StandardScaler), and the columns it cannot scale
    (`scale_problems`). Columns flagged in `unscaled` (onehot indicators) keep mean 0 and scale 1: they
    stay 0/1, and a category absent from a fold's rows is no constant column.
    The one rule for objc and every generated module, which copies this function by source."""
    X = np.asarray(X, dtype=np.float64)
    with np.errstate(over="ignore", invalid="ignore"):
        means, scales = X.mean(axis=0), X.std(axis=0)
    skip = [unscaled is not None and bool(unscaled[j]) for j in range(X.shape[1])]
    for j in range(X.shape[1]):
        if skip[j]:
            means[j], scales[j] = 0.0, 1.0
    tops = [float(np.max(np.abs(X[:, j]))) if len(X) and not skip[j] else 0.0 for j in range(X.shape[1])]
    return means, scales, scale_problems(means, scales, tops, skip)


def scale_problems(means, scales, tops, skip=None):
    """The columns `standardize` cannot scale, as (column index, "overflow" or "constant", largest |value|):
    "overflow", values near the float limit, whose spread overflows (dividing by inf would zero the column);
    "constant", zero spread or only rounding noise (std <= 1e-12 max |x|). `skip` flags columns left as
    they are. Shared by `standard_scales` and the streaming statistics of a table read in chunks; copied
    by source into every generated module with it."""
    problems = []
    for j in range(len(scales)):
        if skip is not None and skip[j]:
            continue
        if not (np.isfinite(scales[j]) and np.isfinite(means[j])):
            problems.append((j, "overflow", float(tops[j])))
        elif not scales[j] > 1e-12 * tops[j]:
            problems.append((j, "constant", float(tops[j])))
    return problems


def _fit_stats(X: np.ndarray, names: tuple[str, ...], spans: Sequence[Span], where: _Where, rows_label: str = "",
               hint: str = "leave it out of the inputs", unscaled: frozenset[str] = frozenset()) -> Standardization:
    """What `standardize` fits on these rows (`standard_scales`), also on a fold's or a holdout's rows;
    a column it cannot scale is T150 at its span."""
    means, scales, problems = standard_scales(X, [name in unscaled for name in names])
    return stats_from_scales(names, spans, means, scales, problems, X[0] if len(X) else None, where, rows_label,
                             hint)


def stats_from_scales(names: tuple[str, ...], spans: Sequence[Span], means: np.ndarray, scales: np.ndarray,
                      problems: list, first_values: np.ndarray | None, where: _Where, rows_label: str = "",
                      hint: str = "leave it out of the inputs") -> Standardization:
    """The standardization of these means and scales, or T150 for each problem `standard_scales` found
    (also from a chunked table's streaming statistics); `first_values`: the first row, which a constant
    column holds throughout."""
    on = f" on {rows_label}" if rows_label else ""
    diags = []
    for j, why, top in problems:
        if why == "overflow":
            diags.append(where.diag("T150", f"input {_q(names[j])} of {_q(where.file)} holds values too large to "
                                    f"standardize (up to {_value(top)}; their spread overflows)", spans[j],
                                    "rescale the column (e.g. a feature dividing it by a power of ten)"))
        else:
            diags.append(where.diag("T150", f"input {_q(names[j])} of {_q(where.file)} is constant{on} "
                                    f"(every value is {_value(first_values[j])}); `standardize` would divide by "
                                    "zero", spans[j], hint))
    _raise_all(diags)
    return Standardization(names, tuple(float(m) for m in means), tuple(float(s) for s in scales))


def _saved_stats(std: Standardization, names: tuple[str, ...], where: _Where,
                 span: Span) -> tuple[np.ndarray, np.ndarray]:
    index = {n: i for i, n in enumerate(std.names)}
    diags = []
    means, scales = np.zeros(len(names)), np.ones(len(names))
    for j, name in enumerate(names):
        if name not in index:
            diags.append(where.diag("T151", f"the saved standardization has no stats for input {_q(name)}", span))
            continue
        means[j], scales[j] = std.means[index[name]], std.scales[index[name]]
        if not (np.isfinite(scales[j]) and scales[j] > 0 and np.isfinite(means[j])):
            diags.append(where.diag("T151", f"the saved standardization for input {_q(name)} is unusable "
                                    f"(mean {means[j]:g}, scale {scales[j]:g})", span))
    _raise_all(diags)
    return means, scales


def _frozen(a: np.ndarray) -> np.ndarray:
    a = np.array(a, copy=True)  # own the memory, so nothing outside can still write to it
    a.setflags(write=False)
    return a


# ---------------------------------------------------------------- rows and splits

def take_rows(data: BoundData, index: np.ndarray | Sequence[int]) -> BoundData:
    """The same binding restricted to some rows (positions or a boolean mask), order kept as given."""
    idx = np.asarray(index)
    if idx.dtype == bool:
        idx = np.flatnonzero(idx)
    idx = idx.astype(np.int64)
    # fancy indexing already makes a fresh array that nothing else holds: freeze it without a copy
    # (a second copy cost about half of a 5-fold split at 1e5 x 100)
    return replace(data, X=_read_only(np.ascontiguousarray(data.X[idx])), y=_read_only(data.y[idx]),
                   weights=_read_only(data.weights[idx]), rows=_read_only(data.rows[idx]))


def _read_only(fresh: np.ndarray) -> np.ndarray:
    fresh.setflags(write=False)
    return fresh


def split_holdout(data: BoundData, fraction: float, seed: int, *, span: Span = NO_SPAN,
                  source_name: str = "") -> tuple[BoundData, BoundData]:
    """(training part, held-out part): a seeded random share `fraction` of the rows is held out.

    The same data, fraction and seed always give the same split (numpy's default_rng(seed)). Each
    part keeps the original row order. When the standardization was fitted on these rows it is
    fitted again on the training part alone, so held-out rows never shape it.
    """
    where = _Where(data.file_label or str(data.source), source_name)
    n = data.n_rows
    if not (0.0 < fraction < 1.0):
        raise where.error("T170", f"holdout share must lie strictly between 0% and 100%, got {fraction * 100:g}%",
                          span, "write e.g. `holdout 20% seed 7`")
    k = int(round(fraction * n))
    if k < 1 or k >= n:
        raise where.error("T170", f"holding out {fraction * 100:g}% of {n} rows of {_q(where.file)} leaves "
                          f"{'no row to hold out' if k < 1 else 'no row to train on'}", span,
                          "use a larger table or another share")
    order = np.random.default_rng(seed).permutation(n)
    held_idx, train_idx = np.sort(order[:k]), np.sort(order[k:])
    if data.task == "margin" and data.target is not None and len(np.unique(data.y[train_idx])) < 2:
        raise where.error("T171", f"the training part of the holdout split of {_q(where.file)} holds one class only",
                          span, "try another seed or a smaller holdout share")
    return split_rows(data, train_idx, held_idx, span=span, source_name=source_name)


def split_rows(data: BoundData, train_idx: np.ndarray, held_idx: np.ndarray, *, span: Span = NO_SPAN,
               source_name: str = "", rows_label: str = "", hint: str = "leave it out of the inputs"
               ) -> tuple[BoundData, BoundData]:
    """(training part, held-out part) of the given row indices. When the standardization was fitted
    on `data`, it is fitted again on the training part alone (as a pipeline with a scaler would), so
    held-out rows never shape it; a column constant on the training part is T150 at `span`, its
    message naming `rows_label` (e.g. "the training rows of fold 2 of 5")."""
    where = _Where(data.file_label or str(data.source), source_name)
    train, held = take_rows(data, train_idx), take_rows(data, held_idx)
    if data.standardize_pending:
        # the statistics from the training part's own values: exact, and no held-out value can overflow them
        stats = _fit_stats(train.X, data.input_names, [span] * data.n_inputs, where,
                           rows_label or "the training part", hint, frozenset(data.unscaled))
        mean, scale = np.asarray(stats.means), np.asarray(stats.scales)

        def scaled(X: np.ndarray) -> np.ndarray:
            out = np.subtract(X, mean)
            out /= scale
            return _frozen(np.ascontiguousarray(out))
        train = replace(train, X=scaled(train.X), standardization=stats, standardization_fitted=True,
                        standardize_pending=False)
        held = replace(held, X=scaled(held.X), standardization=stats, standardization_fitted=False,
                       standardize_pending=False)
        return train, held
    if data.standardization is not None and data.standardization_fitted:
        std = data.standardization
        mean, scale = np.asarray(std.means), np.asarray(std.scales)
        raw_train = train.X * scale
        raw_train += mean
        refit = _fit_stats(raw_train, data.input_names, [span] * data.n_inputs, where, rows_label, hint,
                           frozenset(data.unscaled))
        del raw_train
        m2, s2 = np.asarray(refit.means), np.asarray(refit.scales)
        # (z scale + mean - m2) / s2 as one product and one sum, in place: a fold's copies are the table's
        # size, and the three temporaries of the plain formula cost more than the copies themselves
        ratio, shift = scale / s2, (mean - m2) / s2

        def rescaled(Z: np.ndarray) -> np.ndarray:
            out = np.multiply(Z, ratio)
            out += shift
            return _frozen(np.ascontiguousarray(out))
        train = replace(train, X=rescaled(train.X), standardization=refit)
        held = replace(held, X=rescaled(held.X), standardization=refit, standardization_fitted=False)
    return train, held
