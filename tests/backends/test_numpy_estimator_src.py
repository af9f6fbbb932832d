"""objc/backends/numpy_estimator_src.py imported as a module of objc: the estimator base classes, the
label map and input selection of a generated module, its CSV reader and table loader, and its
command line, called directly (tests/backends/test_numpy_solvers_src.py covers the logistic class
probabilities, the reader against pandas on a well-formed file and a cell that is not a number).

Functions that read the module's global SPEC get the SPEC of a module objc emits (monkeypatched in).
References: objc's own table binding (objc.tables.bind_table and objc.training.bind_training), which
the module promises to bind alike; scikit-learn's r2_score and accuracy_score for `score`, and its
get_params / set_params conventions; ridge regression in closed form (Hoerl & Kennard, Technometrics
1970) for the command line's fit; the population minimizer of the exponential loss, half the
log-odds, so P(+1 | s) = 1 / (1 + exp(-2 s)) (Friedman, Hastie & Tibshirani, "Additive logistic
regression", Annals of Statistics 2000, result 1).
"""

from __future__ import annotations

import functools
import json
import os
import sys
from pathlib import Path

import numpy as np
import pytest
from scipy.special import expit

import objc
import objc.backends.numpy_estimator_src as estimator_src
from objc import training
from objc.backends import numpy_module as nm
from objc.tables import bind_table, read_table, standard_scales
from objc.source_text import Span

TableError = estimator_src.TableError


@functools.lru_cache(maxsize=None)
def spec_table(text: str) -> dict:
    """The SPEC of the module objc emits for a spec (emitted once per text: no test changes a SPEC). The
    lean module, which imports the solver instead of pasting it, writes the same SPEC, faster."""
    return nm.load_module(nm.emit_module(objc.check_text(text, "est.objc"), "import"))["SPEC"]


def spec_text(inputs: str = "inputs a, b, c", *, target: str = "target y", clauses: str = "",
              goal: str = "mean squared(y - s) + lam * l2sq(w)", learn: str = "learn w over inputs, b0",
              score: str = "w . x + b0", table: str = "t.csv") -> str:
    return (f'table t from "{table}"\n  {target}\n  {inputs}\n{clauses}tune lam = 0.1 within 0.0001 .. 1\n'
            f"{learn}\nscore s = {score}\ngoal {goal}\n")


@pytest.fixture
def use_spec(monkeypatch):
    def use(text: str) -> dict:
        spec = spec_table(text)
        monkeypatch.setattr(estimator_src, "SPEC", spec)
        return spec
    return use


def write_csv(path: Path, header, rows) -> Path:
    path.write_text(",".join(header) + "\n" + "".join(",".join(str(v) for v in r) + "\n" for r in rows),
                    encoding="utf-8")
    return path


# ---------------------------------------------------------------- the label map

def test_label_matches_compare_text_with_text_and_numbers_with_numbers():
    cells = ["yes", 1, 1.0, "1", True, np.bool_(True), None, b"yes", np.int64(1), 2.5]
    text = estimator_src._label_matches(cells, "yes")
    np.testing.assert_array_equal(text, [True, False, False, False, False, False, False, False, False, False])
    # 1, 1.0 and numpy's 1 are the number 1; the text "1", booleans, None and bytes are not
    number = estimator_src._label_matches(cells, 1.0)
    np.testing.assert_array_equal(number, [False, True, True, False, False, False, False, False, True, False])


@pytest.mark.parametrize("label_map", [(("benign", 1.0), ("malignant", -1.0)), (("malignant", -1.0), ("benign", 1.0))])
def test_mapped_target_gives_plus_minus_one_and_the_classes_minus_first(label_map):
    y = np.array(["benign", "malignant", "malignant", "benign", "benign"], dtype=object)
    target, classes = estimator_src._mapped_target(y, label_map, "diagnosis")
    np.testing.assert_array_equal(target, [1.0, -1.0, -1.0, 1.0, 1.0])
    # whatever order the spec lists them in, classes_[1] is the class a positive score predicts
    assert list(classes) == ["malignant", "benign"]


