"""Spec text to syntax tree: the only module that knows lark.

Syntax errors are turned into diagnostics; after one, the statement holding it is blanked out and
the text parsed again, so every broken statement in a spec is reported in one go.
"""

from __future__ import annotations

import difflib
import re
from functools import lru_cache
from importlib import resources
from pathlib import Path

import lark
from lark import Token, Transformer, v_args

from objc import syntax_tree as st
from objc.diagnostics import Diagnostic, SpecError
from objc.source_text import SourceText, Span, normalize_line_ends, split_lines

STATEMENT_KEYWORDS = ("table", "target", "inputs", "feature", "rowweight", "classweight", "standardize",
                      "holdout", "validate", "missing", "group", "onehot", "powers", "monomials", "pairs", "spline",
                      "fourier", "tune", "learn", "score", "loss", "goal", "keep")
RESERVED_WORDS = STATEMENT_KEYWORDS + ("from", "like", "all", "except", "seed", "on", "within", "over",
                                       "mean", "sum", "perrow", "classes", "by")

# Friendly words for lark's terminal names, used in "expected ..." messages.
_TERMINAL_WORDS = {
    "NAME": "a name", "NUMBER": "a number", "STRING": 'a quoted string', "COMPARE": "<=, >= or ==",
    "PLUS": "+", "MINUS": "-", "STAR": "*", "SLASH": "/", "DOT": ".", "CIRCUMFLEX": "^", "LPAR": "(",
    "RPAR": ")", "LSQB": "[", "RSQB": "]", "COMMA": ",", "COLON": ":", "EQUAL": "=", "PERCENT": "%",
    "$END": "end of file",
}

MAX_SYNTAX_ERRORS = 20
# Later stages walk expressions recursively; a deeper one gets a message instead of a RecursionError.
MAX_NESTING = 100


def grammar_text() -> str:
    """The grammar source: from the installed package data, else from the checkout's grammar/."""
    try:
        return resources.files("objc.grammar").joinpath("objc.lark").read_text(encoding="utf-8")
    except (ModuleNotFoundError, FileNotFoundError, OSError):
        return (Path(__file__).resolve().parent.parent / "grammar" / "objc.lark").read_text(encoding="utf-8")


@lru_cache(maxsize=1)
def _parser() -> lark.Lark:
    return lark.Lark(grammar_text(), parser="lalr", lexer="basic", propagate_positions=True,
                     maybe_placeholders=True)


def _span(meta) -> Span:
    return Span(meta.line, meta.column, meta.end_line, meta.end_column)


def _tspan(tok: Token) -> Span:
    return Span(tok.line, tok.column, tok.end_line, tok.end_column)


class _LocatedFault(Exception):
    """Raised inside the transformer for a token lark accepted but objc cannot read; parse turns it
    into a diagnostic at the token, not at 1:1 as an internal error."""

    def __init__(self, message: str, span: Span, hint: str) -> None:
        super().__init__(message)
        self.span, self.hint = span, hint


# one escape each: a backslash and what a Python string literal lets follow it
_ESCAPE = re.compile(r"\\(x[0-9a-fA-F]{2}|u[0-9a-fA-F]{4}|U[0-9a-fA-F]{8}|N\{[^}]*\}|.?)")


def _unquote(tok: Token) -> str:
    body = str(tok)[1:-1]
    if "\\" not in body:
        return body
    try:
        # non-ASCII text as escapes first: unicode_escape reads bytes as Latin-1, not UTF-8
        return body.encode("latin-1", "backslashreplace").decode("unicode_escape")
    except UnicodeDecodeError:
        bad = next((m for m in _ESCAPE.finditer(body) if not _decodes(m.group(0))), None)
        start, escape = (bad.start(), bad.group(0)) if bad is not None else (-1, str(tok))
        column = tok.column + 1 + start
        raise _LocatedFault(f"the escape '{escape}' in this string is incomplete or unknown",
                            Span(tok.line, column, tok.line, column + len(escape)),
                            'write a backslash as \\\\; \\xHH, \\uHHHH and \\N{name} need their digits or name') from None


