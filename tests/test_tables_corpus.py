"""The corpus of broken and odd tables, run end to end: each case is a spec and the files it names,
with its expected outcome (an error code, the spec line it points at and what its message must
name, or success with the shape of the bound arrays).

Every case goes through two doors: `objc.tables.bind_table` (with the TableBinding the spec resolves
to) and the command line (`objc fit --json -o ...`: exit 1, one JSON document whose error carries a
line and column, no traceback, nothing written). Binding-level cases whose spans are built by hand
(no spec text) stay in tests/test_tables.py (BROKEN); a case lives in one of the two lists only.

The outcomes are objc's own rules (objc/tables.py's docstring table of codes); where a case checks
a file format's behaviour, the format's own documentation is named beside it.
"""

from __future__ import annotations

import gzip
import json
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable

import numpy as np
import pandas as pd
import pytest

from objc.cli import main
from objc.diagnostics import SpecError
from objc.frontend import check_text
from objc.tables import bind_table
from objc.training import task_of

YES_NO = "y: yes -> +1, no -> -1"
MARGIN = "mean logistic(y * s)"
RESIDUAL = "mean (y - s)^2"


def spec_text(file: str, target: str = YES_NO, inputs: str = "a, b", extra: str = "", loss: str = MARGIN) -> str:
    """Line 1 the table, line 2 the target, line 3 the inputs, line 4 on: `extra` clauses."""
    return (f'table t from "{file}"\n  target {target}\n  inputs {inputs}\n{extra}'
            f"learn w over inputs, b\nscore s = w . x + b\ngoal {loss} + 0.1 * l2sq(w)\n")


@dataclass(frozen=True)
class Case:
    id: str
    files: dict  # name -> str (UTF-8 text) | bytes | callable(path) | None (a folder)
    file: str  # the file the spec names
    code: str | None  # None: success
    line: int = 1  # the spec line the error points at (1 table, 2 target, 3 inputs, 4 extra clause)
    names: tuple[str, ...] = ()  # text the message must hold (file, column, rows)
    shape: tuple[int, int] | None = None  # success: X's shape
    spec: dict = field(default_factory=dict)  # spec_text keyword arguments
    hint: str = ""  # text the hint must hold


def _npz(**arrays) -> Callable[[Path], None]:
    return lambda p: np.savez(p, **arrays)


def _parquet(frame: pd.DataFrame) -> Callable[[Path], None]:
    return lambda p: frame.to_parquet(p)


def _gz(text: str) -> Callable[[Path], None]:
    return lambda p: p.write_bytes(gzip.compress(text.encode("utf-8")))


GOOD = "a,b,y\n1,2,yes\n3,5,no\n4,4,yes\n"
WEIGHTED = "  rowweight w\n"

