"""Resolved, typed nodes: every name bound, every shape known, every span kept.

Shapes: a node is a scalar, one value per row ("rows"), or a vector over a list of input names
("vector"); `x` is the one rows-by-inputs matrix and only appears under a dot product.
What a node depends on is tracked as `depends`: "const" (numbers and tunables), "data" (the table,
so a constant to the optimizer), "params" (learned quantities).
"""

from __future__ import annotations

from dataclasses import dataclass, replace
from typing import Literal, Mapping, Union

from objc import syntax_tree as st
from objc.catalog import INFIX
from objc.source_text import Span

ShapeKind = Literal["scalar", "rows", "vector", "matrix", "classes", "weights", "rowclasses"]
Depends = Literal["const", "data", "params"]


@dataclass(frozen=True)
class Shape:
    kind: ShapeKind
    # for vectors and the input matrix: the input names it runs over; None means "all inputs"
    names: tuple[str, ...] | None = None

    def describe(self) -> str:
        if self.kind == "vector":
            return "a vector over " + ("all inputs" if self.names is None else ", ".join(self.names))
        return {"scalar": "a single number", "rows": "one value per row", "matrix": "the input matrix x",
                "classes": "a vector with one entry per class",
                "weights": "a matrix with one weight per input and class",
                "rowclasses": "one value per row and class (K scores per row)"}[self.kind]


SCALAR = Shape("scalar")
ROWS = Shape("rows")
# a multiclass target's shapes: b by classes, W over inputs by classes, and the score W . x + b
CLASSES = Shape("classes")
WEIGHTS = Shape("weights")
ROW_CLASSES = Shape("rowclasses")


# ---------------------------------------------------------------- data bindings

@dataclass(frozen=True)
class LabelMap:
    """How raw target values map to +1 / -1 (empty: the target is used as it is)."""

    pairs: tuple[tuple[str | float, float], ...]
    span: Span


@dataclass(frozen=True)
class DerivedFeature:
    """An input computed from columns: `feature name = expr` (expr holds only data and numbers)."""

    name: str
    expr: st.Expr
    columns: tuple[str, ...]  # the table columns it reads
    span: Span


@dataclass(frozen=True)
class FeatureMap:
    """A fixed map of columns into inputs (a table clause: `onehot`, `powers`, `monomials`, `pairs`,
    `spline`, `fourier`). Its settings are checked; what it learns from the training rows (the
    categories, the knots) is found when the table is bound, the draws of `fourier` from its seed."""

    kind: Literal["onehot", "powers", "monomials", "pairs", "spline", "fourier"]
    columns: tuple[str, ...]
    span: Span
    degree: int = 1  # powers, monomials, spline
    quantiles: tuple[float, ...] = ()  # spline: where its knots go, as shares of the training rows
    count: int = 0  # fourier: how many random features
    bandwidth: float = 1.0  # fourier: the Gaussian kernel's length scale
    seed: int = 0  # fourier: the seed of its draws
    unseen: Literal["fail", "zeros"] = "fail"  # onehot: what a category not seen in training does
    name: str | None = None  # fourier: the prefix of its inputs and the name of their group

    def plain(self) -> dict:
        """The map as plain data (the generated module's copy of it)."""
        return {"kind": self.kind, "columns": list(self.columns), "degree": self.degree,
                "quantiles": list(self.quantiles), "count": self.count, "bandwidth": self.bandwidth,
                "seed": self.seed, "unseen": self.unseen, "name": self.name}


def map_exponents(kind: str, n_columns: int, degree: int) -> list[tuple[int, ...]]:
    """The exponent of each column in each product a polynomial map makes, in a stable order: by
    total degree, then as itertools.combinations_with_replacement lists the columns."""
    import itertools
    if kind == "pairs":
        combos = list(itertools.combinations(range(n_columns), 2))
    elif kind == "powers":
        combos = [(j,) * d for d in range(1, degree + 1) for j in range(n_columns)]
    else:
        combos = [c for d in range(1, degree + 1) for c in itertools.combinations_with_replacement(range(n_columns), d)]
    return [tuple(c.count(j) for j in range(n_columns)) for c in combos]


