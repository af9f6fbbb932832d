"""The one rule set of a derived feature's formula (`feature NAME = ...`): which forms it may hold,
the columns it reads, its value on a table, and the code a backend writes for it.

A formula is row-by-row arithmetic (`+ - * /`, unary minus, `^` with a literal exponent) of
columns, numbers and catalog atoms whose settings are literal numbers. A literal number is the
goal's: a number, possibly negated (`syntax_tree.literal_number`), so `(d + 1) ^ -1` is one.

Everything goes through `fold`, which walks a formula once, reports every form outside the rules and
builds a value with the `FormulaAlgebra` it is given. Checking (`check_formula`, the resolver and the
table binder), evaluating on columns (`evaluate`, the table binder) and writing Python for the
generated module (its emitter's own algebra) are three algebras over that one walk, so they accept
literally the same forms.

| code | what the rule refuses |
| --- | --- |
| E217 | a name that is not a column (a learned parameter, a tunable, the score, `y`, `x`), `mean`/`sum`/`perrow`, a selection `[...]`, a dot product |
| E218 | a function that is not a catalog atom (unknown, a loss, a norm) |
| E219 | an exponent that is not a literal number |
| E237 | an atom given too few arguments |
| E238 | an atom's setting that is not a literal number |
| E239 | an atom's setting outside its range, or too many settings |
| E248 | a number too large to represent |
"""

from __future__ import annotations

import difflib
import math
from dataclasses import dataclass
from typing import Callable, Generic, Mapping, Protocol, Sequence, TypeVar

import numpy as np

from objc import syntax_tree as st
from objc.catalog import CATALOG, INFIX, Entry
from objc.diagnostics import Diagnostic
from objc.source_text import Span

Value = TypeVar("Value")

ARITHMETIC = ("+", "-", "*", "/")
_ROW_BY_ROW_HINT = "a feature is a fixed transformation of each row's columns; aggregates and learned parts belong in the goal"


class FormulaAlgebra(Protocol[Value]):
    """How `fold` builds a value from an accepted formula, one constructor per accepted form."""

    def number(self, value: float) -> Value: ...

    def column(self, name: str) -> Value: ...

    def negate(self, operand: Value) -> Value: ...

    def arithmetic(self, op: str, left: Value, right: Value) -> Value: ...

    def atom(self, entry: Entry, args: Sequence[Value], settings: Mapping[str, float]) -> Value: ...


@dataclass(frozen=True)
class Folded(Generic[Value]):
    """A formula walked by the rules: the columns it reads (each first use, in order), what breaks
    the rules, and the value the algebra built (None when something does)."""

    reads: tuple[st.Name, ...]
    diagnostics: tuple[Diagnostic, ...]
    value: Value | None

    @property
    def columns(self) -> tuple[str, ...]:
        return tuple(n.id for n in self.reads)


def atom_names() -> list[str]:
    """The catalog entries a formula may call."""
    return sorted(n for n, en in CATALOG.items() if en.kind == "atom")


