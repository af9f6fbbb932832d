"""Resolution errors as a practitioner meets them: the exact line and column, the words that say
what is wrong, and every problem of a spec reported together.

Each broken spec below is the same small valid spec with one thing changed, so the location of the
mistake can be read off the text; the check also compares the text under the reported span with the
offending word.
"""

from __future__ import annotations

import pytest

from objc import SpecError, check_text
from objc.diagnostics import Diagnostic

HEADER = """table rows from "rows.csv"
  target label: yes -> +1, no -> -1
  inputs a, b, c
learn w over inputs, b
score s = w . x + b
"""
GOAL_LINE = HEADER.count("\n") + 1  # the line of a goal appended to HEADER


def errors_of(text: str) -> tuple[Diagnostic, ...]:
    with pytest.raises(SpecError) as info:
        check_text(text, "broken.objc")
    err = info.value
    assert err.diagnostics
    # the rendered message carries file, line and column for a person to find
    first = err.diagnostics[0]
    assert f"broken.objc:{first.span.line}:{first.span.column}" in str(err)
    return err.diagnostics


def snippet(text: str, d: Diagnostic) -> str:
    line = text.split("\n")[d.span.line - 1]
    end = d.span.end_column if d.span.end_line == d.span.line else len(line) + 1
    return line[d.span.column - 1:end - 1]


