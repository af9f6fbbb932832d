"""The NumPy backend: one standalone Python module per spec, built as a syntax tree.

`emit_module(checked)` returns the module's source. It holds, in this order: a header docstring
(spec text, its sha256, the verdict, the method and the expanded objective), the catalog kernels
the spec uses (copied from objc/catalog.py by their source, so a loss's math lives only there),
the spec-specific code generated from the typed tree (per-row value and derivative in the score by
the chain rule, the penalties with their gradients, coefficients, bounds, the derived features),
the `SPEC` table that lists them, the generic solver and estimator code (copied by source from
numpy_solvers_src.py and numpy_estimator_src.py in this folder), and a command line entry point.

Generated code never pastes text: names from a spec become identifiers only after validation
(tunables as estimator arguments), every other spec string (column names, the spec text) is an
`ast.Constant`, so neither a spec nor a data file can inject code. The same spec always yields
byte-identical source.

`fit(...)` compiles that very source, executes it in a fresh namespace and calls its solver, so
the module users ship is the one that was tested.
"""

from __future__ import annotations

import ast
import functools
import hashlib
import inspect
import keyword
import linecache
import math
import textwrap
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Callable, Literal, Mapping, Sequence

import numpy as np

from objc import catalog
from objc import typed_tree as tt
from objc.backends import numpy_solvers_src as _solvers_src
from objc.catalog import CATALOG
from objc.cells import MISSING_CELLS
from objc.checker import CheckedObjective, Term, render
from objc.diagnostics import NUMPY_REFUSAL_CODES
from objc.feature_formula import fold
from objc.fit_result import Certificate, FitResult
from objc.score_form import score_form
from objc.source_text import Span

__all__ = ["emit_module", "fit", "load_module", "NotSupported", "plan_method", "unsupported"]

_HERE = Path(__file__).resolve().parent
_RUNTIME_FILES = ("numpy_solvers_src.py", "numpy_estimator_src.py")

# arguments every generated estimator takes besides the spec's tunables
FIXED_ARGUMENTS = ("tol", "max_passes", "allow_nonconvex", "use_scipy", "param_tol")
# kernels the generic solver code calls whatever the spec uses
_RUNTIME_KERNELS = ("_k_l1_prox", "_k_l2_prox")


class NotSupported(ValueError):
    """The spec is valid, but this backend cannot solve it: `what` says why, `span` where (the message
    adds the spec line and column), `kind` which refusal it is (its code: `code`)."""

    def __init__(self, what: str, span: Span | None = None, kind: str = "expression"):
        self.what, self.span, self.kind = what, span, kind
        super().__init__((f"spec line {span.line}, column {span.column}: " if span is not None else "") + what)

    @property
    def code(self) -> str:
        return NUMPY_REFUSAL_CODES[self.kind]


# ---------------------------------------------------------------- small ast helpers

def _name(identifier: str) -> ast.Name:
    return ast.Name(id=identifier, ctx=ast.Load())


def _const(value: Any) -> ast.expr:
    if isinstance(value, float) and not np.isfinite(value):
        # inf/nan have no literal: spell them as float('inf') so the source stays valid
        return ast.Call(_name("float"), [ast.Constant(repr(value))], [])
    if isinstance(value, (tuple, list)):
        return ast.Tuple([_const(v) for v in value], ast.Load())
    if isinstance(value, dict):
        return ast.Dict([ast.Constant(k) for k in value], [_const(v) for v in value.values()])
    if isinstance(value, (int, float)) and not isinstance(value, bool) and math.copysign(1.0, value) < 0:
        # a negative literal is a minus sign applied to a number in Python's own syntax tree
        return ast.UnaryOp(ast.USub(), ast.Constant(-value))
    return ast.Constant(value)


def _call(func: str | ast.expr, *args: ast.expr, **kwargs: ast.expr) -> ast.Call:
    f = _name(func) if isinstance(func, str) else func
    return ast.Call(f, list(args), [ast.keyword(arg=k, value=v) for k, v in kwargs.items()])


def _attr(obj: str, attr: str) -> ast.Attribute:
    return ast.Attribute(_name(obj), attr, ast.Load())


def _binop(a: ast.expr, op: ast.operator, b: ast.expr) -> ast.expr:
    return ast.BinOp(a, op, b)


def _is_const(e: ast.expr | None, value: float) -> bool:
    return isinstance(e, ast.Constant) and e.value == value


def _is_minus_one(e: ast.expr | None) -> bool:
    return isinstance(e, ast.UnaryOp) and isinstance(e.op, ast.USub) and _is_const(e.operand, 1.0)


def _mul(a: ast.expr | None, b: ast.expr | None) -> ast.expr | None:
    """a * b, folding the constants 0 (None) and +-1 so the generated code stays readable."""
    if a is None or b is None:
        return None
    if _is_const(a, 1.0):
        return b
    if _is_const(b, 1.0):
        return a
    if _is_minus_one(a):
        return ast.UnaryOp(ast.USub(), b)
    if _is_minus_one(b):
        return ast.UnaryOp(ast.USub(), a)
    return _binop(a, ast.Mult(), b)


def _add(a: ast.expr | None, b: ast.expr | None) -> ast.expr | None:
    if a is None:
        return b
    if b is None:
        return a
    return _binop(a, ast.Add(), b)


def _neg(a: ast.expr | None) -> ast.expr | None:
    if a is None:
        return None
    if isinstance(a, ast.Constant) and isinstance(a.value, float):
        return _const(-a.value)
    return ast.UnaryOp(ast.USub(), a)


def _function(name: str, args: list[str], doc: str, body: list[ast.stmt]) -> ast.FunctionDef:
    arguments = ast.arguments(posonlyargs=[], args=[ast.arg(a) for a in args], vararg=None, kwonlyargs=[],
                              kw_defaults=[], kwarg=None, defaults=[])
    return ast.FunctionDef(name=name, args=arguments, body=[ast.Expr(ast.Constant(doc))] + body,
                           decorator_list=[], returns=None, type_params=[])


# ---------------------------------------------------------------- kernels copied from the catalog

def _kernel_name(fn: Callable) -> str:
    name = getattr(fn, "__name__", "")
    if not name.startswith("_k_") or getattr(catalog, name, None) is not fn:
        raise NotSupported(f"catalog function {name or fn!r} is not a copyable kernel (a `_k_*` function)")
    return name


def _kernel_copies(names: set[str]) -> list[_Copied]:
    """The kernels by source (and the kernels they call), in the catalog's own order."""
    wanted, todo = set(), list(names)
    copies: dict[str, _Copied] = {}
    while todo:
        name = todo.pop()
        if name in wanted:
            continue
        fn = getattr(catalog, name, None)
        if fn is None or not name.startswith("_k_"):
            raise NotSupported(f"no catalog kernel named {name}")
        copies[name] = _definition_copy(fn)
        wanted.add(name)
        for sub in ast.walk(ast.parse(copies[name].text)):
            if isinstance(sub, ast.Name) and sub.id.startswith("_k_") and sub.id not in wanted:
                todo.append(sub.id)
    return [copies[n] for n in vars(catalog) if n in wanted]


# ---------------------------------------------------------------- objc's own source, copied with its comments

@dataclass(frozen=True)
class _Copied:
    """One top-level definition of objc's source as its file writes it (the comments above it, its
    docstrings, its inner comments): a standalone module carries this text, a lean one imports `name`
    from `module`."""

    module: str  # the dotted name it has in objc, e.g. "objc.catalog"
    name: str
    text: str

    @property
    def origin(self) -> str:
        return self.module.replace(".", "/") + ".py"


def _definition_copy(fn: Callable) -> _Copied:
    """A function of objc with the comment block right above it."""
    text = textwrap.dedent((inspect.getcomments(fn) or "") + inspect.getsource(fn))
    return _Copied(fn.__module__, fn.__name__, _trimmed(text.split("\n")))


def _trimmed(lines: list[str]) -> str:
    while lines and not lines[0].strip():
        lines = lines[1:]
    while lines and not lines[-1].strip():
        lines = lines[:-1]
    return "\n".join(line.rstrip() for line in lines)


def _file_copies(file: str) -> list[_Copied]:
    """Every function, class and assignment of a runtime file, in its order, each with the text since the
    statement before it (so the comment blocks and section rules above it come along). The file's
    docstring and imports are left out with the comments above them: a module has its own imports, and
    objc's names that a runtime file imports (the catalog's kernels, ...) are pasted in beside it."""
    text = (_HERE / file).read_text(encoding="utf-8")
    lines = text.split("\n")
    out: list[_Copied] = []
    previous_end = 0
    for node in ast.parse(text).body:
        start, previous_end = previous_end, node.end_lineno or node.lineno
        if isinstance(node, (ast.FunctionDef, ast.ClassDef)):
            name = node.name
        elif isinstance(node, ast.Assign) and isinstance(node.targets[0], ast.Name):
            name = node.targets[0].id
        else:
            continue
        out.append(_Copied(f"objc.backends.{file.removesuffix('.py')}", name, _trimmed(lines[start:previous_end])))
    return out


def _copied_text(copies: list[_Copied], what: str) -> str:
    """The definitions as text, under a marker line for each source file they come from."""
    blocks: list[str] = []
    for k, c in enumerate(copies):
        if k == 0 or copies[k - 1].origin != c.origin:
            blocks.append(f"# ---- {what}, as {c.origin} writes it (edit it there)\n\n" + c.text)
        else:
            blocks.append(c.text)
    return "\n\n\n".join(blocks)


def _names_read(nodes: list[ast.stmt]) -> set[str]:
    return {n.id for node in nodes for n in ast.walk(node) if isinstance(n, ast.Name)}


_LEAN_OPTION = "--lean"


def _import_text(groups: list[list[_Copied]], used: set[str]) -> str:
    """The imports of a lean module: from each copied source, the names the module's own code reads
    (what they call in turn resolves inside objc)."""
    modules: dict[str, set[str]] = {}
    for copies in groups:
        for c in copies:
            if c.name in used:
                modules.setdefault(c.module, set()).add(c.name)
    lines = [f"try:  # the solver code is objc's own (a module written by `objc build {_LEAN_OPTION}`)"]
    for module, names in modules.items():
        head = f"    from {module} import ("
        row, rows = "", []
        for name in sorted(names):
            if row and len(head) + len(row) + len(name) + 2 > 110:
                rows.append(row.rstrip())
                row = ""
            row += name + ", "
        rows.append(row.rstrip(", ") + ")")
        lines.append(head + ("\n" + " " * len(head)).join(rows))
    lines += ["except ImportError as _missing:",
              f"    raise ImportError(\"this module runs objc's solver code (it was written by `objc build {_LEAN_OPTION}`): \"",
              "                      \"install objc, or write a standalone module with `objc build` alone\") from _missing"]
    return "\n".join(lines)


