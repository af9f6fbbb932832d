"""objc.tables: reading data files, binding columns by a TableBinding, and every data check.

Bindings are built directly (no spec parsing here); data files are written into tmp_path.
"""

from __future__ import annotations

import re
from dataclasses import replace
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from objc import syntax_tree as st
from objc.diagnostics import Diagnostic, SpecError
from objc.source_text import Span
from objc.tables import (BoundData, Standardization, bind_table, read_table, split_holdout, take_rows)
from objc.typed_tree import DerivedFeature, LabelMap, TableBinding

SPEC = "spec.objc"
TABLE = Span(1, 1, 1, 30)
TARGET = Span(2, 3, 2, 30)
INPUTS = Span(3, 3, 3, 40)
FEATURE = Span(4, 3, 4, 30)
ROWW = Span(5, 3, 5, 20)
CLASSW = Span(6, 3, 6, 30)
HOLD = Span(7, 3, 7, 25)


def item(name: str, kind: str = "column", span: Span = INPUTS) -> st.InputItem:
    return st.InputItem(kind, name, span)


def columns(*names: str) -> tuple[st.InputItem, ...]:
    return tuple(item(n) for n in names)


def binding(path: str = "data.csv", **kw) -> TableBinding:
    base = dict(target="y", target_span=TARGET, inputs=columns("a", "b"), inputs_span=INPUTS)
    base.update(kw)
    return TableBinding("t", path, TABLE, **base)


def yes_no() -> LabelMap:
    return LabelMap((("yes", 1.0), ("no", -1.0)), TARGET)


def feature(name: str, expr: st.Expr, reads: tuple[str, ...] = ()) -> DerivedFeature:
    return DerivedFeature(name, expr, reads, FEATURE)


def name(n: str) -> st.Name:
    return st.Name(n, FEATURE)


def call(func: str, *args: st.Expr) -> st.Call:
    return st.Call(func, tuple(args), FEATURE, FEATURE)


def num(v: float) -> st.Number:
    return st.Number(v, FEATURE)


def write(tmp_path: Path, text: str, file: str = "data.csv") -> Path:
    p = tmp_path / file
    p.write_text(text, encoding="utf-8")
    return p


def bind(tmp_path: Path, b: TableBinding, task: str = "margin", **kw) -> BoundData:
    return bind_table(b, tmp_path, task, source_name=SPEC, **kw)


def error_of(fn, code: str) -> Diagnostic:
    """Run fn, expect a SpecError holding a diagnostic with `code`; return that diagnostic."""
    with pytest.raises(SpecError) as info:
        fn()
    codes = [d.code for d in info.value.diagnostics]
    assert code in codes, f"expected {code}, got {codes}: {info.value}"
    return next(d for d in info.value.diagnostics if d.code == code)


def listed_rows(message: str) -> list[int]:
    """The row numbers a message lists ('row 3' / 'rows 3, 7, 9, ...')."""
    m = re.search(r"\brows? ((?:\d+, )*\d+)", message)
    assert m, f"no row list in: {message}"
    return [int(x) for x in m.group(1).split(", ")]


# a small clean table used by most cases: a, b numeric; y yes/no; w weights; s text
CLEAN = "a,b,y,w,s\n1,10,yes,1,p\n2,20,no,2,q\n3,31,yes,1,r\n4,39,no,0.5,s\n5,52,yes,1,t\n6,58,no,1,u\n"


# ============================================================== the broken corpus
# Each case: files to write, the binding, the task, then what the error must say: code, span, the
# column it names, the rows it lists (None when the problem is not about rows). These are the cases
# whose bindings are built by hand; every case a spec can state (ragged rows, empty files, duplicate
# names, one class, weights, constant columns under standardize, ...) lives in the one end-to-end
# corpus, tests/test_tables_corpus.py, which runs it through bind_table and the command line.

def _case(id, files, b, code, span, column, rows, task="margin", extra=None):
    return pytest.param(files, b, task, code, span, column, rows, extra or {}, id=id)


NAN_ROWS = "a,b,y\n1,2,yes\n,3,no\n3,4,no\n4,inf,no\n5,6,yes\n"
MANY_BAD = "a,b,y\n" + "".join(f"{i},{i * 2},{'maybe' if i in (2, 3, 5, 7, 8, 9, 11) else ('yes' if i % 2 else 'no')}\n"
                              for i in range(1, 13))

