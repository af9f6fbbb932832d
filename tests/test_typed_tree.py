"""objc.typed_tree: the walks every later stage makes over typed nodes (children, map_children,
arithmetic, is_square), the names the polynomial, spline and fourier maps give their inputs, and
TableBinding.explicit_inputs.

Typed trees come from real spec text through objc.check_text. References: the nodes' own dataclass
fields for children; Python's exact fractions for arithmetic; itertools.product and the
stars-and-bars count C(n + d, d) - 1 of the monomials of n variables of degree 1 to d (Feller, An
Introduction to Probability Theory, vol. 1, section II.5) for map_exponents; docs/language.md
section 6a for the names of the maps' inputs.
"""

from __future__ import annotations

import dataclasses
import itertools
import json
import math
import re
import typing
from fractions import Fraction

import numpy as np
import pytest

import objc
from objc import typed_tree as tt
from objc.source_text import Span

NODE_TYPES = typing.get_args(tt.TExpr)

MARGIN = '''table rows from "rows.csv"
  target label: yes -> +1, no -> -1
  inputs a, b, c
learn w over inputs, b
score s = w . x + b
'''
RESIDUAL = MARGIN.replace(": yes -> +1, no -> -1", "")

# a goal that holds every kind of typed node: numbers, a tunable exponent, data, the score, a dot
# product, a custom loss, catalog entries with and without settings, + - * / and both aggregates
EVERY_NODE = MARGIN + '''tune q = 2 within 1.5 .. 4
tune C = 1 within 0.1 .. 10
loss clip(m) = max(0, 1 - m) ^ 2
goal C * mean clip(y * s) + mean pos(1 - y * s) ^ q + (3 - 1) / 4 * l2sq(w) + mean smooth_hinge(y * s, 0.5)
  + sum abs(w[a, b])
'''


def goal_of(text: str) -> tt.TExpr:
    checked = objc.check_text(text, "case.objc")
    assert checked.accepted, [d.render(checked.source) for d in checked.errors]
    return checked.spec.goal


def walk(e):
    yield e
    for child in tt.children(e):
        yield from walk(child)


def holds_nodes(value) -> bool:
    return isinstance(value, NODE_TYPES) or (isinstance(value, tuple) and any(holds_nodes(v) for v in value))


def held_expressions(e) -> list:
    """Every typed node a node holds in its fields, in field order (tuples opened, a tuned setting's
    (name, tunable) pair read as its tunable): what `children` must return."""
    found = []

    def take(value):
        if isinstance(value, NODE_TYPES):
            found.append(value)
        elif isinstance(value, tuple):
            for v in value:
                take(v)
    for f in dataclasses.fields(e):
        take(getattr(e, f.name))
    return found


@pytest.fixture(scope="module")
def every_node():
    return list(walk(goal_of(EVERY_NODE)))


# ---------------------------------------------------------------- children and map_children

def test_the_sample_goal_holds_every_kind_of_node(every_node):
    assert {type(n) for n in every_node} == set(NODE_TYPES)


def test_children_are_exactly_the_expressions_a_node_holds(every_node):
    for node in every_node:
        assert list(tt.children(node)) == held_expressions(node), type(node).__name__


def test_map_children_with_the_identity_rebuilds_an_equal_node(every_node):
    for node in every_node:
        assert tt.map_children(node, lambda c: c) == node
        if not tt.children(node):
            assert tt.map_children(node, lambda c: pytest.fail("a leaf has no children")) is node


def test_map_children_replaces_the_children_and_keeps_everything_else(every_node):
    for node in every_node:
        if not tt.children(node) or (isinstance(node, tt.Apply) and node.tuned):
            continue
        markers = []

        def mark(child):
            markers.append(tt.Const(float(len(markers)), child.span))
            return markers[-1]
        mapped = tt.map_children(node, mark)
        assert type(mapped) is type(node)
        assert list(tt.children(mapped)) == markers
        for f in dataclasses.fields(node):
            before = getattr(node, f.name)
            if not holds_nodes(before):
                assert getattr(mapped, f.name) == before, (type(node).__name__, f.name)


def _tuned_power(every_node) -> tt.Apply:
    (power,) = [n for n in every_node if isinstance(n, tt.Apply) and n.tuned]
    return power