def test_mapped_target_names_the_first_five_unknown_values_and_refuses_one_class():
    y = np.array(["yes", "no"] + list("abcdefg"), dtype=object)
    with pytest.raises(ValueError) as info:
        estimator_src._mapped_target(y, (("yes", 1.0), ("no", -1.0)), "late")
    message = str(info.value)
    assert "'a', 'b', 'c', 'd', 'e', ..." in message and "'f'" not in message and "'late'" in message
    with pytest.raises(ValueError, match="one class only"):
        estimator_src._mapped_target(np.array(["yes", "yes"], dtype=object), (("yes", 1.0), ("no", -1.0)), "late")


# ---------------------------------------------------------------- choosing the inputs

HEADER = ["id", "size_m2", "size_ft", "rooms", "town", "wt", "y"]


def _table_rows(n=12, seed=0):
    rng = np.random.default_rng(seed)
    return [[i + 1, f"{rng.normal(60, 10):.2f}", f"{rng.normal(600, 90):.1f}", int(rng.integers(1, 6)),
             ["Lyon", "Nice", "Metz"][i % 3], f"{rng.uniform(0.5, 2):.3f}", f"{rng.normal():.4f}"] for i in range(n)]


@pytest.mark.parametrize("inputs", ['inputs like "size_*", rooms except size_ft', "inputs all except id",
                                    'inputs rooms, like "s*"', "inputs all", 'inputs like "*o*" except town',
                                    "inputs rooms, size_ft, size_m2, rooms"])
def test_the_module_chooses_the_inputs_objc_binds(tmp_path, inputs):
    path = write_csv(tmp_path / "t.csv", HEADER, _table_rows())
    text = spec_text(inputs, clauses="  rowweight wt\n")
    data = bind_table(objc.check_text(text, "est.objc").spec.table, tmp_path, "residual")
    header, columns, _n = estimator_src._read_csv(str(path))
    chosen = estimator_src._choose_inputs(str(path), spec_table(text)["table"], header, columns)
    assert tuple(chosen) == data.input_names


def _objc_refuses(tmp_path, text):
    with pytest.raises(objc.SpecError):
        bind_table(objc.check_text(text, "est.objc").spec.table, tmp_path, "residual")


@pytest.mark.parametrize("inputs,clauses,cell", [
    pytest.param("inputs rooms, y", "", None, id="target-as-input"),
    pytest.param("inputs rooms, wt", "  rowweight wt\n", None, id="rowweight-as-input"),
    pytest.param("inputs all except idd", "", None, id="misspelled-except"),
    pytest.param("inputs all except id", "", "n.a.", id="stray-text-under-all"),
])
def test_the_module_refuses_the_input_choices_objc_refuses(tmp_path, use_spec, inputs, clauses, cell):
    rows = _table_rows()
    if cell is not None:
        rows[4][3] = cell  # one cell of `rooms`
    path = write_csv(tmp_path / "t.csv", HEADER, rows)
    text = spec_text(inputs, clauses=clauses)
    _objc_refuses(tmp_path, text)
    use_spec(text)
    with pytest.raises(TableError):
        estimator_src.load_table(str(path))


# ---------------------------------------------------------------- the CSV reader

@pytest.mark.parametrize("data,words", [
    (b"", "the file is empty"),
    (b"a,,c\n1,2,3\n", "line 1: column 2 has no name"),
    (b"a,b,\n1,2,3\n", "line 1: column 3 has no name"),
    (b"a,b,a\n1,2,3\n", "line 1: a column name appears twice"),
    (b"a,b\n1,2\n\n4,5,6\n", "line 4: 3 fields, the header has 2"),  # a blank line still counts as a line
])
def test_a_bad_csv_is_one_message_naming_the_file_and_line(tmp_path, data, words):
    path = tmp_path / "t.csv"
    path.write_bytes(data)
    with pytest.raises(TableError) as info:
        estimator_src._read_csv(str(path))
    assert str(info.value).startswith(f"{path}: {words}")