BROKEN = [
    _case("missing-file", {}, binding("nowhere.csv"), "T100", TABLE, None, None),
    _case("unknown-suffix", {"data.xlsx": "a,b\n1,2\n"}, binding("data.xlsx"), "T101", TABLE, None, None),
    _case("npy-not-2d", {"data.npy": np.arange(5.0)}, binding("data.npy"), "T102", TABLE, None, None),
    _case("npy-garbage", {"data.npy": b"this is not an array"}, binding("data.npy"), "T102", TABLE, None, None),
    _case("parquet-garbage", {"data.parquet": "a,b\n1,2\n"}, binding("data.parquet"), "T102", TABLE, None, None),
    _case("npz-2d-column", {"data.npz": {"a": np.ones((3, 2)), "b": np.ones(3)}}, binding("data.npz"), "T102",
          TABLE, "a", None),
    _case("npz-columns-mismatch", {"data.npz": {"data": np.ones((3, 2)), "columns": np.array(["a", "b", "y"])}},
          binding("data.npz"), "T102", TABLE, None, None),
    _case("csv-not-text", {"data.csv": b"\xff\xfe\x00\x81\x00\xc3(\n\x9f,\x80\n"}, binding(), "T102", TABLE,
          None, None),
    _case("input-missing", {"data.csv": CLEAN}, binding(inputs=columns("a", "bb"), label_map=yes_no()), "T110",
          INPUTS, "bb", None, extra={"hint": "did you mean 'b'?"}),
    _case("target-missing", {"data.csv": CLEAN}, binding(target="late", label_map=yes_no()), "T110", TARGET,
          "late", None),
    _case("rowweight-missing", {"data.csv": CLEAN},
          binding(label_map=yes_no(), row_weight="ww", row_weight_span=ROWW), "T110", ROWW, "ww", None,
          extra={"hint": "did you mean 'w'?"}),
    _case("excluded-missing", {"data.csv": CLEAN},
          binding(label_map=yes_no(), inputs=(item("all", "all"),), excluded=(item("zz"),)), "T110", INPUTS, "zz",
          None),
    _case("feature-reads-missing", {"data.csv": CLEAN},
          binding(label_map=yes_no(), features=(feature("f", call("log1p", st.Name("itemz", Span(4, 20, 4, 25)))),)),
          "T110", Span(4, 20, 4, 25), "itemz", None),
    _case("pattern-matches-nothing", {"data.csv": CLEAN},
          binding(label_map=yes_no(), inputs=(item("sensor_*", "pattern"),)), "T111", INPUTS, "sensor_*", None),
    _case("all-finds-nothing", {"data.csv": "y,s\nyes,p\nno,q\n"},
          binding(label_map=yes_no(), inputs=(item("all", "all"),)), "T111", INPUTS, None, None),
    _case("input-not-numeric", {"data.csv": "a,b,y\n1,2,yes\n2,x,no\n3,4,yes\n4,?,no\n"},
          binding(label_map=yes_no()), "T112", INPUTS, "b", [2, 4]),
    _case("target-as-input", {"data.csv": CLEAN}, binding(label_map=yes_no(), inputs=columns("a", "y")), "T113",
          INPUTS, "y", None),
    _case("feature-name-taken", {"data.csv": CLEAN},
          binding(label_map=yes_no(), features=(feature("b", call("abs", name("a"))),)), "T114", FEATURE, "b", None),
    _case("nan-and-inf", {"data.csv": NAN_ROWS}, binding(label_map=yes_no()), "T120", INPUTS, "a", [2]),
    _case("inf-in-b", {"data.csv": NAN_ROWS}, binding(label_map=yes_no(), inputs=columns("b")), "T120", INPUTS, "b",
          [4]),
    _case("all-rows-dropped", {"data.csv": "a,b,y\n,1,yes\n2,,no\n"}, binding(label_map=yes_no(), missing="drop"),
          "T121", TABLE, None, None),
    _case("label-not-in-map", {"data.csv": MANY_BAD}, binding(label_map=yes_no()), "T130", TARGET, "y",
          [2, 3, 5, 7, 8], extra={"in_message": "(7 rows in all)", "hint": 'maybe -> -1'}),
    _case("zero-one-without-map", {"data.csv": "a,b,y\n1,2,1\n2,3,0\n3,4,1\n"}, binding(), "T131", TARGET, "y", [2],
          extra={"hint": "target y: 1 -> +1, 0 -> -1"}),
    _case("real-target-text", {"data.csv": "a,b,y\n1,2,3.5\n2,3,n/a?\n3,4,1\n"}, binding(), "T133", TARGET, "y", [2],
          task="residual"),
    _case("label-map-bad-label", {"data.csv": CLEAN}, binding(label_map=LabelMap((("yes", 2.0), ("no", -1.0)), TARGET)),
          "T134", TARGET, None, None),
    _case("class-weights-on-real-target", {"data.csv": "a,b,y\n1,2,0.5\n2,3,1.5\n"},
          binding(class_weights=((1.0, 3.0),), class_weights_span=CLASSW), "T142", CLASSW, None, None,
          task="residual"),
    _case("unknown-function", {"data.csv": CLEAN},
          binding(label_map=yes_no(), features=(feature("f", call("log2p", name("a"))),)), "E218", FEATURE, None, None,
          extra={"hint": "log1p"}),
    _case("exponent-not-literal", {"data.csv": CLEAN},
          binding(label_map=yes_no(), features=(feature("f", st.Power(name("a"), name("b"), FEATURE)),)), "E219",
          FEATURE, None, None),
    _case("mean-in-feature", {"data.csv": CLEAN},
          binding(label_map=yes_no(), features=(feature("f", st.Aggregate("mean", name("a"), FEATURE)),)), "E217",
          FEATURE, None, None),
    _case("feature-undefined", {"data.csv": "a,b,y\n1,2,yes\n0,3,no\n2,4,yes\n0,1,no\n"},
          binding(label_map=yes_no(), features=(feature("loga", call("log", name("a"))),)), "T161", FEATURE, "loga",
          [2, 4]),
]