def _decodes(escape: str) -> bool:
    try:
        escape.encode("latin-1", "backslashreplace").decode("unicode_escape")
        return True
    except UnicodeDecodeError:
        return False


@v_args(meta=True)
class _ToTree(Transformer):
    # ---- expressions
    def number(self, meta, c):
        return st.Number(float(c[0]), _span(meta))

    def name(self, meta, c):
        return st.Name(str(c[0]), _span(meta))

    def call(self, meta, c):
        args = tuple(a for a in c[1:] if a is not None)
        return st.Call(str(c[0]), args, _span(meta), _tspan(c[0]))

    def negate(self, meta, c):
        return st.Negate(c[0], _span(meta))

    def _bin(op):
        def f(self, meta, c):
            return st.Binary(op, c[0], c[1], _span(meta))
        return f

    add, subtract, multiply, divide, dot = _bin("+"), _bin("-"), _bin("*"), _bin("/"), _bin(".")

    def raise_to(self, meta, c):
        return st.Power(c[0], c[1], _span(meta))

    def mean_of(self, meta, c):
        return st.Aggregate("mean", c[0], _span(meta))

    def sum_of(self, meta, c):
        return st.Aggregate("sum", c[0], _span(meta))

    def perrow_of(self, meta, c):
        return st.Aggregate("perrow", c[0], _span(meta))

    def select(self, meta, c):
        return st.Select(c[0], tuple(k[0] for k in c[1:]), _span(meta))

    def positive_number(self, meta, c):
        return float(c[0])

    def negative_number(self, meta, c):
        return -float(c[0])

    def column_name(self, meta, c):
        return (str(c[0]), _span(meta))

    def column_string(self, meta, c):
        return (_unquote(c[0]), _span(meta))

    # ---- statements
    def table_stmt(self, meta, c):
        return st.TableStmt(str(c[0]), _unquote(c[1]), _span(meta))

    def label_name(self, meta, c):
        return (str(c[0]), _span(meta))

    def label_string(self, meta, c):
        return (_unquote(c[0]), _span(meta))

    def label_number(self, meta, c):
        return (c[0], _span(meta))

    def label_pair(self, meta, c):
        return st.LabelPair(c[0][0], c[1], _span(meta))

    def target_clause(self, meta, c):
        labels = tuple(x for x in c[1:] if x is not None)
        return st.TargetClause(c[0][0], labels, _span(meta))

    def target_classes(self, meta, c):
        return st.TargetClause(c[0][0], (), _span(meta), tuple(c[1:]))

    def input_pattern(self, meta, c):
        return st.InputItem("pattern", _unquote(c[0]), _span(meta))

    def input_all(self, meta, c):
        return st.InputItem("all", "all", _span(meta))

    def excluded(self, meta, c):
        return tuple(st.InputItem("column", name, span) for name, span in c)

    def inputs_clause(self, meta, c):
        *items, excluded = c
        items = tuple(i if isinstance(i, st.InputItem) else st.InputItem("column", i[0], i[1]) for i in items)
        return st.InputsClause(items, excluded or (), _span(meta))

    def feature_clause(self, meta, c):
        return st.FeatureClause(str(c[0]), c[1], _span(meta))

    def rowweight_clause(self, meta, c):
        return st.RowWeightClause(c[0][0], _span(meta))

    def class_weight(self, meta, c):
        return st.ClassWeight(c[0], c[1], _span(meta))

    def class_weight_label(self, meta, c):
        # a class of a `classes` target named by its label (text), e.g. classweight setosa = 2
        return st.ClassWeight(_unquote(c[0]) if c[0].type == "STRING" else str(c[0]), c[1], _span(meta))

    def classweight_clause(self, meta, c):
        return st.ClassWeightClause(tuple(c), _span(meta))

    def standardize_clause(self, meta, c):
        return st.StandardizeClause(_span(meta))

    def holdout_clause(self, meta, c):
        amount, percent, seed = c
        fraction = float(amount) / 100.0 if percent is not None else float(amount)
        if seed is not None and not float(seed).is_integer():  # inf (1e400) or a fraction
            raise _LocatedFault(f"the holdout seed must be a whole number, not {seed}", _tspan(seed),
                                "e.g. holdout 20% seed 7")
        return st.HoldoutClause(fraction, None if seed is None else int(float(seed)), _span(meta))

    def validate_clause(self, meta, c):
        return st.ValidateClause(_unquote(c[0]), _span(meta))

    def missing_clause(self, meta, c):
        return st.MissingClause(str(c[0]), _span(meta))

    def group_clause(self, meta, c):
        return st.GroupClause(str(c[0]), tuple(x[0] for x in c[1:]), _span(meta))

    def map_number(self, meta, c):
        value, percent = c
        return float(value) / 100.0 if percent is not None else float(value)

    def map_word(self, meta, c):
        return str(c[0])

    def map_setting(self, meta, c):
        return st.MapSetting(str(c[0]), tuple(c[1:]), _span(meta))

    def map_seed(self, meta, c):
        return st.MapSetting("seed", tuple(c), _span(meta))

    def _map(self, kind: str, meta, c, name: str | None = None) -> st.MapClause:
        columns = tuple(x[0] for x in c if isinstance(x, tuple))
        settings = tuple(x for x in c if isinstance(x, st.MapSetting))
        return st.MapClause(kind, columns, settings, _span(meta), name)

    def onehot_clause(self, meta, c):
        return self._map("onehot", meta, c)

    def powers_clause(self, meta, c):
        return self._map("powers", meta, c)

    def monomials_clause(self, meta, c):
        return self._map("monomials", meta, c)

    def pairs_clause(self, meta, c):
        return self._map("pairs", meta, c)

    def spline_clause(self, meta, c):
        return self._map("spline", meta, c)

    def fourier_clause(self, meta, c):
        return self._map("fourier", meta, c[1:], name=str(c[0]))

    def tune_range(self, meta, c):
        return (c[0], c[1], _span(meta))

    def tune_stmt(self, meta, c):
        low, high, range_span = c[2]
        return st.TuneStmt(str(c[0]), c[1], low, high, _span(meta), range_span)

    def learn_scalar(self, meta, c):
        return st.LearnItem(str(c[0]), False, _span(meta))

    def learn_vector(self, meta, c):
        return st.LearnItem(str(c[0]), True, _span(meta))

    def learn_matrix(self, meta, c):
        return st.LearnItem(str(c[0]), True, _span(meta), True)

    def learn_classes(self, meta, c):
        return st.LearnItem(str(c[0]), False, _span(meta), True)

    def learn_stmt(self, meta, c):
        return st.LearnStmt(tuple(c), _span(meta))

    def score_stmt(self, meta, c):
        return st.ScoreStmt(str(c[0]), c[1], _span(meta))

    def loss_stmt(self, meta, c):
        return st.LossStmt(str(c[0]), str(c[1]), c[2], _span(meta))

    def goal_stmt(self, meta, c):
        return st.GoalStmt(c[0], _span(meta))

    def keep_stmt(self, meta, c):
        return st.KeepStmt(c[0], str(c[1]), c[2], _span(meta))

    def start(self, meta, c):
        return st.SpecTree(tuple(c))