def test_records_are_rows_as_objc_reads_them(tmp_path):
    # objc's reader (pandas.read_csv): a blank line is no row, a record of empty cells is a row of missing
    # values, a short record's last cells are missing
    path = tmp_path / "t.csv"
    path.write_bytes(b"a,b,c\n1,2,3\n\n   \n,,\n4\n")
    header, columns, n = estimator_src._read_csv(str(path))
    table = read_table(path, span=Span(1, 1, 1, 2), source_name="t.objc")
    assert n == len(table["a"]) == 3
    for name in header:
        values, text = estimator_src._column_numbers(columns[name])
        assert not text
        np.testing.assert_array_equal(values, table[name].astype(float))


def test_bytes_that_are_not_utf8_and_a_missing_file(tmp_path):
    data = b"a,b\n1,\xff\n"
    path = tmp_path / "t.csv"
    path.write_bytes(data)
    offset = data.index(b"\xff")  # Python's decoder reports the offset from 0
    with pytest.raises(TableError, match=f"not UTF-8 text .* at byte {offset}\\)"):
        estimator_src._read_csv(str(path))
    with pytest.raises(TableError, match="cannot read the table"):
        estimator_src._read_csv(str(tmp_path / "nowhere.csv"))


def test_names_lose_a_byte_order_mark_and_blanks_and_cells_keep_theirs(tmp_path):
    path = tmp_path / "t.csv"
    path.write_bytes("\ufeff a ,b\n yes,1\n".encode("utf-8"))
    header, columns, n = estimator_src._read_csv(str(path))
    # objc reads a cell as written: " yes" is not the label "yes"
    assert header == ["a", "b"] and columns == {"a": [" yes"], "b": ["1"]} and n == 1


@pytest.mark.parametrize("cell", ["1_000", "\u0663", "NAN", "+nan", "nAn"])
def test_the_module_reads_a_number_only_where_objc_does(tmp_path, cell):
    path = write_csv(tmp_path / "t.csv", ["k", "v"], [[1, "2.5"], [2, cell]])
    table = read_table(path, span=Span(1, 1, 1, 2), source_name="t.objc")
    assert table["v"].dtype == object and table["v"][1] == cell  # objc: text, not a number
    with pytest.raises(TableError, match="is not a number"):
        estimator_src._numeric(str(path), "v", ["2.5", cell])


# cells a table may hold where a number is meant, and near misses: decimal spellings, signs, exponents,
# blanks, infinities, nan spellings on and off the missing list, digit underscores, non-ASCII digits,
# thousands separators, booleans
CELL_CORPUS = ["1", "1.0", " 1", "1 ", "\t2\t", "+1", "-1", "-0", "0001", "00.1", "1e5", "1E+05", "1.e5", ".5", "5.", "-.5",
               "+.5e-3", "1e0001", "1e500", "-1e500", "1e-500", "1.5e3 ", "inf", "-inf", "+inf", "Inf", "iNf", "INF",
               "infinity", "-Infinity", "+INFINITY", "infinit", "nan", "NaN", "-nan", "-NaN", "NAN", "+nan", "nAn", "Nan",
               "1_000", "\u0663", "\uff11", "\u00a01", "1,000", "1 000", "0x10", "1e", "e5", "--1", "1.2.3", "1e5.5",
               "+.e5", "1d5", "3j", "+", "-", ".", " ", "NA", "None", "true", "True", "FALSE"]


@pytest.mark.parametrize("cells", [["2.5", c] for c in CELL_CORPUS] + [["True", "false"], ["tRUE", "NA", "False"],
                                                                      ["True", "1"], ["NA", "NA"]], ids=repr)
def test_the_module_reads_each_cell_as_objc_does(tmp_path, cells):
    # reference: objc's table reader (pandas.read_csv's inference, then pandas.to_numeric on a column with text)
    import csv
    from objc.tables import _as_float
    path = tmp_path / "t.csv"
    with open(path, "w", newline="", encoding="utf-8") as f:
        csv.writer(f, quoting=csv.QUOTE_ALL).writerows([["k", "v"]] + [[str(i), c] for i, c in enumerate(cells)])
    objc_values, objc_text = _as_float(read_table(path, span=Span(1, 1, 1, 2), source_name="t.objc")["v"])
    _header, columns, _n = estimator_src._read_csv(str(path))
    values, text = estimator_src._column_numbers(columns["v"])
    assert list(text) == list(objc_text)
    np.testing.assert_array_equal(values, objc_values)


# ---------------------------------------------------------------- the target

