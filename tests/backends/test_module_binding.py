"""One CSV table, one spec, two bindings that must agree: objc's (objc.tables.bind_table and the holdout
split after it, through objc.training.bind_training as `objc fit` binds) and the one a generated NumPy
module carries for its own command line (`load_table` of objc/backends/numpy_estimator_src.py, run
inside the module objc emits, reading that module's own SPEC).

The property, over small drawn tables and table clauses: either both refuse (objc raises SpecError,
the module its TableError) or both accept with the same X, y, row weights (after class weights),
input names and standardization statistics, the same rows kept under `missing drop` and the same
rows held out by `holdout`. Each side is the other's reference.

The module returns its training rows without their row numbers, so the comparison of rows adds to
the module's SPEC one more derived input, each row's number, and turns `standardize` off on both
sides (the number would be standardized too); the module's held-out rows are then the rows it keeps
without the holdout less the rows it trains on.

A second property does the same for the feature maps (onehot, powers, pairs, spline), comparing
also the maps' fitted state. A multiclass spec is not compared: its module has no table reader (no
load_table, no command line), only `fit(X, labels)` on rows already read.

The plain tests below are disagreements the properties found, each shrunk to a small table and kept
as a regression test once fixed.
"""

from __future__ import annotations

import contextlib
import functools
import tempfile
from dataclasses import replace
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

import objc
from objc import training
from objc.backends import numpy_module as nm
from objc.cells import MISSING_CELLS

SPEC_TEMPLATE = '''table t from "t.csv"
  {target}
  {inputs}
{clauses}learn w over inputs, b0
score s = w . x + b0
goal {goal}
'''
# the intercept is b0, not b: `b` is a column here, and `feature ab = a * b` must read the column

MARGIN_GOAL = "mean logistic(y * s) + 0.1 * l2sq(w)"
RESIDUAL_GOAL = "mean squared(y - s) + 0.1 * l2sq(w)"
TARGETS = {  # the target column: its clause and its goal
    "late": ("target late: yes -> +1, no -> -1", MARGIN_GOAL),
    "d": ("target d: 1 -> +1, 0 -> -1", MARGIN_GOAL),
    "y": ("target y", RESIDUAL_GOAL),
}
INPUTS = ("inputs a, b", "inputs all", "inputs all except c", 'inputs like "x*"')
ROW_NUMBER = "row_number_tag"


def spec_text(target: str, inputs: str, *, rowweight=False, classweight=False, feature=False, maps=(),
              standardize=False, drop=False, holdout=False) -> str:
    clause, goal = TARGETS[target]
    clauses = "".join(line for line, on in (
        ("  rowweight wt\n", rowweight), ("  classweight +1 = 3, -1 = 1\n", classweight),
        ("  feature ab = a * b\n", feature), *((f"  {m}\n", True) for m in maps), ("  standardize\n", standardize),
        ("  missing drop\n", drop), ("  holdout 25% seed 3\n", holdout)) if on)
    return SPEC_TEMPLATE.format(target=clause, inputs=inputs, clauses=clauses, goal=goal)


@functools.lru_cache(maxsize=None)
def compiled(text: str):
    """(objc's checked spec, the namespace of the module objc emits for it). The lean module, which
    imports the solver, carries the same estimator code and SPEC as a standalone one and emits faster."""
    checked = objc.check_text(text, "t.objc")
    return checked, nm.load_module(nm.emit_module(checked, "import"))


def write_table(folder: Path, header, rows) -> Path:
    path = folder / "t.csv"
    path.write_text("".join(",".join(r) + "\n" for r in [header] + rows), encoding="utf-8")
    return path


# ---------------------------------------------------------------- the two bindings

class Refused:
    def __init__(self, why: str, codes=()):
        self.why, self.codes = why, tuple(codes)

    def __repr__(self):
        return f"refused: {self.why}"


class Crashed:
    """The module raised something other than its TableError: neither a refusal nor a binding."""
    def __init__(self, error: Exception):
        self.error = error

    def __repr__(self):
        return f"crashed: {self.error!r}"


def objc_binding(checked, folder: Path, *, standardize=None, holdout=True):
    """(objc's training rows, its held-out rows or None), or Refused."""
    table = checked.spec.table
    table = replace(table, standardize=table.standardize if standardize is None else standardize,
                    holdout=table.holdout if holdout else None)
    try:
        train, held, _where = training.bind_training(replace(checked, spec=replace(checked.spec, table=table)),
                                                     folder)
    except objc.SpecError as err:
        return Refused(str(err), (d.code for d in err.diagnostics))
    return train, held


