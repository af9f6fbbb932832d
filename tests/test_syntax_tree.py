"""objc.syntax_tree: the frozen nodes the parser makes, their spans into the spec text, the values
the statements hold, and literal_number, the one rule for a number written in the spec.

Trees come from real spec text through objc.spec_parser.parse. References: Python's own unary minus
(`eval`) for signed literals; the text under a node's span, parsed again, for the spans.
"""

from __future__ import annotations

import dataclasses

import pytest

from objc import syntax_tree as st
from objc.source_text import SourceText, Span
from objc.spec_parser import parse

EXPR_TYPES = (st.Number, st.Name, st.Call, st.Negate, st.Binary, st.Power, st.Aggregate, st.Select)


def goal_of(expr_text: str) -> st.Expr:
    (stmt,) = parse(SourceText("g.objc", f"goal {expr_text}\n")).statements
    assert isinstance(stmt, st.GoalStmt)
    return stmt.expr


def without_spans(node):
    """A node as nested tuples of its type and fields, spans left out: the structure alone."""
    if isinstance(node, tuple):
        return tuple(without_spans(n) for n in node)
    if dataclasses.is_dataclass(node):
        return (type(node).__name__,) + tuple(without_spans(getattr(node, f.name)) for f in dataclasses.fields(node)
                                              if not isinstance(getattr(node, f.name), Span))
    return node


def subexpressions(e):
    yield e
    for f in dataclasses.fields(e):
        value = getattr(e, f.name)
        for v in value if isinstance(value, tuple) else (value,):
            if isinstance(v, EXPR_TYPES):
                yield from subexpressions(v)


# ---------------------------------------------------------------- literal_number

@pytest.mark.parametrize("written", ["2", "+2", "2.5", "1e-3", ".5", "-1", "- -2", "-(2)", "-(-(3))", "- - - 2.5"])
def test_a_signed_literal_is_the_number_python_reads_from_the_same_text(written):
    power = goal_of(f"abs(r) ^ {written}")
    assert isinstance(power, st.Power)
    value = st.literal_number(power.exponent)
    assert isinstance(value, float) and value == float(eval(written))


@pytest.mark.parametrize("written", ["q", "-q", "(1 - 3)", "(2 * 3)", "-(2 ^ 2)", "abs(2)", "(mean w)", "w[a]"])
def test_anything_but_a_signed_number_is_no_literal(written):
    # an exponent or a setting must be written as a number: arithmetic, names and calls are not folded
    power = goal_of(f"abs(r) ^ {written}")
    assert st.literal_number(power.exponent) is None


# ---------------------------------------------------------------- spans

GOAL = "C * mean hinge(y * s) + 0.5 * l2sq(w[a, \"carrier load\"]) - -3 + (r + 1) ^ - -2 + sum abs(w) / 2"


def test_every_node_spans_exactly_its_own_text():
    # the text under each subexpression's span, parsed on its own, is that subexpression again
    source = SourceText("g.objc", f"goal {GOAL}\n")
    nodes = list(subexpressions(goal_of(GOAL)))
    assert {type(n) for n in nodes} == set(EXPR_TYPES)
    for node in nodes:
        text = source.snippet(node.span)
        assert without_spans(goal_of(text)) == without_spans(node), (text, node)


def test_names_calls_and_numbers_span_what_was_written():
    source = SourceText("g.objc", f"goal {GOAL}\n")
    for node in subexpressions(goal_of(GOAL)):
        if isinstance(node, st.Name):
            assert source.snippet(node.span) == node.id
        elif isinstance(node, st.Call):
            assert source.snippet(node.func_span) == node.func
            assert source.snippet(node.span).startswith(node.func + "(")
        elif isinstance(node, st.Number):
            assert float(source.snippet(node.span)) == node.value


def test_a_statement_over_several_lines_spans_from_its_keyword_to_its_last_token():
    text = "goal mean logistic(y * s)\n   + 0.5 * l2sq(w)\n"
    (goal,) = parse(SourceText("g.objc", text)).statements
    # line 1 column 1 ('goal') to line 2 one past ')' of "   + 0.5 * l2sq(w)" (18 characters)
    assert goal.span == Span(1, 1, 2, 19)
    assert goal.expr.span.line == 1 and goal.expr.span.end_line == 2


# ---------------------------------------------------------------- values of the statements

SPEC = '''table t from "data/t.csv"
  target late: yes -> +1, 0 -> -1
  inputs like "size_*", rooms except id
  classweight +1 = 3, -1 = 0.5
  holdout 20% seed 7
  spline temp degree 3 knots 25%, 50%
  onehot town unseen zeros
  fourier warm = temp, rain count 20 bandwidth 1.5 seed 4
tune C = 1.0 within 0.01 .. 100
learn w over inputs, b
learn W over inputs by classes, c by classes
score s = w . x + b
loss clip(m) = max(0, 1 - m)
goal C * mean clip(y * s)
keep abs(w) <= 5
'''