def _materialize(tmp_path: Path, files: dict) -> None:
    for file, content in files.items():
        p = tmp_path / file
        if isinstance(content, str):
            p.write_text(content, encoding="utf-8")
        elif isinstance(content, bytes):
            p.write_bytes(content)
        elif isinstance(content, dict):
            np.savez(p, **content)
        else:
            np.save(p, content)


@pytest.mark.parametrize("files,b,task,code,span,column,rows,extra", BROKEN)
def test_broken_table_is_reported_at_its_clause(tmp_path, files, b, task, code, span, column, rows, extra):
    _materialize(tmp_path, files)
    d = error_of(lambda: bind(tmp_path, b, task), code)
    assert d.severity == "error"
    assert d.source_name == SPEC
    assert d.span == span
    if code not in ("T113", "T134", "T142", "E217", "E218", "E219"):
        assert f"'{b.path}'" in d.message, d.message  # the file is named
    if column is not None:
        assert repr(column) in d.message, d.message
    if rows is not None:
        assert listed_rows(d.message) == rows
    for key, want in extra.items():
        where = d.hint if key == "hint" else d.message
        assert want in where, where
    rendered = d.render()
    assert rendered.startswith(f"{SPEC}:{span.line}:{span.column}: error [{code}]")


def test_corpus_covers_many_codes():
    codes = {p.values[3] for p in BROKEN}
    assert len(BROKEN) >= 15 and len(codes) >= 15


def test_several_missing_columns_reported_together(tmp_path):
    write(tmp_path, CLEAN)
    b = binding(inputs=columns("aa", "bb"), label_map=yes_no(), row_weight="ww", row_weight_span=ROWW)
    with pytest.raises(SpecError) as info:
        bind(tmp_path, b)
    named = sorted(re.search(r"'(\w+)'", d.message).group(1) for d in info.value.diagnostics)
    assert named == ["aa", "bb", "ww"]
    assert all(d.code == "T110" for d in info.value.diagnostics)


def test_row_list_is_capped_at_five(tmp_path):
    rows = "\n".join(f"{i},{'x' if i > 3 else i},yes" for i in range(1, 21))
    write(tmp_path, "a,b,y\n" + rows + "\n")
    d = error_of(lambda: bind(tmp_path, binding(label_map=yes_no())), "T112")
    assert listed_rows(d.message) == [4, 5, 6, 7, 8]
    assert "(17 rows in all)" in d.message


def test_schema_input_missing_names_it(tmp_path):
    write(tmp_path, CLEAN)
    d = error_of(lambda: bind(tmp_path, binding(label_map=yes_no()), input_names=("a", "c")), "T110")
    assert "'c'" in d.message and "'data.csv'" in d.message and d.span == INPUTS


def test_saved_stats_missing_an_input(tmp_path):
    write(tmp_path, CLEAN)
    stats = Standardization(("a",), (0.0,), (1.0,))
    d = error_of(lambda: bind(tmp_path, binding(label_map=yes_no()), standardization=stats), "T151")
    assert "'b'" in d.message


# ============================================================== holdout errors

def _bound_pm(tmp_path: Path, n: int, ys: list[str] | None = None) -> BoundData:
    ys = ys or ["yes" if i % 2 else "no" for i in range(n)]
    write(tmp_path, "a,b,y\n" + "".join(f"{i},{i * i % 7},{ys[i]}\n" for i in range(n)))
    return bind(tmp_path, binding(label_map=yes_no()))


@pytest.mark.parametrize("fraction", [0.0, 1.0, 20.0, -0.1])
def test_holdout_fraction_outside_unit_interval(tmp_path, fraction):
    data = _bound_pm(tmp_path, 10)
    d = error_of(lambda: split_holdout(data, fraction, 7, span=HOLD, source_name=SPEC), "T170")
    assert d.span == HOLD and d.source_name == SPEC


def test_holdout_that_leaves_a_part_empty(tmp_path):
    data = _bound_pm(tmp_path, 3)
    d = error_of(lambda: split_holdout(data, 0.1, 7, span=HOLD, source_name=SPEC), "T170")
    assert "'data.csv'" in d.message and "3 rows" in d.message


def test_holdout_training_part_with_one_class(tmp_path):
    # holding out 90% of 10 rows leaves a single training row, so one class whatever the seed
    data = _bound_pm(tmp_path, 10)
    d = error_of(lambda: split_holdout(data, 0.9, 3, span=HOLD, source_name=SPEC), "T171")
    assert d.span == HOLD and "'data.csv'" in d.message


# ============================================================== reading formats

FRAME = pd.DataFrame({"x1": [0.5, 1.5, -2.0, 3.25], "x2": [1, 2, 3, 4], "z": [9.0, 8.0, 7.5, 6.0]})