class _Assembly:
    """A module's text, section by section, and the syntax tree it must parse to (checked in `text`)."""

    def __init__(self) -> None:
        self.parts: list[str] = []
        self.tree: list[ast.stmt] = []

    def nodes(self, nodes: list[ast.stmt], comment: str | None = None) -> None:
        if nodes:
            module = ast.fix_missing_locations(ast.Module(body=list(nodes), type_ignores=[]))
            self._add(ast.unparse(module), nodes, comment)

    def source(self, text: str, comment: str | None = None, nodes: list[ast.stmt] | None = None) -> None:
        if text:
            self._add(text, ast.parse(text).body if nodes is None else nodes, comment)

    def _add(self, text: str, nodes: list[ast.stmt], comment: str | None) -> None:
        self.parts.append((comment + "\n" if comment else "") + text.strip("\n"))
        self.tree += nodes

    def text(self) -> str:
        source = "\n\n\n".join(self.parts) + "\n"
        # the joins and the layout only add comments and line breaks: the tree must be the one assembled
        if ast.dump(ast.parse(source)) != ast.dump(ast.Module(body=self.tree, type_ignores=[])):
            raise AssertionError("the assembled module differs from its syntax tree")
        return source


# ---------------------------------------------------------------- straight-line code from the typed tree

class _Code:
    """One generated function body: each node's value (and derivative) assigned to a fresh local.

    `variable` says what the derivative is taken in: "s" (the score of a row) for row terms, a
    parameter reference for penalties, None for constants (coefficients, bounds, features).
    """

    def __init__(self, emitter: "_Emitter", variable: str | tuple[str, tuple[str, ...] | None] | None,
                 where: str):
        self.emitter, self.variable, self.where = emitter, variable, where
        self.body: list[ast.stmt] = []
        self.count = 0

    def let(self, value: ast.expr, stem: str) -> ast.expr:
        if isinstance(value, (ast.Name, ast.Constant)):
            return value
        name = f"{stem}{self.count}"
        self.body.append(ast.Assign([ast.Name(name, ast.Store())], value))
        return _name(name)

    def fresh(self) -> None:
        self.count += 1

    def unsupported(self, e: tt.TExpr, what: str) -> NotSupported:
        return NotSupported(f"{what} in {self.where} is not "
                            "supported by the NumPy backend (the cvxpy backend may solve it)", e.span)

    def walk(self, e: tt.TExpr) -> tuple[ast.expr, ast.expr | None]:
        """(value, derivative) of e; derivative None means zero."""
        if isinstance(e, tt.Const):
            return _const(float(e.value)), None
        if isinstance(e, tt.TunableRef):
            return ast.Subscript(_name("tun"), ast.Constant(e.name), ast.Load()), None
        if isinstance(e, tt.DataRef):
            if self.variable != "s" and self.variable != "data":
                raise self.unsupported(e, f"data ('{e.name}')")
            if e.kind == "target":
                return _name("y"), None
            if e.kind == "inputs":
                raise self.unsupported(e, "the input matrix x outside the score")
            return ast.Subscript(_name("cols"), ast.Constant(e.name), ast.Load()), None
        if isinstance(e, tt.ScoreRef):
            if self.variable != "s":
                raise self.unsupported(e, "the score")
            return _name("s"), ast.Constant(1.0)
        if isinstance(e, tt.ParamRef):
            if not isinstance(self.variable, tuple) or (e.name, e.entries) != self.variable:
                raise self.unsupported(e, f"the learned parameter '{render(e)}'")
            return _name("v"), ast.Constant(1.0)
        if isinstance(e, tt.CustomLoss):
            return self.walk(e.body)
        if isinstance(e, tt.Neg):
            a, da = self.walk(e.operand)
            return self._store(ast.UnaryOp(ast.USub(), a), _neg(da))
        if isinstance(e, tt.Add):
            a, da = self.walk(e.left)
            b, db = self.walk(e.right)
            return self._store(_binop(a, ast.Add(), b), _add(da, db))
        if isinstance(e, tt.Mul):
            a, da = self.walk(e.left)
            b, db = self.walk(e.right)
            return self._store(_binop(a, ast.Mult(), b), _add(_mul(da, b), _mul(a, db)))
        if isinstance(e, tt.Div):
            a, da = self.walk(e.left)
            b, db = self.walk(e.right)
            d = None
            if da is not None and db is None:
                d = _binop(da, ast.Div(), b)
            elif db is not None:
                top = _add(_mul(da, b), _neg(_mul(a, db)))
                d = _binop(top, ast.Div(), _binop(b, ast.Mult(), b))
            return self._store(_binop(a, ast.Div(), b), d)
        if isinstance(e, tt.Aggregate):
            if e.over != "entries" or not isinstance(self.variable, tuple):
                raise self.unsupported(e, f"'{e.kind}' over rows")
            a, da = self.walk(e.operand)
            value = _call(_attr("np", "sum" if e.kind == "sum" else "mean"), a)
            d = da
            if e.kind == "mean" and da is not None:
                d = _binop(da, ast.Div(), _call(_attr("np", "size"), a))
            return self._store(value, d)
        if isinstance(e, tt.Apply):
            return self._apply(e)
        if isinstance(e, tt.Dot):
            raise self.unsupported(e, "a dot product")
        raise self.unsupported(e, type(e).__name__)

    def _store(self, value: ast.expr, d: ast.expr | None) -> tuple[ast.expr, ast.expr | None]:
        v = self.let(value, "v")
        dd = self.let(d, "d") if d is not None else None
        self.fresh()
        return v, dd

    def _apply(self, e: tt.Apply) -> tuple[ast.expr, ast.expr | None]:
        entry = CATALOG[e.entry]
        if not entry.trainable:
            raise self.unsupported(e, f"the {entry.name} loss (evaluation only)")
        args = [self.walk(a) for a in e.args]
        tuned = dict(e.tuned)  # a setting or exponent a tunable gives is read from `tun` at run time
        opts = {k: (ast.Subscript(_name("tun"), ast.Constant(tuned[k].name), ast.Load()) if k in tuned
                    else _const(float(v))) for k, v in e.options}
        value_fn = self.emitter.kernel(entry.value)
        values = [a for a, _ in args]
        value = _call(value_fn, *values, **opts)
        if all(d is None for _, d in args):
            return self._store(value, None)
        if len(args) == 1 and entry.value_and_derivative is not None:
            pair = self.let(_call(self.emitter.kernel(entry.value_and_derivative), *values, **opts), "pair")
            value = ast.Subscript(pair, ast.Constant(0), ast.Load())
            d = _mul(ast.Subscript(pair, ast.Constant(1), ast.Load()), args[0][1])
            return self._store(value, d)
        deriv_fn = self.emitter.kernel(entry.derivative)
        if len(args) == 1:
            d = _mul(_call(deriv_fn, *values, **opts), args[0][1])
            return self._store(value, d)
        parts = self.let(_call(deriv_fn, *values, **opts), "parts")
        d = None
        for i, (_, da) in enumerate(args):
            if da is not None:
                d = _add(d, _mul(ast.Subscript(parts, ast.Constant(i), ast.Load()), da))
        return self._store(value, d)


class _FeatureSyntax:
    """A feature formula's forms (objc/feature_formula.py) as Python syntax over the module's `cols`."""

    _OPS = {"+": ast.Add, "-": ast.Sub, "*": ast.Mult, "/": ast.Div}

    def __init__(self, emitter: "_Emitter") -> None:
        self.emitter = emitter

    def number(self, value: float) -> ast.expr:
        return _const(value)

    def column(self, name: str) -> ast.expr:
        return ast.Subscript(_name("cols"), ast.Constant(name), ast.Load())

    def negate(self, operand: ast.expr) -> ast.expr:
        return ast.UnaryOp(ast.USub(), operand)

    def arithmetic(self, op: str, left: ast.expr, right: ast.expr) -> ast.expr:
        return _binop(left, self._OPS[op](), right)

    def atom(self, entry: catalog.Entry, args: Sequence[ast.expr], settings: Mapping[str, float]) -> ast.expr:
        return _call(self.emitter.kernel(entry.value), *args, **{k: _const(v) for k, v in settings.items()})


# ---------------------------------------------------------------- the emitter

def _python_arguments(tunables: tuple[str, ...]) -> dict[str, str]:
    """Estimator argument name for each tunable: its own name when that is a usable Python name."""
    taken = set(FIXED_ARGUMENTS)
    out: dict[str, str] = {}
    for name in tunables:
        candidate = name
        if not candidate.isidentifier() or keyword.iskeyword(candidate) or candidate in taken or \
                candidate.startswith("_") or candidate.endswith("_") or candidate == "self":
            candidate = f"{name.strip('_') or 'tunable'}_value"
            k = 2
            while candidate in taken or not candidate.isidentifier() or keyword.iskeyword(candidate):
                candidate = f"{name.strip('_') or 'tunable'}_value{k}"
                k += 1
        taken.add(candidate)
        out[name] = candidate
    return out


def _penalty_target(t: Term) -> tuple[str, tuple[str, ...] | None, bool]:
    """The one learned parameter (and chosen entries) a penalty term reads."""
    refs: list[tt.ParamRef] = []

    def collect(e: tt.TExpr) -> None:
        if isinstance(e, tt.ParamRef):
            refs.append(e)
        for child in _children(e):
            collect(child)
    collect(t.core)
    keys = {(r.name, r.entries) for r in refs}
    if len(keys) != 1:
        raise NotSupported(f"term {t.index + 1} ('{t.text}') reads "
                           f"{'no' if not keys else 'several'} learned parameter selections; the NumPy backend "
                           "needs a penalty on one parameter (or one selection of it)", t.span, "penalty")
    ref = refs[0]
    return ref.name, ref.entries, ref.vector


