"""objc.score_form: the score as s = A theta + offset, the slots of the learned parameters in theta,
the `standard` flag a backend uses to skip copying the data, and the K scores of a multiclass spec.

Each score is checked against the same score written out by hand in NumPy on random rows.
"""

from __future__ import annotations

import numpy as np
import pytest

import objc
from objc.score_form import class_scores, design, layout, score_form

NAMES = ("a", "b", "c", "z")  # the inputs of HEADER, the feature z last
HEADER = '''table t from "t.csv"
  target y
  inputs a, b, c
  feature z = a * c
'''
CLASSES = '''table t from "t.csv"
  target kind classes rye, spelt, wheat
  inputs a, b, c
'''


def checked(learn: str, score: str, header: str = HEADER, goal: str = "mean squared(y - s) + 0.1 * l2sq(w)"):
    text = f"{header}{learn}\n" + (f"score s = {score}\n" if score else "") + f"goal {goal}\n"
    result = objc.check_text(text, "score.objc")
    assert not result.errors, [d.render(result.source) for d in result.errors]
    return result


@pytest.fixture(scope="module")
def rows():
    rng = np.random.default_rng(5)
    X = rng.normal(size=(7, 4))
    X[:, 3] = X[:, 0] * X[:, 2]  # z = a * c, as the feature says
    return X, rng.normal(size=7)


# ---------------------------------------------------------------- slots

def test_slots_of_a_score_with_an_intercept():
    form = score_form(checked("learn w over inputs, b", "w . x + b"), NAMES)
    assert [(s.name, s.vector, s.start, s.size) for s in form.slots] == [("w", True, 0, 4), ("b", False, 4, 1)]
    assert form.size == 5 and form.input_names == NAMES
    assert (form.standard, form.weights_name, form.intercept_name) == (True, "w", "b")
    assert form.index_of("w", "c") == 2 and form.index_of("b", None) == 4


def test_slots_of_a_score_without_an_intercept():
    form = score_form(checked("learn w over inputs", "w . x"), NAMES)
    assert [(s.name, s.vector, s.start, s.size) for s in form.slots] == [("w", True, 0, 4)]
    assert (form.standard, form.weights_name, form.intercept_name, form.size) == (True, "w", None, 4)


def test_slots_follow_the_order_parameters_are_learned_in():
    form = score_form(checked("learn b, w over inputs", "w . x + b"), NAMES)
    assert [(s.name, s.start, s.size) for s in form.slots] == [("b", 0, 1), ("w", 1, 4)]
    assert form.standard and form.index_of("w", "a") == 1


def test_slots_of_parameters_by_classes_count_an_entry_per_class():
    # three classes, three inputs: W is 3 x 3 (9 numbers), b one per class
    spec = checked("learn W over inputs by classes, b by classes", "W . x + b", header=CLASSES,
                   goal="mean softmax_ce(s, y) + 0.01 * l2sq(W)")
    slots = layout(spec, ("a", "b", "c"))
    assert [(s.name, s.vector, s.start, s.size) for s in slots] == [("W", True, 0, 9), ("b", True, 9, 3)]
    with pytest.raises(ValueError, match="class_scores"):
        score_form(spec, ("a", "b", "c"))


# ---------------------------------------------------------------- s = A theta + offset

def _hand(score, X):
    """The score written out by hand for the learned values in `p`."""
    a, b, c, z = X.T
    return {
        "w . x + b": lambda p: X @ p["w"] + p["b"],
        "w . x - b": lambda p: X @ p["w"] - p["b"],
        "-(w . x) + b": lambda p: -(X @ p["w"]) + p["b"],
        "w . x + b + 0.5 * z - z / 4 + 3": lambda p: X @ p["w"] + p["b"] + 0.25 * z + 3,
        "w . x + b / 2 - 3 * g": lambda p: X @ p["w"] + p["b"] / 2 - 3 * p["g"],
        "w . x + b + g * z": lambda p: X @ p["w"] + p["b"] + p["g"] * z,
        "w . x + w[a] * z + b": lambda p: X @ p["w"] + p["w"][0] * z + p["b"],
        "w[a] * 2 + w . x + b": lambda p: X @ p["w"] + 2 * p["w"][0] + p["b"],
        "w[a, b] . x[a, b] + b": lambda p: a * p["w"][0] + b * p["w"][1] + p["b"],
        "w . x + (b - 1) * 2": lambda p: X @ p["w"] + 2 * p["b"] - 2,
        "2 * -(z - b) + w . x": lambda p: -2 * z + 2 * p["b"] + X @ p["w"],
        "3 * (2 * g) + w . x + b": lambda p: 6 * p["g"] + X @ p["w"] + p["b"],
    }[score]