# (id, spec, code, line, column, text under the span or None, words the message or hint must hold)
CASES = [
    ("misspelled loss", HEADER + "goal mean hinje(y * s)\n",
     "E236", GOAL_LINE, 11, "hinje", ["unknown function 'hinje'", "did you mean 'hinge'"]),
    ("misspelled norm", HEADER + "goal mean hinge(y * s) + 0.5 * l2sqr(w)\n",
     "E236", GOAL_LINE, 32, "l2sqr", ["did you mean 'l2sq'"]),
    ("unknown name", HEADER + "goal mean hinge(y * z)\n",
     "E227", GOAL_LINE, 21, "z", ["unknown name 'z'"]),
    ("unknown name close to a tunable",
     HEADER + "tune lam = 0.1 within 0 .. 1\ngoal mean hinge(y * s) + lamb * l2sq(w)\n",
     "E227", GOAL_LINE + 1, 26, "lamb", ["unknown name 'lamb'", "did you mean 'lam'"]),
    ("duplicate declaration", HEADER + "tune w = 1 within 0 .. 2\ngoal l2sq(w)\n",
     "E202", GOAL_LINE, 1, None, ["'w' is declared twice", "line 4"]),
    ("declaring a built-in name", HEADER + "tune y = 1 within 0 .. 2\ngoal l2sq(w)\n",
     "E201", GOAL_LINE, 1, None, ["'y' is built in"]),
    ("catalog name redeclared", HEADER + "loss hinge(m) = max(0, 1 - m)\ngoal l2sq(w)\n",
     "E203", GOAL_LINE, 1, None, ["catalog function"]),
    ("tunable default outside its range", HEADER + "tune C = 5 within 0 .. 2\ngoal C * l2sq(w)\n",
     "E205", GOAL_LINE, 1, None, ["default 5 outside its range 0 .. 2"]),
    ("label mapped to 2", HEADER.replace("no -> -1", "no -> 2") + "goal l2sq(w)\n",
     "E209", 2, 28, "no -> 2", ["maps to 2", "+1 or -1"]),
    ("missing goal", HEADER,
     "E244", 1, 1, None, ["no `goal`"]),
    ("two goals", HEADER + "goal l2sq(w)\ngoal l1(w)\n",
     "E245", GOAL_LINE + 1, 1, "goal l1(w)", ["one goal"]),
    ("norm of a per-row expression", HEADER + "goal l1(y * s)\n",
     "E240", GOAL_LINE, 6, "l1(y * s)", ["norm of a weight vector", "one value per row"]),
    ("mean of a scalar", HEADER + "goal mean l2sq(w)\n",
     "E221", GOAL_LINE, 6, "mean l2sq(w)", ["`mean` needs one value per row or a vector", "a single number"]),
    ("x outside a dot product", HEADER + "goal mean hinge(y * s) + l2sq(w) * x\n",
     "E228", GOAL_LINE, 36, "x", ["input matrix", "dot product"]),
    ("x added in the score", HEADER.replace("w . x + b", "x + b") + "goal l2sq(w)\n",
     "E228", 5, 11, "x", ["dot product"]),
    ("exponent an expression", HEADER + "tune C = 1 within 0 .. 2\ngoal l2sq(w) ^ (C + 1)\n",
     "E219", GOAL_LINE + 1, 17, "C + 1", ["exponent must be a literal number or a tunable"]),
    ("tunable exponent in a feature",
     HEADER.replace("  inputs a, b, c\n", "  inputs a, b, c\n  feature a2 = a ^ C\n")
     + "tune C = 1 within 0 .. 2\ngoal l2sq(w)\n", "E219", 4, 20, "C", ["exponent in a feature must be a literal"]),
    ("huber option an expression", HEADER + "tune C = 1 within 0 .. 2\ngoal mean huber(y - s, 2 * C)\n",
     "E238", GOAL_LINE + 1, 24, "2 * C", ["setting of huber must be a literal number or a tunable"]),
    # a setting holds for every value a sweep may give its tunable: the whole range is checked, and the
    # error sits on the range (the domains are the catalog's: huber's d in (0, inf], Huber 1964;
    # the quantile t in (0, 1), Koenker & Bassett 1978; epsilon >= 0, Vapnik 1995)
    ("tunable huber threshold reaching 0", HEADER + "tune C = 1 within 0 .. 2\ngoal mean huber(y - s, C)\n",
     "E239", GOAL_LINE, 19, "0 .. 2", ["huber's d", "(0, inf]", "reaches 0", "line 7, column 24", "within"]),
    ("tunable quantile range reaching 1", HEADER + "tune t = 0.5 within 0.1 .. 1\ngoal mean pinball(y - s, t)\n",
     "E239", GOAL_LINE, 21, "0.1 .. 1", ["pinball's t", "(0, 1)", "reaches 1", "tune t = 0.5 within 0.1 .. 0.955"]),
    ("tunable epsilon range below 0",
     HEADER + "tune e = 0.1 within -1 .. 1\ngoal mean epsilon_insensitive(y - s, e)\n",
     "E239", GOAL_LINE, 21, "-1 .. 1", ["epsilon_insensitive's e", "[0, inf]", "reaches -1", "within 0 .. 1"]),
    ("perrow of a vector", HEADER + "goal mean hinge(y * s) + perrow abs(w)\n",
     "E250", GOAL_LINE, 26, "perrow abs(w)", ["`perrow` divides by the number of rows", "with `mean`", "`sum`"]),
    ("negative number to a tunable power", HEADER + "tune q = 2 within 1 .. 3\ngoal (-2) ^ q * l2sq(w)\n",
     "E249", GOAL_LINE + 1, 6, "(-2) ^ q", ["negative number to the tunable power 'q'"]),
    ("huber option out of range", HEADER + "goal mean huber(y - s, -1)\n",
     "E239", GOAL_LINE, 11, "huber(y - s, -1)", ["huber's d must lie in (0, inf]", "-1"]),
    ("pinball t = 1.5", HEADER + "goal mean pinball(y - s, 1.5)\n",
     "E239", GOAL_LINE, 11, "pinball(y - s, 1.5)", ["pinball's t must lie in (0, 1)", "1.5"]),
    ("feature using a learned parameter",
     HEADER.replace("  inputs a, b, c\n", "  inputs a, b, c\n  feature wa = log1p(w)\n") + "goal l2sq(w)\n",
     "E217", 4, 22, "w", ["computed from table columns only", "'w'"]),
    ("feature using the target",
     HEADER.replace("  inputs a, b, c\n", "  inputs a, b, c\n  feature ya = y * a\n") + "goal l2sq(w)\n",
     "E217", 4, 16, "y", ["computed from table columns only"]),
    ("loss body using a learned parameter", HEADER + "loss bad(m) = max(0, 1 - m) + b\ngoal mean bad(y * s)\n",
     "E222", GOAL_LINE, 31, "b", ["one variable", "'b'"]),
    ("selecting an unknown input", HEADER + "goal l1(w[a, d])\n",
     "E234", GOAL_LINE, 9, "w[a, d]", ["'d' is not one of the inputs"]),
    ("selecting inputs of a parameter learned by classes",
     HEADER.replace("  target label: yes -> +1, no -> -1\n", "  target kind classes p, q, r\n")
     .replace("learn w over inputs, b\nscore s = w . x + b\n", "learn W over inputs by classes\nscore s = W . x\n")
     + "goal mean softmax_ce(s, y) + l1(W[a])\n",
     "E256", GOAL_LINE, 33, "W[a]", ["learned by classes", "l1(W)"]),
    ("group_l2 without groups", HEADER + "goal group_l2(w)\n",
     "E242", GOAL_LINE, 6, "group_l2(w)", ["declares no `group`"]),
    ("table clause without a table", "inputs a, b\nlearn w over inputs\ngoal l2sq(w)\n",
     "E207", 1, 1, "inputs a, b", ["no `table` statement"]),
    ("y without a target", HEADER.replace("  target label: yes -> +1, no -> -1\n", "")
     + "goal mean hinge(y * s)\n", "E225", GOAL_LINE - 1, 17, "y", ["no `target` clause"]),
    ("score referring to itself", HEADER.replace("w . x + b", "w . x + s") + "goal l2sq(w)\n",
     "E223", 5, 19, "s", ["cannot refer to itself"]),
]