def _expected_words(expected) -> str:
    words = []
    for t in sorted(expected):
        if t in _TERMINAL_WORDS:
            words.append(_TERMINAL_WORDS[t])
        elif t.isupper() and t.lower() in RESERVED_WORDS:
            words.append(f"'{t.lower()}'")
        elif t.startswith("__ANON"):
            # a literal of more than one character (`..`, `->`): lark names it anonymously
            pattern = next((term.pattern for term in _parser().terminals if term.name == t), None)
            if pattern is not None and pattern.type == "str":
                words.append(pattern.value)
        else:
            words.append(t.lower())
    # operators and punctuation first: after a broken expression they are the likely fix
    words = sorted(set(words), key=lambda w: (w.startswith("'"), w))
    if len(words) > 8:
        return ", ".join(words[:8]) + ", ..."
    return ", ".join(words)


def _statement_bounds(text: str, line: int) -> tuple[int, int]:
    """Lines [first, last] of the statement holding `line`: it starts at a line whose first word
    is a statement keyword and runs until the next such line."""
    lines = text.split("\n")
    starts = re.compile(r"^\s*(" + "|".join(STATEMENT_KEYWORDS) + r")\b")
    first = line
    while first > 1 and not starts.match(lines[first - 1]):
        first -= 1
    last = line
    while last < len(lines) and not starts.match(lines[last]):
        last += 1
    return first, last