def map_product_name(columns, exponents) -> str:
    """`temp`, `temp^2`, `temp*rain`, `temp^2*rain`: the name of a product of columns."""
    return "*".join(c if e == 1 else f"{c}^{e}" for c, e in zip(columns, exponents) if e)


def map_knot_name(column: str, knot: float, degree: int) -> str:
    """`(temp-12.5)+^3`: the truncated power (temp - knot)_+^degree; the knot is written exactly
    (repr of the float), so the name itself stores it."""
    shift = f"-{knot!r}" if knot >= 0 else f"+{-knot!r}"
    return f"({column}{shift})+" + (f"^{degree}" if degree != 1 else "")


def map_knot_of(name: str, column: str, degree: int) -> float | None:
    """The knot a `map_knot_name` holds, or None when `name` is not one of this column's."""
    head, tail = f"({column}", ")+" + (f"^{degree}" if degree != 1 else "")
    if not (name.startswith(head) and name.endswith(tail)) or len(name) <= len(head) + len(tail):
        return None
    shift = name[len(head):len(name) - len(tail)]
    try:
        value = float(shift[1:])
    except ValueError:
        return None
    knot = value if shift[0] == "-" else -value if shift[0] == "+" else None
    # a shift that only parses is not enough: `(x--2.0)+` parses as x's knot -2.0 but is knot 2.0 of a
    # column `x-`, and float() takes forms repr never writes (`1_0`, ` 2`): the name must be this knot's own
    return knot if knot is not None and map_knot_name(column, knot, degree) == name else None


def map_fixed_names(m: "FeatureMap") -> tuple[str, ...] | None:
    """The inputs a map makes when they do not depend on the rows (every map but onehot and the
    knot part of spline), else None."""
    if m.kind in ("powers", "monomials", "pairs"):
        return tuple(map_product_name(m.columns, e) for e in map_exponents(m.kind, len(m.columns), m.degree))
    if m.kind == "fourier":
        return tuple(f"{m.name}_{j}" for j in range(1, m.count + 1))
    return None


@dataclass(frozen=True)
class TableBinding:
    """Everything a spec says about its table; `objc.tables` reads data by it."""

    name: str
    path: str  # as written, relative to the spec file's folder
    span: Span
    target: str | None = None
    target_span: Span | None = None
    label_map: LabelMap | None = None
    inputs: tuple[st.InputItem, ...] = ()
    excluded: tuple[st.InputItem, ...] = ()
    inputs_span: Span | None = None
    features: tuple[DerivedFeature, ...] = ()
    row_weight: str | None = None
    row_weight_span: Span | None = None
    class_weights: tuple[tuple[float, float], ...] = ()  # (label +1/-1, weight)
    class_weights_span: Span | None = None
    standardize: bool = False
    holdout: float | None = None
    holdout_seed: int = 0
    holdout_span: Span | None = None
    validation_path: str | None = None
    validation_span: Span | None = None
    missing: Literal["fail", "drop"] = "fail"
    groups: tuple[tuple[str, tuple[str, ...]], ...] = ()
    maps: tuple[FeatureMap, ...] = ()
    # `target kind classes a, b, c`: the class labels as the table writes them, in class order (K >= 3)
    classes: tuple[str | float, ...] = ()
    # classweight of a multiclass target: (class label as written, weight)
    class_label_weights: tuple[tuple[str | float, float], ...] = ()

    def explicit_inputs(self) -> tuple[str, ...] | None:
        """Input names when every input is named outright (no pattern, no `all`, no map whose
        inputs depend on the rows: onehot, spline), else None."""
        if any(i.kind != "column" for i in self.inputs):
            return None
        made = [map_fixed_names(m) for m in self.maps]
        if any(names is None for names in made):
            return None
        excluded = {e.text for e in self.excluded}
        names = tuple(i.text for i in self.inputs if i.text not in excluded) + tuple(f.name for f in self.features)
        return tuple(dict.fromkeys(names + tuple(n for ns in made for n in ns)))  # a name is one input


# ---------------------------------------------------------------- typed expressions
# Every node carries: span (into the spec), shape, depends.