def _write_all_formats(tmp_path: Path) -> dict[str, Path]:
    paths = {"csv": tmp_path / "t.csv", "npy": tmp_path / "t.npy", "npz_cols": tmp_path / "cols.npz",
             "npz_data": tmp_path / "data.npz", "parquet": tmp_path / "t.parquet", "tsv": tmp_path / "t.tsv",
             "csv_gz": tmp_path / "t.csv.gz"}
    FRAME.to_csv(paths["csv"], index=False)
    FRAME.to_csv(paths["csv_gz"], index=False)
    FRAME.to_csv(paths["tsv"], index=False, sep="\t")
    np.save(paths["npy"], FRAME.to_numpy(dtype=float))
    np.savez(paths["npz_cols"], **{c: FRAME[c].to_numpy() for c in FRAME.columns})
    np.savez(paths["npz_data"], data=FRAME.to_numpy(dtype=float), columns=np.array(FRAME.columns, dtype=str))
    FRAME.to_parquet(paths["parquet"])
    return paths


def test_every_format_reads_the_same_columns(tmp_path):
    paths = _write_all_formats(tmp_path)
    for kind, p in paths.items():
        cols = read_table(p, span=TABLE, source_name=SPEC)
        names = [f"c{j}" for j in range(3)] if kind == "npy" else list(FRAME.columns)
        assert list(cols) == names, kind
        for got, want in zip(cols.values(), FRAME.columns):
            np.testing.assert_array_equal(got.astype(float), FRAME[want].to_numpy(dtype=float), err_msg=kind)


def test_every_format_binds_to_the_same_arrays(tmp_path):
    paths = _write_all_formats(tmp_path)
    results = []
    for kind, p in paths.items():
        a, b, t = ("c0", "c1", "c2") if kind == "npy" else ("x1", "x2", "z")
        bb = binding(p.name, target=t, inputs=columns(a, b))
        results.append(bind(tmp_path, bb, "residual"))
    for r in results:
        np.testing.assert_array_equal(r.X, FRAME[["x1", "x2"]].to_numpy(dtype=float))
        np.testing.assert_array_equal(r.y, FRAME["z"].to_numpy())
        assert r.X.dtype == np.float64 and r.X.flags.c_contiguous


def test_read_table_keeps_text_columns(tmp_path):
    write(tmp_path, "n,s\n1,abc\n2,\n3,d e\n")
    cols = read_table(tmp_path / "data.csv", span=TABLE, source_name=SPEC)
    assert cols["n"].dtype.kind == "i"
    assert cols["s"][0] == "abc" and cols["s"][2] == "d e" and pd.isna(cols["s"][1])


def test_read_table_errors_name_the_file(tmp_path):
    d = error_of(lambda: read_table(tmp_path / "gone.csv", span=TABLE, source_name=SPEC), "T100")
    assert "gone.csv" in d.message and d.span == TABLE


def test_parquet_nullable_integers_become_nan(tmp_path):
    frame = pd.DataFrame({"a": pd.array([1, None, 3], dtype="Int64"), "y": [1.0, 2.0, 3.0]})
    frame.to_parquet(tmp_path / "t.parquet")
    cols = read_table(tmp_path / "t.parquet", span=TABLE, source_name=SPEC)
    assert cols["a"].dtype == np.float64 and np.isnan(cols["a"][1]) and cols["a"][2] == 3.0
    d = error_of(lambda: bind(tmp_path, binding("t.parquet", inputs=columns("a")), "residual"), "T120")
    assert listed_rows(d.message) == [2]


def test_data_path_overrides_spec_path(tmp_path):
    write(tmp_path, CLEAN)
    other = tmp_path / "elsewhere"
    other.mkdir()
    write(other, "a,b,y\n5,6,no\n7,8,yes\n", "fresh.csv")
    data = bind(tmp_path, binding(label_map=yes_no()), data_path=other / "fresh.csv")
    np.testing.assert_array_equal(data.X, [[5, 6], [7, 8]])
    assert data.source == other / "fresh.csv"


def test_file_span_points_at_the_validation_clause(tmp_path):
    val = Span(8, 3, 8, 30)
    d = error_of(lambda: bind(tmp_path, binding(label_map=yes_no()), data_path=tmp_path / "val.csv", file_span=val),
                 "T100")
    assert d.span == val and "val.csv" in d.message


# ============================================================== selection

SENSORS = ("id,sensor_1,sensor_2,y,sensor_9,note,w,other\n"
           "1,0.1,5,yes,9,a,1,3\n2,0.4,6,no,8,b,2,1\n3,0.2,4,yes,7,c,1,4\n4,0.9,2,no,6,d,1,1\n")


def test_pattern_selects_in_file_order_minus_except(tmp_path):
    write(tmp_path, SENSORS)
    b = binding(label_map=yes_no(), inputs=(item("other"), item("sensor_*", "pattern")), excluded=(item("sensor_9"),))
    data = bind(tmp_path, b)
    assert data.input_names == ("other", "sensor_1", "sensor_2")
    np.testing.assert_array_equal(data.X[:, 0], [3, 1, 4, 1])


