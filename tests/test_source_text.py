"""objc.source_text: spans, where a line ends, a character index as line and column, spec bytes as
text, and the excerpt with its caret that every diagnostic prints.

Expected places come from texts built line by line here (so each character's line and column is
known by construction), from Python's own str.splitlines and codecs, or are worked out by hand in a
comment.
"""

from __future__ import annotations

import dataclasses

import pytest

from objc.source_text import (NO_SPAN, SourceText, Span, decode_spec_bytes, first_unencodable, normalize_line_ends,
                              position_at, split_lines)

# lines of a spec and the line end after each: LF, CRLF and CR, the three line ends objc reads
LINES = ["table t from \"t.csv\"", "", "  inputs a, b", "goal l2sq(w)"]
ENDS = ["\r\n", "\n", "\r"]
MIXED = "".join(line + end for line, end in zip(LINES, ENDS)) + LINES[-1]


# ---------------------------------------------------------------- spans

def test_cover_is_the_smallest_span_holding_both_in_either_order():
    first, second = Span(2, 5, 2, 9), Span(4, 1, 4, 3)
    assert first.cover(second) == Span(2, 5, 4, 3) == second.cover(first)
    # a span inside another: the outer one
    outer, inner = Span(1, 1, 3, 10), Span(2, 4, 2, 6)
    assert outer.cover(inner) == outer == inner.cover(outer)
    # on one line, start and end are compared by column
    assert Span(1, 7, 1, 9).cover(Span(1, 3, 1, 4)) == Span(1, 3, 1, 9)


def test_cover_compares_line_before_column():
    # (line 1, column 50) comes before (line 2, column 1): the start is the earlier line's, whatever its column
    assert Span(2, 1, 2, 2).cover(Span(1, 50, 1, 51)) == Span(1, 50, 2, 2)


def test_label_is_line_colon_column_and_a_span_is_frozen():
    assert Span(12, 11, 12, 30).label() == "12:11"
    with pytest.raises(dataclasses.FrozenInstanceError):
        Span(1, 1, 1, 2).line = 3


# ---------------------------------------------------------------- line ends

def test_split_lines_splits_at_lf_crlf_and_cr():
    assert split_lines(MIXED) == LINES


@pytest.mark.parametrize("text", ["a\nb", "a\r\nb\r\n\r\nc", "x\ry\rz", "one line", "\n\n", "a\r\r\nb"])
def test_split_lines_agrees_with_str_splitlines_on_the_three_line_ends(text):
    # str.splitlines drops the empty piece after a final line end, which split_lines keeps (a text
    # that ends with a line end has an empty last line, where a caret after the text can go)
    expected = text.splitlines()
    if text.endswith(("\n", "\r")):
        expected.append("")
    assert split_lines(text) == expected


@pytest.mark.parametrize("brk", ["\v", "\f", "\x1c", "\x1d", "\x1e", "\x85", "\u2028", "\u2029"])
def test_other_unicode_line_breaks_do_not_end_a_line(brk):
    # str.splitlines splits at each of these (Python docs, str.splitlines); objc does not, so that a
    # caret is never drawn under a different line than the one the parser counted
    text = f"goal a{brk}b\nkeep c"
    assert len(text.splitlines()) == 3
    assert split_lines(text) == [f"goal a{brk}b", "keep c"]


def test_normalize_line_ends_keeps_every_line_and_column():
    text = normalize_line_ends(MIXED)
    assert "\r" not in text
    assert text.split("\n") == split_lines(MIXED)
    # CR followed by CRLF is two line ends, not one
    assert normalize_line_ends("a\r\r\nb") == "a\n\nb"


# ---------------------------------------------------------------- a character index as a place

def test_position_at_every_character_of_a_text_with_mixed_line_ends():
    index = 0
    for line_no, (line, end) in enumerate(zip(LINES, ENDS + [""]), start=1):
        for col, ch in enumerate(line, start=1):
            assert MIXED[index] == ch
            assert position_at(MIXED, index) == Span(line_no, col, line_no, col + 1), (index, ch)
            index += 1
        index += len(end)
    assert index == len(MIXED)


def test_position_at_the_end_of_the_text_is_one_past_its_last_line():
    # "ab\ncd": index 5 is past 'd', line 2 column 3 (by hand)
    assert position_at("ab\ncd", 5) == Span(2, 3, 2, 4)
    # a text ending with a line end: its end is column 1 of the empty last line
    assert position_at("ab\r\n", 4) == Span(2, 1, 2, 2)


# ---------------------------------------------------------------- bytes and text

def test_utf8_bytes_decode_without_a_fault():
    text = "goal mean hinge(y * s)  # é, ∑, 😀\n"
    assert decode_spec_bytes(text.encode("utf-8")) == (text, None)