@pytest.mark.parametrize("score", ["w . x + b", "w . x - b", "-(w . x) + b", "w . x + b + 0.5 * z - z / 4 + 3",
                                   "w . x + b / 2 - 3 * g", "w . x + b + g * z", "w . x + w[a] * z + b",
                                   "w[a] * 2 + w . x + b", "w[a, b] . x[a, b] + b", "w . x + (b - 1) * 2",
                                   "2 * -(z - b) + w . x", "3 * (2 * g) + w . x + b"])
def test_design_reproduces_the_score_written_by_hand(score, rows):
    X, y = rows
    learn = "learn w over inputs, b, g" if "g" in score else "learn w over inputs, b"
    form = score_form(checked(learn, score), NAMES)
    A, offset = design(form, X, y)
    assert A.shape == (len(X), form.size)
    rng = np.random.default_rng(len(score))
    for _ in range(3):
        theta = rng.normal(size=form.size)
        params = {s.name: theta[s.start:s.start + s.size] if s.vector else theta[s.start] for s in form.slots}
        np.testing.assert_allclose(A @ theta + offset, _hand(score, X)(params), rtol=1e-13, atol=1e-13)
    # only exactly w . x (+ b), in that sign, lets a backend read the data matrix as it is
    assert form.standard is (score == "w . x + b")


def test_the_standard_design_is_the_data_with_a_column_of_ones(rows):
    X, y = rows
    form = score_form(checked("learn w over inputs, b", "w . x + b"), NAMES)
    A, offset = design(form, X, y)
    np.testing.assert_array_equal(A, np.column_stack([X, np.ones(len(X))]))
    np.testing.assert_array_equal(offset, np.zeros(len(X)))


def test_a_parameter_the_score_does_not_read_keeps_its_slot_and_no_column(rows):
    X, y = rows
    form = score_form(checked("learn w over inputs, b, g", "w . x + b", goal="mean squared(y - s) + l2sq(w) + g^2"),
                      NAMES)
    A, _offset = design(form, X, y)
    assert form.slot("g").start == 5 and not form.standard
    np.testing.assert_array_equal(A[:, 5], 0.0)


# ---------------------------------------------------------------- scores no backend can read

@pytest.mark.parametrize("score", ["2 * (w . x) + b", "(w . x + b) / 2"])
def test_a_scaled_dot_product_is_refused_with_the_way_out(score):
    spec = objc.check_text(f"{HEADER}learn w over inputs, b\nscore s = {score}\n"
                           "goal mean squared(y - s) + 0.1 * l2sq(w)\n", "score.objc")
    with pytest.raises(ValueError, match="moving the factor onto x's columns"):
        score_form(spec, NAMES)


def test_no_score_is_refused():
    spec = checked("learn w over inputs, b", "", goal="0.1 * l2sq(w) + b^2")
    with pytest.raises(ValueError, match="no score"):
        score_form(spec, NAMES)


# ---------------------------------------------------------------- the K scores of a multiclass spec

@pytest.mark.parametrize("intercept", [True, False])
def test_class_scores_are_each_rows_scores_for_every_class(intercept, rows):
    X = rows[0][:, :3]
    learn = "learn W over inputs by classes" + (", b by classes" if intercept else "")
    spec = checked(learn, "W . x + b" if intercept else "W . x", header=CLASSES,
                   goal="mean softmax_ce(s, y) + 0.01 * l2sq(W)")
    rng = np.random.default_rng(2)
    params = {"W": rng.normal(size=(3, 3)), "b": rng.normal(size=3)}
    S = class_scores(spec, params, X)
    # s_ik = sum_j x_ij W_jk (+ b_k), by loops
    for i in range(len(X)):
        for k in range(3):
            expected = sum(X[i, j] * params["W"][j, k] for j in range(3)) + (params["b"][k] if intercept else 0.0)
            assert S[i, k] == pytest.approx(expected, rel=1e-13, abs=1e-13)


def test_class_scores_refuse_a_score_with_one_value_per_row(rows):
    spec = checked("learn w over inputs, b", "w . x + b")
    with pytest.raises(ValueError, match="W . x"):
        class_scores(spec, {"w": np.zeros(4), "b": 0.0}, rows[0])
