"""The parser and resolver on broken text: random text and random mutations of well-formed specs.

Whatever the text, `check_text` either returns a checked objective or raises SpecError; no other
exception escapes, and every diagnostic points at a real place (line >= 1, column >= 1).
The seed specs are the example specs in specs/*.objc plus a few written here, so the test has
material even while the example folder is still empty.
"""

from __future__ import annotations

import warnings
from pathlib import Path

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from objc import SpecError, check_text
from objc.spec_parser import RESERVED_WORDS, parse
from objc.source_text import SourceText

SPECS_DIR = Path(__file__).resolve().parent.parent / "specs"

# Own seed specs (invented scenarios, for the fuzzing only): together they use every statement.
OWN_SPECS = (
    '''# late orders (invented scenario)
table orders from "data/orders.csv"
  target late: yes -> +1, no -> -1
  inputs distance_km, items, carrier_load
  feature log_items = log1p(items)
  rowweight priority
  classweight +1 = 3, -1 = 1
  standardize
  holdout 20% seed 7
  missing fail
tune C = 1.0 within 0.01 .. 100
learn w over inputs, b
score s = w . x + b
loss softclip(m) = max(0, 1 - m)^2
goal C * mean softclip(y * s) + 0.5 * l2sq(w)
keep w[distance_km] >= 0
''',
    '''table houses from "houses.csv"
  target price
  inputs like "size_*", rooms except id
  group size = size_m2, size_ft
  validate on "houses_val.csv"
  missing drop
tune lam = 0.1 within 0 .. 10
learn w over inputs, b
score s = w . x + b
goal mean huber(y - s, 1.35) + lam * (0.3 * l1(w) + 0.7 * l2sq(w)) + group_l2(w)
  + 0.01 * b^2
keep abs(w) <= 5
keep l1(w) <= 10
''',
    '''table t from "t.npz"
  target "the label": "a b" -> +1, 2 -> -1
  inputs all except "the label"
learn w over inputs, b
score s = w . x + b
goal mean (0.8 * hinge(y * s) + 0.2 * logistic(y * s)) + 0.1 * l1(w)
''',
    '''table days from "days.csv"
  target sold
  inputs a, b
tune q = 2 within 1.5 .. 4
tune t = 0.9 within 0.5 .. 0.95
learn w over inputs, b
score s = w . x + b
loss powered(r) = abs(r) ^ q
goal perrow pinball(y - s, t) + 0.1 * mean powered(y - s) + 0.01 * mean cosh(y - s)
  + 0.1 * l1(w)
''',
)


def _seed_specs() -> list[str]:
    found = sorted(SPECS_DIR.rglob("*.objc")) if SPECS_DIR.is_dir() else []
    return list(OWN_SPECS) + [p.read_text(encoding="utf-8") for p in found]


SEEDS = _seed_specs()

# Pieces a mutation may insert: every keyword and operator of the language, and some odd characters.
TOKENS = list(RESERVED_WORDS) + [
    "(", ")", "[", "]", ",", ":", "=", "->", "..", ".", "+", "-", "*", "/", "^", "<=", ">=", "==", "%",
    "#", '"', "'", "\n", " ", "\t", "0", "1.5", "-2", "1e400", "x", "y", "s", "w", "b", "hinge", "l2sq",
    "group_l2", "huber", "pinball", "zero_one", "tanh", "max", "min", "hypot", "\\", "é", "\r\n", "\x00",
    "cosh", "below", "l0", "q", "t", "^ q", ", t", ", q",
]