def test_all_takes_numeric_columns_except_target_weight_and_excluded(tmp_path):
    write(tmp_path, SENSORS)
    b = binding(label_map=yes_no(), inputs=(item("all", "all"),), excluded=(item("id"),), row_weight="w",
                row_weight_span=ROWW)
    data = bind(tmp_path, b)
    assert data.input_names == ("sensor_1", "sensor_2", "sensor_9", "other")
    assert [w.code for w in data.warnings] == ["T190"] and "'note'" in data.warnings[0].message


def test_all_refuses_a_numeric_column_with_stray_text_with_its_rows(tmp_path):
    # regression: `inputs all except` used to leave out 'sensor_2' (one stray text cell) with only a
    # warning printed last; a column that is mostly numbers is meant as an input, so it is an error
    write(tmp_path, SENSORS.replace("2,0.4,6,no", "2,0.4,n/a?,no"))
    b = binding(label_map=yes_no(), inputs=(item("all", "all"),), excluded=(item("id"),), row_weight="w",
                row_weight_span=ROWW)
    with pytest.raises(SpecError) as err:
        bind(tmp_path, b)
    [d] = [d for d in err.value.diagnostics if "sensor_2" in d.message]
    assert d.code == "T112" and "row 2" in d.message


def test_pattern_skips_target_and_row_weight(tmp_path):
    write(tmp_path, "x_a,x_y,x_w\n1,yes,1\n2,no,2\n")
    data = bind(tmp_path, binding(target="x_y", label_map=yes_no(), inputs=(item("x_*", "pattern"),),
                                  row_weight="x_w", row_weight_span=ROWW))
    assert data.input_names == ("x_a",)


def test_hostile_column_names_are_plain_names(tmp_path):
    code_name = "__import__('os').system('touch pwned')"
    names = ['he said "hi"', "two\nlines", code_name, "a,b", "x'); drop"]
    frame = pd.DataFrame({n: [1.0 + i, 2.0 * i + 1, 3.0 - i] for i, n in enumerate(names)})
    frame["y"] = [0.5, 1.0, 2.0]
    frame.to_csv(tmp_path / "data.csv", index=False)
    cols = read_table(tmp_path / "data.csv", span=TABLE, source_name=SPEC)
    assert list(cols) == names + ["y"]
    data = bind(tmp_path, binding(inputs=columns(*names)), "residual")
    assert data.input_names == tuple(names)
    np.testing.assert_array_equal(data.X, frame[names].to_numpy())
    by_pattern = bind(tmp_path, binding(inputs=(item("*system*", "pattern"),)), "residual")
    assert by_pattern.input_names == (code_name,)
    assert not (tmp_path / "pwned").exists() and not Path("pwned").exists()
    # a missing hostile name is quoted on one line in the message
    d = error_of(lambda: bind(tmp_path, binding(inputs=columns("new\nline")), "residual"), "T110")
    assert "\n" not in d.message and "'new\\nline'" in d.message


# ============================================================== target and labels

def test_string_labels_map_through_the_map(tmp_path):
    write(tmp_path, CLEAN)
    data = bind(tmp_path, binding(label_map=yes_no()))
    np.testing.assert_array_equal(data.y, [1, -1, 1, -1, 1, -1])
    assert data.label_map == yes_no() and data.target == "y"


def test_zero_one_labels_map_as_numbers(tmp_path):
    write(tmp_path, "a,b,y\n1,2,1\n2,3,0\n3,5,0\n")
    data = bind(tmp_path, binding(label_map=LabelMap(((1.0, 1.0), (0.0, -1.0)), TARGET)))
    np.testing.assert_array_equal(data.y, [1, -1, -1])
    # the text "1" is not the number 1: a string key does not match a numeric column
    d = error_of(lambda: bind(tmp_path, binding(label_map=LabelMap((("1", 1.0), ("0", -1.0)), TARGET))), "T130")
    assert listed_rows(d.message) == [1, 2, 3]


def test_plus_minus_one_target_needs_no_map(tmp_path):
    write(tmp_path, "a,b,y\n1,2,1\n2,3,-1\n3,5,-1\n")
    data = bind(tmp_path, binding())
    np.testing.assert_array_equal(data.y, [1, -1, -1])
    assert data.label_map is None


def test_boolean_target_maps_from_true_false(tmp_path):
    write(tmp_path, "a,b,y\n1,2,True\n2,3,False\n3,5,True\n")
    data = bind(tmp_path, binding(label_map=LabelMap((("true", 1.0), ("false", -1.0)), TARGET)))
    np.testing.assert_array_equal(data.y, [1, -1, 1])


def test_npz_text_labels(tmp_path):
    np.savez(tmp_path / "t.npz", a=np.array([1.0, 2.0, 3.0]), b=np.array([0.0, 1.0, 0.5]),
             y=np.array(["cat", "dog", "cat"]))
    data = bind(tmp_path, binding("t.npz", label_map=LabelMap((("dog", 1.0), ("cat", -1.0)), TARGET)))
    np.testing.assert_array_equal(data.y, [-1, 1, -1])