def test_mapping_a_tunable_setting_to_a_number_fixes_it(every_node):
    power = _tuned_power(every_node)
    (key, ref), = power.tuned
    fixed = tt.map_children(power, lambda c: tt.Const(3.0, c.span) if isinstance(c, tt.TunableRef) else c)
    assert fixed.tuned == () and fixed.option_dict[key] == 3.0
    assert tt.children(fixed) == power.args
    # to another tunable: still a setting, read from the new one
    other = dataclasses.replace(ref, name="r", default=2.5)
    renamed = tt.map_children(power, lambda c: other if c is ref else c)
    assert renamed.tuned == ((key, other),) and renamed.option_values() == {key: 2.5}
    assert renamed.option_values({"r": 1.75}) == {key: 1.75}


def test_a_setting_cannot_become_anything_but_a_tunable_or_a_number(every_node):
    power = _tuned_power(every_node)
    learned = tt.ParamRef("b", False, Span(1, 1, 1, 2))
    with pytest.raises(TypeError, match="tunable or a number"):
        tt.map_children(power, lambda c: learned if isinstance(c, tt.TunableRef) else c)


def test_setting_is_the_tunable_that_sets_an_option_or_its_number(every_node):
    power = _tuned_power(every_node)
    (key, ref), = power.tuned
    assert power.setting(key) is ref
    (smooth,) = [n for n in every_node if isinstance(n, tt.Apply) and n.entry == "smooth_hinge"]
    (option,) = smooth.option_dict
    setting = smooth.setting(option)
    assert isinstance(setting, tt.Const) and setting.value == 0.5


# ---------------------------------------------------------------- arithmetic

def _const_algebra(convert):
    def value(e):
        got = tt.arithmetic(e, value)
        return convert(e.value) if got is None else got
    return value


@pytest.mark.parametrize("written", ["(2 + 3) * 4 / 8 - 1", "-(1 - 4) / (2 * 3)", "7 / 2 / 2", "3 - 2 - 0.5",
                                     "0.1 + 0.2 * 3"])
def test_arithmetic_computes_a_coefficient_as_python_does(written):
    goal = goal_of(RESIDUAL + f"goal ({written}) * l2sq(w) + mean squared(y - s)\n")
    coefficient = goal.left.left
    # exact rationals: the tree's operators in Fraction arithmetic against Python evaluating the same
    # text with every number written as a Fraction
    exact = _const_algebra(lambda v: Fraction(str(v)))(coefficient)
    assert exact == eval(re.sub(r"\d+(\.\d+)?", lambda m: f"Fraction('{m.group(0)}')", written), {"Fraction": Fraction})
    assert _const_algebra(float)(coefficient) == pytest.approx(eval(written), rel=1e-15)
    # and in an algebra of arrays, entry by entry
    arrays = _const_algebra(lambda v: np.full(3, v))(coefficient)
    np.testing.assert_allclose(arrays, np.full(3, eval(written)), rtol=1e-15)


def test_arithmetic_is_none_for_every_node_but_the_four_operators(every_node):
    operators = (tt.Add, tt.Neg, tt.Mul, tt.Div)
    for node in every_node:
        got = tt.arithmetic(node, lambda c: 1.0)
        assert (got is None) == (not isinstance(node, operators)), type(node).__name__
    # the dot product is no arithmetic operator: its operands are a vector and the input matrix
    assert any(isinstance(n, tt.Dot) for n in every_node)


# ---------------------------------------------------------------- is_square

@pytest.mark.parametrize("goal,square", [
    ("mean (y - s) ^ 2", True),
    ("mean (y - s) ^ 2.0", True),
    ("mean abs(y - s) ^ 2", True),
    ("mean (y - s) ^ - -2", True),  # a signed literal is the number it reads as
    ("mean (y - s) ^ 4", False),
    ("mean squared(y - s)", False),  # r^2 / 2, another catalog entry
    ("mean abs(y - s) ^ q", False),  # a tunable whose default is 2 can be set to anything in its range
])
def test_is_square_only_for_the_written_exponent_two(goal, square):
    text = RESIDUAL + "tune q = 2 within 1 .. 3\n" + f"goal {goal}\n"
    node = goal_of(text).operand
    assert tt.is_square(node) is square


