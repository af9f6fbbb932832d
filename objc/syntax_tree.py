"""Frozen nodes of a parsed spec, each with its source span; no meaning attached yet."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Literal, Union

from objc.source_text import Span


# ---------------------------------------------------------------- expressions

@dataclass(frozen=True)
class Number:
    value: float
    span: Span


@dataclass(frozen=True)
class Name:
    id: str
    span: Span


@dataclass(frozen=True)
class Call:
    func: str
    args: tuple["Expr", ...]
    span: Span
    func_span: Span


@dataclass(frozen=True)
class Negate:
    operand: "Expr"
    span: Span


@dataclass(frozen=True)
class Binary:
    op: Literal["+", "-", "*", "/", "."]
    left: "Expr"
    right: "Expr"
    span: Span


@dataclass(frozen=True)
class Power:
    base: "Expr"
    exponent: "Expr"
    span: Span


@dataclass(frozen=True)
class Aggregate:
    kind: Literal["mean", "sum", "perrow"]
    operand: "Expr"
    span: Span


@dataclass(frozen=True)
class Select:
    base: "Expr"
    keys: tuple[str, ...]
    span: Span


Expr = Union[Number, Name, Call, Negate, Binary, Power, Aggregate, Select]


def literal_number(e: Expr) -> float | None:
    """The value of a number written in the spec, signs included (`-1`, `- -2`); None for anything
    else. The one rule for where a literal is required: exponents and catalog settings, in features
    and in the goal alike."""
    if isinstance(e, Number):
        return float(e.value)
    if isinstance(e, Negate):
        inner = literal_number(e.operand)
        return None if inner is None else -inner
    return None


# ---------------------------------------------------------------- statements

@dataclass(frozen=True)
class TableStmt:
    name: str
    path: str
    span: Span


@dataclass(frozen=True)
class LabelPair:
    value: str | float  # the raw value in the table
    label: float  # what it maps to: +1 or -1
    span: Span


@dataclass(frozen=True)
class TargetClause:
    column: str
    labels: tuple[LabelPair, ...]
    span: Span
    # `target kind classes a, b, c`: the class labels as the table writes them, in class order
    classes: tuple[tuple[str | float, Span], ...] = ()


@dataclass(frozen=True)
class InputItem:
    kind: Literal["column", "pattern", "all"]
    text: str
    span: Span


@dataclass(frozen=True)
class InputsClause:
    items: tuple[InputItem, ...]
    excluded: tuple[InputItem, ...]
    span: Span


@dataclass(frozen=True)
class FeatureClause:
    name: str
    expr: Expr
    span: Span


@dataclass(frozen=True)
class RowWeightClause:
    column: str
    span: Span


@dataclass(frozen=True)
class ClassWeight:
    label: float | str  # text only for a class of a `classes` target
    weight: float
    span: Span


@dataclass(frozen=True)
class ClassWeightClause:
    weights: tuple[ClassWeight, ...]
    span: Span


@dataclass(frozen=True)
class StandardizeClause:
    span: Span


@dataclass(frozen=True)
class HoldoutClause:
    fraction: float
    seed: int | None
    span: Span


@dataclass(frozen=True)
class ValidateClause:
    path: str
    span: Span


@dataclass(frozen=True)
class MissingClause:
    policy: str
    span: Span


@dataclass(frozen=True)
class GroupClause:
    name: str
    columns: tuple[str, ...]
    span: Span


@dataclass(frozen=True)
class MapSetting:
    """One `word value, value...` setting of a map clause: `degree 3`, `knots 25%, 50%`, `unseen zeros`."""

    key: str
    values: tuple[float | str, ...]  # numbers (a percent already divided by 100) or words
    span: Span


@dataclass(frozen=True)
class MapClause:
    """A fixed map of columns into new inputs: `onehot`, `powers`, `monomials`, `pairs`, `spline`,
    `fourier NAME = ...`; its settings are checked when the spec is resolved."""

    kind: Literal["onehot", "powers", "monomials", "pairs", "spline", "fourier"]
    columns: tuple[str, ...]
    settings: tuple[MapSetting, ...]
    span: Span
    name: str | None = None  # `fourier NAME = ...`: the prefix of its inputs and the name of their group


@dataclass(frozen=True)
class TuneStmt:
    name: str
    default: float
    low: float
    high: float
    span: Span
    range_span: Span | None = None  # the `low .. high` part, where a range that is too wide is reported


@dataclass(frozen=True)
class LearnItem:
    name: str
    over_inputs: bool
    span: Span
    by_classes: bool = False  # one entry (or one weight vector) per class of a `classes` target


@dataclass(frozen=True)
class LearnStmt:
    items: tuple[LearnItem, ...]
    span: Span


@dataclass(frozen=True)
class ScoreStmt:
    name: str
    expr: Expr
    span: Span


@dataclass(frozen=True)
class LossStmt:
    name: str
    param: str
    expr: Expr
    span: Span


@dataclass(frozen=True)
class GoalStmt:
    expr: Expr
    span: Span


@dataclass(frozen=True)
class KeepStmt:
    left: Expr
    op: Literal["<=", ">=", "=="]
    right: Expr
    span: Span


Statement = Union[TableStmt, TargetClause, InputsClause, FeatureClause, RowWeightClause, ClassWeightClause,
                  StandardizeClause, HoldoutClause, ValidateClause, MissingClause, GroupClause, MapClause, TuneStmt,
                  LearnStmt, ScoreStmt, LossStmt, GoalStmt, KeepStmt]


@dataclass(frozen=True)
class SpecTree:
    statements: tuple[Statement, ...]