def test_real_target_stays_real(tmp_path):
    write(tmp_path, "a,b,y\n1,2,3.5\n2,3,-0.25\n3,5,1e3\n")
    data = bind(tmp_path, binding(), "residual")
    np.testing.assert_array_equal(data.y, [3.5, -0.25, 1000.0])


def test_table_without_target_when_not_needed(tmp_path):
    write(tmp_path, "a,b\n1,2\n3,4\n")
    data = bind(tmp_path, binding(label_map=yes_no()), need_target=False)
    assert data.target is None and np.isnan(data.y).all() and data.X.shape == (2, 2)
    # a target column that is there but unusable does not block predicting either
    write(tmp_path, "a,b,y\n1,2,maybe\n3,4,\n", "with_y.csv")
    data = bind(tmp_path, binding("with_y.csv", label_map=yes_no()), need_target=False)
    assert data.target is None and data.n_rows == 2
    error_of(lambda: bind(tmp_path, binding(label_map=yes_no())), "T110")


def test_one_class_allowed_when_asked(tmp_path):
    write(tmp_path, "a,b,y\n1,2,yes\n2,3,yes\n")
    data = bind(tmp_path, binding(label_map=yes_no()), both_classes=False)
    np.testing.assert_array_equal(data.y, [1, 1])


# ============================================================== weights

def test_weights_are_row_weight_times_class_weight(tmp_path):
    write(tmp_path, CLEAN)
    b = binding(label_map=yes_no(), row_weight="w", row_weight_span=ROWW, class_weights=((1.0, 3.0), (-1.0, 0.5)),
                class_weights_span=CLASSW)
    data = bind(tmp_path, b)
    rw = np.array([1, 2, 1, 0.5, 1, 1])
    cw = np.where(data.y > 0, 3.0, 0.5)
    np.testing.assert_allclose(data.weights, rw * cw)
    np.testing.assert_array_equal(data.y, [1, -1, 1, -1, 1, -1])


def test_weights_default_to_ones(tmp_path):
    write(tmp_path, CLEAN)
    np.testing.assert_array_equal(bind(tmp_path, binding(label_map=yes_no())).weights, np.ones(6))


def test_class_weight_only_for_one_label(tmp_path):
    write(tmp_path, CLEAN)
    data = bind(tmp_path, binding(label_map=yes_no(), class_weights=((-1.0, 4.0),), class_weights_span=CLASSW))
    np.testing.assert_array_equal(data.weights, [1, 4, 1, 4, 1, 4])


# ============================================================== missing values

def test_missing_drop_removes_rows_and_reports_them(tmp_path):
    write(tmp_path, NAN_ROWS)
    data = bind(tmp_path, binding(label_map=yes_no(), missing="drop"))
    assert data.dropped == 2
    np.testing.assert_array_equal(data.rows, [1, 3, 5])
    np.testing.assert_array_equal(data.X, [[1, 2], [3, 4], [5, 6]])
    (warn,) = data.warnings
    assert warn.code == "T191" and warn.severity == "warning" and listed_rows(warn.message) == [2, 4]


def test_missing_target_rows_dropped(tmp_path):
    write(tmp_path, "a,b,y\n1,2,yes\n2,3,\n3,4,no\n")
    data = bind(tmp_path, binding(label_map=yes_no(), missing="drop"))
    np.testing.assert_array_equal(data.rows, [1, 3])
    np.testing.assert_array_equal(data.y, [1, -1])


def test_missing_in_unused_column_is_ignored(tmp_path):
    write(tmp_path, "a,b,y,junk\n1,2,yes,\n2,3,no,x\n")
    data = bind(tmp_path, binding(label_map=yes_no()))
    assert data.n_rows == 2 and data.dropped == 0


# ============================================================== derived features

POS = "a,b,y\n0.5,2,yes\n1.5,3,no\n4.0,-1,yes\n9.0,0.25,no\n"


def _feature_values(tmp_path: Path, expr: st.Expr) -> np.ndarray:
    write(tmp_path, POS)
    data = bind(tmp_path, binding(label_map=yes_no(), features=(feature("f", expr),)))
    assert data.input_names == ("a", "b", "f")
    return data.X[:, 2]


A = np.array([0.5, 1.5, 4.0, 9.0])
B = np.array([2.0, 3.0, -1.0, 0.25])