CORPUS = [
    # ---- shape of the file
    Case("ragged-long-row", {"d.csv": "a,b,y\n1,2,yes\n1,2,3,4\n"}, "d.csv", "T102", 1, ("'d.csv'", "line 3")),
    # regression: one record with exactly one field too many used to make pandas take the first column
    # as the index and shift every name (reported as "'b' is not numeric"); pandas.read_csv docs,
    # index_col=False: "force pandas to not use the first column as the index"
    Case("ragged-one-extra-field", {"d.csv": "a,b,y\n1,2,yes,extra\n3,4,no,x\n"}, "d.csv", "T102", 1,
         ("'d.csv'", "line 2", "more fields")),
    # a short record: pandas fills the missing trailing field, which then is a missing value of its row
    Case("ragged-short-row", {"d.csv": "a,b,y\n1,2,yes\n3,4\n5,6,no\n"}, "d.csv", "T120", 2, ("'y'", "row 2")),
    Case("empty-file", {"d.csv": ""}, "d.csv", "T103", 1, ("'d.csv'", "empty")),
    Case("header-only", {"d.csv": "a,b,y\n"}, "d.csv", "T103", 1, ("'d.csv'", "no data rows")),
    Case("directory", {"d.csv": None}, "d.csv", "T102", 1, ("'d.csv'", "folder")),
    Case("missing-file", {}, "gone.csv", "T100", 1, ("'gone.csv'", "not found")),
    Case("duplicate-name", {"d.csv": "a,b,a,y\n1,2,3,yes\n4,5,6,no\n"}, "d.csv", "T104", 1, ("'a'", "twice")),
    # regression: an empty header cell became pandas' invented "Unnamed: 1" (which `all` would pick)
    Case("empty-name", {"d.csv": "a,,b,y\n1,9,2,yes\n3,8,5,no\n"}, "d.csv", "T104", 1, ("column 2", "no name")),
    Case("trailing-separator", {"d.csv": "a,b,y,\n1,2,yes,\n3,5,no,\n"}, "d.csv", "T104", 1, ("column 4",)),
    # RFC 4180 section 2.6: a field in double quotes may hold line breaks; here in a label
    Case("quoted-newline-in-label", {"d.csv": 'a,b,y\n1,2,yes\n3,5,"no\nreally"\n'}, "d.csv", "T130", 2,
         ("'y'", "row 2", "'no\\nreally'")),
    Case("quoted-newline-in-unused-column", {"d.csv": 'a,b,y,note\n1,2,yes,"two\nlines"\n3,5,no,x\n'}, "d.csv",
         None, shape=(2, 2)),
    Case("thousands-separator", {"d.csv": 'a,b,y\n"1,000",2,yes\n"2,500",5,no\n'}, "d.csv", "T112", 3,
         ("'a'", "rows 1, 2", "'1,000'"), hint="thousands"),
    Case("crlf-line-ends", {"d.csv": "a,b,y\r\n1,2,yes\r\n3,5,no\r\n"}, "d.csv", None, shape=(2, 2)),
    Case("blank-lines-at-end", {"d.csv": GOOD + "\n\n"}, "d.csv", None, shape=(3, 2)),
    # ---- encodings and compression
    # Unicode Standard, section 23.8: U+FEFF at the start of a file is a byte order mark, not text
    Case("utf8-bom", {"d.csv": "\ufeff" + GOOD}, "d.csv", None, shape=(3, 2)),
    Case("latin1-bytes", {"d.csv": "a,b,y\n1,2,oui\n3,5,caf\xe9\n".encode("latin-1")}, "d.csv", "T102", 1,
         ("'d.csv'", "0xe9", "line 3", "UTF-8"), spec={"target": 'y: oui -> +1, "café" -> -1'}, hint="iconv"),
    Case("utf16", {"d.csv": GOOD.encode("utf-16")}, "d.csv", "T102", 1, ("'d.csv'", "UTF-8"), hint="UTF-16"),
    Case("nul-byte-in-cell", {"d.csv": b"a,b,y\n1,2,yes\n3,\x005,no\n"}, "d.csv", "T112", 3, ("'b'", "row 2")),
    # RFC 1952 (gzip): the .gz suffix means gzip-compressed bytes; pandas decompresses by the suffix
    Case("gzip-csv", {"d.csv.gz": _gz(GOOD)}, "d.csv.gz", None, shape=(3, 2)),
    Case("gz-suffix-plain-text", {"d.csv.gz": GOOD}, "d.csv.gz", "T102", 1, ("'d.csv.gz'",)),
    # ---- targets and labels
    Case("one-class", {"d.csv": "a,b,y\n1,2,yes\n3,5,yes\n"}, "d.csv", "T132", 2, ("'y'", "one class")),
    Case("label-outside-map", {"d.csv": "a,b,y\n1,2,yes\n3,5,maybe\n4,4,no\n"}, "d.csv", "T130", 2,
         ("'maybe'", "row 2"), hint="maybe -> -1"),
    Case("label-with-space", {"d.csv": "a,b,y\n1,2, yes\n3,5,no\n"}, "d.csv", "T130", 2, ("' yes'", "row 1")),
    Case("real-target-with-text", {"d.csv": "a,b,y\n1,2,3.5\n3,5,lots\n"}, "d.csv", "T133", 2, ("'y'", "row 2"),
         spec={"target": "y", "loss": RESIDUAL}),
    # ---- values
    Case("all-missing-column", {"d.csv": "a,b,y\n,2,yes\nNA,5,no\n"}, "d.csv", "T120", 3, ("'a'", "rows 1, 2")),
    Case("all-missing-dropped", {"d.csv": "a,b,y\n,2,yes\nNA,5,no\n"}, "d.csv", "T121", 1, ("'d.csv'",),
         spec={"extra": "  missing drop\n"}),
    # pandas' default missing-value spellings (pandas.read_csv, na_values), in inputs and in the target:
    # dropped rows under `missing drop`, by objc and by the generated module alike
    Case("missing-spellings-dropped", {"d.csv": "a,b,y\n1,2,yes\n#N/A,5,no\n3,NULL,yes\n4,4,#N/A\n5,1,no\n"
                                                "6,n/a,yes\n7,3,no\n"}, "d.csv", None, shape=(3, 2),
         spec={"extra": "  missing drop\n"}),
    # IEEE 754 infinities as pandas reads them ("inf", "-inf", "Infinity" and an overflowing 1e999)
    Case("infinite-values", {"d.csv": "a,b,y\ninf,2,yes\n-Infinity,5,no\n1,1e999,yes\n"}, "d.csv", "T120", 3,
         ("'a'", "rows 1, 2")),
    Case("text-in-numeric", {"d.csv": "a,b,y\n1,2,yes\n3,five,no\n4,4,yes\n"}, "d.csv", "T112", 3,
         ("'b'", "row 2", "'five'")),
    Case("hex-literal", {"d.csv": "a,b,y\n0x10,2,yes\n3,5,no\n"}, "d.csv", "T112", 3, ("'a'", "row 1")),
    Case("zero-variance-standardize", {"d.csv": "a,b,y\n1,7,yes\n2,7,no\n3,7,yes\n"}, "d.csv", "T150", 3,
         ("'b'", "constant"), spec={"extra": "  standardize\n"}),
    # one rule for objc and its generated modules: a spread of rounding noise (7 and the next double up,
    # std ~4e-16 against 1e-12 x 7) is a constant column; the modules once refused only an exact zero
    Case("rounding-noise-standardize", {"d.csv": "a,b,y\n1,7,yes\n2,7.000000000000001,no\n3,7,yes\n"}, "d.csv",
         "T150", 3, ("'b'", "constant"), spec={"extra": "  standardize\n"}),
    # regression: values near the float limit (IEEE 754 double max ~1.8e308) made the spread overflow to
    # inf, and dividing by it zeroed the column in silence
    Case("overflowing-standardize", {"d.csv": "a,b,y\n1e308,2,yes\n-1e308,5,no\n1,4,yes\n"}, "d.csv", "T150", 3,
         ("'a'", "too large"), spec={"extra": "  standardize\n"}),
    Case("negative-row-weight", {"d.csv": "a,b,y,w\n1,2,yes,1\n3,5,no,-2\n4,4,yes,1\n"}, "d.csv", "T140", 4,
         ("'w'", "row 2", "negative"), spec={"extra": WEIGHTED}),
    Case("missing-row-weight", {"d.csv": "a,b,y,w\n1,2,yes,1\n3,5,no,\n4,4,yes,1\n"}, "d.csv", "T120", 4,
         ("'w'", "row 2"), spec={"extra": WEIGHTED}),
    Case("zero-row-weights", {"d.csv": "a,b,y,w\n1,2,yes,0\n3,5,no,0\n"}, "d.csv", "T141", 4, ("'w'", "zero"),
         spec={"extra": WEIGHTED}),
    # ---- sizes
    Case("one-row-real-target", {"d.csv": "a,b,y\n1,2,3\n"}, "d.csv", None, shape=(1, 2),
         spec={"target": "y", "loss": RESIDUAL}),
    Case("one-row-margin", {"d.csv": "a,b,y\n1,2,yes\n"}, "d.csv", "T132", 2, ("one class",)),
    Case("more-columns-than-rows", {"d.csv": "a,b,c,d,e,y\n1,2,3,4,5,yes\n6,5,9,1,0,no\n"}, "d.csv", None,
         shape=(2, 5), spec={"inputs": "a, b, c, d, e"}),
    # ---- other formats
    # NumPy docs, numpy.load: allow_pickle=False refuses object arrays, which need pickle
    Case("npz-object-array", {"d.npz": _npz(a=np.array([1, "x"], dtype=object), b=np.ones(2),
                                            y=np.array(["yes", "no"]))}, "d.npz", "T102", 1, ("'d.npz'", "pickle")),
    Case("npz-text-labels", {"d.npz": _npz(a=np.array([1.0, 2.0]), b=np.array([0.5, 0.0]),
                                           y=np.array(["yes", "no"]))}, "d.npz", None, shape=(2, 2)),
    Case("npz-empty", {"d.npz": _npz()}, "d.npz", "T103", 1, ("'d.npz'", "no columns")),
    Case("parquet-text-in-numbers", {"d.parquet": _parquet(pd.DataFrame(
        {"a": ["1", "2", "x"], "b": [1.0, 2.0, 3.0], "y": ["yes", "no", "yes"]}))}, "d.parquet", "T112", 3,
         ("'a'", "row 3", "'x'")),
    Case("parquet-dates", {"d.parquet": _parquet(pd.DataFrame(
        {"a": pd.to_datetime(["2020-01-01", "2020-01-02"]), "b": [1.0, 2.0], "y": ["yes", "no"]}))}, "d.parquet",
         "T112", 3, ("'a'", "rows 1, 2")),
    Case("parquet-nested-lists", {"d.parquet": _parquet(pd.DataFrame(
        {"a": [[1, 2], [3], [4]], "b": [1.0, 2.0, 3.0], "y": ["yes", "no", "yes"]}))}, "d.parquet", "T112", 3,
         ("'a'",)),
    Case("parquet-booleans", {"d.parquet": _parquet(pd.DataFrame(
        {"a": [True, False, True], "b": [1.0, 2.0, 3.0], "y": ["yes", "no", "yes"]}))}, "d.parquet", None,
         shape=(3, 2)),
    Case("parquet-garbage", {"d.parquet": GOOD}, "d.parquet", "T102", 1, ("'d.parquet'",)),
]