# ---------------------------------------------------------------- the names of the maps' inputs

@pytest.mark.parametrize("n,degree", [(1, 1), (1, 4), (2, 2), (3, 3), (4, 2), (2, 5)])
def test_monomials_are_every_product_of_total_degree_one_to_d(n, degree):
    got = tt.map_exponents("monomials", n, degree)
    expected = {e for e in itertools.product(range(degree + 1), repeat=n) if 1 <= sum(e) <= degree}
    assert set(got) == expected and len(got) == len(expected) == math.comb(n + degree, degree) - 1
    totals = [sum(e) for e in got]
    assert totals == sorted(totals)
    # within one degree, in the order combinations_with_replacement lists column indices: for exponent
    # tuples that is descending lexicographic order
    for d in range(1, degree + 1):
        same = [e for e in got if sum(e) == d]
        assert same == sorted(same, reverse=True)


@pytest.mark.parametrize("n,degree", [(1, 3), (3, 2), (2, 4)])
def test_powers_raise_each_column_alone_by_degree_then_column(n, degree):
    got = tt.map_exponents("powers", n, degree)
    assert all(sum(1 for p in e if p) == 1 for e in got) and len(got) == n * degree
    assert [(max(e), e.index(max(e))) for e in got] == [(d, j) for d in range(1, degree + 1) for j in range(n)]


@pytest.mark.parametrize("n", [1, 2, 3, 5])
def test_pairs_are_every_product_of_two_distinct_columns(n):
    got = tt.map_exponents("pairs", n, 7)  # the degree is no setting of pairs
    assert got == [tuple(int(j in pair) for j in range(n)) for pair in itertools.combinations(range(n), 2)]
    assert len(got) == math.comb(n, 2)


def test_product_names_as_the_language_reference_writes_them():
    # docs/language.md section 6a and the function's own examples
    assert tt.map_product_name(("temp", "rain"), (1, 0)) == "temp"
    assert tt.map_product_name(("temp", "rain"), (2, 0)) == "temp^2"
    assert tt.map_product_name(("temp", "rain"), (1, 1)) == "temp*rain"
    assert tt.map_product_name(("temp", "rain"), (2, 1)) == "temp^2*rain"
    assert tt.map_product_name(("a", "b", "c"), (0, 3, 1)) == "b^3*c"


def test_a_knot_name_as_the_language_reference_writes_it():
    # docs/language.md section 6a: (temp - 12.5)_+^3 is `(temp-12.5)+^3`; degree 1 has no exponent
    assert tt.map_knot_name("temp", 12.5, 3) == "(temp-12.5)+^3"
    assert tt.map_knot_name("temp", -3.25, 1) == "(temp+3.25)+"


KNOTS = [12.5, -3.25, 0.0, -0.0, 1 / 3, -2 / 3, 1e-300, 5e-324, -1.7976931348623157e308, 123456789.123456789,
         0.1 + 0.2] + list(np.random.default_rng(11).normal(scale=1e3, size=20))


@pytest.mark.parametrize("degree", [1, 2, 3])
def test_a_knot_name_holds_its_knot_exactly(degree):
    for knot in KNOTS:
        name = tt.map_knot_name("temp", float(knot), degree)
        back = tt.map_knot_of(name, "temp", degree)
        # the same float to the last bit (the sign of zero included), not only an equal decimal
        assert back is not None and float(back).hex() == float(knot).hex(), (name, knot)


def test_map_knot_of_refuses_names_that_are_not_this_columns_knots():
    assert tt.map_knot_of("(temp-1.5)+^3", "temp", 1) is None  # another degree
    assert tt.map_knot_of("(temp-1.5)+", "temp", 3) is None
    assert tt.map_knot_of("(temp-1.5)+", "rain", 1) is None  # another column
    assert tt.map_knot_of("(temp-1.5)+", "tem", 1) is None  # a column whose name is a prefix of this one
    for name in ("temp", "temp^2", "(temp)+", "(temp-)+", "(temp-abc)+", "(temp*1.5)+", "(temp1.5)+"):
        assert tt.map_knot_of(name, "temp", 1) is None, name