# reference values computed by numpy's own ufuncs (NumPy reference manual: numpy.log1p, numpy.sqrt,
# numpy.abs, numpy.power, numpy.maximum, numpy.exp)
@pytest.mark.parametrize("expr,want", [
    (call("log1p", name("a")), np.log1p(A)),
    (call("sqrt", name("a")), np.sqrt(A)),
    (call("abs", name("b")), np.abs(B)),
    (call("exp", st.Negate(name("b"), FEATURE)), np.exp(-B)),
    (st.Power(name("a"), num(3), FEATURE), np.power(A, 3)),
    (st.Power(name("a"), st.Negate(num(0.5), FEATURE), FEATURE), np.power(A, -0.5)),
    (call("power", name("a"), num(1.5)), np.power(A, 1.5)),
    (call("max", name("a"), name("b")), np.maximum(A, B)),
    (st.Binary("*", name("a"), name("b"), FEATURE), A * B),
    (st.Binary("/", st.Binary("-", name("a"), num(1), FEATURE), name("b"), FEATURE), (A - 1) / B),
    (st.Binary("+", call("log1p", name("a")), st.Binary("*", num(2), name("b"), FEATURE), FEATURE),
     np.log1p(A) + 2 * B),
])
def test_derived_feature_matches_numpy(tmp_path, expr, want):
    np.testing.assert_allclose(_feature_values(tmp_path, expr), want, rtol=1e-15)


def test_feature_may_read_an_earlier_feature(tmp_path):
    write(tmp_path, POS)
    f1 = feature("la", call("log1p", name("a")))
    f2 = feature("la2", st.Power(name("la"), num(2), FEATURE))
    data = bind(tmp_path, binding(label_map=yes_no(), features=(f1, f2)))
    np.testing.assert_allclose(data.X[:, 3], np.log1p(A) ** 2, rtol=1e-15)


def test_feature_option_out_of_range(tmp_path):
    write(tmp_path, POS)
    b = binding(label_map=yes_no(), features=(feature("f", call("log1p", name("a"), num(2))),))
    d = error_of(lambda: bind(tmp_path, b), "E239")
    assert "log1p" in d.message


def test_feature_of_a_text_column(tmp_path):
    write(tmp_path, CLEAN)
    b = binding(label_map=yes_no(), features=(feature("f", call("abs", st.Name("s", Span(4, 15, 4, 16)))),))
    d = error_of(lambda: bind(tmp_path, b), "T112")
    assert "'s'" in d.message and d.span == Span(4, 15, 4, 16) and listed_rows(d.message) == [1, 2, 3, 4, 5]


# ============================================================== standardization