def _children(e: tt.TExpr) -> tuple[tt.TExpr, ...]:
    if isinstance(e, (tt.Add, tt.Mul, tt.Div, tt.Dot)):
        return (e.left, e.right)
    if isinstance(e, tt.Neg):
        return (e.operand,)
    if isinstance(e, tt.Aggregate):
        return (e.operand,)
    if isinstance(e, tt.Apply):
        return e.args
    if isinstance(e, tt.CustomLoss):
        return (e.body,)
    return ()


def _penalty_form(core: tt.TExpr) -> str | None:
    """'l1', 'l2' or 'l2sq' when the penalty is exactly that norm of a parameter (the prox is known)."""
    def is_param(e: tt.TExpr) -> bool:
        return isinstance(e, tt.ParamRef)
    if isinstance(core, tt.Apply) and core.entry in ("l1", "l2", "l2sq") and is_param(core.args[0]):
        return core.entry
    if isinstance(core, tt.Apply) and CATALOG[core.entry].reads_second_moments and is_param(core.args[0]):
        return "dropout"
    if isinstance(core, tt.Apply) and core.entry == "abs" and is_param(core.args[0]) and \
            core.args[0].shape.kind == "scalar":
        return "l1"
    if tt.is_square(core) and is_param(core.args[0]) and core.args[0].shape.kind == "scalar":
        return "l2sq"
    if isinstance(core, tt.Aggregate) and core.kind == "sum" and core.over == "entries" and \
            isinstance(core.operand, tt.Apply) and is_param(core.operand.args[0]):
        inner = core.operand
        if inner.entry == "abs":
            return "l1"
        if tt.is_square(inner):
            return "l2sq"
    return None


def _coefficient_factors(t: Term) -> tuple[list[tt.TExpr], bool]:
    """The constant factors in front of a term's core, and whether it is negated."""
    factors: list[tt.TExpr] = []
    negated = False
    e = t.expr
    while e is not t.core:
        if isinstance(e, tt.Neg):
            negated = not negated
            e = e.operand
        elif isinstance(e, tt.Mul):
            factors.append(e.left)
            e = e.right
        else:  # pragma: no cover - the checker builds terms this way only
            raise NotSupported(f"cannot read the coefficient of term {t.index + 1}", t.span)
    return factors, negated


def plan_method(checked: CheckedObjective) -> str:
    """The solver family the analysis asks for (the module may switch to a prox variant at run time
    when the data give a penalty weight or a bound): 'lbfgs', 'fista', 'smoothing',
    'smoothing+fista' or 'subgradient'."""
    if not checked.accepted:
        return "subgradient"
    prox_part = bool(checked.constraints)
    rows_nonsmooth = False
    for t in checked.terms:
        if t.kind == "params" and not t.smooth:
            if _penalty_form(t.core) in ("l1", "l2"):
                prox_part = True
            else:
                return "subgradient"
        if t.kind == "rows" and not t.smooth:
            rows_nonsmooth = True
    if rows_nonsmooth:
        return "smoothing+fista" if prox_part else "smoothing"
    return "fista" if prox_part else "lbfgs"


_METHOD_TEXT = {
    "lbfgs": "L-BFGS (SciPy's L-BFGS-B when importable, else the module's own two-loop recursion); "
             "smooth objective",
    "fista": "accelerated proximal gradient (FISTA with restart and backtracking) with the catalog's prox "
             "for the nonsmooth penalties and projections for the constraints",
    "smoothing": "smoothing with continuation: each nonsmooth loss replaced by its Moreau envelope (through "
                 "the catalog's prox), minimized by L-BFGS, the envelope parameter shrunk until the "
                 "certificate holds; a piecewise-linear loss with a ridge penalty is finished exactly (the rows "
                 "near a kink solved as a small QP, a free intercept found by a 1-D search over the "
                 "multiplier of the dual's equality; SciPy needed)",
    "smoothing+fista": "smoothing with continuation (Moreau envelopes through the catalog's prox) and "
                       "accelerated proximal gradient for the penalties and constraints; a piecewise-linear loss "
                       "with an l1 penalty is finished exactly (the rows near a kink solved as a small LP, SciPy "
                       "needed)",
    "subgradient": "subgradient method with diminishing steps: the objective is not certified convex, so the "
                   "result is at best a local minimum (runs only with allow_nonconvex=True); without theta0 "
                   "it runs from three deterministic starts (zero, a seeded random point, the least-squares "
                   "fit of the score to the target) and keeps the lowest objective",
}