@dataclass(frozen=True)
class Const:
    value: float
    span: Span
    shape: Shape = SCALAR
    depends: Depends = "const"


@dataclass(frozen=True)
class TunableRef:
    name: str
    default: float
    low: float
    high: float
    span: Span
    shape: Shape = SCALAR
    depends: Depends = "const"


@dataclass(frozen=True)
class DataRef:
    """A table column (`kind` column or feature), the target `y`, or the input matrix `x`."""

    name: str
    kind: Literal["column", "feature", "target", "inputs"]
    span: Span
    shape: Shape = ROWS
    depends: Depends = "data"


@dataclass(frozen=True)
class ParamRef:
    """A learned parameter; `names` narrows a vector parameter to chosen inputs (w[a, b]). A
    parameter `by classes` has the shape WEIGHTS (over inputs) or CLASSES."""

    name: str
    vector: bool
    span: Span
    shape: Shape = SCALAR
    depends: Depends = "params"
    entries: tuple[str, ...] | None = None  # the chosen inputs of a vector parameter; None: all


@dataclass(frozen=True)
class ScoreRef:
    name: str
    expr: "TExpr"
    span: Span
    shape: Shape = ROWS
    depends: Depends = "params"


@dataclass(frozen=True)
class Apply:
    """A catalog entry applied to arguments, with its options (huber's d, pinball's t, power's p).

    `options` holds every option's value with tunables at their defaults; `tuned` names the options
    a tunable sets, whose value at a fit is the tunable's (see `option_values`)."""

    entry: str
    args: tuple["TExpr", ...]
    options: tuple[tuple[str, float], ...]
    span: Span
    shape: Shape = SCALAR
    depends: Depends = "const"
    tuned: tuple[tuple[str, "TunableRef"], ...] = ()
    # for an entry that reads the rows' second moments (dropridge): the goal's row aggregate ('mean',
    # 'perrow' or 'sum') they are normalized by, so the penalty is scaled exactly like the loss it averages
    rows: str | None = None

    @property
    def option_dict(self) -> dict[str, float]:
        return dict(self.options)

    def setting(self, key: str) -> "TExpr":
        """One option as an expression: the tunable that sets it, or its number."""
        return dict(self.tuned).get(key) or Const(float(self.option_dict[key]), self.span)

    def option_values(self, tunables: Mapping[str, float] | None = None) -> dict[str, float]:
        """The options at these tunable values (a tunable not given stands at its default)."""
        out = dict(self.options)
        for key, ref in self.tuned:
            out[key] = float((tunables or {}).get(ref.name, ref.default))
        return out


@dataclass(frozen=True)
class CustomLoss:
    """A loss the spec defines (`loss name(v) = body`), applied to `arg`; `body` has `arg` inlined."""

    name: str
    arg: "TExpr"
    body: "TExpr"
    param: str
    definition_span: Span
    span: Span
    shape: Shape = SCALAR
    depends: Depends = "const"


@dataclass(frozen=True)
class _Arithmetic:
    """The fields of the three arithmetic operators; each operator is its own node type."""

    left: "TExpr"
    right: "TExpr"
    span: Span
    shape: Shape = SCALAR
    depends: Depends = "const"


@dataclass(frozen=True)
class Add(_Arithmetic):
    pass


@dataclass(frozen=True)
class Mul(_Arithmetic):
    pass


@dataclass(frozen=True)
class Div(_Arithmetic):
    pass


@dataclass(frozen=True)
class Neg:
    operand: "TExpr"
    span: Span
    shape: Shape = SCALAR
    depends: Depends = "const"


@dataclass(frozen=True)
class Dot:
    """w . x: a parameter vector against the input matrix (one value per row) or another vector."""

    left: "TExpr"
    right: "TExpr"
    span: Span
    shape: Shape = ROWS
    depends: Depends = "params"