@contextlib.contextmanager
def module_table(namespace, **changes):
    """The module's SPEC with some table clauses changed, for the span of a `with`."""
    spec = namespace["SPEC"]
    namespace["SPEC"] = dict(spec, table=dict(spec["table"], **changes))
    try:
        yield
    finally:
        namespace["SPEC"] = spec


def _row_numbers(table_columns):
    # a derived input of the module is given the table's cells by column, one cell per row it read
    return np.arange(1.0, len(next(iter(table_columns.columns.values()))) + 1.0)


def module_binding(namespace, path: Path, *, tag_rows=False, holdout=True):
    """(X, y, c, names, stats) of the module's load_table, or Refused. With `tag_rows`, standardize is
    off and the input ROW_NUMBER of X holds each row's number (counted from 1 over the rows the module
    read): the last input, or, with feature maps, the last before the maps' inputs."""
    table = namespace["SPEC"]["table"]
    changes = {} if holdout else {"holdout": None}
    if tag_rows:
        changes.update(standardize=False, features=tuple(table["features"]) + ((ROW_NUMBER, _row_numbers),))
    with module_table(namespace, **changes):
        try:
            return namespace["load_table"](str(path))
        except namespace["TableError"] as err:
            return Refused(str(err))
        except Exception as err:  # noqa: BLE001 - a crash is reported as a disagreement, not raised
            return Crashed(err)


def untagged(X, names):
    """(X without the row numbers, the names without ROW_NUMBER, the row numbers)."""
    j = names.index(ROW_NUMBER)
    return np.delete(X, j, axis=1), names[:j] + names[j + 1:], X[:, j]


def assert_same_refusal(ours, theirs, what: str):
    assert not isinstance(theirs, Crashed), f"{what}: objc {ours!r}; module {theirs!r}"
    assert isinstance(ours, Refused) == isinstance(theirs, Refused), f"{what}: objc {ours!r}; module {theirs!r}"


def check_agreement(text: str, header, rows, folder: Path) -> None:
    checked, namespace = compiled(text)
    path = write_table(folder, header, rows)
    table = checked.spec.table

    # ---- as the spec says: X, y, weights, names, standardization
    ours, theirs = objc_binding(checked, folder), module_binding(namespace, path)
    assert_same_refusal(ours, theirs, "binding")
    if not isinstance(ours, Refused):
        train, (X, y, c, names, stats) = ours[0], theirs
        assert names == train.input_names
        np.testing.assert_array_equal(y, train.y)
        np.testing.assert_array_equal(c, train.weights)
        np.testing.assert_array_equal(X, train.X)
        stats = dict(stats or {})
        # the maps' fitted state: the module writes it beside the standardization, objc with each map
        assert stats.pop("maps", []) == [{k: v for k, v in m.items() if k not in ("kind", "columns")}
                                         for m in train.maps]
        if train.standardization is None:
            assert not stats
        else:
            std = train.standardization
            assert stats["names"] == list(std.names)
            np.testing.assert_array_equal(stats["means"], std.means)
            np.testing.assert_array_equal(stats["scales"], std.scales)

    # ---- the rows: kept (after `missing drop`), trained on, held out
    ours, theirs = objc_binding(checked, folder, standardize=False), module_binding(namespace, path, tag_rows=True)
    assert_same_refusal(ours, theirs, "binding without standardize")
    if isinstance(ours, Refused):
        return
    (train, held), (X, y, c, names) = ours, theirs[:4]
    X, names, tags = untagged(X, names)
    assert names == train.input_names
    np.testing.assert_array_equal(X, train.X)
    np.testing.assert_array_equal(y, train.y)
    np.testing.assert_array_equal(c, train.weights)
    np.testing.assert_array_equal(tags, train.rows)
    if table.holdout is None:
        return
    ours = objc_binding(checked, folder, standardize=False, holdout=False)
    theirs = module_binding(namespace, path, tag_rows=True, holdout=False)
    assert_same_refusal(ours, theirs, "binding without standardize and holdout")
    if isinstance(ours, Refused):
        return
    kept, kept_tags = ours[0], untagged(theirs[0], theirs[3])[2]
    np.testing.assert_array_equal(kept_tags, kept.rows)
    module_held = sorted(set(kept_tags.tolist()) - set(tags.tolist()))
    assert module_held == held.rows.tolist()