class _Emitter:
    def __init__(self, checked: CheckedObjective):
        self.checked = checked
        self.kernels: set[str] = set(_RUNTIME_KERNELS)
        self.defs: list[ast.stmt] = []
        self.maps = False

    def kernel(self, fn: Callable) -> str:
        name = _kernel_name(fn)
        self.kernels.add(name)
        return name

    # ---- spec-specific functions

    def value_function(self, name: str, args: list[str], doc: str, e: tt.TExpr, variable) -> str:
        code = _Code(self, variable, doc)
        v, _ = code.walk(e)
        self.defs.append(_function(name, args, doc, code.body + [ast.Return(v)]))
        return name

    def constant_function(self, name: str, doc: str, factors: list[tt.TExpr], negated: bool) -> str:
        code = _Code(self, None, doc)
        value: ast.expr = _const(-1.0 if negated else 1.0)
        for f in factors:
            fv, _ = code.walk(f)
            value = fv if _is_const(value, 1.0) else _binop(value, ast.Mult(), fv)
        self.defs.append(_function(name, ["tun"], doc, code.body + [ast.Return(value)]))
        return name

    def rows_function(self, t: Term) -> str:
        name = f"term_{t.index}_rows"
        doc = (f"Term {t.index + 1} (spec line {t.span.line}): {t.text}\n\n    "
               f"Per row: the value of {render(t.body)} and its derivative in the score s.\n    ")
        code = _Code(self, "s", f"term {t.index + 1}")
        v, d = code.walk(t.body)
        ret = ast.Return(ast.Tuple([v, d if d is not None else ast.Constant(0.0)], ast.Load()))
        self.defs.append(_function(name, ["s", "y", "cols", "tun"], doc, code.body + [ret]))
        return name

    def penalty_function(self, t: Term, param: str, entries) -> str:
        name = f"term_{t.index}_penalty"
        doc = (f"Term {t.index + 1} (spec line {t.span.line}): {t.text}\n\n    "
               f"Value of {render(t.core)} at v (the entries of {param} it reads) and its gradient in v.\n    ")
        code = _Code(self, (param, entries), f"term {t.index + 1}")
        v, d = code.walk(t.core)
        value = _call(_name("float"), _call(_attr("np", "sum"), v))
        grad = _call(_attr("np", "broadcast_to"), d if d is not None else ast.Constant(0.0), _attr("v", "shape"))
        ret = ast.Return(ast.Tuple([value, grad], ast.Load()))
        self.defs.append(_function(name, ["v", "tun"], doc, code.body + [ret]))
        return name

    # ---- tables

    def term_table(self, t: Term) -> ast.expr:
        factors, negated = _coefficient_factors(t)
        coef = self.constant_function(f"term_{t.index}_coefficient",
                                      f"Term {t.index + 1} (spec line {t.span.line}): the coefficient "
                                      f"{t.coefficient_text or '1'}.", factors, negated)
        common: dict[str, ast.expr] = {"index": ast.Constant(t.index), "line": ast.Constant(t.span.line),
                                       "text": ast.Constant(t.text), "coefficient": _name(coef)}
        if t.kind == "rows":
            fields = dict(common, kind=ast.Constant("rows"), aggregate=ast.Constant(t.aggregate),
                          rows=_name(self.rows_function(t)), smooth=ast.Constant(bool(t.smooth)))
            if t.known_loss is not None:
                entry = CATALOG[t.known_loss[0]]
                fields.update(loss=ast.Constant(entry.name), role=ast.Constant(t.role),
                              options=_const({k: float(v) for k, v in t.known_loss[1]}))
                fields["prox"] = _name(self.kernel(entry.prox)) if entry.prox is not None else ast.Constant(None)
                fields["conjugate"] = _name(self.kernel(entry.conjugate)) if entry.conjugate is not None else \
                    ast.Constant(None)
                lip = entry.lipschitz({k: float(v) for k, v in t.known_loss[1]})
                fields["lipschitz"] = _const(float(lip) if lip is not None else None)
                # the least l'' over an interval: what turns a gap into a certified distance of the weights
                fields["curv_floor"] = _name(self.kernel(entry.curv_floor)) if entry.curv_floor is not None else \
                    ast.Constant(None)
                if isinstance(t.body, tt.Apply) and t.body.tuned:
                    # settings a tunable gives: the solver reads them from the tunables of each fit; the
                    # Lipschitz constant (which only sizes smoothing stages) is the larger at the range
                    # ends, an upper bound for the catalog's settings (linear, or a max of linear, in them)
                    fields["tuned_options"] = _const({k: ref.name for k, ref in t.body.tuned})
                    ends = [entry.lipschitz(t.body.option_values({r.name: getattr(r, side) for _, r in t.body.tuned}))
                            for side in ("low", "high")]
                    if lip is not None and all(v is not None for v in ends):
                        fields["lipschitz"] = _const(float(max([lip] + ends)))
            return ast.Dict([ast.Constant(k) for k in fields], list(fields.values()))
        if t.kind == "params":
            param, entries, _vector = _penalty_target(t)
            fields = dict(common, kind=ast.Constant("params"), param=ast.Constant(param),
                          entries=_const(entries), form=ast.Constant(_penalty_form(t.core)),
                          smooth=ast.Constant(bool(t.smooth)), penalty=_name(self.penalty_function(t, param, entries)))
            if fields["form"].value == "dropout":
                # a ridge weighted by the rows' second moments, which the runtime takes from its data
                core = t.core
                drop = core.setting("p")
                fields.update(rows=ast.Constant(core.rows or "mean"), drop=_name(self.value_function(
                    f"term_{t.index}_drop", ["tun"], f"Term {t.index + 1}: the drop probability.", drop, None)),
                    factor=_name(self.kernel(catalog._k_dropout_factor)),
                    moments=_name(self.kernel(catalog._k_second_moments)))
            return ast.Dict([ast.Constant(k) for k in fields], list(fields.values()))
        if t.kind == "constant":
            value = self.value_function(f"term_{t.index}_constant", ["tun"],
                                        f"Term {t.index + 1} (spec line {t.span.line}): a constant.", t.core, None)
            fields = dict(common, kind=ast.Constant("constant"), constant=_name(value))
            return ast.Dict([ast.Constant(k) for k in fields], list(fields.values()))
        raise NotSupported(f"term {t.index + 1} mixes per-row aggregates with other "
                           "expressions; only the cvxpy backend can solve it", t.span, "aggregate")

    def constraint_table(self, k: int) -> ast.expr:
        c = self.checked.spec.constraints[k]
        info = self.checked.constraints[k]
        where = f"Constraint (spec line {c.span.line}): {info.text}"
        left, op, right = c.left, c.op, c.right
        if left.depends != "params":
            left, right = right, left
            op = {"<=": ">=", ">=": "<=", "==": "=="}[op]
        fields: dict[str, ast.expr] = {"line": ast.Constant(c.span.line), "text": ast.Constant(info.text)}
        bound_name = f"constraint_{k}_bound"
        if isinstance(left, tt.ParamRef) and right.depends == "const":
            low = high = None
            self.value_function(bound_name, ["tun"], where, right, None)
            if op in (">=", "=="):
                low = _name(bound_name)
            if op in ("<=", "=="):
                high = _name(bound_name)
            fields.update(kind=ast.Constant("interval"), param=ast.Constant(left.name), entries=_const(left.entries),
                          low=low or ast.Constant(None), high=high or ast.Constant(None))
        elif isinstance(left, tt.Apply) and left.entry in ("abs", "l1", "l2") and op == "<=" and \
                isinstance(left.args[0], tt.ParamRef) and right.depends == "const":
            ref = left.args[0]
            self.value_function(bound_name, ["tun"], where, right, None)
            if left.entry == "abs":
                negative = f"constraint_{k}_negative_bound"
                self.value_function(negative, ["tun"], where, tt.Neg(right, right.span), None)
                fields.update(kind=ast.Constant("interval"), low=_name(negative), high=_name(bound_name))
            else:
                fields.update(kind=ast.Constant(f"{left.entry} ball"), radius=_name(bound_name))
            fields.update(param=ast.Constant(ref.name), entries=_const(ref.entries))
        else:
            raise NotSupported(f"constraint '{info.text}' is not a sign, bound, box, L1 ball "
                               "or L2 ball on a learned parameter; the NumPy backend cannot project on it "
                               "(the cvxpy backend can)", c.span, "constraint")
        return ast.Dict([ast.Constant(k2) for k2 in fields], list(fields.values()))

    def score_table(self) -> ast.expr:
        spec = self.checked.spec
        if spec.score is None:
            raise NotSupported("the spec has no score", None, "score")
        try:
            form = score_form(self.checked, tuple(spec.table.explicit_inputs() or ()) if spec.table else ())
        except ValueError as err:
            raise NotSupported(str(err), spec.score.span, "score") from None
        dots, scalars = [], []
        for k, b in enumerate(form.blocks):
            if b.dot:
                dots.append(ast.Tuple([ast.Constant(b.param), _const(b.entries if b.entries else None),
                                       _const(b.sign)], ast.Load()))
            else:
                coef: ast.expr = ast.Constant(None)
                if b.coefficient is not None:
                    fname = f"score_coefficient_{k}"
                    self.value_function(fname, ["cols", "tun"], f"The score (spec line {spec.score.span.line}): the "
                                        f"factor {render(b.coefficient)} of {b.param}.", b.coefficient, "data")
                    coef = _name(fname)
                scalars.append(ast.Tuple([ast.Constant(b.param), _const(b.entries), _const(b.sign), coef],
                                         ast.Load()))
        offset: ast.expr = ast.Constant(None)
        if form.offset:
            total = form.offset[0]
            for piece in form.offset[1:]:
                total = tt.Add(total, piece, piece.span, piece.shape, piece.depends)
            self.value_function("score_offset", ["cols", "tun"], f"The score (spec line {spec.score.span.line}): "
                                f"the part without learned parameters, {render(total)}.", total, "data")
            offset = _name("score_offset")
        fields = {"standard": ast.Constant(bool(form.standard)), "dots": ast.Tuple(dots, ast.Load()),
                  "scalars": ast.Tuple(scalars, ast.Load()), "offset": offset,
                  "weights": ast.Constant(form.weights_name), "intercept": ast.Constant(form.intercept_name)}
        return ast.Dict([ast.Constant(k) for k in fields], list(fields.values()))

    def table_table(self) -> ast.expr:
        """How the command line reads a CSV: the spec's table clauses as plain data."""
        tb = self.checked.spec.table
        if tb is None:
            return ast.Constant(None)
        features = []
        for k, f in enumerate(tb.features):
            fname = f"feature_{k}"
            self.feature_function(fname, f)
            features.append(ast.Tuple([ast.Constant(f.name), _name(fname)], ast.Load()))
        label_map = None
        if tb.label_map is not None and tb.label_map.pairs:
            label_map = tuple((v, float(lab)) for v, lab in tb.label_map.pairs)
        fields = {
            "path": ast.Constant(tb.path), "target": ast.Constant(tb.target), "label_map": _const(label_map),
            "inputs": _const(tuple((i.kind, i.text) for i in tb.inputs)),
            "excluded": _const(tuple(e.text for e in tb.excluded)),
            "features": ast.Tuple(features, ast.Load()),
            "row_weight": ast.Constant(tb.row_weight),
            "class_weights": _const(tuple((float(a), float(b)) for a, b in tb.class_weights)),
            "standardize": ast.Constant(bool(tb.standardize)),
            "holdout": _const((float(tb.holdout), int(tb.holdout_seed)) if tb.holdout is not None else None),
            "missing": ast.Constant(tb.missing),
            "maps": _const(tuple(m.plain() for m in tb.maps)),
        }
        self.map_functions()
        return ast.Dict([ast.Constant(k) for k in fields], list(fields.values()))

    def map_functions(self) -> None:
        """The feature maps' math, objc's own (`_map_copies`), so the module computes every map as objc does."""
        self.maps = True

    def feature_function(self, fname: str, f: tt.DerivedFeature) -> None:
        # the formula rules' own walk (objc/feature_formula.py) with Python syntax as its algebra, so the
        # module computes exactly the forms objc's table binder does
        folded = fold(f.expr, _FeatureSyntax(self))
        if folded.diagnostics:
            first = folded.diagnostics[0]
            raise NotSupported(f"feature {f.name!r}: {first.message}", first.span, "feature")
        doc = f"Derived input {f.name!r} (spec line {f.span.line}) from the table's columns."
        body = [ast.Return(_call(_attr("np", "asarray"), folded.value, dtype=_attr("np", "float64")))]
        self.defs.append(_function(fname, ["cols"], doc, body))

    # ---- the module

    def spec_table(self) -> ast.expr:
        c = self.checked
        spec = c.spec
        terms = [self.term_table(t) for t in c.terms]
        constraints = [self.constraint_table(k) for k in range(len(spec.constraints))]
        score = self.score_table()
        table = self.table_table()
        method = plan_method(c)
        trainable = c.verdict != "not subdifferentiable"
        refusal = "" if trainable else ("the objective is not subdifferentiable (it uses the 0-1 loss, which is "
                                        "for evaluation only): nothing can be trained on it")
        needs_target = any(_uses_target(t.core) for t in c.terms)
        tunables = {t.name: float(t.default) for t in spec.tunables}
        ranges = {t.name: (float(t.low), float(t.high)) for t in spec.tunables}
        arguments = _python_arguments(tuple(tunables))
        inputs = tuple(spec.table.explicit_inputs()) if spec.table is not None and \
            spec.table.explicit_inputs() is not None else None
        fields: dict[str, ast.expr] = {
            "name": ast.Constant(spec.source_name), "sha256": ast.Constant(c.spec_hash),
            "verdict": ast.Constant(c.verdict), "accepted": ast.Constant(bool(c.accepted)),
            "trainable": ast.Constant(trainable), "refusal": ast.Constant(refusal),
            "method": ast.Constant(method), "method_text": ast.Constant(_METHOD_TEXT[method]),
            "task": ast.Constant(c.task), "needs_target": ast.Constant(needs_target),
            "parameters": _const(tuple((p.name, bool(p.vector)) for p in spec.parameters)),
            "inputs": _const(inputs),
            "tunables": _const(tunables), "tunable_ranges": _const(ranges),
            "tunable_arguments": _const(arguments),
            "score": score, "terms": ast.Tuple(terms, ast.Load()),
            "constraints": ast.Tuple(constraints, ast.Load()), "table": table,
            "text": _name("SPEC_TEXT"),
        }
        return ast.Dict([ast.Constant(k) for k in fields], list(fields.values()))

    def estimator_class(self) -> ast.ClassDef:
        """`Model`: the scikit-learn style estimator, with the tunables as constructor arguments."""
        spec = self.checked.spec
        arguments = _python_arguments(tuple(t.name for t in spec.tunables))
        defaults = {arguments[t.name]: float(t.default) for t in spec.tunables}
        fixed = {"tol": 1e-6, "max_passes": None, "allow_nonconvex": False, "use_scipy": True, "param_tol": 1e-6}
        names = list(defaults) + list(fixed)
        values = list(defaults.values()) + list(fixed.values())
        args = ast.arguments(posonlyargs=[], args=[ast.arg("self")], vararg=None,
                             kwonlyargs=[ast.arg(n) for n in names], kw_defaults=[_const(v) for v in values],
                             kwarg=None, defaults=[])
        body: list[ast.stmt] = [ast.Expr(ast.Constant(
            "Estimator for the spec above. Keyword arguments: the spec's tunables (by name), then the solver "
            "settings tol, max_passes, allow_nonconvex, use_scipy, param_tol (None: no parameter stop)."))]
        for n in names:
            body.append(ast.Assign([ast.Attribute(_name("self"), n, ast.Store())], _name(n)))
        init = ast.FunctionDef(name="__init__", args=args, body=body, decorator_list=[], returns=None,
                               type_params=[])
        doc = ast.Expr(ast.Constant(
            f"A linear model trained on the objective of {spec.source_name!r}, following scikit-learn's "
            "conventions (fit, predict, decision_function, score, get_params, set_params; fitted attributes "
            "end in '_') without importing scikit-learn."))
        param_names = ast.Assign([ast.Name("_param_names", ast.Store())], _const(tuple(names)))
        base = "ClassifierBase" if self.checked.task == "margin" else "EstimatorBase"
        return ast.ClassDef(name="Model", bases=[_name(base)], keywords=[],
                            body=[doc, param_names, init], decorator_list=[], type_params=[])