@pytest.mark.parametrize("data,line,column,shown", [
    # 0xff never occurs in UTF-8 (RFC 3629, section 1): line 2, after "cd" (by hand)
    (b"ab\ncd\xffe", 2, 3, "0xff"),
    # 'é' is two bytes (0xc3 0xa9) but one column, so the bad byte is at column 2, not 3
    (b"\xc3\xa9\xfe", 1, 2, "0xfe"),
    # a CRLF and a CR each end one line: the fault is on line 3
    (b"x\r\ny\r\x80", 3, 1, "0x80"),
    # 0xe2 0x82 starts a three-byte sequence and stops short: one maximal subpart, shown whole
    # (The Unicode Standard, chapter 3.9, "U+FFFD Substitution of Maximal Subparts")
    (b"ok \xe2\x82", 1, 4, "0xe2 0x82"),
])
def test_the_first_byte_that_is_not_utf8_is_located_and_written_out(data, line, column, shown):
    text, fault = decode_spec_bytes(data)
    # the text is Python's own decoding with replacement, so it can still be shown
    assert text == data.decode("utf-8", errors="replace")
    span, bad = fault
    assert (span.line, span.column, bad) == (line, column, shown)
    assert SourceText("s.objc", text).snippet(span) == "\ufffd"


def test_only_the_first_fault_is_reported():
    _text, (span, bad) = decode_spec_bytes(b"a\xffb\xfe")
    assert (span.column, bad) == (2, "0xff")


def test_first_unencodable_finds_a_lone_surrogate():
    assert first_unencodable("goal l2sq(w)") is None
    # a character outside the BMP is valid text (its surrogate pair is only a UTF-16 matter)
    assert first_unencodable("# 😀 fine") is None
    assert first_unencodable("ab\ud800c\udfff") == 2
    assert first_unencodable("\udc80") == 0


# ---------------------------------------------------------------- lines, excerpts and carets

def test_line_text_counts_from_one_and_is_empty_outside_the_text():
    source = SourceText("s.objc", MIXED)
    assert [source.line_text(k) for k in range(1, len(LINES) + 1)] == LINES
    assert source.line_text(0) == "" and source.line_text(len(LINES) + 1) == "" and source.line_text(-1) == ""


def test_snippet_is_the_text_under_a_one_line_span():
    text = "goal mean hinje(y * s) + 0.5 * l2sq(w)\n"
    start = text.index("hinje")
    source = SourceText("s.objc", text)
    # columns from 1, end exclusive: the five letters of the misspelled loss
    assert source.snippet(Span(1, start + 1, 1, start + 6)) == "hinje"


def test_snippet_of_a_span_over_several_lines_stops_at_the_first_lines_end():
    source = SourceText("s.objc", "goal mean hinge(y * s)\n   + 0.5 * l2sq(w)\n")
    assert source.snippet(Span(1, 6, 2, 19)) == "mean hinge(y * s)"


def test_snippet_of_an_empty_span_is_the_character_at_its_start_and_no_span_has_none():
    source = SourceText("s.objc", "goal x\n")
    # a zero-width span still names the character it points at
    assert source.snippet(Span(1, 6, 1, 6)) == "x"
    assert source.snippet(NO_SPAN) == ""


def test_render_draws_the_line_with_a_gutter_and_carets_under_the_span():
    source = SourceText("s.objc", "table t from \"t.csv\"\ngoal mean hinje(y * s)\n")
    # written out by hand: the line number right-aligned in four places, " | ", the line; then the
    # gutter's width (7) plus the column less one (10) of blanks and one caret per character of "hinje"
    assert source.render(Span(2, 11, 2, 16)) == (
        "   2 | goal mean hinje(y * s)\n"
        "                 ^^^^^")


def test_render_puts_the_first_caret_under_the_first_character_on_any_line_number():
    text = "\n" * 12344 + "keep abs(w) <= 5"
    source = SourceText("s.objc", text)
    line = len(split_lines(text))
    shown, carets = source.render(Span(line, 6, line, 12)).split("\n")
    assert shown.startswith(f"{line} | ")  # a five-digit number widens the gutter
    assert carets.index("^") == shown.index("abs(w)") and carets.count("^") == len("abs(w)")


def test_render_of_a_span_over_several_lines_underlines_to_the_end_of_its_first_line():
    source = SourceText("s.objc", "goal mean hinge(y * s)\n   + 0.5 * l2sq(w)\n")
    shown, carets = source.render(Span(1, 6, 2, 19)).split("\n")
    assert carets.strip() == "^" * len("mean hinge(y * s)")
    assert carets.index("^") == shown.index("mean")


def test_render_of_a_place_past_the_line_is_one_caret_just_after_it():
    # an 'unexpected end of line' points past the last character: one caret there, never more
    source = SourceText("s.objc", "goal mean hinge(\n")
    shown, carets = source.render(Span(1, 17, 1, 40)).split("\n")
    assert carets == " " * len(shown) + "^"


def test_render_shows_tabs_and_control_characters_one_column_wide():
    # a tab or a control character would move the terminal's cursor, so the caret would drift; each
    # is drawn as one character, the tab as a blank and the others as '?'
    source = SourceText("s.objc", "\tgoal a\x07b\x7fc\x85d\u2028e hinje(m)")
    shown, carets = source.render(Span(1, 17, 1, 22)).split("\n")
    assert shown == "   1 |  goal a?b?c?d?e hinje(m)"
    assert carets.index("^") == shown.index("hinje") and carets.count("^") == 5


def test_render_of_no_span_is_empty():
    assert SourceText("s.objc", "goal x\n").render(NO_SPAN) == ""