@pytest.fixture(scope="module")
def statements():
    return parse(SourceText("t.objc", SPEC)).statements


def test_statements_come_in_the_order_written(statements):
    assert [type(s).__name__ for s in statements] == [
        "TableStmt", "TargetClause", "InputsClause", "ClassWeightClause", "HoldoutClause", "MapClause", "MapClause",
        "MapClause", "TuneStmt", "LearnStmt", "LearnStmt", "ScoreStmt", "LossStmt", "GoalStmt", "KeepStmt"]
    # each statement starts on its own line of the text
    assert [s.span.line for s in statements] == list(range(1, 16))


def test_label_pairs_keep_text_as_text_and_numbers_as_numbers(statements):
    target = statements[1]
    assert target.column == "late" and target.classes == ()
    assert [(p.value, p.label) for p in target.labels] == [("yes", 1.0), (0.0, -1.0)]
    assert isinstance(target.labels[1].value, float)


def test_inputs_items_say_how_each_was_chosen(statements):
    inputs = statements[2]
    assert [(i.kind, i.text) for i in inputs.items] == [("pattern", "size_*"), ("column", "rooms")]
    assert [(i.kind, i.text) for i in inputs.excluded] == [("column", "id")]


def test_percents_are_shares(statements):
    # 20% of the rows is a share of 0.2; knots at 25% and 50% are the quantiles 0.25 and 0.5
    holdout = statements[4]
    assert (holdout.fraction, holdout.seed) == (0.2, 7)
    spline = statements[5]
    assert (spline.kind, spline.columns, spline.name) == ("spline", ("temp",), None)
    assert {s.key: s.values for s in spline.settings} == {"degree": (3.0,), "knots": (0.25, 0.5)}
    (holdout_without_percent,) = [s for s in parse(SourceText("h.objc", 'table t from "t.csv"\n  holdout 0.25\n'))
                                  .statements if isinstance(s, st.HoldoutClause)]
    assert (holdout_without_percent.fraction, holdout_without_percent.seed) == (0.25, None)


def test_class_weights_and_map_settings_hold_their_values(statements):
    assert [(c.label, c.weight) for c in statements[3].weights] == [(1.0, 3.0), (-1.0, 0.5)]
    onehot, fourier = statements[6], statements[7]
    assert {s.key: s.values for s in onehot.settings} == {"unseen": ("zeros",)}
    assert (fourier.name, fourier.columns) == ("warm", ("temp", "rain"))
    assert {s.key: s.values for s in fourier.settings} == {"count": (20.0,), "bandwidth": (1.5,), "seed": (4.0,)}


def test_learn_items_say_over_inputs_and_by_classes(statements):
    plain, by_classes = statements[9], statements[10]
    assert [(i.name, i.over_inputs, i.by_classes) for i in plain.items] == [("w", True, False), ("b", False, False)]
    assert [(i.name, i.over_inputs, i.by_classes) for i in by_classes.items] == [("W", True, True),
                                                                                 ("c", False, True)]


def test_loss_tune_and_keep_statements(statements):
    tune, loss, keep = statements[8], statements[12], statements[14]
    assert (tune.name, tune.default, tune.low, tune.high) == ("C", 1.0, 0.01, 100.0)
    assert (loss.name, loss.param) == ("clip", "m")
    assert without_spans(loss.expr) == without_spans(goal_of("max(0, 1 - m)"))
    assert keep.op == "<=" and st.literal_number(keep.right) == 5.0


def test_classes_of_a_target_keep_their_written_form_and_place():
    text = 'table t from "t.csv"\n  target kind classes rye, "spelt wheat", 3\n'
    target = parse(SourceText("c.objc", text)).statements[1]
    assert [v for v, _ in target.classes] == ["rye", "spelt wheat", 3.0]
    source = SourceText("c.objc", text)
    assert [source.snippet(sp) for _, sp in target.classes] == ["rye", '"spelt wheat"', "3"]


# ---------------------------------------------------------------- frozen values

def test_nodes_are_frozen_and_compare_by_value_place_included():
    first = parse(SourceText("a.objc", "goal a + a\n"))
    again = parse(SourceText("a.objc", "goal a + a\n"))
    assert first == again and hash(first) == hash(again)
    goal = first.statements[0].expr
    # the two `a`s are one name at two places: unequal, since a node is where it was written too
    assert goal.left.id == goal.right.id and goal.left != goal.right
    with pytest.raises(dataclasses.FrozenInstanceError):
        goal.op = "-"