def _uses_target(e: tt.TExpr) -> bool:
    if isinstance(e, tt.DataRef) and e.kind == "target":
        return True
    if isinstance(e, tt.ScoreRef):
        return False
    return any(_uses_target(c) for c in _children(e) + ((e.body,) if isinstance(e, tt.CustomLoss) else ()))


def _header(checked: CheckedObjective) -> str:
    spec = checked.spec
    method = plan_method(checked)
    lines = [
        f"objc NumPy module for the spec {spec.source_name!r}.",
        "",
        "Generated by objc from the spec below: regenerate it rather than edit it. Needs only NumPy",
        "(SciPy's L-BFGS-B, linprog and threadpoolctl are used when importable).",
        "",
        f"spec sha256: {checked.spec_hash}",
        f"verdict: {checked.verdict}" + (" (smooth)" if checked.smooth else " (nonsmooth)"),
        f"method: {_METHOD_TEXT[method]}",
        "certificate: the duality gap where every conjugate is known, else an optimality residual",
        "",
        "Use: `from <this module> import Model` (fit / predict / decision_function), `solve(X, y, ...)`,",
        "or as a script: `python <this file> TABLE.csv -o model.json`.",
        "",
        "The objective, expanded:",
        "",
        textwrap.indent(checked.expanded, "    "),
        "",
        "The spec:",
        "",
        textwrap.indent(spec.text.rstrip("\n"), "    "),
    ]
    return "\n".join(lines) + "\n"


def unsupported(checked: CheckedObjective) -> NotSupported | None:
    """Why the NumPy backend cannot train an accepted spec, or None: the spec's own tables are built
    (where every refusal is raised) without the runtime's source, so `check` can afford it."""
    try:
        if checked.task == "multiclass":
            _mc_plan(checked)
            return None
        _Emitter(checked).spec_table()
    except NotSupported as err:
        return err
    return None


Runtime = Literal["inline", "import"]


def emit_module(checked: CheckedObjective, runtime: Runtime = "inline") -> str:
    """The NumPy module for a checked objective (byte-identical for the same spec and `runtime`).

    runtime "inline" (the default) writes a standalone module: objc's kernels, solver and estimator
    code are in it as their files write them, comments included, each block under a line naming its
    file. "import" writes a lean module that imports them from the installed objc (the estimator code,
    which reads the module's own `SPEC`, stays in it); both predict alike.

    Raises NotSupported when the spec holds something this backend cannot solve (a constraint it
    cannot project on, a term mixing rows and other expressions), with the spec line.
    """
    if runtime not in ("inline", "import"):
        raise ValueError(f"runtime must be 'inline' or 'import', not {runtime!r}")
    if checked.verdict == "not subdifferentiable":
        raise NotSupported("the objective is not subdifferentiable: the 0-1 loss is for evaluation only, so "
                           "nothing can be trained on it (train a surrogate such as hinge or logistic)")
    if checked.task == "multiclass":
        return _emit_multiclass(checked, runtime)
    em = _Emitter(checked)
    spec_table = em.spec_table()
    estimator = em.estimator_class()
    spec_node = ast.Assign([ast.Name("SPEC", ast.Store())], spec_table)
    tail = ast.parse(_TAIL).body
    solvers, estimator_code = _file_copies("numpy_solvers_src.py"), _file_copies("numpy_estimator_src.py")
    kernels = _kernel_copies(em.kernels)
    maps = (_map_copies() if em.maps else []) + _scaling_copies()
    header = _header(checked) if runtime == "inline" else _header(checked).replace(_STANDALONE_NEEDS, _LEAN_NEEDS)
    out = _Assembly()
    out.nodes([ast.Expr(ast.Constant(header))] + ast.parse(_IMPORTS).body
              + [ast.Assign([ast.Name("_MISSING_CELLS", ast.Store())], _const(MISSING_CELLS))])
    out.nodes([ast.Assign([ast.Name("SPEC_TEXT", ast.Store())], ast.Constant(checked.spec.text)),
               ast.Assign([ast.Name("SPEC_SHA256", ast.Store())], ast.Constant(checked.spec_hash)),
               ast.Assign([ast.Name("VERDICT", ast.Store())], ast.Constant(checked.verdict)),
               ast.Assign([ast.Name("METHOD", ast.Store())], ast.Constant(_METHOD_TEXT[plan_method(checked)]))],
              "# ---- the spec, verbatim (its sha256 and verdict follow)")
    if runtime == "inline":
        out.source(_copied_text(kernels, "catalog kernels"))
    else:
        estimator_nodes = [node for c in estimator_code for node in ast.parse(c.text).body]
        used = _names_read(em.defs + [spec_node, estimator] + tail + estimator_nodes)
        out.source(_import_text([kernels, maps, solvers], used),
                   "# ---- objc's kernels, maps and solver code, imported from the installed objc")
    out.nodes(em.defs, "# ---- generated from the spec's typed tree (each docstring names its spec line)")
    if runtime == "inline":
        out.source(_copied_text(maps, "feature maps and standardization"))
    out.source("SPEC = " + _layout(spec_table, 0), "# ---- the spec as a table the solver reads", [spec_node])
    if runtime == "inline":
        out.source(_copied_text(solvers, "generic solver code"))
    out.source(_copied_text(estimator_code, "estimator and command line"))
    out.nodes([estimator], "# ---- the estimator for this spec")
    out.source(_TAIL, "# ---- functions for use without the estimator", tail)
    return out.text()


_STANDALONE_NEEDS = ("Needs only NumPy\n(SciPy's L-BFGS-B, linprog and threadpoolctl are used when importable).")
_LEAN_NEEDS = (f"Needs objc\ninstalled: it imports objc's solver code (written by `objc build {_LEAN_OPTION}`; "
               "`objc build` alone writes\na standalone module).")


def _layout(node: ast.expr, depth: int, width: int = 100) -> str:
    """A dict or tuple literal spread over lines, one entry per line, when it is too long for one."""
    flat = ast.unparse(node)
    if len(flat) + 4 * depth <= width or not isinstance(node, (ast.Dict, ast.Tuple)):
        return flat
    pad = "    " * (depth + 1)
    if isinstance(node, ast.Dict):
        items = [f"{pad}{ast.unparse(k)}: {_layout(v, depth + 1, width)}," for k, v in zip(node.keys, node.values)]
        return "{\n" + "\n".join(items) + "\n" + "    " * depth + "}"
    items = [f"{pad}{_layout(v, depth + 1, width)}," for v in node.elts]
    return "(\n" + "\n".join(items) + "\n" + "    " * depth + ")"


_IMPORTS = '''
import math
import re
import sys
import numpy as np
try:
    import scipy.optimize as _scipy_optimize
except ImportError:
    _scipy_optimize = None
try:
    import threadpoolctl as _threadpoolctl
except ImportError:
    _threadpoolctl = None
'''

_TAIL = '''
def solve(X, y, weights=None, input_names=None, tunables=None, tol=1e-06, max_passes=None, allow_nonconvex=False,
          theta0=None, progress=None, use_scipy=True, param_tol=1e-06):
    """Fit the spec's objective: X (rows x inputs, dense or CSR), y, optional row weights, input names
    (default: the spec's inputs), tunable values by spec name. Stops at a relative certificate of `tol`
    and, unless `param_tol` is None, parameters within `param_tol` of the optimum (certified where the
    objective is strongly convex in all of them). Returns a dict: params, objective, term_values, status,
    method, certificate (with distance, curvature, distance_note), iterations, passes, seconds."""
    return run_solver(SPEC, X, y, weights, input_names, tunables, tol, max_passes, allow_nonconvex, theta0,
                      progress, use_scipy, param_tol)


def decision_function(params, X, input_names=None, tunables=None):
    """The score s = w . x + b (as the spec defines it) of each row, from fitted parameters."""
    return decision_values(SPEC, params, X, input_names, tunables)


def predict(params, X, input_names=None, tunables=None):
    """Labels +1/-1 for a margin spec (the sign of the score, 0 counted as -1), else the score."""
    s = decision_function(params, X, input_names, tunables)
    return np.where(s > 0, 1.0, -1.0) if SPEC["task"] == "margin" else s


if __name__ == "__main__":
    sys.exit(main())
'''


# ---------------------------------------------------------------- in-process training

def load_module(source: str, name: str = "objc_generated") -> dict[str, Any]:
    """Compile and execute generated source in a fresh namespace (what `python module.py` would run).

    The code's file name is `<NAME SHA>` (SHA the start of the source's sha256, so two modules never
    share one), and the source is registered with linecache under it: a traceback from inside the
    module shows the offending line, as one from a file would."""
    filename = _module_filename(name, hashlib.sha256(source.encode("utf-8")).hexdigest())
    linecache.cache[filename] = (len(source), None, source.splitlines(keepends=True), filename)
    namespace: dict[str, Any] = {"__name__": name}
    exec(compile(source, filename, "exec"), namespace)  # noqa: S102 - our own generated source
    return namespace


def _module_filename(name: str, digest: str) -> str:
    return f"<{name} {digest[:16]}>"


@functools.lru_cache(maxsize=1)
def _module_cache() -> dict[str, Any]:
    """The one cache of this module (emitted sources, compiled namespaces, the runtime sources' digest),
    held by lru_cache."""
    return {"source": {}, "namespace": {}}


_CACHE_ENTRIES = 32


def _compiled(checked: CheckedObjective) -> dict[str, Any]:
    """The generated module of a spec, compiled once per process.

    Emitting costs about 0.2 s (most of it the syntax tree of the generic solver code), compiling
    a little more; both depend only on the spec (its text and name) and on the sources copied in (runtime, catalog), so
    the source is kept by those and the namespace by the source's sha256. A generated namespace
    holds no state between calls, so sharing it is safe."""
    cache = _module_cache()
    runtime = _runtime_digest(cache)
    key = (checked.spec.source_name, checked.spec.text, checked.verdict, checked.expanded, checked.task, runtime)
    emitted = cache["source"].get(key)
    if emitted is None:
        source = emit_module(checked)
        emitted = (source, hashlib.sha256(source.encode("utf-8")).hexdigest())
        _remember(cache["source"], key, emitted)
    source, digest = emitted
    namespace = cache["namespace"].get(digest)
    if namespace is None:
        namespace = load_module(source, "objc_fit")
        dropped = _remember(cache["namespace"], digest, namespace)
        if dropped is not None:  # its lines go with it (a long run emits many modules of 200 kB)
            linecache.cache.pop(_module_filename("objc_fit", dropped), None)
    return namespace