# ---------------------------------------------------------------- drawn tables and clauses

# A table is drawn clean (numbers, labels, positive weights), then given a few defects, so that most
# drawn tables bind and the refusals come one cause at a time.
NUMBER = st.integers(-12, 12).map(lambda k: f"{k / 4:g}")
# `d` is written as integers mostly, sometimes as decimals, which its label map matches by value
CLEAN = {"late": st.sampled_from(["yes", "no"]), "d": st.sampled_from(["1", "0", "1", "0", "1.0", "0.0"]),
         "wt": st.sampled_from(["1", "0.5", "2", "3"]), "town": st.sampled_from(["Lyon", "Nice", "Paris"])}
MISSING = st.sampled_from(MISSING_CELLS)
INFINITY = st.sampled_from(["inf", "-inf"])
HUGE = st.sampled_from(["1e200", "-3e200"])  # finite, but the product of two overflows
TEXT = st.sampled_from(["n.a.", "abc"])
UNLISTED = ("maybe", "2")  # target values the label maps of `late` and `d` do not list


def defect(column: str):
    """A cell that is not clean, for this column."""
    if column == "late":
        return st.one_of(MISSING, st.just(UNLISTED[0]))
    if column == "d":
        return st.one_of(MISSING, st.just(UNLISTED[1]), INFINITY)
    if column == "wt":
        return st.one_of(st.just("0"), st.just("-1"), MISSING, INFINITY)
    if column == "town":
        return MISSING
    return st.one_of(MISSING, INFINITY, TEXT, HUGE)


@st.composite
def cases(draw):
    target = draw(st.sampled_from(sorted(TARGETS)))
    clauses = {name: draw(st.booleans()) for name in ("rowweight", "feature", "standardize", "drop", "holdout")}
    clauses["classweight"] = draw(st.booleans())
    text = spec_text(target, draw(st.sampled_from(INPUTS)), **clauses)
    columns = ["a"] + [name for name in ("b", "c", "x1", "x2") if draw(st.integers(0, 5))]
    if clauses["rowweight"] or draw(st.booleans()):
        columns.append("wt")
    columns.append(target)
    header = list(draw(st.permutations(columns)))
    return text, header, draw(tables(header))


@st.composite
def tables(draw, header, most_rows=10):
    n = draw(st.integers(1, most_rows))
    rows = [[draw(CLEAN.get(name, NUMBER)) for name in header] for _ in range(n)]
    for _ in range(draw(st.integers(0, 3))):
        i, j = draw(st.integers(0, n - 1)), draw(st.integers(0, len(header) - 1))
        rows[i][j] = draw(defect(header[j]))
    if draw(st.integers(0, 9)) == 0:  # now and then a record of empty cells: a row of missing values
        rows.insert(draw(st.integers(0, n)), [""] * len(header))
    return rows


@settings(max_examples=250, deadline=None, derandomize=True, database=None)
@given(cases())
def test_objc_and_the_module_bind_a_table_alike(case):
    text, header, rows = case
    with tempfile.TemporaryDirectory() as name:
        folder = Path(name)
        check_agreement(text, header, rows, folder)


MAPS = ("onehot town", "powers a degree 2", "pairs a, b", "spline a degree 1 knots 25%, 50%, 75%")
MAP_INPUTS = ("inputs a, b", "inputs b", "inputs all except town", "inputs all")


@st.composite
def map_cases(draw):
    """A spec with one to four feature maps over a numeric `a`, `b` and a text `town`, beside
    `standardize`, `missing drop` and `holdout`, and a table for it."""
    target = draw(st.sampled_from(sorted(TARGETS)))
    maps = [m for m in MAPS if draw(st.booleans())] or [draw(st.sampled_from(MAPS))]
    maps = [m + " unseen zeros" if m.startswith("onehot") and draw(st.booleans()) else m for m in maps]
    clauses = {name: draw(st.booleans()) for name in ("standardize", "drop", "holdout")}
    text = spec_text(target, draw(st.sampled_from(MAP_INPUTS)), maps=maps, **clauses)
    columns = ["a", "b", "town", target] + (["c"] if draw(st.booleans()) else [])
    header = list(draw(st.permutations(columns)))
    # more rows than the first property draws: spline's knots need a few distinct values of `a`
    return text, header, draw(tables(header, most_rows=14))