def test_target_cells_through_a_label_map_agree_with_objc(tmp_path):
    rows = [[f"{0.1 * i:.1f}", cell] for i, cell in enumerate(["1", "1.0", "0", "0.0", "1e0", "NA", " 1", "0"])]
    path = write_csv(tmp_path / "t.csv", ["a", "d"], rows)
    text = spec_text("inputs a", target="target d: 1 -> +1, 0 -> -1", goal="mean logistic(y * s) + lam * l2sq(w)",
                     clauses="  missing drop\n")
    data = bind_table(objc.check_text(text, "est.objc").spec.table, tmp_path, "margin")
    header, columns, _n = estimator_src._read_csv(str(path))
    y, missing, unlisted = estimator_src._target_values(str(path), spec_table(text)["table"], columns)
    assert not np.any(unlisted) and list(np.flatnonzero(missing)) == [5]
    # the missing cell is NaN (dropped later by `missing drop`); every other cell maps as objc maps it
    assert np.isnan(y[5]) and np.isnan(y).sum() == 1
    kept = np.delete(y, 5)
    np.testing.assert_array_equal(kept, data.y)


def test_a_target_value_outside_the_label_map_is_named_with_its_row(tmp_path, use_spec):
    text = spec_text("inputs a", target="target late: yes -> +1, no -> -1", goal="mean logistic(y * s) + lam * l2sq(w)")
    table = spec_table(text)["table"]
    _y, missing, unlisted = estimator_src._target_values("t.csv", table, {"late": ["yes", "no", "maybe"]})
    assert list(unlisted) == [False, False, True] and not np.any(missing)
    use_spec(text)
    path = write_csv(tmp_path / "t.csv", ["a", "late"], [["1", "yes"], ["2", "no"], ["3", "maybe"]])
    with pytest.raises(TableError, match=r"data row 3, column 'late': 'maybe' is not in the spec's label map"):
        estimator_src.load_table(str(path))
    with pytest.raises(TableError, match="target column 'late' is not in the table"):
        estimator_src._target_values("t.csv", table, {"a": ["1"]})


# ---------------------------------------------------------------- the table loader

LOADER_SPEC = '''table t from "t.csv"
  target late: yes -> +1, no -> -1
  inputs dist, stops
  feature ds = dist * stops
  rowweight wt
  classweight +1 = 3, -1 = 1
  onehot town
  standardize
  missing drop
  holdout 25% seed 3
learn w over inputs, b
score s = w . x + b
goal mean logistic(y * s) + 0.1 * l2sq(w)
'''