IDS = [c.id for c in CORPUS]


def _materialize(root: Path, case: Case) -> None:
    for name, content in case.files.items():
        p = root / name
        if content is None:
            p.mkdir()
        elif isinstance(content, str):
            p.write_text(content, encoding="utf-8")
        elif isinstance(content, bytes):
            p.write_bytes(content)
        else:
            content(p)
    (root / "s.objc").write_text(spec_text(case.file, **case.spec), encoding="utf-8")


def test_corpus_is_large_and_varied():
    assert len(CORPUS) >= 30 and len(set(IDS)) == len(IDS)
    assert len({c.code for c in CORPUS if c.code}) >= 12 and sum(c.code is None for c in CORPUS) >= 5


@pytest.mark.parametrize("case", CORPUS, ids=IDS)
def test_through_bind_table(tmp_path, case):
    _materialize(tmp_path, case)
    checked = check_text((tmp_path / "s.objc").read_text(encoding="utf-8"), "s.objc")
    assert checked.accepted
    binding = checked.spec.table
    if case.code is None:
        data = bind_table(binding, tmp_path, task_of(checked), source_name="s.objc")
        assert data.X.shape == case.shape and np.isfinite(data.X).all()
        return
    with pytest.raises(SpecError) as info:
        bind_table(binding, tmp_path, task_of(checked), source_name="s.objc")
    codes = [d.code for d in info.value.diagnostics]
    assert case.code in codes, f"expected {case.code}, got {codes}: {info.value}"
    d = next(d for d in info.value.diagnostics if d.code == case.code)
    assert d.span.line == case.line, d.render()
    for want in case.names:
        assert want in d.message, d.message
    assert case.hint in d.hint, d.hint


