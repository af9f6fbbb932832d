"""The one rule set of a derived feature's formula (objc/feature_formula.py): the forms it accepts and
refuses (with the codes of docs/language.md's error table), the columns it reads, its values on a
table, and the generated NumPy module computing the same values as objc's table binder."""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest

from objc import SpecError, check_text, training
from objc import syntax_tree as st
from objc.backends import numpy_module
from objc.feature_formula import check_formula, evaluate
from objc.spec_parser import parse
from objc.source_text import SourceText

SPEC = """table rows from "rows.csv"
  target label: yes -> +1, no -> -1
  inputs a, c, d
  feature f = {formula}
tune C = 1 within 0.1 .. 2
learn w over inputs, b
score s = w . x + b
goal mean logistic(y * s) + 0.1 * l2sq(w)
"""
FEATURE_LINE = 4
FORMULA_COLUMN = len("  feature f = ") + 1


def formula_of(text: str) -> st.Expr:
    """The parsed formula of `feature f = text` (the parser's own spans)."""
    tree = parse(SourceText("f.objc", SPEC.format(formula=text)))
    return next(s.expr for s in tree.statements if isinstance(s, st.FeatureClause))


def errors_of(formula: str) -> list[tuple[str, int, str]]:
    """(code, column, offending text) of each error the spec with this feature gets."""
    with pytest.raises(SpecError) as info:
        check_text(SPEC.format(formula=formula), "f.objc")
    line = SPEC.format(formula=formula).split("\n")[FEATURE_LINE - 1]
    out = []
    for d in info.value.diagnostics:
        assert d.span.line == FEATURE_LINE and d.hint, d  # every refusal points at the formula and says what to do
        out.append((d.code, d.span.column, line[d.span.column - 1:d.span.end_column - 1]))
    return out


# ---------------------------------------------------------------- the forms accepted

@pytest.mark.parametrize("formula", [
    "(a + 1) ^ -1",  # a negated literal is a literal exponent, as in the goal
    "a ^ -(-2)",
    "max(a, c, -0.5)",  # an atom of two or more arguments
    "hypot(a, c) / d",  # division by a column: a row with d = 0 is a data fact (T161), not a rule
    "below(a, -0.5)",  # a negative literal setting inside its range
    "-log1p(abs(c))",
])
def test_a_row_by_row_formula_resolves(formula):
    # docs/language.md: a feature is row-by-row arithmetic of columns, numbers and atoms
    checked = check_text(SPEC.format(formula=formula), "f.objc")
    assert [f.name for f in checked.spec.table.features] == ["f"]


def test_the_columns_read_are_listed_once_in_order():
    folded = check_formula(formula_of("log1p(d) * a + d ^ 2 - hypot(c, a)"))
    assert folded.diagnostics == ()
    assert folded.columns == ("d", "a", "c")
    # each listed name carries the span of its first use, where a missing column is reported (T110)
    assert [n.span.column for n in folded.reads] == [FORMULA_COLUMN + 6, FORMULA_COLUMN + 11,
                                                     FORMULA_COLUMN + 29]


# ---------------------------------------------------------------- the forms refused, with their codes

@pytest.mark.parametrize("formula,expected", [
    ("w * a", [("E217", FORMULA_COLUMN, "w")]),  # a learned parameter
    ("C * a", [("E217", FORMULA_COLUMN, "C")]),  # a tunable
    ("y * a", [("E217", FORMULA_COLUMN, "y")]),  # the target
    ("s + a", [("E217", FORMULA_COLUMN, "s")]),  # the score
    ("x", [("E217", FORMULA_COLUMN, "x")]),  # the input matrix
    ("mean a", [("E217", FORMULA_COLUMN, "mean a")]),  # adds over rows
    ("a . c", [("E217", FORMULA_COLUMN, "a . c")]),  # a dot product
    ("w[a]", [("E217", FORMULA_COLUMN, "w[a]")]),  # a selection
    ("log2p(a)", [("E218", FORMULA_COLUMN, "log2p")]),  # no such function
    ("l1(a)", [("E218", FORMULA_COLUMN, "l1")]),  # a norm of a parameter vector
    ("hinge(a)", [("E218", FORMULA_COLUMN, "hinge")]),  # a loss, not an atom
    ("a ^ C", [("E219", FORMULA_COLUMN + 4, "C")]),  # a tunable exponent
    ("a ^ (1 + 1)", [("E219", FORMULA_COLUMN + 5, "1 + 1")]),  # an expression as exponent
    ("max(a)", [("E237", FORMULA_COLUMN, "max(a)")]),  # two or more arguments
    ("hypot(a)", [("E237", FORMULA_COLUMN, "hypot(a)")]),
    ("below(a, d)", [("E238", FORMULA_COLUMN + 9, "d")]),  # a setting read from a column
    ("below(a, C)", [("E238", FORMULA_COLUMN + 9, "C")]),  # a tunable setting
    ("log1p(a, 2)", [("E239", FORMULA_COLUMN, "log1p(a, 2)")]),  # a setting the atom does not have
    ("a * 1e999", [("E248", FORMULA_COLUMN + 4, "1e999")]),  # infinite
    # every problem is reported together
    ("w * a + log2p(c) + d ^ C", [("E217", FORMULA_COLUMN, "w"), ("E218", FORMULA_COLUMN + 8, "log2p"),
                                  ("E219", FORMULA_COLUMN + 23, "C")]),
])
def test_a_formula_outside_the_rules_is_refused_at_its_place(formula, expected):
    # the codes and what each refuses are docs/language.md's error table (E217-E219, E237-E239, E248)
    assert errors_of(formula) == expected