def _runtime_digest(cache: dict) -> str:
    """The sha256 of the sources copied into every module, read again only when a file's size or
    modification time changes (reading and hashing them took about a millisecond per fit, paid at
    every point of a path)."""
    import os
    files = cache.get("runtime files")
    if files is None:  # plain strings, formed once: building Path objects per fit cost more than the stat calls
        # every file a module copies code from: the runtime, the catalog's kernels, and the maps' math and
        # standardize's rule (tables.py, typed_tree.py)
        files = tuple(str(_HERE / f) for f in _RUNTIME_FILES + (_MULTICLASS_RUNTIME,)) + (
            str(catalog.__file__), str(_HERE.parent / "tables.py"), str(_HERE.parent / "typed_tree.py"))
        cache["runtime files"] = files
    stamp = tuple((st.st_mtime_ns, st.st_size) for st in map(os.stat, files))
    kept = cache.get("runtime")
    if kept is None or kept[0] != stamp:
        kept = (stamp, hashlib.sha256(b"".join(Path(f).read_bytes() for f in files)).hexdigest())
        cache["runtime"] = kept
    return kept[1]


def _remember(store: dict, key: Any, value: Any) -> Any:
    """Keep key: value, dropping the oldest entry when the store is full; returns the dropped key or None."""
    dropped = None
    if len(store) >= _CACHE_ENTRIES:
        dropped = next(iter(store))  # the oldest entry (dicts keep insertion order)
        store.pop(dropped)
    store[key] = value
    return dropped


def fit(checked: CheckedObjective, X: Any, y: Any, weights: Any, input_names: tuple[str, ...] | list[str],
        tunables: dict[str, float] | None = None, tol: float = 1e-6, max_passes: int | None = None,
        allow_nonconvex: bool = False, theta0: Any = None,
        progress: Callable[[int, float, float | None], None] | None = None,
        use_scipy: bool = True, param_tol: float | None = 1e-6, prepared: dict | None = None,
        certify_only: bool = False) -> FitResult:
    """Train with the generated module itself: emit, compile, execute (once per spec and process, see
    `_compiled`), call its solver.

    `prepared` and `certify_only` are the solver's (a cache kept across the fits of a path; only the
    certificate of theta0); see `run_solver`.

    Raises NotSupported for specs this backend cannot solve and ValueError for unusable data or
    settings (the message says which)."""
    if checked.task == "multiclass":
        if certify_only or prepared is not None:
            raise NotSupported("paths and certificates of a given point are not available for a spec with classes")
        return _fit_multiclass(checked, X, y, weights, input_names, tunables, tol, max_passes, theta0, param_tol)
    ns = _compiled(checked)
    out = ns["run_solver"](ns["SPEC"], X, y, weights, tuple(input_names) if input_names is not None else None,
                           tunables, tol, max_passes, allow_nonconvex, theta0, progress, use_scipy, param_tol,
                           prepared=prepared, certify_only=certify_only)
    cert = out["certificate"]
    return FitResult(params=out["params"], objective=float(out["objective"]), term_values=tuple(out["term_values"]),
                     status=out["status"], backend="numpy", method=out["method"],
                     certificate=Certificate(cert["kind"], cert["absolute"], cert["relative"], cert["tolerance"],
                                             cert["note"], distance=cert["distance"], curvature=cert["curvature"],
                                             distance_note=cert["distance_note"],
                                             param_tolerance=cert["param_tolerance"],
                                             weights_distance=cert.get("weights_distance")),
                     iterations=int(out["iterations"]), passes=int(out["passes"]), seconds=float(out["seconds"]),
                     extra={"theta": out["theta"], "input_names": out["input_names"]})


def bound_problem(checked: CheckedObjective, X: Any, y: Any, weights: Any, input_names: tuple[str, ...] | list[str],
                  tunables: dict[str, float] | None = None, prepared: dict | None = None) -> tuple[dict[str, Any], Any]:
    """(the generated module's namespace, its problem bound to these rows): the spec's terms with their
    row weights, penalties and bounds, for code that reads the objective's pieces without solving
    (a path's start, a screening test). `prepared` as in `fit` (the rows are checked once per path).
    Raises NotSupported or ValueError like `fit`."""
    ns = _compiled(checked)
    return ns, ns["build_problem"](ns["SPEC"], X, y, weights, tuple(input_names), tunables, prepared)


# ---------------------------------------------------------------- multiclass modules
# A spec whose target has classes gets a module of its own: the spec's goal read into one multiclass
# loss and penalties of W (the `SPEC` table and a generated `_mc_coefficients`), the catalog's kernels,
# the solver of numpy_multiclass_src.py (copied by source) and `_MC_TAIL` (solve, fit, decision_function,
# predict, predict_proba). The binary modules stay as they were.

_MULTICLASS_RUNTIME = "numpy_multiclass_src.py"
_MC_PENALTY_KINDS = ("l2sq", "l1", "inputs_l2")


def _mc_plan(checked: CheckedObjective) -> dict[str, Any]:
    """The multiclass goal as the solver takes it: one loss term (entry, aggregate, coefficient
    factors) and penalties of W (kind, coefficient factors); NotSupported (with the spec line) for
    anything else."""
    from objc.checker import multiclass_form
    spec = checked.spec
    form = multiclass_form(spec)
    if form is None:
        raise NotSupported("the score of a spec with classes must be W . x + b (or W . x)",
                           spec.score.span if spec.score is not None else None, "score")
    if spec.constraints:
        raise NotSupported("the NumPy multiclass solver takes no `keep` constraints", spec.constraints[0].span,
                           "constraint")
    if spec.table is not None and spec.table.maps and spec.table.features:
        raise NotSupported("a multiclass NumPy module computes feature maps but not `feature` lines beside them",
                           spec.table.features[0].span, "feature")
    loss: tuple[str, str, list[tt.TExpr]] | None = None
    penalties: list[tuple[str, list[tt.TExpr]]] = []
    for t in checked.terms:
        factors, negated = _coefficient_factors(t)
        if negated:
            raise NotSupported(f"term {t.index + 1} ('{t.text}') has a negative coefficient", t.span)
        if t.kind == "rows" and isinstance(t.body, tt.Apply) and CATALOG[t.body.entry].role == "multiclass":
            if loss is not None:
                raise NotSupported("the NumPy multiclass solver takes one multiclass loss term; this goal has "
                                   "two or more", t.span)
            loss = (t.body.entry, t.aggregate or "sum", factors)
        elif t.kind == "params" and isinstance(t.core, tt.Apply) and t.core.entry in _MC_PENALTY_KINDS and \
                isinstance(t.core.args[0], tt.ParamRef) and t.core.args[0].name == form[0]:
            penalties.append((t.core.entry, factors))
        elif t.kind == "params" and isinstance(t.core, tt.Apply) and CATALOG[t.core.entry].reads_second_moments \
                and isinstance(t.core.args[0], tt.ParamRef) and t.core.args[0].name == form[0]:
            # the drop probability (a number or a tunable) goes along; the solve turns it into a ridge
            drop = t.core.setting("p")
            penalties.append(("dropridge", factors + [drop]))
        else:
            raise NotSupported(f"term {t.index + 1} ('{t.text}') is neither a multiclass loss of the score nor "
                               f"{', '.join(_MC_PENALTY_KINDS)} of {form[0]}", t.span, "penalty")
        for f in factors:
            if _contains_data(f):
                raise NotSupported(f"the coefficient of term {t.index + 1} reads data", t.span)
    if loss is None:
        raise NotSupported("the goal has no multiclass loss term (softmax_ce, cs_hinge or ww_hinge under mean, sum "
                           "or perrow)", spec.goal_span)
    kinds = {k for k, _f in penalties}
    if "dropridge" in kinds and kinds & {"l1", "inputs_l2"}:
        t = next(t for t in checked.terms if isinstance(t.core, tt.Apply) and t.core.entry in ("l1", "inputs_l2"))
        raise NotSupported("the NumPy multiclass solver takes dropridge beside l2sq only (it solves the weighted "
                           "ridge by scaling the inputs, which would change l1 and inputs_l2)", t.span, "penalty")
    if loss[0] != "softmax_ce" and kinds & {"l1", "inputs_l2"}:
        t = next(t for t in checked.terms if isinstance(t.core, tt.Apply) and t.core.entry in ("l1", "inputs_l2"))
        raise NotSupported(f"the NumPy multiclass solver trains {loss[0]} with an l2sq penalty alone (its dual "
                           "method); this goal adds l1 or inputs_l2", t.span, "penalty")
    if not kinds & {"l2sq", "dropridge"} and (loss[0] != "softmax_ce" or not kinds):
        raise NotSupported(f"the NumPy multiclass solver needs a penalty of W for {loss[0]} (l2sq"
                           + (", l1 or inputs_l2" if loss[0] == "softmax_ce" else "") + ")", spec.goal_span,
                           "penalty")
    return {"weights": form[0], "intercept": form[1], "loss": loss, "penalties": penalties}


def _contains_data(e: tt.TExpr) -> bool:
    return isinstance(e, tt.DataRef) or any(_contains_data(c) for c in _children(e))


def _mc_factor_ast(e: tt.TExpr) -> ast.expr:
    """A constant coefficient factor as Python, tunables read from the dict `T` by their spec names
    (string constants: no spec text becomes code)."""
    if isinstance(e, tt.Const):
        return _const(float(e.value))
    if isinstance(e, tt.TunableRef):
        return ast.Subscript(_name("T"), ast.Constant(e.name), ast.Load())
    if isinstance(e, tt.Neg):
        return ast.UnaryOp(ast.USub(), _mc_factor_ast(e.operand))
    if isinstance(e, tt.Add):
        return _binop(_mc_factor_ast(e.left), ast.Add(), _mc_factor_ast(e.right))
    if isinstance(e, tt.Mul):
        return _binop(_mc_factor_ast(e.left), ast.Mult(), _mc_factor_ast(e.right))
    if isinstance(e, tt.Div):
        return _binop(_mc_factor_ast(e.left), ast.Div(), _mc_factor_ast(e.right))
    if isinstance(e, tt.Apply) and e.entry == catalog.INFIX["^"].name and not e.tuned:
        return _binop(_mc_factor_ast(e.args[0]), ast.Pow(), _const(float(e.options[0][1])))
    raise NotSupported(f"the coefficient '{render(e)}' is not a number, a tunable or a product of them", e.span)


