"""The score as a linear map of the learned parameters: s = A theta + offset.

Both backends read this instead of walking the score themselves. The common form `w . x + b` is
flagged as `standard`, so a backend can use the data matrix as it is (no copy with a column of ones).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from objc import typed_tree as tt
from objc.checker import CheckedObjective, EvalEnv, evaluate


@dataclass(frozen=True)
class Slot:
    """Where one learned parameter sits in the flat vector theta."""

    name: str
    vector: bool
    start: int
    size: int


@dataclass(frozen=True)
class Block:
    """One additive piece of the score: coefficient x parameter (entries chosen by name)."""

    param: str
    entries: tuple[str, ...] | None  # None: the whole vector (against x) or a scalar parameter
    coefficient: tt.TExpr | None  # None: the input matrix x (for a dot product) or 1
    sign: float
    dot: bool = False  # a weight vector against x's columns


@dataclass(frozen=True)
class ScoreForm:
    slots: tuple[Slot, ...]
    input_names: tuple[str, ...]
    blocks: tuple[Block, ...]
    offset: tuple[tt.TExpr, ...]  # parameter-free pieces (data or constants), added
    standard: bool  # exactly w . x (+ b): A = [X, 1]
    weights_name: str | None
    intercept_name: str | None

    @property
    def size(self) -> int:
        return sum(s.size for s in self.slots)

    def slot(self, name: str) -> Slot:
        return next(s for s in self.slots if s.name == name)

    def index_of(self, param: str, entry: str | None) -> int:
        s = self.slot(param)
        return s.start if entry is None else s.start + self.input_names.index(entry)


def layout(checked: CheckedObjective, input_names: tuple[str, ...]) -> tuple[Slot, ...]:
    slots, start = [], 0
    k = len(checked.spec.table.classes) if checked.spec.table is not None else 0
    for p in checked.spec.parameters:
        size = len(input_names) if p.vector else 1
        if p.by_classes:  # W: inputs x K, b: K (stored as such; flattened here only to be counted)
            size *= k
        slots.append(Slot(p.name, p.vector or p.by_classes, start, size))
        start += size
    return tuple(slots)


def score_form(checked: CheckedObjective, input_names: tuple[str, ...]) -> ScoreForm:
    """Decompose the (affine) score into blocks; raises ValueError if it is not affine."""
    blocks: list[Block] = []
    offset: list[tt.TExpr] = []

    def walk(e: tt.TExpr, sign: float, coef: tt.TExpr | None) -> None:
        if e.depends != "params":
            piece = e if coef is None else tt.Mul(coef, e, e.span, e.shape, e.depends)
            offset.append(piece if sign > 0 else tt.Neg(piece, e.span, e.shape, e.depends))
            return
        if isinstance(e, tt.Add):
            walk(e.left, sign, coef)
            walk(e.right, sign, coef)
        elif isinstance(e, tt.Neg):
            walk(e.operand, -sign, coef)
        elif isinstance(e, tt.Mul) or isinstance(e, tt.Div):
            if isinstance(e, tt.Div):
                factor, inner = tt.Div(tt.Const(1.0, e.span), e.right, e.span), e.left
            elif e.left.depends != "params":
                factor, inner = e.left, e.right
            else:
                factor, inner = e.right, e.left
            walk(inner, sign, factor if coef is None else tt.Mul(coef, factor, e.span, e.shape, "data"))
        elif isinstance(e, tt.Dot):
            vec, mat = (e.left, e.right) if isinstance(e.left, tt.ParamRef) else (e.right, e.left)
            if not isinstance(vec, tt.ParamRef) or not isinstance(mat, tt.DataRef):
                raise ValueError("the score's dot product must be a weight vector against x")
            entries = vec.entries if vec.entries is not None else mat.shape.names
            if coef is not None:
                raise ValueError("scale a dot product inside the score by moving the factor onto x's columns")
            blocks.append(Block(vec.name, entries, None, sign, True))
        elif isinstance(e, tt.ParamRef):
            if e.vector and e.shape.kind == "vector":
                raise ValueError(f"{e.name} is a vector; the score needs it in a dot product, e.g. {e.name} . x")
            blocks.append(Block(e.name, e.entries, coef, sign))
        else:
            raise ValueError("the score is not affine in the learned parameters")

    if checked.spec.score is None:
        raise ValueError("the spec has no score")
    if any(p.by_classes for p in checked.spec.parameters):
        raise ValueError("a score with classes is W . x + b; see class_scores")
    walk(checked.spec.score.expr, 1.0, None)
    slots = layout(checked, input_names)
    vec_blocks = [b for b in blocks if b.dot]
    scalar_blocks = [b for b in blocks if not b.dot and b.coefficient is None and
                     not any(s.name == b.param and s.vector for s in slots)]
    standard = (len(vec_blocks) == 1 and vec_blocks[0].entries is None and vec_blocks[0].sign > 0
                and len(blocks) == len(vec_blocks) + len(scalar_blocks) and len(scalar_blocks) <= 1
                and all(b.sign > 0 and b.entries is None for b in scalar_blocks) and not offset
                and len(slots) == len(blocks))
    return ScoreForm(slots, tuple(input_names), tuple(blocks), tuple(offset), standard,
                     vec_blocks[0].param if standard else None,
                     scalar_blocks[0].param if standard and scalar_blocks else None)


@dataclass(frozen=True, eq=False)
class ClassScoreForm:
    """The score of a multiclass spec, W . x + b: K scores per row, read by `class_scores`."""

    checked: CheckedObjective
    input_names: tuple[str, ...]
    weights_name: str
    intercept_name: str | None


def class_scores(checked: CheckedObjective, params: dict, X: np.ndarray) -> np.ndarray:
    """The K scores of every row (rows x K) of a multiclass score W . x + b."""
    from objc.checker import multiclass_form
    form = multiclass_form(checked.spec)
    if form is None:
        raise ValueError("the score is not W . x + b with W and b learned by classes")
    W = np.asarray(params[form[0]], dtype=np.float64)
    S = np.asarray(X, dtype=np.float64) @ W
    return S + np.asarray(params[form[1]], dtype=np.float64) if form[1] else S


def data_env(X: np.ndarray, y: np.ndarray, input_names: tuple[str, ...]) -> EvalEnv:
    """An evaluation environment whose columns are the (possibly standardized) inputs."""
    cols = {n: X[:, i] for i, n in enumerate(input_names)}
    return EvalEnv(list(input_names), {}, cols, y)


def design(form: ScoreForm, X: np.ndarray, y: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """A (n x P) and offset (n,) with s = A @ theta + offset. Copies the data: for general score forms."""
    n = X.shape[0]
    env = data_env(X, y, form.input_names)
    A = np.zeros((n, form.size))
    for b in form.blocks:
        slot = form.slot(b.param)
        if b.dot:
            names = b.entries if b.entries is not None else form.input_names
            for nm in names:
                j = form.input_names.index(nm)
                A[:, slot.start + j] += b.sign * X[:, j]
        else:
            c = 1.0 if b.coefficient is None else np.broadcast_to(np.asarray(evaluate(b.coefficient, env), float), (n,))
            col = form.index_of(b.param, b.entries[0] if b.entries else None)
            A[:, col] += b.sign * c
    off = np.zeros(n)
    for piece in form.offset:
        off += np.broadcast_to(np.asarray(evaluate(piece, env), dtype=float), (n,))
    return A, off