@pytest.mark.parametrize("text, code, line, column, under, words", [c[1:] for c in CASES],
                         ids=[c[0] for c in CASES])
def test_error_location_and_message(text: str, code: str, line: int, column: int, under, words) -> None:
    diags = errors_of(text)
    assert [d.code for d in diags] == [code], [(d.code, d.message) for d in diags]
    d = diags[0]
    assert (d.span.line, d.span.column) == (line, column), d.span
    if under is not None:
        assert snippet(text, d) == under
    said = d.message + " " + d.hint + " " + " ".join(d.notes)
    for w in words:
        assert w in said, said


def test_several_errors_are_reported_together() -> None:
    text = HEADER + "tune C = 5 within 0 .. 2\ngoal mean hinje(y * z) + l1(y * s)\ngoal l1(w)\n"
    diags = errors_of(text)
    got = sorted((d.span.line, d.span.column, d.code) for d in diags)
    assert [(c, line, col) for line, col, c in got] == [("E205", GOAL_LINE, 1), ("E236", GOAL_LINE + 1, 11), ("E240", GOAL_LINE + 1, 26),
                   ("E245", GOAL_LINE + 2, 1)]


def test_an_error_inside_mean_is_not_reported_twice() -> None:
    # a misspelled loss inside `mean` is one mistake: no second message about what `mean` received
    diags = errors_of(HEADER + "goal mean hinje(y * s) + mean pinball(y - s, 2)\n")
    assert [d.code for d in diags] == ["E236", "E239"]


def test_the_unbroken_spec_resolves() -> None:
    # the same header with a valid goal resolves: each case above fails for its one change only
    result = check_text(HEADER + "goal mean hinge(y * s) + 0.5 * l2sq(w)\n", "ok.objc")
    assert result.accepted


# ---------------------------------------------------------------- tunable exponents and settings

def _goal_node(text: str):
    return check_text(HEADER + text, "ok.objc").spec.goal


def test_a_tunable_exponent_resolves_to_a_power_read_from_the_tunable() -> None:
    from objc import typed_tree as tt
    goal = _goal_node("tune q = 2 within 1.5 .. 4\ngoal mean pos(1 - y * s) ^ q\n")
    assert isinstance(goal, tt.Aggregate)
    power = goal.operand
    assert isinstance(power, tt.Apply) and power.entry == "power"
    (key, ref), = power.tuned
    assert key == "p" and (ref.name, ref.low, ref.high) == ("q", 1.5, 4.0)
    assert power.option_values({"q": 3.0}) == {"p": 3.0} and power.option_values() == {"p": 2.0}
    # the tunable is a child of the node, so every walk that looks for tunables finds it
    assert ref in tt.children(power)