def fold(expr: st.Expr, algebra: FormulaAlgebra[Value], not_columns: Mapping[str, str] | None = None) -> Folded[Value]:
    """Walk `expr` by the formula rules and build its value with `algebra`.

    `not_columns` maps names that a spec declares as something else to what they are ("a learned
    parameter", "the target", ...); every other name is read as a column. Every problem is reported,
    each with its span and a hint; the value is None when there is any."""
    others = dict(not_columns or {})
    reads: list[st.Name] = []
    diags: list[Diagnostic] = []

    def refuse(code: str, message: str, span: Span, hint: str) -> None:
        diags.append(Diagnostic(code, message, span, "error", hint))

    def literal(e: st.Expr) -> float | None:
        v = st.literal_number(e)
        if v is not None and not math.isfinite(v):
            refuse("E248", "this number is too large to represent", e.span, "use a smaller value")
        return v

    def walk(e: st.Expr) -> Value | None:
        if isinstance(e, st.Number):
            v = literal(e)
            return algebra.number(v) if v is not None and math.isfinite(v) else None
        if isinstance(e, st.Name):
            if e.id in others:
                refuse("E217", f"a feature is computed from table columns only; '{e.id}' is not a column "
                       f"({others[e.id]})", e.span, _ROW_BY_ROW_HINT)
                return None
            if e.id not in {n.id for n in reads}:
                reads.append(e)
            return algebra.column(e.id)
        if isinstance(e, st.Negate):
            inner = walk(e.operand)
            return None if inner is None else algebra.negate(inner)
        if isinstance(e, st.Binary):
            if e.op not in ARITHMETIC:
                refuse("E217", "a dot product is not a row-by-row formula", e.span,
                       "multiply columns with * (a feature gives one number per row)")
                return None
            left, right = walk(e.left), walk(e.right)
            return None if left is None or right is None else algebra.arithmetic(e.op, left, right)
        if isinstance(e, st.Power):
            return _power(e)
        if isinstance(e, st.Aggregate):
            refuse("E217", f"`{e.kind}` combines rows; a feature is computed row by row", e.span, _ROW_BY_ROW_HINT)
            return None
        if isinstance(e, st.Select):
            refuse("E217", "selecting entries [...] is not a row-by-row formula", e.span, _ROW_BY_ROW_HINT)
            return None
        if isinstance(e, st.Call):
            return _call(e)
        raise TypeError(f"not a syntax-tree expression: {e!r}")

    def _power(e: st.Power) -> Value | None:
        base = walk(e.base)
        p = literal(e.exponent)
        if p is None:
            refuse("E219", "an exponent in a feature must be a literal number", e.exponent.span,
                   "write e.g. a ^ 2 or (a + 1) ^ -1; a tunable exponent belongs in the goal or a loss")
            return None
        settings = _settings(INFIX["^"], (p,), e.span)
        if base is None or settings is None or not math.isfinite(p):
            return None
        return algebra.atom(INFIX["^"], (base,), settings)

    def _call(e: st.Call) -> Value | None:
        entry = CATALOG.get(e.func)
        if entry is None or entry.kind != "atom":
            what = "not an atom" if entry is None else f"a {entry.kind}, not an atom"
            close = difflib.get_close_matches(e.func, atom_names(), n=1, cutoff=0.6)
            refuse("E218", f"'{e.func}' is {what} usable in a feature", e.func_span,
                   f"did you mean '{close[0]}'?" if close else "atoms: " + ", ".join(atom_names()))
            for a in e.args:  # what the arguments hold is reported too
                walk(a)
            return None
        n_args = len(e.args) if entry.arity == 0 else entry.arity
        if entry.arity == 0 and len(e.args) < 2:
            refuse("E237", f"{e.func} takes two or more arguments", e.span, f"e.g. {e.func}(a, 0)")
            return None
        if len(e.args) < n_args:
            refuse("E237", f"{e.func} takes {entry.arity} argument(s), got {len(e.args)}", e.span,
                   f"{e.func}: {entry.formula}")
            return None
        args = [walk(a) for a in e.args[:n_args]]
        given: list[float] = []
        for a in e.args[n_args:]:
            v = literal(a)
            if v is None:
                refuse("E238", f"a setting of {e.func} in a feature must be a literal number", a.span,
                       f"e.g. {e.func}(a, {entry.options[0].default:g})" if entry.options
                       else f"{e.func} takes no setting: remove it")
                return None
            given.append(v)
        settings = _settings(entry, tuple(given), e.span)
        if settings is None or any(a is None for a in args) or not all(map(math.isfinite, given)):
            return None
        return algebra.atom(entry, args, settings)

    def _settings(entry: Entry, given: tuple[float, ...], span: Span) -> dict[str, float] | None:
        try:
            return entry.resolve_options(given)
        except ValueError as err:
            refuse("E239", str(err), span, f"{entry.name}: {entry.formula}")
            return None

    value = walk(expr)
    return Folded(tuple(reads), tuple(diags), None if diags else value)


class _Nothing:
    """The algebra of a check alone: every form builds nothing."""

    def number(self, value: float) -> None:
        return None

    def column(self, name: str) -> None:
        return None

    def negate(self, operand: None) -> None:
        return None

    def arithmetic(self, op: str, left: None, right: None) -> None:
        return None

    def atom(self, entry: Entry, args: Sequence[None], settings: Mapping[str, float]) -> None:
        return None


def check_formula(expr: st.Expr, not_columns: Mapping[str, str] | None = None) -> Folded[None]:
    """The columns a formula reads and what in it breaks the rules (see `fold`)."""
    return fold(expr, _Nothing(), not_columns)


_ARRAY_OPS: dict[str, Callable[[np.ndarray, np.ndarray], np.ndarray]] = {
    "+": np.add, "-": np.subtract, "*": np.multiply, "/": np.divide}


@dataclass(frozen=True)
class _Arrays:
    """The algebra of evaluation: every form is an array of one value per row."""

    columns: Mapping[str, np.ndarray]
    n_rows: int

    def number(self, value: float) -> np.ndarray:
        return np.full(self.n_rows, value)

    def column(self, name: str) -> np.ndarray:
        return np.asarray(self.columns[name], dtype=np.float64)

    def negate(self, operand: np.ndarray) -> np.ndarray:
        return -operand

    def arithmetic(self, op: str, left: np.ndarray, right: np.ndarray) -> np.ndarray:
        return _ARRAY_OPS[op](left, right)

    def atom(self, entry: Entry, args: Sequence[np.ndarray], settings: Mapping[str, float]) -> np.ndarray:
        # the atom's math is its catalog entry's kernel
        return np.asarray(entry.value(*args, **settings), dtype=np.float64)


def evaluate(expr: st.Expr, columns: Mapping[str, np.ndarray], n_rows: int) -> np.ndarray:
    """The formula on every row, from float columns of `n_rows` values each. NaN and infinities are
    left for the caller to report (log of 0, division by 0, an overflowing power).

    Raises ValueError when the formula breaks the rules (`check_formula` says why)."""
    with np.errstate(all="ignore"):
        folded = fold(expr, _Arrays(columns, n_rows))
    if folded.diagnostics:
        raise ValueError(f"not a feature formula: {folded.diagnostics[0].message}")
    return np.broadcast_to(folded.value, (n_rows,)).astype(np.float64)
