"""The spec text and positions in it: every diagnostic points back here."""

from __future__ import annotations

import re
from dataclasses import dataclass


@dataclass(frozen=True)
class Span:
    """A range of spec text; lines and columns count from 1, `end_column` is exclusive."""

    line: int
    column: int
    end_line: int
    end_column: int

    def cover(self, other: "Span") -> "Span":
        start = min((self.line, self.column), (other.line, other.column))
        end = max((self.end_line, self.end_column), (other.end_line, other.end_column))
        return Span(start[0], start[1], end[0], end[1])

    def label(self) -> str:
        return f"{self.line}:{self.column}"


NO_SPAN = Span(0, 0, 0, 0)


# The one rule for where a line ends, for every part of objc that counts lines: LF, CRLF or CR.
# Other characters Unicode calls line breaks (VT, FF, FS, GS, RS, NEL, U+2028, U+2029) are not line
# ends here but errors at their place (spec_parser), so a caret is never drawn under another line.
_LINE_END = re.compile(r"\r\n|\r|\n")


def _invisible(ch: str) -> bool:
    code = ord(ch)
    return code < 0x20 or 0x7F <= code <= 0x9F or code in (0x2028, 0x2029)


def split_lines(text: str) -> list[str]:
    """The lines of `text`, split at LF, CRLF and CR only (not at str.splitlines' other breaks)."""
    return _LINE_END.split(text)


def normalize_line_ends(text: str) -> str:
    """CRLF and CR as LF: the same lines, the same columns."""
    return text.replace("\r\n", "\n").replace("\r", "\n")


def position_at(text: str, index: int) -> Span:
    """The one-character span at a character index of `text` (lines and columns from 1)."""
    before = split_lines(text[:index])
    line, column = len(before), len(before[-1]) + 1
    return Span(line, column, line, column + 1)


def decode_spec_bytes(data: bytes) -> tuple[str, tuple[Span, str] | None]:
    """Spec bytes as text. Bytes that are not UTF-8 are replaced (so the text can still be shown) and
    the first of them is returned with its span and its value written out, e.g. '0xff'; None when
    the bytes are all UTF-8."""
    try:
        return data.decode("utf-8"), None
    except UnicodeDecodeError as err:
        # the bytes before the fault decode alike either way, so the replaced text locates it exactly
        before = data[:err.start].decode("utf-8")
        bad = " ".join(f"0x{b:02x}" for b in data[err.start:err.end])
        return data.decode("utf-8", errors="replace"), (position_at(before + "\ufffd", len(before)), bad)


def first_unencodable(text: str) -> int | None:
    """The index of the first character UTF-8 cannot encode (a lone surrogate, e.g. from a JSON
    escape), or None."""
    try:
        text.encode("utf-8")
        return None
    except UnicodeEncodeError as err:
        return err.start


@dataclass(frozen=True)
class SourceText:
    """A spec's text and the name it is reported under (usually its path)."""

    name: str
    text: str

    def line_text(self, line: int) -> str:
        lines = split_lines(self.text)
        if 1 <= line <= len(lines):
            return lines[line - 1]
        return ""

    def snippet(self, span: Span) -> str:
        """The offending text itself, clipped to its first line."""
        if span.line == 0:
            return ""
        text = self.line_text(span.line)
        end = span.end_column if span.end_line == span.line else len(text) + 1
        return text[span.column - 1 : max(end - 1, span.column)]

    def render(self, span: Span) -> str:
        """The span's first line with a caret underline, ready to print under a message."""
        if span.line == 0:
            return ""
        # a control character would move the terminal's cursor: show it as '?' so the caret lines up
        text = "".join("?" if _invisible(c) else c for c in self.line_text(span.line).expandtabs(1))
        width = (span.end_column if span.end_line == span.line else len(text) + 1) - span.column
        width = max(1, min(width, len(text) - span.column + 2))
        gutter = f"{span.line:>4} | "
        return f"{gutter}{text}\n{' ' * (len(gutter) + span.column - 1)}{'^' * width}"