def test_tunable_settings_resolve_for_every_entry_with_settings() -> None:
    from objc import typed_tree as tt
    from objc.catalog import ENTRIES
    for entry in ENTRIES:
        for k, opt in enumerate(entry.options):
            if entry.name == "power":
                continue  # its exponent is the `^` operator's, above
            low, high = (opt.low if not opt.low_open else opt.low + 0.1, 0.5) if opt.low == 0 else (
                opt.default - 0.1, opt.default + 0.1)
            low, high = (0.2, 0.8) if entry.name == "pinball" else (low, high)
            args = "w" if entry.kind == "norm" else ("y - s" if entry.role != "margin" else "y * s")
            settings = ", ".join(["k"] if k == 0 else [f"{o.default:g}" for o in entry.options[:k]] + ["k"])
            default = min(max(opt.default, low), high)
            text = (f"tune k = {default:g} within {low:g} .. {high:g}\n"
                    f"goal {'mean ' if entry.kind != 'norm' else ''}{entry.name}({args}, {settings}) + l2sq(w)"
                    # a norm scaled by the rows (dropridge) is normalized like a per-row term, so needs one
                    + (" + mean logistic(y * s)" if entry.reads_second_moments else "") + "\n")
            goal = check_text(HEADER + text, "ok.objc").spec.goal
            node = next(n for n in _walk(goal) if isinstance(n, tt.Apply) and n.entry == entry.name)
            assert dict(node.tuned)[opt.name].name == "k", entry.name


def _walk(e):
    from objc import typed_tree as tt
    yield e
    for c in tt.children(e):
        yield from _walk(c)


def test_tune_range_span_is_the_range_itself() -> None:
    spec = check_text(HEADER + "tune lam = 0.1 within 0.001 .. 10\ngoal mean hinge(y * s) + lam * l2sq(w)\n",
                      "ok.objc").spec
    (t,) = spec.tunables
    line = (HEADER + "tune lam = 0.1 within 0.001 .. 10\n").split("\n")[t.range_span.line - 1]
    assert line[t.range_span.column - 1:t.range_span.end_column - 1] == "0.001 .. 10"


def test_perrow_resolves_over_rows_only() -> None:
    from objc import typed_tree as tt
    goal = _goal_node("goal perrow hinge(y * s) + 0.5 * l2sq(w)\n")
    agg = goal.left
    assert isinstance(agg, tt.Aggregate) and (agg.kind, agg.over) == ("perrow", "rows")


# ---------------------------------------------------------------- one rule for a literal number

def test_a_negative_literal_exponent_is_the_same_number_in_a_feature_and_in_the_goal(tmp_path):
    # regression: `(d + 1) ^ -1` was accepted in a goal and refused in a feature (E219), and the NumPy
    # module could not compute the feature; now the resolver, the table binder and the generated
    # module read a signed literal by one rule (syntax_tree.literal_number)
    import numpy as np
    import pandas as pd
    from objc import training
    from objc.backends import numpy_module
    text = HEADER.replace("  inputs a, b, c\n", "  feature inv = (a + 1) ^ -1\n  feature h = max(c, -(-0.5)) ^ -(-2)\n"
                          "  inputs a, b, c\n") + "goal mean logistic(y * s) + 0.1 * l2sq(w)\n"
    checked = check_text(text, str(tmp_path / "feat.objc"))
    rng = np.random.default_rng(3)
    frame = pd.DataFrame({"a": rng.uniform(0, 4, 60), "b": rng.normal(size=60), "c": rng.normal(size=60),
                          "label": np.where(rng.normal(size=60) > 0, "yes", "no")})
    train, _, _ = training.bind_training(checked, tmp_path, frame=frame)
    assert train.input_names == ("a", "b", "c", "inv", "h")
    # the values by hand: 1 / (a + 1) and max(c, 0.5) ^ 2
    np.testing.assert_allclose(train.X[:, 3], 1.0 / (frame["a"].to_numpy() + 1.0), rtol=1e-15)
    np.testing.assert_allclose(train.X[:, 4], np.maximum(frame["c"].to_numpy(), 0.5) ** 2, rtol=1e-15)
    # the generated module computes the same features from the frame as objc's binder did: its fit on
    # the frame scores the rows as cvxpy's optimum (Clarabel, on the binder's matrix) does
    module = numpy_module.load_module(numpy_module.emit_module(checked))
    est = module["Model"]().fit(frame[["a", "b", "c"]], frame["label"])
    ref = training.run_backend(checked, train, "cvxpy")
    np.testing.assert_allclose(est.decision_function(frame[["a", "b", "c"]]),
                               train.X @ ref.params["w"] + ref.params["b"], atol=1e-5)