def _blank_lines(text: str, first: int, last: int) -> str:
    lines = text.split("\n")
    for i in range(first - 1, min(last, len(lines))):
        lines[i] = " " * len(lines[i])
    return "\n".join(lines)


def _diagnose(err: lark.exceptions.LarkError, source: SourceText) -> Diagnostic:
    if isinstance(err, lark.exceptions.UnexpectedCharacters):
        ch = source.line_text(err.line)[err.column - 1: err.column] or "?"
        span = Span(err.line, err.column, err.line, err.column + 1)
        hint = "names use letters, digits and _; quote file names and odd column names with \"...\""
        if ch == "'":
            hint = "strings use double quotes: \"...\""
        return Diagnostic("E101", f"unexpected character '{ch}'", span, hint=hint, source_name=source.name)
    if isinstance(err, lark.exceptions.UnexpectedToken):
        tok = err.token
        if tok.type == "$END":
            lines = split_lines(source.text.rstrip())
            span = Span(len(lines), max(1, len(lines[-1])), len(lines), len(lines[-1]) + 1)
            return Diagnostic("E102", "the spec ends in the middle of a statement", span,
                              hint=f"expected {_expected_words(err.expected)}", source_name=source.name)
        span = _tspan(tok)
        word = str(tok)
        msg = f"unexpected '{word}'"
        hint = f"expected {_expected_words(err.expected)}"
        at_line_start = source.line_text(tok.line)[: tok.column - 1].strip() == ""
        if word in STATEMENT_KEYWORDS and at_line_start:
            msg = f"the statement before '{word}' is unfinished"
            hint = f"before '{word}' it expected {_expected_words(err.expected)}"
            return Diagnostic("E104", msg, span, hint=hint, source_name=source.name)
        starters = sorted(k for k in STATEMENT_KEYWORDS if k.upper() in err.expected)
        if at_line_start and tok.type == "NAME" and starters:
            close = difflib.get_close_matches(word, STATEMENT_KEYWORDS, n=1, cutoff=0.5)
            listed = "a statement starts with one of: " + ", ".join(f"'{k}'" for k in starters)
            if close:
                hint = f"did you mean '{close[0]}'? ({listed})"
            else:
                # no keyword is near: the word may be another tool's name for the objective
                hint = listed + "; the objective is written `goal ...`"
            return Diagnostic("E103", msg, span, hint=hint, source_name=source.name)
        if word in RESERVED_WORDS and "NAME" in err.expected:
            msg = f"'{word}' is a reserved word and cannot be used as a name here"
            hint = f"pick another name, or quote a column name: \"{word}\""
        return Diagnostic("E103", msg, span, hint=hint, source_name=source.name)
    if isinstance(err, lark.exceptions.UnexpectedEOF):
        return Diagnostic("E102", "the spec ends in the middle of a statement", Span(1, 1, 1, 2),
                          source_name=source.name)
    return Diagnostic("E100", f"could not parse the spec: {err}", Span(1, 1, 1, 2), source_name=source.name)