@settings(max_examples=200, deadline=None, derandomize=True, database=None)
@given(map_cases())
def test_objc_and_the_module_bind_feature_maps_alike(case):
    text, header, rows = case
    with tempfile.TemporaryDirectory() as name:
        folder = Path(name)
        write_table(folder, header, rows)
        check_agreement(text, header, rows, folder)


# ---------------------------------------------------------------- disagreements found, shrunk

def test_class_weights_on_a_real_target_are_refused(tmp_path):
    text = spec_text("y", "inputs a, b", classweight=True)
    check_agreement(text, ["a", "b", "y"], [["0", "0.5", "1"], ["1", "0", "-1"], ["0.5", "1", "2"]], tmp_path)


def test_a_holdout_that_leaves_no_row_out_is_refused(tmp_path):
    text = spec_text("late", "inputs a, b", holdout=True)
    check_agreement(text, ["a", "b", "late"], [["0", "0.5", "yes"], ["1", "0", "no"]], tmp_path)


def test_a_holdout_whose_training_part_holds_one_class_is_refused(tmp_path):
    # 25% of 4 rows with seed 3 holds out the fourth row, the only `no`
    text = spec_text("late", "inputs a, b", holdout=True)
    check_agreement(text, ["a", "b", "late"],
                    [["0", "0.5", "yes"], ["1", "0", "yes"], ["0.5", "1", "yes"], ["1", "1", "no"]], tmp_path)


def test_an_infinite_numeric_target_cell_is_dropped_under_missing_drop(tmp_path):
    text = spec_text("d", "inputs a, b", drop=True)
    check_agreement(text, ["a", "b", "d"], [["0", "0.5", "1"], ["1", "0", "inf"], ["0.5", "1", "0"]], tmp_path)


def test_a_row_of_empty_cells_is_missing_values(tmp_path):
    text = spec_text("late", "inputs a, b")
    check_agreement(text, ["a", "b", "late"], [["0", "0.5", "yes"], ["", "", ""], ["1", "0", "no"]], tmp_path)


def test_a_feature_that_overflows_is_refused_under_missing_drop(tmp_path):
    text = spec_text("y", "inputs a, b", feature=True, drop=True)
    check_agreement(text, ["a", "b", "y"], [["0", "0.5", "1"], ["1e200", "1e200", "2"], ["1", "0", "0"]], tmp_path)


def test_a_label_outside_the_map_on_a_dropped_row_is_dropped_with_it(tmp_path):
    text = spec_text("late", "inputs a, b", drop=True)
    check_agreement(text, ["a", "b", "late"], [["0", "0.5", "yes"], ["NA", "1", "maybe"], ["1", "0", "no"]], tmp_path)


# 25% of 4 rows with seed 3 holds out the fourth row; the first three are the training rows
HELD_OUT_FOURTH = [["0.25", "1", "yes"], ["0.5", "2", "no"], ["0.75", "0", "yes"], [None, "3", "no"]]


@pytest.mark.parametrize("held_value", ["1e200", "1e10"])
def test_standardize_with_a_holdout_reads_the_training_rows_alone(tmp_path, held_value):
    rows = [r[:] for r in HELD_OUT_FOURTH]
    rows[3][0] = held_value
    check_agreement(spec_text("late", "inputs a, b", standardize=True, holdout=True), ["a", "b", "late"], rows,
                    tmp_path)


@pytest.mark.parametrize("feature_map", ["powers a degree 2", "pairs a, b"])
def test_a_map_input_that_overflows_is_refused(tmp_path, feature_map):
    text = spec_text("late", "inputs a, b", maps=[feature_map])
    check_agreement(text, ["a", "b", "late"], [["1e200", "1e200", "yes"], ["0", "1", "no"]], tmp_path)


def test_spline_knots_that_collapse_are_refused(tmp_path):
    text = spec_text("late", "inputs a, b", maps=["spline a degree 1 knots 25%, 50%, 75%"])
    check_agreement(text, ["a", "b", "late"], [["0", "0", "yes"], ["0", "1", "no"]], tmp_path)


def test_a_spline_on_no_row_left_is_refused(tmp_path):
    text = spec_text("late", "inputs a, b", maps=["spline a degree 1 knots 25%, 50%, 75%"], drop=True)
    check_agreement(text, ["a", "b", "late"], [["", "0", "yes"]], tmp_path)