def _assert_only_spec_errors(text: str) -> None:
    """check_text returns or raises SpecError; every diagnostic (errors and warnings) has a place."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # numerical warnings of the witness search are not failures
        try:
            checked = check_text(text, "fuzz.objc")
        except SpecError as err:
            assert err.diagnostics, "a SpecError must carry at least one diagnostic"
            diagnostics = list(err.diagnostics)
        else:
            diagnostics = list(checked.errors) + list(checked.warnings)
    for d in diagnostics:
        assert d.span.line >= 1 and d.span.column >= 1, (d.code, d.message, d.span)
        assert d.code and d.message


def _mutate(text: str, edits: list[tuple[str, float, float, str]]) -> str:
    """Apply (operation, where, length, piece) edits; `where` and `length` are shares of the text."""
    for op, where, length, piece in edits:
        n = len(text)
        i = int(where * n)
        j = min(n, i + 1 + int(length * 12))
        if op == "delete":
            text = text[:i] + text[j:]
        elif op == "insert":
            text = text[:i] + piece + text[i:]
        elif op == "replace":
            text = text[:i] + piece + text[j:]
        elif op == "swap_lines":
            lines = text.split("\n")
            a, b = int(where * len(lines)) % len(lines), int(length * len(lines)) % len(lines)
            lines[a], lines[b] = lines[b], lines[a]
            text = "\n".join(lines)
        elif op == "drop_line":
            lines = text.split("\n")
            del lines[int(where * len(lines)) % len(lines)]
            text = "\n".join(lines)
    return text


EDIT = st.tuples(
    st.sampled_from(["delete", "insert", "replace", "swap_lines", "drop_line"]),
    st.floats(0, 1, exclude_max=True),
    st.floats(0, 1, exclude_max=True),
    st.one_of(st.sampled_from(TOKENS), st.text(max_size=3)),
)

FUZZ = settings(max_examples=200, deadline=None, suppress_health_check=[HealthCheck.too_slow])


def test_own_seed_specs_are_well_formed() -> None:
    # the mutations start from valid text: the seeds themselves parse and resolve
    for text in OWN_SPECS:
        checked = check_text(text, "seed.objc")
        assert checked.accepted, [d.message for d in checked.errors]


@FUZZ
@given(st.text(max_size=200))
def test_random_text_raises_only_spec_errors(text: str) -> None:
    _assert_only_spec_errors(text)


@FUZZ
@given(st.lists(st.sampled_from(TOKENS), max_size=40))
def test_random_token_soup_raises_only_spec_errors(tokens: list[str]) -> None:
    _assert_only_spec_errors(" ".join(tokens))


@FUZZ
@given(st.sampled_from(range(len(SEEDS))), st.lists(EDIT, min_size=1, max_size=4))
def test_mutated_specs_raise_only_spec_errors(index: int, edits) -> None:
    _assert_only_spec_errors(_mutate(SEEDS[index], edits))


@pytest.mark.parametrize("index", range(len(SEEDS)))
def test_every_single_line_deletion_of_a_seed(index: int) -> None:
    # exhaustive over lines: a spec with any one line removed still fails cleanly or checks
    lines = SEEDS[index].split("\n")
    for k in range(len(lines)):
        _assert_only_spec_errors("\n".join(lines[:k] + lines[k + 1:]))


@pytest.mark.parametrize("text", [
    "goal " + "(" * 3000 + "l2sq(w)" + ")" * 3000,  # deep nesting
    "goal " + " + ".join(["l2sq(w)"] * 2000),  # a long sum
    "goal l2sq(w) / 0",  # division by a zero literal
    "goal l2sq(w) ^ 1e400",  # a literal that overflows to infinity
    'table t from "\\x"',  # a broken escape in a string
    "\ufeffgoal 1",  # a byte-order mark
    "",
    "\n\n\n",
])
def test_edge_texts_raise_only_spec_errors(text: str) -> None:
    _assert_only_spec_errors('table t from "d.csv"\n  target y0\n  inputs a, b\nlearn w over inputs, b\n'
                             "score s = w . x + b\n" + text)
    _assert_only_spec_errors(text)


def test_parse_reports_each_broken_statement_once() -> None:
    # recovery blanks out one broken statement and parses again: three broken statements, three errors
    text = "tune C = 1 within 0 ..\nlearn w over\nscore s = w . x +\ngoal l2sq(w)\n"
    with pytest.raises(SpecError) as info:
        parse(SourceText("p.objc", text))
    diags = info.value.diagnostics
    assert len(diags) == 3
    # an unfinished statement is reported where the next statement's keyword interrupts it
    assert [(d.code, d.span.line, d.span.column) for d in diags] == [("E104", 2, 1), ("E104", 3, 1), ("E104", 4, 1)]
    assert "'learn'" in diags[0].message and "unfinished" in diags[0].message


# ---------------------------------------------------------------- syntax errors: place and words

HEADER = """table rows from "rows.csv"
  target label: yes -> +1, no -> -1
  inputs a, b, c