def test_standardization_matches_scikit_learn(tmp_path):
    from sklearn.preprocessing import StandardScaler

    rng = np.random.default_rng(3)
    raw = rng.normal(loc=[5.0, -2.0], scale=[3.0, 0.1], size=(40, 2))
    pd.DataFrame({"a": raw[:, 0], "b": raw[:, 1], "y": rng.normal(size=40)}).to_csv(tmp_path / "data.csv",
                                                                                      index=False)
    data = bind(tmp_path, binding(standardize=True), "residual")
    # scikit-learn StandardScaler: z = (x - u) / s with s the population standard deviation
    # (scikit-learn user guide, sklearn.preprocessing.StandardScaler)
    scaler = StandardScaler().fit(pd.read_csv(tmp_path / "data.csv")[["a", "b"]].to_numpy())
    np.testing.assert_allclose(data.X, scaler.transform(pd.read_csv(tmp_path / "data.csv")[["a", "b"]].to_numpy()),
                               rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(data.standardization.means, scaler.mean_, rtol=1e-13)
    np.testing.assert_allclose(data.standardization.scales, scaler.scale_, rtol=1e-13)
    assert data.standardization.names == ("a", "b") and data.standardization_fitted


def test_saved_stats_are_applied_not_recomputed(tmp_path):
    write(tmp_path, CLEAN)
    fit = bind(tmp_path, binding(label_map=yes_no(), standardize=True))
    write(tmp_path, "b,y,a\n100,yes,7\n0,no,-1\n", "later.csv")
    later = bind(tmp_path, binding("later.csv", label_map=yes_no(), standardize=True),
                 standardization=fit.standardization)
    means, scales = np.array(fit.standardization.means), np.array(fit.standardization.scales)
    np.testing.assert_allclose(later.X, (np.array([[7.0, 100.0], [-1.0, 0.0]]) - means) / scales)
    assert later.standardization == fit.standardization and not later.standardization_fitted


def test_standardization_round_trips_through_a_dict():
    s = Standardization(("a", "b"), (1.0, -2.5), (0.5, 3.0))
    assert Standardization.from_dict(s.as_dict()) == s


def test_constant_column_on_eval_data_is_fine_with_saved_stats(tmp_path):
    write(tmp_path, "a,b,y\n1,7,yes\n2,7,no\n")
    stats = Standardization(("a", "b"), (0.0, 5.0), (1.0, 2.0))
    data = bind(tmp_path, binding(label_map=yes_no(), standardize=True), standardization=stats)
    np.testing.assert_allclose(data.X[:, 1], [1.0, 1.0])


# ============================================================== schema order

def test_reordered_columns_are_matched_by_name(tmp_path):
    write(tmp_path, "a,b,y\n1,10,yes\n2,20,no\n")
    write(tmp_path, "y,b,extra,a\nyes,10,0,1\nno,20,0,2\n", "shuffled.csv")
    b = binding(label_map=yes_no(), features=(feature("la", call("log1p", name("a"))),))
    first = bind(tmp_path, b)
    second = bind(tmp_path, replace(b, path="shuffled.csv"), input_names=first.input_names)
    assert second.input_names == ("a", "b", "la")
    np.testing.assert_array_equal(first.X, second.X)
    flipped = bind(tmp_path, replace(b, path="shuffled.csv"), input_names=("la", "b", "a"))
    np.testing.assert_array_equal(flipped.X, first.X[:, [2, 1, 0]])


# ============================================================== holdout and take_rows

def test_holdout_is_reproducible_and_a_partition(tmp_path):
    data = _bound_pm(tmp_path, 50)
    tr1, ho1 = split_holdout(data, 0.2, 7)
    tr2, ho2 = split_holdout(data, 0.2, 7)
    np.testing.assert_array_equal(ho1.rows, ho2.rows)
    np.testing.assert_array_equal(tr1.X, tr2.X)
    assert ho1.n_rows == 10 and tr1.n_rows == 40
    assert np.all(np.diff(ho1.rows) > 0) and np.all(np.diff(tr1.rows) > 0)  # original order kept
    assert sorted(np.concatenate([tr1.rows, ho1.rows]).tolist()) == list(range(1, 51))
    _, ho3 = split_holdout(data, 0.2, 8)
    assert not np.array_equal(ho1.rows, ho3.rows)
    # each part keeps its rows' data: X row r of the part is the original row rows[r]
    np.testing.assert_array_equal(ho1.X, data.X[ho1.rows - 1])
    np.testing.assert_array_equal(ho1.y, data.y[ho1.rows - 1])


def test_holdout_refits_standardization_on_the_training_part(tmp_path):
    write(tmp_path, "a,b,y\n" + "".join(f"{i},{(i * 7) % 11},{'yes' if i % 2 else 'no'}\n" for i in range(30)))
    data = bind(tmp_path, binding(label_map=yes_no(), standardize=True))
    train, held = split_holdout(data, 0.3, 1)
    raw = pd.read_csv(tmp_path / "data.csv")[["a", "b"]].to_numpy(dtype=float)
    raw_train, raw_held = raw[train.rows - 1], raw[held.rows - 1]
    mean, std = raw_train.mean(axis=0), raw_train.std(axis=0)
    np.testing.assert_allclose(train.X, (raw_train - mean) / std, atol=1e-12)
    np.testing.assert_allclose(held.X, (raw_held - mean) / std, atol=1e-12)
    assert train.standardization == held.standardization
    np.testing.assert_allclose(train.standardization.means, mean)


def test_take_rows_with_mask_and_positions(tmp_path):
    write(tmp_path, CLEAN)
    data = bind(tmp_path, binding(label_map=yes_no(), row_weight="w", row_weight_span=ROWW))
    part = take_rows(data, [4, 0])
    np.testing.assert_array_equal(part.rows, [5, 1])
    np.testing.assert_array_equal(part.weights, [1, 1])
    masked = take_rows(data, data.y > 0)
    np.testing.assert_array_equal(masked.rows, [1, 3, 5])
    assert masked.input_names == data.input_names


def test_bound_arrays_are_read_only(tmp_path):
    write(tmp_path, CLEAN)
    data = bind(tmp_path, binding(label_map=yes_no()))
    for arr in (data.X, data.y, data.weights, data.rows):
        with pytest.raises(ValueError):
            arr[0] = 0


# ---------------------------------------------------------------- a folder of Parquet files

def _parquet_folder(tmp_path: Path, frames: list[pd.DataFrame]) -> Path:
    folder = tmp_path / "rows"
    (folder / "deeper").mkdir(parents=True)
    for k, f in enumerate(frames):  # the last file one folder down: a dataset is searched to any depth
        f.to_parquet((folder / "deeper" if k == len(frames) - 1 else folder) / f"p{k}.parquet")
    return folder


def test_a_folder_of_parquet_files_is_one_table_in_path_order(tmp_path):
    a = pd.DataFrame({"x": [1.0, 2.0], "y": [1, -1]})
    b = pd.DataFrame({"x": [3.0, 4.0, 5.0], "y": [1, 1, -1]})
    _parquet_folder(tmp_path, [a, b])
    data = bind(tmp_path, binding("rows", target="y", inputs=columns("x")))
    # by path: "deeper/p1.parquet" comes before "p0.parquet"
    np.testing.assert_array_equal(data.X[:, 0], [3.0, 4.0, 5.0, 1.0, 2.0])
    np.testing.assert_array_equal(data.rows, [1, 2, 3, 4, 5])


def test_a_parquet_folder_with_other_columns_or_no_files_is_refused(tmp_path):
    _parquet_folder(tmp_path, [pd.DataFrame({"x": [1.0], "y": [1]}), pd.DataFrame({"x": [2.0], "z": [1]})])
    d = error_of(lambda: bind(tmp_path, binding("rows", target="y", inputs=columns("x"))), "T102")
    assert "p0.parquet" in d.message and "deeper/p1.parquet" not in d.message and "same columns" in d.hint
    (tmp_path / "empty").mkdir()
    d = error_of(lambda: bind(tmp_path, binding("empty", target="y", inputs=columns("x"))), "T102")
    assert "folder" in d.message