def test_load_table_binds_the_training_rows_objc_binds(tmp_path, monkeypatch):
    rng = np.random.default_rng(12)
    rows = [[f"{rng.uniform(1, 30):.2f}", int(rng.integers(1, 9)), f"{rng.uniform(0.5, 2):.2f}",
             ["Lyon", "Nice", "Metz"][int(rng.integers(0, 3))], "yes" if rng.random() < 0.4 else "no"]
            for _ in range(41)]
    rows[6][0], rows[11][2], rows[20][4] = "NA", "", "#N/A"  # three rows with a missing cell, dropped
    path = write_csv(tmp_path / "t.csv", ["dist", "stops", "wt", "town", "late"], rows)
    checked = objc.check_text(LOADER_SPEC, str(tmp_path / "t.objc"))
    train, _held, _where = training.bind_training(checked, tmp_path)
    monkeypatch.setattr(estimator_src, "SPEC", nm.load_module(nm.emit_module(checked, "import"))["SPEC"])
    X, y, c, names, stats = estimator_src.load_table(str(path))
    assert names == train.input_names == ("dist", "stops", "ds", "town=Lyon", "town=Metz", "town=Nice")
    np.testing.assert_array_equal(y, train.y)
    np.testing.assert_allclose(c, train.weights, rtol=1e-15)
    # objc standardizes all rows, then again on the training part; the module on the training part once
    np.testing.assert_allclose(X, train.X, rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(stats["means"], train.standardization.means, rtol=1e-12)
    np.testing.assert_allclose(stats["scales"], train.standardization.scales, rtol=1e-12)
    assert stats["maps"] == [{"categories": {"town": ["Lyon", "Metz", "Nice"]}}]
    # the onehot indicators stay 0/1, as objc leaves them
    assert set(np.unique(X[:, 3:])) == {0.0, 1.0}


def test_load_table_refuses_negative_weights_and_a_single_class(tmp_path, use_spec):
    text = spec_text("inputs a", target="target late: yes -> +1, no -> -1", clauses="  rowweight wt\n",
                     goal="mean logistic(y * s) + lam * l2sq(w)")
    use_spec(text)
    path = write_csv(tmp_path / "t.csv", ["a", "wt", "late"], [[1, 1, "yes"], [2, -0.5, "no"], [3, 1, "no"]])
    with pytest.raises(TableError, match="data row 2: a negative row weight"):
        estimator_src.load_table(str(path))
    path = write_csv(tmp_path / "t.csv", ["a", "wt", "late"], [[1, 1, "yes"], [2, 1, "yes"]])
    with pytest.raises(TableError, match="holds one class only"):
        estimator_src.load_table(str(path))


# ---------------------------------------------------------------- standardization and maps

def test_scaling_refusal_names_the_first_input_and_counts_the_rest():
    X = np.column_stack([np.ones(5), np.arange(5.0), np.full(5, 2.0), [1e308, -1e308, 0, 1e308, -1e308]])
    means, scales, problems = standard_scales(X)
    assert [j for j, _why, _top in problems] == [0, 2, 3]
    message = estimator_src._scaling_refusal(problems, ["a", "b", "c", "d"])
    assert message.startswith("input 'a' (and 2 more) is constant on these rows")
    overflow = [p for p in problems if p[0] == 3]
    assert "too large to standardize (up to 1e+308" in estimator_src._scaling_refusal(overflow, ["a", "b", "c", "d"])
    # an input without a name is counted from 1
    assert estimator_src._scaling_refusal(problems[1:2], []).startswith("input 3 (counting from 1) is constant")


def test_only_the_onehot_indicators_stay_unscaled():
    table = {"maps": ({"kind": "onehot", "columns": ["town", "day"]}, {"kind": "powers", "columns": ["t"]})}
    state = [{"categories": {"town": ["Lyon", "Nice"], "day": ["1", "7"]}}, {}]
    assert estimator_src._map_unscaled(table, state) == {"town=Lyon", "town=Nice", "day=1", "day=7"}
    assert estimator_src._map_unscaled({}, None) == set()


# ---------------------------------------------------------------- class probabilities

MARGIN_HEAD = spec_text("inputs a, b", target="target late: yes -> +1, no -> -1")


def test_the_exponential_loss_reads_as_half_the_log_odds():
    spec = spec_table(MARGIN_HEAD.replace("mean squared(y - s)", "mean exponential(y * s)"))
    term = estimator_src._probability_term(spec, {"lam": 0.1})
    assert term is not None and term["loss"] == "exponential"
    s = np.linspace(-20.0, 20.0, 41)
    ones = np.ones_like(s)
    d_pos, d_neg = term["rows"](s, ones, {}, {})[1], term["rows"](s, -ones, {}, {})[1]
    p = estimator_src.class_probabilities(d_pos, d_neg)
    np.testing.assert_allclose(p[:, 1], expit(2 * s), rtol=1e-12)
    np.testing.assert_allclose(p[:, 0], expit(-2 * s), rtol=1e-12)


@pytest.mark.parametrize("goal", ["mean hinge(y * s) + lam * l2sq(w)",  # not differentiable at the kink
                                  "mean logistic(y * s) + mean squared_hinge(y * s) + lam * l2sq(w)"])  # two terms
def test_no_probability_without_one_smooth_calibrated_margin_loss(goal):
    spec = spec_table(MARGIN_HEAD.replace("mean squared(y - s) + lam * l2sq(w)", goal))
    assert estimator_src._probability_term(spec, {}) is None
    assert estimator_src._probability_term(spec_table(spec_text()), {}) is None  # a residual loss


# ---------------------------------------------------------------- the estimator base classes

class Regressor(estimator_src.EstimatorBase):
    _param_names = ("lam", "tol", "max_passes", "allow_nonconvex", "use_scipy", "param_tol")

    def __init__(self, *, lam=0.1, tol=1e-10, max_passes=None, allow_nonconvex=False, use_scipy=True, param_tol=1e-8):
        self.lam, self.tol, self.max_passes = lam, tol, max_passes
        self.allow_nonconvex, self.use_scipy, self.param_tol = allow_nonconvex, use_scipy, param_tol


class Classifier(estimator_src.ClassifierBase):
    _param_names = Regressor._param_names
    __init__ = Regressor.__init__


def test_get_params_set_params_and_repr_follow_scikit_learn():
    model = Regressor(lam=0.5)
    assert model.get_params() == {"lam": 0.5, "tol": 1e-10, "max_passes": None, "allow_nonconvex": False,
                                  "use_scipy": True, "param_tol": 1e-8}
    assert model.set_params(lam=0.25, tol=1e-7) is model and (model.lam, model.tol) == (0.25, 1e-7)
    assert repr(model) == ("Regressor(lam=0.25, tol=1e-07, max_passes=None, allow_nonconvex=False, use_scipy=True, "
                           "param_tol=1e-08)")
    # scikit-learn's own wording for a parameter the estimator does not have (BaseEstimator.set_params)
    with pytest.raises(ValueError, match=r"Invalid parameter 'alpha' for estimator Regressor\. Valid parameters "
                                         r"are: \['allow_nonconvex', 'lam', 'max_passes', 'param_tol', 'tol', "
                                         r"'use_scipy'\]\."):
        model.set_params(alpha=1.0)


def test_an_unfitted_model_raises_scikit_learns_error_or_its_own(use_spec, monkeypatch):
    use_spec(spec_text())
    import sklearn.exceptions
    with pytest.raises(sklearn.exceptions.NotFittedError):
        Regressor().predict(np.zeros((2, 3)))
    # without scikit-learn loaded: an error that is both a ValueError and an AttributeError, as
    # scikit-learn's NotFittedError is
    monkeypatch.delitem(sys.modules, "sklearn.exceptions")
    with pytest.raises(estimator_src._NotFitted) as info:
        Regressor().predict(np.zeros((2, 3)))
    assert isinstance(info.value, ValueError) and isinstance(info.value, AttributeError)


@pytest.fixture(scope="module")
def regression_rows():
    rng = np.random.default_rng(21)
    X = rng.normal(size=(60, 3))
    y = X @ np.array([1.0, -2.0, 0.5]) + 0.3 + rng.normal(scale=0.5, size=60)
    return X, y, rng.uniform(0.1, 2.0, size=60)


def test_score_is_the_weighted_r2_of_scikit_learn(use_spec, regression_rows):
    from sklearn.metrics import r2_score
    use_spec(spec_text())
    X, y, w = regression_rows
    model = Regressor().fit(X, y)
    assert model.coef_.shape == (3,) and isinstance(model.intercept_, float) and model.input_names_ == ("a", "b", "c")
    pred = model.predict(X)
    assert model.score(X, y) == pytest.approx(r2_score(y, pred), rel=1e-12)
    assert model.score(X, y, sample_weight=w) == pytest.approx(r2_score(y, pred, sample_weight=w), rel=1e-12)
    # a constant target: scikit-learn's finite convention, 1 for a perfect prediction, else 0
    constant = np.full(len(y), 2.0)
    assert model.score(X, constant) == r2_score(constant, pred) == 0.0


def test_a_column_vector_target_warns_and_fits_as_one_column(use_spec, regression_rows):
    import sklearn.exceptions
    use_spec(spec_text())
    X, y, _w = regression_rows
    with pytest.warns(sklearn.exceptions.DataConversionWarning, match="column-vector y"):
        column = Regressor().fit(X, y[:, None])
    np.testing.assert_allclose(column.coef_, Regressor().fit(X, y).coef_, rtol=1e-12)


def test_classifier_score_is_the_weighted_accuracy_of_scikit_learn(use_spec, regression_rows):
    from sklearn.metrics import accuracy_score
    use_spec(MARGIN_HEAD.replace("mean squared(y - s)", "mean logistic(y * s)"))
    X, y, w = regression_rows
    labels = np.where(y > 0.3, "yes", "no")
    model = Classifier(lam=0.05).fit(X, labels)
    assert list(model.classes_) == ["no", "yes"]
    pred = model.predict(X)
    np.testing.assert_array_equal(pred == "yes", model.decision_function(X) > 0)
    assert model.score(X, labels) == pytest.approx(accuracy_score(labels, pred), rel=1e-12)
    assert model.score(X, labels, sample_weight=w) == pytest.approx(accuracy_score(labels, pred, sample_weight=w),
                                                                    rel=1e-12)
    assert model.score(X, labels) < 1.0  # the classes overlap, so a wrong prediction is counted


# ---------------------------------------------------------------- the command line

def test_positive_takes_a_positive_finite_number_only():
    assert estimator_src._positive("1e-6", "--param-tol") == 1e-6
    for text in ("0", "-1", "nan", "inf", "abc", ""):
        with pytest.raises(TableError, match=f"--param-tol {text!r}: write a positive number, or off"):
            estimator_src._positive(text, "--param-tol")


def test_write_json_atomic_writes_strict_json_or_leaves_the_old_file(tmp_path):
    path = tmp_path / "m.json"
    estimator_src._write_json_atomic(str(path), {"w": [1.0, 2.5], "name": "é"})
    assert json.loads(path.read_text(encoding="utf-8")) == {"w": [1.0, 2.5], "name": "é"}
    assert path.read_text(encoding="utf-8").endswith("}\n")
    before = path.read_bytes()
    with pytest.raises(ValueError):  # strict JSON has no NaN (RFC 8259, section 6)
        estimator_src._write_json_atomic(str(path), {"w": [float("nan")]})
    assert path.read_bytes() == before and os.listdir(tmp_path) == ["m.json"]


def _ridge_csv(tmp_path):
    rng = np.random.default_rng(30)
    X = rng.normal(size=(50, 3))
    y = X @ np.array([0.5, -1.0, 2.0]) + rng.normal(scale=0.3, size=50)
    return write_csv(tmp_path / "t.csv", ["a", "b", "c", "y"], np.column_stack([X, y]).tolist()), X, y


def test_the_command_line_fits_ridge_and_writes_the_weights_by_name(tmp_path, use_spec, capsys):
    path, X, y = _ridge_csv(tmp_path)
    use_spec(spec_text(goal="mean squared(y - s) + lam * l2sq(w)", learn="learn w over inputs", score="w . x"))
    out = tmp_path / "m.json"
    rc = estimator_src.main([str(path), "-o", str(out), "--set", "lam=0.05", "--tol", "1e-12", "--param-tol", "1e-9"])
    assert rc == 0, capsys.readouterr().err
    model = json.loads(out.read_text())
    # squared is r^2 / 2 (docs/language.md, section 8): w* = (X'X / n + 2 lam I)^-1 X'y / n
    n = len(y)
    w_star = np.linalg.solve(X.T @ X / n + 2 * 0.05 * np.eye(3), X.T @ y / n)
    assert list(model["params"]["w"]) == ["a", "b", "c"] and model["inputs"] == ["a", "b", "c"]
    np.testing.assert_allclose([model["params"]["w"][k] for k in "abc"], w_star, atol=1e-7)
    assert model["tunables"] == {"lam": 0.05} and model["standardization"] is None
    assert "wrote" in capsys.readouterr().out


@pytest.mark.parametrize("args,words", [
    (["--set", "lam"], "--set 'lam': write NAME=VALUE"),
    (["--set", "lam=abc"], "--set 'lam=abc': 'abc' is not a number"),
    (["--set", "lam=50"], "outside its declared range 0.0001 .. 1"),
    (["--param-tol", "0"], "--param-tol '0': write a positive number, or off"),
])
def test_the_command_line_refuses_bad_settings_with_one_line_and_writes_nothing(tmp_path, use_spec, capsys, args,
                                                                                 words):
    path, _X, _y = _ridge_csv(tmp_path)
    use_spec(spec_text())
    out = tmp_path / "m.json"
    rc = estimator_src.main([str(path), "-o", str(out)] + args)
    err = capsys.readouterr().err
    assert rc == 1 and err.startswith("error: ") and words in err and err.count("\n") == 1
    assert not out.exists()