learn w over inputs, b
score s = w . x + b
"""

# (id, spec, code, line, column, words the message or hint must hold)
SYNTAX_CASES = [
    ("reserved word as a tunable", HEADER + "tune mean = 1 within 0 .. 2\ngoal l2sq(w)\n",
     "E103", 6, 6, ["'mean' is a reserved word", '"mean"']),
    ("reserved word as a parameter", HEADER.replace("inputs, b\n", "inputs, sum\n") + "goal l2sq(w)\n",
     "E103", 4, 22, ["'sum' is a reserved word"]),
    ("the new aggregate word as a tunable", HEADER + "tune perrow = 1 within 0 .. 2\ngoal l2sq(w)\n",
     "E103", 6, 6, ["'perrow' is a reserved word"]),
    ("a tune range with one end", HEADER + "tune C = 1 within 0\ngoal l2sq(w)\n",
     "E104", 7, 1, ["statement before 'goal' is unfinished", ".."]),
    ("reserved word as a loss variable", HEADER + "loss sq(from) = from^2\ngoal l2sq(w)\n",
     "E103", 6, 9, ["'from' is a reserved word"]),
    ("unterminated statement", HEADER + "tune C = 1 within 0 ..\ngoal l2sq(w)\n",
     "E104", 7, 1, ["statement before 'goal' is unfinished", "a number"]),
    ("spec ends inside the goal", HEADER + "goal l2sq(w) +\n",
     "E102", 6, 14, ["ends in the middle of a statement"]),
    ("unclosed parenthesis", HEADER + "goal mean hinge(y * s\n",
     "E102", 6, 21, ["ends in the middle", ")"]),
    ("single-quoted string", HEADER.replace('"rows.csv"', "'rows.csv'") + "goal l2sq(w)\n",
     "E101", 1, 17, ["unexpected character", "double quotes"]),
    ("stray character", HEADER + "goal l2sq(w) $ 2\n",
     "E101", 6, 14, ["unexpected character '$'"]),
    ("missing comma between inputs", HEADER.replace("inputs a, b, c", "inputs a b, c") + "goal l2sq(w)\n",
     "E103", 3, 12, ["unexpected 'b'"]),
    ("a statement word objc does not have", HEADER + "minimize l2sq(w)\n",
     "E103", 6, 1, ["unexpected 'minimize'", "'goal'"]),
    # regression: a misspelt keyword used to get the `goal` note too, pointing away from the fix
    ("a misspelt statement word", HEADER.replace("score s", "scroe s") + "goal l2sq(w)\n",
     "E103", 5, 1, ["unexpected 'scroe'", "did you mean 'score'?"]),
]


@pytest.mark.parametrize("text, code, line, column, words", [c[1:] for c in SYNTAX_CASES],
                         ids=[c[0] for c in SYNTAX_CASES])
def test_syntax_error_location_and_message(text: str, code: str, line: int, column: int, words) -> None:
    with pytest.raises(SpecError) as info:
        check_text(text, "broken.objc")
    (d,) = info.value.diagnostics
    assert (d.code, d.span.line, d.span.column) == (code, line, column)
    said = d.message + " " + d.hint
    for w in words:
        assert w in said, said
    if "did you mean" in said:
        assert "`goal ...`" not in said, said
    assert f"broken.objc:{line}:{column}" in str(info.value)


def test_several_syntax_errors_are_reported_together() -> None:
    text = HEADER.replace('"rows.csv"', "'rows.csv'") + "tune C = 1 within 0 ..\nlearn v over\ngoal l2sq(w) +\n"
    with pytest.raises(SpecError) as info:
        check_text(text, "broken.objc")
    got = [(d.code, d.span.line, d.span.column) for d in info.value.diagnostics]
    assert got == [("E101", 1, 17), ("E104", 7, 1), ("E104", 8, 1), ("E102", 8, 14)]


def test_too_deep_nesting_is_a_located_error() -> None:
    text = HEADER + "goal " + " + ".join(["l2sq(w)"] * 300) + "\n"
    with pytest.raises(SpecError) as info:
        check_text(text, "deep.objc")
    (d,) = info.value.diagnostics
    assert (d.code, d.span.line, d.span.column) == ("E105", 6, 1)


def test_deep_chain_of_custom_losses_is_a_spec_error() -> None:
    text = HEADER + "loss f0(m) = " + "exp(" * 90 + "m" + ")" * 90 + "\n"
    for k in range(1, 6):
        text += f"loss f{k}(m) = f{k - 1}(f{k - 1}(m))\n"
    _assert_only_spec_errors(text + "goal mean f5(y - s)\n")


def test_tune_keeps_the_place_of_its_range() -> None:
    # the range's own span, so a range that leaves a setting's domain can be pointed at exactly
    text = "tune delta = 1.35 within 0.5 .. 5\n"
    (stmt,) = parse(SourceText("t.objc", text)).statements
    r = stmt.range_span
    assert (stmt.low, stmt.high) == (0.5, 5.0)
    assert text[r.column - 1:r.end_column - 1] == "0.5 .. 5"
    negative = "tune a = 0 within -1 .. -0.5\n"
    (stmt,) = parse(SourceText("t.objc", negative)).statements
    assert (stmt.low, stmt.high) == (-1.0, -0.5)
    assert negative[stmt.range_span.column - 1:stmt.range_span.end_column - 1] == "-1 .. -0.5"


def test_perrow_binds_like_mean_and_sum() -> None:
    from objc import syntax_tree as syn
    (goal,) = parse(SourceText("t.objc", "goal perrow hinge(y * s) * 2 + mean hinge(y * s)\n")).statements
    left = goal.expr.left
    # `perrow` takes the next factor only, as `mean` and `sum` do
    assert isinstance(left, syn.Binary) and left.op == "*"
    assert isinstance(left.left, syn.Aggregate) and left.left.kind == "perrow"
    assert "perrow" in RESERVED_WORDS


# ---------------------------------------------------------------- one rule for line ends

CONTROL_CHARACTERS = ["\v", "\f", "\x00", "\x1c", "\x1d", "\x1e", "\x7f", "\x85", "\u2028", "\u2029"]


@pytest.mark.parametrize("ch", CONTROL_CHARACTERS, ids=[f"U+{ord(c):04X}" for c in CONTROL_CHARACTERS])
def test_a_control_character_is_an_error_at_its_place(ch) -> None:
    # regression: str.splitlines breaks lines at these (Python documentation, str.splitlines) while
    # the parser counted only LF, so carets were drawn under another line
    text = HEADER.replace("  inputs a, b, c\n", f"  inputs a,{ch} b, c\n") + "goal l2sq(w)\n"
    with pytest.raises(SpecError) as info:
        check_text(text, "ctl.objc")
    (d,) = info.value.diagnostics
    assert (d.code, d.span.line, d.span.column) == ("E107", 3, 12) and f"U+{ord(ch):04X}" in d.message
    shown = str(info.value).splitlines()
    assert shown[1].startswith("   3 |   inputs a,? b, c") and shown[2].index("^") == shown[1].index("?")


@pytest.mark.parametrize("end", ["\n", "\r\n", "\r"], ids=["LF", "CRLF", "CR"])
def test_lf_crlf_and_cr_end_lines_alike(end) -> None:
    text = (HEADER + "goal l2sq(w) $\n").replace("\n", end)
    with pytest.raises(SpecError) as info:
        check_text("\ufeff" + text if end == "\r" else text, "ends.objc")  # a leading BOM is no character
    (d,) = info.value.diagnostics
    assert (d.code, d.span.line, d.span.column) == ("E101", 6, 14)
    assert "   6 | goal l2sq(w) $" in str(info.value)


# ---------------------------------------------------------------- found by tests/test_fuzz.py

@pytest.mark.parametrize("string, column, shown", [
    ('"\\x"', 15, "\\x"),  # regression: was E100 "internal parse error" at 1:1
    ('"ab\\\\\\u12zz"', 19, "\\u"),  # an escaped backslash, then a \u with too few digits
    ('"\\u00e9\\N{no such name}"', 21, "\\N{no such name}"),
], ids=["truncated \\x", "short \\u", "unknown \\N name"])
def test_a_broken_string_escape_is_located_at_the_escape(string: str, column: int, shown: str) -> None:
    text = f"table t from {string}\n"
    with pytest.raises(SpecError) as info:
        parse(SourceText("esc.objc", text))
    (d,) = info.value.diagnostics
    assert (d.code, d.span.line, d.span.column) == ("E108", 1, column)
    assert text[d.span.column - 1:d.span.end_column - 1] == shown and shown in d.message


def test_non_ascii_text_beside_an_escape_keeps_its_letters() -> None:
    # regression: unicode_escape decoded the UTF-8 bytes as Latin-1, so "é" came back as "Ã©"
    (stmt,) = parse(SourceText("esc.objc", 'table t from "caf\u00e9\\n.csv"\n')).statements
    assert stmt.path == "caf\u00e9\n.csv"


@pytest.mark.parametrize("seed", ["1e400", "2.5"])
def test_a_holdout_seed_that_is_not_whole_is_located(seed: str) -> None:
    # regression: `seed 1e400` raised OverflowError inside the parser, shown as E100 at 1:1
    text = f'table t from "a.csv"\n  holdout 20% seed {seed}\n'
    with pytest.raises(SpecError) as info:
        parse(SourceText("seed.objc", text))
    (d,) = info.value.diagnostics
    assert (d.code, d.span.line, d.span.column) == ("E108", 2, 20) and seed in d.message