def test_the_refusal_names_what_the_name_is_and_suggests_the_atom():
    with pytest.raises(SpecError) as info:
        check_text(SPEC.format(formula="log2p(w)"), "f.objc")
    by_code = {d.code: d for d in info.value.diagnostics}
    assert "did you mean 'log1p'?" == by_code["E218"].hint
    assert "'w' is not a column (a learned parameter)" in by_code["E217"].message


# ---------------------------------------------------------------- values

COLUMNS = {"a": np.array([0.0, 1.0, 3.0, math.e - 1.0, -0.75]),
           "c": np.array([4.0, -2.0, 0.25, 1.0, 2.0]),
           "d": np.array([2.0, 0.5, 0.0, -1.0, 8.0])}


@pytest.mark.parametrize("formula,by_hand", [
    # each right-hand side is the textbook formula written directly in NumPy
    ("(a + 1) ^ -1", lambda a, c, d: 1.0 / (a + 1.0)),
    ("a ^ -(-2)", lambda a, c, d: a * a),
    ("hypot(3 * d, 4 * d)", lambda a, c, d: 5.0 * np.abs(d)),  # the 3-4-5 right triangle
    ("log1p(a)", lambda a, c, d: np.log(1.0 + a)),
    ("max(a, c, -0.5)", lambda a, c, d: np.maximum(np.maximum(a, c), -0.5)),
    ("min(a, c) - -c", lambda a, c, d: np.minimum(a, c) + c),
    ("below(a, -0.5)", lambda a, c, d: (a < -0.5).astype(float)),
    ("c / d", lambda a, c, d: np.array([2.0, -4.0, np.inf, -1.0, 0.25])),  # c / 0 is inf, left for T161
])
def test_values_are_the_textbook_formula(formula, by_hand):
    got = evaluate(formula_of(formula), COLUMNS, 5)
    np.testing.assert_allclose(got, by_hand(**COLUMNS), rtol=1e-15)


def test_log1p_of_e_minus_one_is_one():
    # log(1 + (e - 1)) = log e = 1
    assert evaluate(formula_of("log1p(a)"), COLUMNS, 5)[3] == pytest.approx(1.0, abs=1e-15)


def test_evaluating_a_formula_outside_the_rules_raises():
    with pytest.raises(ValueError, match="not a feature formula"):
        evaluate(formula_of("mean a"), COLUMNS, 5)


@pytest.mark.parametrize("formula", [
    "(a + 1) ^ -1", "hypot(3 * d, 4 * d)", "max(a, c, -0.5)", "below(a, -0.5) * c", "-(a ^ 3) / (d ^ 2 + 1)",
    "sqrt(abs(c)) + exp(-a) - softplus(d)",
])
def test_the_generated_module_computes_the_feature_as_objc_does(formula):
    # the module writes the formula as Python; on the same columns it gives objc's values, which the
    # test above holds to the formulas written by hand
    checked = check_text(SPEC.format(formula=formula), "f.objc")
    module = numpy_module.load_module(numpy_module.emit_module(checked))
    ours = evaluate(formula_of(formula), COLUMNS, 5)
    np.testing.assert_array_equal(np.broadcast_to(module["feature_0"](COLUMNS), (5,)), ours)


def test_a_negative_exponent_feature_fits_the_same_on_both_backends(tmp_path):
    # the feature 1 / (a + 1): objc's binder computes it for the cvxpy fit (Clarabel, the outside
    # reference); the generated module computes it itself from the frame for its own fit
    text = SPEC.format(formula="(a + 1) ^ -1").replace("  inputs a, c, d\n", "  inputs a, c\n")
    checked = check_text(text, str(tmp_path / "f.objc"))
    rng = np.random.default_rng(11)
    a, c = rng.uniform(0.0, 3.0, 120), rng.normal(size=120)
    label = np.where(1.0 / (a + 1.0) - 0.5 + 0.3 * rng.normal(size=120) > 0, "yes", "no")
    frame = pd.DataFrame({"a": a, "c": c, "label": label})
    train, _, _ = training.bind_training(checked, tmp_path, frame=frame)
    assert train.input_names == ("a", "c", "f")
    np.testing.assert_allclose(train.X[:, 2], 1.0 / (a + 1.0), rtol=1e-15)
    reference = training.run_backend(checked, train, "cvxpy")
    ours = training.run_backend(checked, train, "numpy")
    assert ours.objective == pytest.approx(reference.objective, rel=1e-6)
    module = numpy_module.load_module(numpy_module.emit_module(checked))
    est = module["Model"]().fit(frame[["a", "c"]], frame["label"])
    np.testing.assert_allclose(est.decision_function(frame[["a", "c"]]),
                               train.X @ reference.params["w"] + reference.params["b"], atol=1e-5)
