"""objc.diagnostics: how one diagnostic reads (file:line:column, severity and code, the line with its
caret, notes and the fix), its JSON form, and SpecError, the one error carrying them.

The expected renderings are written out by hand from the format the README shows ("what `check`
says": `specs/refused/sqrt_margin.objc:12:11: error [E313] ...`, then the line under a gutter, the
carets, and indented notes).
"""

from __future__ import annotations

import json

import pytest

import objc
from objc.diagnostics import Diagnostic, SpecError, fail
from objc.source_text import NO_SPAN, SourceText, Span

TEXT = 'table t from "t.csv"\ngoal mean hinje(y * s)\n'
SOURCE = SourceText("case.objc", TEXT)
HINJE = Span(2, 11, 2, 16)  # "hinje": line 2, columns 11 to 15


def test_render_with_its_source_gives_place_code_line_caret_notes_and_fix():
    d = Diagnostic("E236", "unknown function 'hinje'", HINJE, hint="write hinge",
                   notes=("did you mean 'hinge'", "the catalog is in docs/language.md"))
    assert d.render(SOURCE) == (
        "case.objc:2:11: error [E236] unknown function 'hinje'\n"
        "   2 | goal mean hinje(y * s)\n"
        "                 ^^^^^\n"
        "  note: did you mean 'hinge'\n"
        "  note: the catalog is in docs/language.md\n"
        "  fix: write hinge")


def test_the_caret_of_a_rendering_stands_under_the_span_in_the_text():
    rendered = Diagnostic("E236", "unknown function", HINJE).render(SOURCE).split("\n")
    assert rendered[2].index("^") == rendered[1].index("hinje")


def test_a_warning_renders_its_severity_and_no_fix_line_without_a_hint():
    d = Diagnostic("W301", "the intercept is penalized", Span(2, 1, 2, 5), severity="warning")
    lines = d.render(SOURCE).split("\n")
    assert lines[0] == "case.objc:2:1: warning [W301] the intercept is penalized"
    assert len(lines) == 3 and not any(line.startswith("  fix:") for line in lines)


def test_the_diagnostics_own_source_name_wins_over_the_sources():
    d = Diagnostic("T110", "column 'a' is not in the table", HINJE, source_name="data/t.csv")
    assert d.render(SOURCE).split("\n")[0] == "data/t.csv:2:11: error [T110] column 'a' is not in the table"


def test_without_a_source_there_is_no_excerpt():
    d = Diagnostic("E236", "unknown function", HINJE, hint="write hinge", source_name="case.objc")
    assert d.render() == "case.objc:2:11: error [E236] unknown function\n  fix: write hinge"


def test_a_diagnostic_without_a_place_names_only_the_file_or_nothing():
    # a missing file has no line: the name alone, and no caret even when a source is given
    assert Diagnostic("E001", "spec file not found: x.objc", NO_SPAN, source_name="x.objc").render(SOURCE) == \
        "x.objc: error [E001] spec file not found: x.objc"
    assert Diagnostic("E001", "no file", NO_SPAN).render() == "error [E001] no file"


def test_to_json_holds_the_place_the_text_under_it_and_is_strict_json():
    d = Diagnostic("E236", "unknown function 'hinje'", HINJE, hint="write hinge", notes=("did you mean 'hinge'",))
    doc = d.to_json(SOURCE)
    assert doc == {"code": "E236", "severity": "error", "message": "unknown function 'hinje'", "file": "case.objc",
                   "line": 2, "column": 11, "end_line": 2, "end_column": 16, "text": "hinje",
                   "hint": "write hinge", "notes": ["did you mean 'hinge'"]}
    assert json.loads(json.dumps(doc, allow_nan=False)) == doc
    # with no source there is no text to quote and no file unless the diagnostic names one
    bare = d.to_json()
    assert bare["text"] == "" and bare["file"] == ""


def test_a_spec_error_renders_every_diagnostic_in_order():
    first = Diagnostic("E236", "unknown function 'hinje'", HINJE)
    second = Diagnostic("E227", "unknown name 'z'", Span(2, 21, 2, 22))
    err = SpecError((first, second), SOURCE)
    assert str(err) == err.render() == first.render(SOURCE) + "\n" + second.render(SOURCE)
    assert err.warnings == ()
    with pytest.raises(SpecError) as info:
        raise err
    assert info.value.diagnostics == (first, second)


def test_fail_builds_a_spec_error_with_one_located_error():
    err = fail("E205", "default 5 outside its range 0 .. 2", HINJE, hint="widen the range", source=SOURCE,
               source_name="other.objc")
    (d,) = err.diagnostics
    assert (d.code, d.severity, d.span, d.hint, d.source_name, d.notes) == (
        "E205", "error", HINJE, "widen the range", "other.objc", ())
    assert err.source is SOURCE and str(err).startswith("other.objc:2:11: error [E205] ")


def test_a_real_spec_error_points_its_caret_at_the_misspelled_word():
    text = ('table rows from "rows.csv"\n  target label: yes -> +1, no -> -1\n  inputs a, b\n'
            'learn w over inputs, b\nscore s = w . x + b\ngoal mean hinge(y * s) + 0.5 * l2sqr(w)\n')
    with pytest.raises(objc.SpecError) as info:
        objc.check_text(text, "broken.objc")
    rendered = str(info.value).split("\n")
    goal = text.split("\n")[5]
    # the head names the file, the goal's line (6) and the word's column counted from 1
    assert rendered[0].startswith(f"broken.objc:6:{goal.index('l2sqr') + 1}: error [")
    assert rendered[1].endswith(goal) and rendered[2].index("^") == rendered[1].index("l2sqr")
    assert rendered[2].count("^") == len("l2sqr")