# control characters a spec may hold: the tab (read as a space) and the line ends LF and CR
_ALLOWED_CONTROLS = frozenset("\t\n\r")
_CONTROL_NAMES = {0x00: "NUL", 0x0B: "vertical tab", 0x0C: "form feed", 0x1C: "file separator",
                  0x1D: "group separator", 0x1E: "record separator", 0x1F: "unit separator", 0x7F: "DEL",
                  0x85: "next line, NEL", 0x2028: "line separator", 0x2029: "paragraph separator",
                  0xFEFF: "byte order mark"}


def _is_forbidden(ch: str) -> bool:
    code = ord(ch)
    if ch in _ALLOWED_CONTROLS:
        return False
    return code < 0x20 or 0x7F <= code <= 0x9F or code in (0x2028, 0x2029) or (code == 0xFEFF)


def _control_characters(source: SourceText) -> list[Diagnostic]:
    """Every control character outside tab, LF and CR, at its place: the one line rule (LF, CRLF or
    CR end a line) holds only if no other character can be taken for a line break."""
    out = []
    for number, line in enumerate(split_lines(source.text), start=1):
        for k, ch in enumerate(line):
            if _is_forbidden(ch) and not (number == 1 and k == 0 and ch == "\ufeff"):
                name = _CONTROL_NAMES.get(ord(ch), "a control character")
                out.append(Diagnostic("E107", f"U+{ord(ch):04X} ({name}) is not allowed in a spec",
                                      Span(number, k + 1, number, k + 2),
                                      hint="delete it; a line ends at LF, CRLF or CR, and only spaces and tabs "
                                      "separate words", source_name=source.name))
                if len(out) >= MAX_SYNTAX_ERRORS:
                    return out
    return out


def parse(source: SourceText) -> st.SpecTree:
    """Parse spec text into a syntax tree, or raise SpecError listing every syntax problem."""
    controls = _control_characters(source)
    if controls:
        raise SpecError(tuple(controls), source)
    text = normalize_line_ends(source.text).replace("\t", " ")
    if text.startswith("\ufeff"):  # a byte order mark at the very start is an encoding mark, not text
        text = " " + text[1:]
    diagnostics: list[Diagnostic] = []
    tree = None
    for _ in range(MAX_SYNTAX_ERRORS):
        try:
            tree = _parser().parse(text)
            break
        except lark.exceptions.LarkError as err:
            diag = _diagnose(err, source)
            diagnostics.append(diag)
            line = diag.span.line or 1
            if diag.code == "E104":  # the fault lies in the statement before this line
                line = max(1, line - 1)
                while line > 1 and not text.split("\n")[line - 1].strip():
                    line -= 1
            first, last = _statement_bounds(text, line)
            blanked = _blank_lines(text, first, last)
            if blanked == text:
                break
            text = blanked
    if diagnostics:
        raise SpecError(tuple(diagnostics), source)
    for stmt in tree.children:
        stack = [(stmt, 1)]
        while stack:
            node, depth = stack.pop()
            if depth > MAX_NESTING:
                raise SpecError((Diagnostic("E105", f"this statement nests more than {MAX_NESTING} levels deep",
                                            _span(stmt.meta), hint="split it: define a `loss`, or shorten the sum",
                                            source_name=source.name),), source)
            stack.extend((c, depth + 1) for c in node.children if isinstance(c, lark.Tree))
    try:
        return _ToTree().transform(tree)
    except lark.exceptions.VisitError as err:  # a transformer bug, reported rather than leaked
        if isinstance(err.orig_exc, _LocatedFault):
            fault = err.orig_exc
            raise SpecError((Diagnostic("E108", str(fault), fault.span, hint=fault.hint,
                                        source_name=source.name),), source) from None
        raise SpecError((Diagnostic("E100", f"internal parse error: {err.orig_exc}", Span(1, 1, 1, 2),
                                    source_name=source.name),), source) from None