def test_a_knot_name_of_another_column_sharing_a_prefix_is_not_read():
    name = tt.map_knot_name("x-", 2.0, 1)
    assert tt.map_knot_of(name, "x-", 1) == 2.0
    # whenever a name is read as a knot k of x, it must be the name x's knot k has
    got = tt.map_knot_of(name, "x", 1)
    assert got is None or tt.map_knot_name("x", got, 1) == name


def test_a_knot_is_read_only_from_the_name_map_knot_name_writes_for_it():
    # each parses as a float after the sign, but none is the name of a knot of temp: knots of `temp-`
    # and `temp+`, and forms float() accepts that repr never writes
    for name in ("(temp--2.0)+", "(temp-+2.0)+", "(temp+-2.0)+", "(temp+0.0)+", "(temp-1_0)+", "(temp- 2.0)+",
                 "(temp-2.50)+", "(temp-2.5e0)+"):
        assert tt.map_knot_of(name, "temp", 1) is None, name


# ---------------------------------------------------------------- explicit_inputs

def table_of(inputs: str, clauses: str = ""):
    text = (f'table t from "t.csv"\n  target y\n  {inputs}\n{clauses}learn w over inputs, b0\n'
            'score s = w . x + b0\ngoal mean squared(y - s) + 0.1 * l2sq(w)\n')
    return objc.check_text(text, "t.objc").spec.table


def test_named_inputs_less_the_excluded_then_the_features():
    assert table_of("inputs a, b, c").explicit_inputs() == ("a", "b", "c")
    assert table_of("inputs a, b, c except b").explicit_inputs() == ("a", "c")
    assert table_of("inputs a, c", "  feature ac = a * c\n").explicit_inputs() == ("a", "c", "ac")


@pytest.mark.parametrize("inputs,clauses", [
    ("inputs all except id", ""), ('inputs like "t*"', ""), ("inputs temp", "  onehot town\n"),
    ("inputs rain", "  spline temp degree 3 knots 25%, 50%\n")])
def test_no_explicit_inputs_when_the_rows_decide_them(inputs, clauses):
    # a pattern, `all`, the categories of onehot and the knots of spline are known only from a table
    assert table_of(inputs, clauses).explicit_inputs() is None


def test_map_inputs_follow_the_plain_ones_and_a_name_is_one_input():
    # docs/language.md 6a: `powers` makes each column to the powers 1 .. degree; `temp` made by a
    # map is the column temp; the same product made by two maps is one input
    powers = table_of("inputs temp, rain", "  powers temp, rain degree 3\n").explicit_inputs()
    assert powers == ("temp", "rain") + tuple(f"{c}^{d}" for d in (2, 3) for c in ("temp", "rain"))
    both = table_of("inputs temp", "  monomials temp, rain degree 2\n  pairs temp, rain\n").explicit_inputs()
    assert both == ("temp", "rain", "temp^2", "temp*rain", "rain^2")
    fourier = table_of("inputs temp", "  fourier warm = temp, rain count 3 bandwidth 1.5 seed 2\n").explicit_inputs()
    assert fourier == ("temp", "warm_1", "warm_2", "warm_3")


def test_a_feature_map_as_plain_data_is_what_the_spec_says():
    (spline,) = table_of("inputs rain", "  spline temp degree 3 knots 25%, 50%\n").maps
    plain = spline.plain()
    assert json.loads(json.dumps(plain)) == plain
    assert (plain["kind"], plain["columns"], plain["degree"], plain["quantiles"]) == ("spline", ["temp"], 3, [0.25, 0.5])
    (fourier,) = table_of("inputs temp", "  fourier warm = temp, rain count 3 bandwidth 1.5 seed 2\n").maps
    assert {k: fourier.plain()[k] for k in ("count", "bandwidth", "seed", "name")} == {
        "count": 3, "bandwidth": 1.5, "seed": 2, "name": "warm"}


# ---------------------------------------------------------------- shapes

def test_every_shape_kind_has_its_own_description():
    kinds = typing.get_args(tt.ShapeKind)
    described = [tt.Shape(k).describe() for k in kinds]
    assert len(set(described)) == len(kinds) and all(described)
    assert "a, b" in tt.Shape("vector", ("a", "b")).describe()
    assert "all inputs" in tt.Shape("vector").describe()