def _mc_product(factors: list[tt.TExpr]) -> ast.expr:
    out: ast.expr = _const(1.0)
    for f in factors:
        out = _binop(out, ast.Mult(), _mc_factor_ast(f))
    return out


def _mc_penalty_coefficient(kind: str, factors: list[tt.TExpr]) -> ast.expr:
    if kind != "dropridge":
        return _mc_product(factors)
    # dropridge's last factor is its drop probability p: the coefficient of sum_j m2_j ||W_j||^2 is p / (2 (1 - p))
    ratio = ast.Call(_name("_k_dropout_factor"), [_mc_factor_ast(factors[-1])], [])
    return ratio if not factors[:-1] else _binop(_mc_product(factors[:-1]), ast.Mult(), ratio)


def _mc_coefficients_def(plan: dict[str, Any]) -> ast.FunctionDef:
    pens = ast.List([ast.Tuple([ast.Constant(kind), _mc_penalty_coefficient(kind, f)], ast.Load())
                     for kind, f in plan["penalties"]], ast.Load())
    body = [ast.Return(ast.Tuple([_mc_product(plan["loss"][2]), pens], ast.Load()))]
    return _function("_mc_coefficients", ["T"], "(the loss term's coefficient, [(penalty, coefficient)]) at the "
                     "tunable values T, as the spec's goal writes them", body)


def _mc_spec_table(checked: CheckedObjective, plan: dict[str, Any]) -> ast.expr:
    spec = checked.spec
    tb = spec.table
    inputs = tb.explicit_inputs()
    table = {
        "name": spec.source_name, "sha256": checked.spec_hash, "verdict": checked.verdict, "task": "multiclass",
        "loss": plan["loss"][0], "aggregate": plan["loss"][1], "classes": tuple(tb.classes), "K": len(tb.classes),
        "weights": plan["weights"], "intercept": plan["intercept"],
        "inputs": tuple(inputs) if inputs is not None else None, "target": tb.target,
        "standardize": bool(tb.standardize), "class_weights": tuple(tuple(p) for p in tb.class_label_weights),
        "maps": tuple(m.plain() for m in tb.maps),
        # the named columns the maps' inputs follow (the module computes the maps, not `feature` lines)
        "columns": tuple(i.text for i in tb.inputs if i.text not in {e.text for e in tb.excluded})
        if tb.maps and all(i.kind == "column" for i in tb.inputs) else None,
        "tunables": {t.name: float(t.default) for t in spec.tunables},
        "tunable_ranges": {t.name: (float(t.low), float(t.high)) for t in spec.tunables},
    }
    return _const(table)


def _mc_method(plan: dict[str, Any]) -> str:
    if plan["loss"][0] != "softmax_ce":
        return ("Newton's method on the multiclass hinge smoothed, then its exact face, with an l2sq penalty; "
                "certified by the duality gap")
    if {k for k, _f in plan["penalties"]} & {"l1", "inputs_l2"}:
        return "accelerated proximal gradient (FISTA with restarts) for l1 / inputs_l2; certified by the duality gap"
    return "L-BFGS on softmax cross-entropy with an l2sq penalty; certified by the duality gap"


def _mc_kernels() -> set[str]:
    tree = ast.parse((_HERE / _MULTICLASS_RUNTIME).read_text(encoding="utf-8"))
    names = {n.id for n in ast.walk(tree) if isinstance(n, ast.Name) and n.id.startswith("_k_")}
    return names | {"_k_mc_softmax_ce", "_k_mc_probabilities", "_k_dropout_factor", "_k_second_moments"}


def _map_copies() -> list[_Copied]:
    """The feature maps' math (typed_tree's names, tables' values), objc's own functions."""
    from objc import tables
    fns = (tt.map_exponents, tt.map_product_name, tt.map_knot_name, tt.map_knot_of, tables.map_category_text,
           tables.map_sorted_categories, tables.map_fourier_draws, tables.map_fit, tables.map_state_from_names,
           tables.map_outputs, tables.map_unseen_rows)
    return [_definition_copy(fn) for fn in fns]


def _scaling_copies(multiclass: bool = False) -> list[_Copied]:
    """`standardize`'s one rule (tables.standard_scales), and for a multiclass module the estimator's
    wording of a refusal (a binary module has the whole estimator file already)."""
    from objc import tables
    from objc.backends import numpy_estimator_src as estimator_src
    return [_definition_copy(tables.scale_problems), _definition_copy(tables.standard_scales)] + (
        [_definition_copy(estimator_src._scaling_refusal)] if multiclass else [])


def _mc_map_copies() -> list[_Copied]:
    """The maps' math and the estimator's way of applying them (the binary modules' own)."""
    from objc.backends import numpy_estimator_src as estimator_src
    return _map_copies() + [_definition_copy(fn) for fn in (estimator_src._map_unscaled, estimator_src._apply_maps)]


def _emit_multiclass(checked: CheckedObjective, runtime: Runtime = "inline") -> str:
    plan = _mc_plan(checked)
    method = _mc_method(plan)
    header = _header(checked).replace(f"method: {_METHOD_TEXT[plan_method(checked)]}", f"method: {method}")
    header = header.replace("Use: `from <this module> import Model` (fit / predict / decision_function), "
                            "`solve(X, y, ...)`,\nor as a script: `python <this file> TABLE.csv -o model.json`.",
                            "Use: `fit(X, labels)` (raw inputs, labels as the table writes them) returns a model;\n"
                            "`predict(model, X)`, `decision_function(model, X)`, `predict_proba(model, X)` "
                            "(softmax_ce);\n`solve(X, y, weights)` trains on prepared rows (classes 0 .. K-1).")
    if runtime == "import":
        header = header.replace(_STANDALONE_NEEDS, _LEAN_NEEDS)
    coefficients = _mc_coefficients_def(plan)
    spec_node = ast.Assign([ast.Name("SPEC", ast.Store())], _mc_spec_table(checked, plan))
    kernels, solver = _kernel_copies(_mc_kernels()), _file_copies(_MULTICLASS_RUNTIME)
    maps = (_mc_map_copies() if checked.spec.table.maps else []) + _scaling_copies(multiclass=True)
    out = _Assembly()
    out.nodes([ast.Expr(ast.Constant(header))] + ast.parse(
        "import math\nimport re\nimport sys\nimport numpy as np\n"
        "try:  # optional: SciPy's NNLS balances a hinge's dual point\n"
        "    import scipy.optimize as _scipy_optimize\n"
        "except ImportError:  # pragma: no cover\n"
        "    _scipy_optimize = None\n").body)
    out.nodes([ast.Assign([ast.Name("SPEC_TEXT", ast.Store())], ast.Constant(checked.spec.text)),
               ast.Assign([ast.Name("SPEC_SHA256", ast.Store())], ast.Constant(checked.spec_hash)),
               ast.Assign([ast.Name("VERDICT", ast.Store())], ast.Constant(checked.verdict)),
               ast.Assign([ast.Name("METHOD", ast.Store())], ast.Constant(method))],
              "# ---- the spec, verbatim (its sha256 and verdict follow)")
    if runtime == "inline":
        out.source(_copied_text(kernels, "catalog kernels"))
    else:
        used = _names_read([coefficients, spec_node] + ast.parse(_MC_TAIL).body)
        out.source(_import_text([kernels, solver, maps], used),
                   "# ---- objc's kernels, multiclass solver and maps, imported from the installed objc")
    out.nodes([coefficients], "# ---- generated from the spec's goal")
    out.nodes([spec_node], "# ---- the spec as a table the solver reads")
    if runtime == "inline":
        out.source(_copied_text(solver, "multiclass solver"))
        out.source(_copied_text(maps, "feature maps and standardization"))
    out.source(_MC_TAIL, "# ---- functions for use: fit, predict, decision_function, predict_proba, solve")
    return out.text()