@dataclass(frozen=True)
class Aggregate:
    """`mean`, `sum` or `perrow` over rows (weighted by row x class weights), or `mean` or `sum`
    over a vector's entries. Over rows with weights c_i: mean = sum c_i E_i / sum c_i,
    sum = sum c_i E_i, perrow = sum c_i E_i / n with n the number of rows."""

    kind: Literal["mean", "sum", "perrow"]
    operand: "TExpr"
    over: Literal["rows", "entries"]
    span: Span
    shape: Shape = SCALAR
    depends: Depends = "const"


TExpr = Union[Const, TunableRef, DataRef, ParamRef, ScoreRef, Apply, CustomLoss, Add, Neg, Mul, Div, Dot, Aggregate]


def is_square(e: TExpr) -> bool:
    """e is u ^ 2 with the exponent written as the number 2 (not a tunable that defaults to 2)."""
    power = INFIX["^"]
    return (isinstance(e, Apply) and e.entry == power.name and not e.tuned
            and e.option_dict.get(power.options[0].name) == 2.0)


def arithmetic(e: TExpr, f):
    """For an Add, Neg, Mul or Div node, its operator applied to f of its operands, in any algebra with
    + - * / (numbers, arrays, cvxpy expressions); None for every other node."""
    if isinstance(e, Neg):
        return -f(e.operand)
    if isinstance(e, Add):
        return f(e.left) + f(e.right)
    if isinstance(e, Mul):
        return f(e.left) * f(e.right)
    if isinstance(e, Div):
        return f(e.left) / f(e.right)
    return None


def children(e: TExpr) -> tuple[TExpr, ...]:
    """The direct subexpressions of a typed node (a score's expression and a custom loss's argument
    and body included), for the walks every later stage makes."""
    if isinstance(e, (Add, Mul, Div, Dot)):
        return (e.left, e.right)
    if isinstance(e, (Neg, Aggregate)):
        return (e.operand,)
    if isinstance(e, Apply):
        return e.args + tuple(ref for _, ref in e.tuned)
    if isinstance(e, CustomLoss):
        return (e.arg, e.body)
    if isinstance(e, ScoreRef):
        return (e.expr,)
    return ()


def map_children(e: TExpr, f) -> TExpr:
    """The same node with `f` applied to each direct subexpression (the node itself is kept)."""
    if isinstance(e, (Add, Mul, Div, Dot)):
        return replace(e, left=f(e.left), right=f(e.right))
    if isinstance(e, (Neg, Aggregate)):
        return replace(e, operand=f(e.operand))
    if isinstance(e, Apply):
        # a setting is a number or a tunable: a walk that maps a tunable to a number fixes the setting
        options, tuned = dict(e.options), []
        for key, ref in e.tuned:
            mapped = f(ref)
            if isinstance(mapped, TunableRef):
                tuned.append((key, mapped))
            elif isinstance(mapped, Const):
                options[key] = float(mapped.value)
            else:
                raise TypeError(f"a setting of {e.entry} can only become a tunable or a number")
        return replace(e, args=tuple(f(a) for a in e.args), options=tuple(options.items()), tuned=tuple(tuned))
    if isinstance(e, CustomLoss):
        return replace(e, arg=f(e.arg), body=f(e.body))
    if isinstance(e, ScoreRef):
        return replace(e, expr=f(e.expr))
    return e


# ---------------------------------------------------------------- the resolved spec

@dataclass(frozen=True)
class Tunable:
    name: str
    default: float
    low: float
    high: float
    span: Span
    range_span: Span | None = None  # the `low .. high` part of the `tune` statement


@dataclass(frozen=True)
class Parameter:
    name: str
    vector: bool  # True: one weight per input
    span: Span
    by_classes: bool = False  # one entry per class (with vector: an inputs x classes matrix)


@dataclass(frozen=True)
class Constraint:
    left: TExpr
    op: Literal["<=", ">=", "=="]
    right: TExpr
    span: Span


@dataclass(frozen=True)
class ResolvedSpec:
    source_name: str
    text: str
    table: TableBinding | None
    tunables: tuple[Tunable, ...]
    parameters: tuple[Parameter, ...]
    score: ScoreRef | None
    goal: TExpr
    goal_span: Span
    constraints: tuple[Constraint, ...]
    custom_losses: tuple[str, ...]