@pytest.mark.parametrize("case", CORPUS, ids=IDS)
def test_through_the_command_line(tmp_path, case, capsys):
    _materialize(tmp_path, case)
    out = tmp_path / "out" / "m.json"
    code = main(["fit", str(tmp_path / "s.objc"), "--json", "-o", str(out)])
    stdout, stderr = capsys.readouterr()
    assert "Traceback" not in stdout + stderr
    doc = json.loads(stdout)  # exactly one JSON document
    if case.code is None:
        assert code == 0 and doc["ok"] and out.exists() and out.with_suffix(".npz").exists()
        assert len(doc["inputs"]) == case.shape[1]
        return
    assert code == 1 and doc["ok"] is False and "internal_error" not in doc
    err = next(e for e in doc["errors"] if e["code"] == case.code)
    assert err["line"] == case.line and err["column"] >= 1
    for want in case.names:
        assert want in err["message"], err["message"]
    assert not (tmp_path / "out").exists() or not any((tmp_path / "out").iterdir())  # nothing written


def corpus_figures() -> dict:
    """Counts for docs/reliability.md: cases, how many end in an error or in success, codes seen."""
    codes = sorted({c.code for c in CORPUS if c.code})
    return {"cases": len(CORPUS), "errors": sum(c.code is not None for c in CORPUS),
            "successes": sum(c.code is None for c in CORPUS), "codes": codes,
            "regressions": [c.id for c in CORPUS if c.id in REGRESSIONS]}


# cases that failed before the fix in objc/tables.py that they guard
REGRESSIONS = ("ragged-one-extra-field", "empty-name", "trailing-separator", "overflowing-standardize",
               "latin1-bytes", "utf16", "thousands-separator")


CSV_CASES = [c for c in CORPUS if c.file.endswith(".csv") and all(
    isinstance(v, str) for v in c.files.values())]


@pytest.mark.parametrize("case", CSV_CASES, ids=[c.id for c in CSV_CASES])
def test_through_the_generated_module(tmp_path, case):
    """The generated NumPy module reads a CSV by itself (`load_table`, for its command line): it must
    accept and refuse exactly what objc does, and bind the same rows."""
    from objc.backends import numpy_module as nm
    _materialize(tmp_path, case)
    checked = check_text((tmp_path / "s.objc").read_text(encoding="utf-8"), "s.objc")
    ns = nm.load_module(nm.emit_module(checked))
    path = str(tmp_path / case.file)
    if case.code is None:
        X, y, c, names, stats = ns["load_table"](path)
        data = bind_table(checked.spec.table, tmp_path, task_of(checked), source_name="s.objc")
        assert X.shape == case.shape and tuple(names) == tuple(data.input_names)
        np.testing.assert_allclose(X, data.X, rtol=1e-12)
        np.testing.assert_array_equal(y, data.y)
        return
    with pytest.raises(ns["TableError"]):
        ns["load_table"](path)