# the tail's tunable rule is the binary modules' own (numpy_solvers_src.py), copied by source
_MC_TAIL = '\n\n'.join(inspect.getsource(fn) for fn in (_solvers_src.tunable_refusal,
                                                        _solvers_src.settled_tunables)) + '''
def _mc_tunables(tunables):
    declared = {name: (default, *SPEC["tunable_ranges"][name]) for name, default in SPEC["tunables"].items()}
    return settled_tunables(declared, tunables, ValueError)


def solve(X, y, weights=None, tunables=None, tol=1e-08, max_passes=None, theta0=None):
    """Train on prepared rows: X (rows x inputs, standardized as the spec says), y the class of each
    row (0 .. K-1, in the order of SPEC["classes"]), weights each row's row x class weight c_i.
    Returns the solver's dict (W, b, objective, gap, distance, mu, passes, status, method)."""
    X = np.asarray(X, dtype=np.float64)
    n = X.shape[0] if X.ndim == 2 else 0
    c = np.ones(n) if weights is None else np.asarray(weights, dtype=np.float64).reshape(-1)
    if c.shape != (n,) or not np.all(np.isfinite(c)) or np.any(c < 0):
        raise ValueError(f"weights must hold one finite value >= 0 per row of X ({n})")
    loss_coef, penalties = _mc_coefficients(_mc_tunables(tunables))
    # the per-row factor rho_i: the loss term's coefficient times c_i, over sum c (mean) or n (perrow)
    scale = {"mean": float(np.sum(c)), "perrow": float(n), "sum": 1.0}[SPEC["aggregate"]]
    if not scale > 0:
        raise ValueError("every row weight is zero")
    rho = loss_coef * c / scale
    penalties, s = _mc_dropout_as_ridge(X, c, penalties)
    if s is None:
        return solve_multiclass(X, y, SPEC["K"], rho, SPEC["loss"], penalties, SPEC["intercept"] is not None,
                                tol=tol, max_passes=max_passes, theta0=theta0)
    if theta0 is not None:
        W0, b0 = (theta0["W"], theta0.get("b")) if isinstance(theta0, dict) else theta0
        theta0 = {"W": np.asarray(W0, dtype=np.float64) * s[:, None], "b": b0}
    out = solve_multiclass(X / s, y, SPEC["K"], rho, SPEC["loss"], penalties, SPEC["intercept"] is not None,
                           tol=tol, max_passes=max_passes, theta0=theta0)
    # back from V = s W: the objective and its gap are the same numbers; a distance in V bounds one in
    # (W, b) after the largest 1 / s_j, a curvature in V one in (W, b) after the smallest s_j^2
    out = dict(out, W=np.asarray(out["W"]) / s[:, None])
    if out.get("distance") is not None:
        out["distance"] = float(out["distance"]) * max(1.0, float(np.max(1.0 / s)))
    if out.get("mu") is not None:
        out["mu"] = float(out["mu"]) * min(1.0, float(np.min(s * s)))
    return out


def _mc_dropout_as_ridge(X, c, penalties):
    """dropridge is the ridge sum_j d_j ||W_j||^2 with d_j its coefficient times m2_j, the second moment of
    input j on these rows (normalized like the loss). With l2sq it makes one weight e_j per input, which
    scaling input j by 1 / s_j, s_j = sqrt(e_j / mean e), turns into the plain ridge (mean e) ||V||_F^2
    in V_j = s_j W_j. Returns (the solver's penalties, s) or (penalties, None) without dropridge."""
    drops = [coef for kind, coef in penalties if kind == "dropridge"]
    if not drops:
        return penalties, None
    ridge = sum(coef for kind, coef in penalties if kind == "l2sq")
    e = ridge + sum(drops) * _k_second_moments(X, c, SPEC["aggregate"])
    if not np.all(e > 0):
        j = int(np.flatnonzero(~(e > 0))[0])
        raise ValueError(f"input {SPEC['inputs'][j] if SPEC['inputs'] else j + 1} is zero on every training row, so "
                         "dropridge gives its weights no penalty; leave it out of the inputs or add l2sq(W)")
    level = float(np.mean(e))
    return [("l2sq", level)], np.sqrt(e / level)


def _mc_same(cell, label):
    if isinstance(label, str):
        return isinstance(cell, str) and cell == label
    try:
        return not isinstance(cell, (str, bool)) and float(cell) == float(label)
    except (TypeError, ValueError):
        return False


def class_numbers(labels):
    """Each label's class 0 .. K-1 (text matches text, numbers numbers); ValueError naming the rows
    whose label is not among SPEC["classes"]."""
    out = np.full(len(labels), -1, dtype=np.int64)
    for i, cell in enumerate(labels):
        for k, label in enumerate(SPEC["classes"]):
            if _mc_same(cell, label):
                out[i] = k
                break
    bad = np.flatnonzero(out < 0)
    if len(bad):
        shown = ", ".join(str(int(r) + 1) for r in bad[:5]) + (f" and {len(bad) - 5} more" if len(bad) > 5 else "")
        raise ValueError(f"labels at rows {shown} (counting from 1) are not among the classes "
                         f"{', '.join(str(c) for c in SPEC['classes'])}: {labels[bad[0]]!r}")
    return out


def _mc_matrix(X, state=None):
    """(rows x inputs, the inputs' names, the feature maps' state). Without feature maps X is that
    matrix already (columns in the order of SPEC["inputs"]); with them X holds the table's columns by
    name (a pandas DataFrame or a dict of columns), and the spec's inputs come first, then each map's
    inputs as objc makes them (the maps fitted on these rows when `state` is None)."""
    if not SPEC["maps"]:
        X = np.asarray(X, dtype=np.float64)
        if X.ndim != 2:
            raise ValueError("X must be a 2-D array (rows x inputs)")
        return X, list(SPEC["inputs"] or ()), None
    if not hasattr(X, "keys"):
        raise ValueError("this spec has feature maps, which read columns by name: pass X as a pandas DataFrame "
                         "or a dict of columns")

    def column(name):
        if name not in X.keys():
            raise ValueError(f"X has no column {name!r}, which the spec reads")
        return X[name]

    def fail(message):
        raise ValueError(f"X: {message}")
    if SPEC["columns"] is None:
        raise ValueError("this spec names its inputs by a pattern or `all`; the module applies its feature maps "
                         "only to inputs named outright")
    chosen = list(SPEC["columns"])
    data = {c: np.asarray(column(c), dtype=np.float64) for c in chosen}
    state = _apply_maps({"maps": SPEC["maps"]}, lambda c: list(np.asarray(column(c), dtype=object)),
                        lambda c: data[c] if c in data else np.asarray(column(c), dtype=np.float64), data, chosen,
                        state, fail)
    return np.column_stack([data[c] for c in chosen]), chosen, state


def fit(X, labels, weights=None, tunables=None, tol=1e-08, max_passes=None):
    """Train on raw rows: X (rows x inputs, in the order of SPEC["inputs"]; by column name when the
    spec has feature maps, see `_mc_matrix`), labels as the table writes them. Applies the maps,
    standardizes as the spec says (mean and population standard deviation of these rows; a onehot
    indicator stays 0/1), applies the class weights, solves. Returns the model: W, b, means, scales,
    the inputs, the maps' state and the solver's report."""
    X, names, state = _mc_matrix(X)
    y = class_numbers(list(labels))
    means, scales = np.zeros(X.shape[1]), np.ones(X.shape[1])
    if SPEC["standardize"]:
        keep = np.array([n in _map_unscaled({"maps": SPEC["maps"]}, state) for n in names], dtype=bool) \
            if state is not None else np.zeros(X.shape[1], dtype=bool)
        means, scales, problems = standard_scales(X, keep)
        if problems:
            raise ValueError(_scaling_refusal(problems, names))
    c = np.ones(len(y)) if weights is None else np.asarray(weights, dtype=np.float64).reshape(-1)
    for label, w in SPEC["class_weights"]:
        c = np.where(y == class_numbers([label])[0], c * w, c)
    out = solve((X - means) / scales, y, c, tunables, tol, max_passes)
    return dict(out, means=means, scales=scales, classes=list(SPEC["classes"]), inputs=names, maps=state)


def decision_function(model, X):
    """The K scores of each row (rows x K), s = W^T x + b on the standardized inputs (the feature
    maps applied with the state `fit` found)."""
    X = (_mc_matrix(X, model.get("maps"))[0] - model["means"]) / model["scales"]
    return multiclass_scores(model["W"], model["b"], X)


def predict(model, X):
    """The class of the highest score of each row, as SPEC["classes"] writes it."""
    picked = np.argmax(decision_function(model, X), axis=1)
    return [SPEC["classes"][int(k)] for k in picked]


def predict_proba(model, X):
    """The class probabilities of a softmax_ce model: the softmax of each row's scores."""
    if SPEC["loss"] != "softmax_ce":
        raise ValueError(f"{SPEC['loss']} models no probabilities; only softmax_ce does")
    return softmax_probabilities(decision_function(model, X))
'''


# the relative gap a multiclass fit runs to when a parameter tolerance is asked for: the weights are read,
# not only the objective, and a gap of 1e-6 leaves them off in the fourth digit (measured on iris and wine,
# softmax_ce + l2sq: W within 1e-6 of scikit-learn's at 1e-14, 2.3e-6 off at 1e-12); about 1.7x the passes
_MC_PARAM_GAP = 1e-14


def _fit_multiclass(checked: CheckedObjective, X: Any, y: Any, weights: Any, input_names, tunables, tol: float,
                    max_passes: int | None, theta0: Any, param_tol: float | None = None) -> FitResult:
    from objc.fit_result import objective_terms
    ns = _compiled(checked)
    values = dict(ns["SPEC"]["tunables"], **(tunables or {}))
    # only L-BFGS (softmax_ce with l2sq alone) is asked for that gap; the hinges' Newton method and FISTA
    # for l1 / inputs_l2 stop at --tol
    lbfgs = ns["SPEC"]["loss"] == "softmax_ce" and not {k for k, _f in _mc_plan(checked)["penalties"]} & {"l1", "inputs_l2"}
    run_tol = tol if param_tol is None or not lbfgs else min(tol, _MC_PARAM_GAP)
    out = ns["solve"](X, y, weights, values, run_tol, max_passes, theta0)
    params = {ns["SPEC"]["weights"]: np.asarray(out["W"], dtype=np.float64)}
    if ns["SPEC"]["intercept"] is not None:
        params[ns["SPEC"]["intercept"]] = np.asarray(out["b"], dtype=np.float64)
    objective, term_values = objective_terms(checked, None, np.asarray(X, dtype=np.float64), np.asarray(y),
                                             np.ones(len(y)) if weights is None else np.asarray(weights),
                                             params, values)
    gap = float(out["gap"])
    if not math.isfinite(gap):
        raise NotSupported(f"the multiclass solver returned no finite duality gap (its status: {out['status']}), so "
                           "its answer is not certified", checked.spec.goal_span)
    status = out["status"]
    if status != "optimal":  # B's solver says why it stopped; a budget that ran out is refused by `fit`
        status = "max passes" if "budget" in status else status
    absolute = gap * max(1.0, abs(float(out["objective"])))
    distance = out["distance"]
    note = (f"||params - optimum|| <= sqrt(2 (P - D) / mu), mu = {out['mu']:.3g} (twice the least ridge weight of "
            "an input's weights, from l2sq and dropridge: the objective is mu-strongly convex in W)"
            if distance is not None else
            "none proved: the intercept is free (the losses do not change when one number is added to every "
            "class's score), so the objective is not strongly convex in it" if ns["SPEC"]["intercept"] is not None
            else "none proved: no l2sq penalty makes the objective strongly convex")
    cert = Certificate("duality gap", absolute, gap, run_tol, "Fenchel duality gap of the multiclass solver"
                       + ("" if status == out["status"] else f"; {out['status']}")
                       + ("" if run_tol == tol else f"; run to a relative gap of {run_tol:g} rather than --tol "
                          f"{tol:g} because --param-tol asks for the weights (an uncertified estimate where no "
                          "distance is proved)"),
                       distance=distance, curvature=out["mu"], distance_note=note)
    return FitResult(params=params, objective=objective, term_values=term_values, status=status,
                     backend="numpy", method=out["method"], certificate=cert, iterations=int(out["iterations"]),
                     passes=int(out["passes"]), extra={})
