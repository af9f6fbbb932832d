"""The cvxpy backend: a checked objective as a cvxpy problem, solved in memory or emitted as a module.

`build_problem` translates the typed tree generically: one vectorized variable per learned
parameter, the data as constants (no per-row constraints), every catalog atom through its entry's
`cvxpy` construction, tunables as cvxpy `Parameter`s. Constant factors that hold tunables in a form
DPP does not accept (1 / C, C * D, C ^ 2) become one derived parameter each, whose value is
recomputed from the tunables, so a sweep re-solves without re-canonicalizing. A tunable that sets
an exponent (`pos(1 - m) ^ q`) or a catalog setting (`huber(r, d)`) enters as its number: cvxpy
takes a Parameter there either not at all or not as DPP (power(x, p) needs a number p), so such a
problem is built again whenever that tunable changes (`solve_build` does it for a sweep).

`fit` solves it and returns a `FitResult` (`solve_build` and `set_tunables` re-solve one build for
a sweep); HiGHS is driven only when `bounds_propagation_sound` says cvxpy hands it sound variable
bounds. `emit_module` writes the same problem as a standalone
Python module (numpy and cvxpy only), generated as a syntax tree: every catalog construction is
replayed on a recorder standing in for `cp` (or, where it branches on its arguments, copied from
the catalog's source), data-only subexpressions use the catalog's NumPy kernels (copied by source),
and names from the spec or the table become identifiers only after validation, otherwise they stay
string constants.

Problems are reported as `SpecError` with one of these codes:

| code | problem |
| --- | --- |
| C400 | the objective was not accepted by the checker (not provably convex, or has errors) |
| C401 | a tunable value is unknown to the spec, not a number, or outside its declared range |
| C402 | the arrays do not fit together (shapes, non-finite values) or the row weights are unusable |
| C403 | an input the spec names is not among the data's inputs |
| C404 | an expression has no cvxpy form, or cvxpy does not accept the problem as convex |
| C410 | the solver asked for is unknown to objc or not installed |
| C411 | the solver cannot handle this problem class (e.g. OSQP on an exponential-cone problem) |
| C412 | the solver's interface is known to mis-solve problems of this form with this cvxpy |
| C420 | the solver reports the constraints infeasible |
| C421 | the solver reports the goal unbounded below |
| C422 | the solver stopped without reaching its tolerances (inaccurate) |
| C423 | the solver failed (solver error) or stopped at an iteration or time limit |
| C430 | emit: a tunable's name collides with an argument of the emitted functions |
| C431 | emit: the spec selects inputs by name, but the input order is unknown |
"""

from __future__ import annotations

import ast
import builtins
import functools
import inspect
import keyword
import textwrap
import time
from dataclasses import dataclass, field, fields
from types import MappingProxyType
from typing import Any, Callable, Mapping, Sequence

import numpy as np

from objc import catalog as catalog_module
from objc import typed_tree as tt
from objc.backends import numpy_solvers_src as solvers_src
from objc.catalog import CATALOG, Entry, _k_second_moments
from objc.checker import CheckedObjective, EvalEnv, analyse, evaluate, render
from objc.diagnostics import Diagnostic, SpecError
from objc.fit_result import Certificate, FitResult, objective_terms
from objc.score_form import score_form
from objc.source_text import NO_SPAN, Span

# Tolerances tried in order: tight first (the backend is the exact reference the others are compared
# with), then the solver's usual ones when the tight ones stall. Measured: CLARABEL at 1e-10 ended
# 'inaccurate' on one of eight weighted logistic problems on iris where 1e-9 and its defaults (1e-8)
# succeeded; the objective then moved by < 1e-12.
SOLVER_OPTIONS: Mapping[str, tuple[Mapping[str, Any], ...]] = MappingProxyType({
    # 1e-12 with tighter iterative refinement first: at 1e-10 CLARABEL reported 'optimal' on an
    # exponential + L2 fit on iris whose intercept was still 3e-6 from the optimum (measured against
    # a Newton solve to a gradient norm of 1e-16), and ended 'inaccurate' on logistic + L2
    "CLARABEL": (MappingProxyType({"tol_gap_abs": 1e-12, "tol_gap_rel": 1e-12, "tol_feas": 1e-12,
                                   "iterative_refinement_reltol": 1e-14, "iterative_refinement_abstol": 1e-14,
                                   "max_iter": 400}),
                 MappingProxyType({"tol_gap_abs": 1e-10, "tol_gap_rel": 1e-10, "tol_feas": 1e-10,
                                   "max_iter": 400}),
                 MappingProxyType({"tol_gap_abs": 1e-8, "tol_gap_rel": 1e-8, "tol_feas": 1e-8, "max_iter": 400})),
    "SCS": (MappingProxyType({"eps_abs": 1e-9, "eps_rel": 1e-9, "max_iters": 200000}),
            MappingProxyType({"eps_abs": 1e-6, "eps_rel": 1e-6, "max_iters": 200000})),
    "OSQP": (MappingProxyType({"eps_abs": 1e-10, "eps_rel": 1e-10, "max_iter": 100000, "polishing": True}),
             MappingProxyType({"eps_abs": 1e-7, "eps_rel": 1e-7, "max_iter": 100000, "polishing": True})),
    "HIGHS": (MappingProxyType({}),),
})
# the option holding each solver's relative gap (or residual) tolerance, for the certificate
_GAP_TOLERANCE = {"CLARABEL": "tol_gap_rel", "SCS": "eps_rel", "OSQP": "eps_rel"}
ALLOWED_SOLVERS: tuple[str, ...] = tuple(SOLVER_OPTIONS)


@dataclass(frozen=True, eq=False)
class CvxpyBuild:
    """A checked objective as a cvxpy problem, with handles on its pieces."""

    problem: Any  # cvxpy.Problem
    variables: Mapping[str, Any]  # cvxpy Variable by learned parameter name (vectors follow input order)
    parameters: Mapping[str, Any]  # cvxpy Parameter by tunable name
    score: Any  # the score expression (one value per row), None when the spec has no score
    terms: tuple[Any, ...]  # one expression (or number) per checked.terms, coefficient included
    checked: CheckedObjective
    input_names: tuple[str, ...]
    X: np.ndarray
    y: np.ndarray
    weights: np.ndarray
    derived: tuple[tuple[Any, tt.TExpr], ...] = ()  # parameters computed from the tunables
    # tunables built in as numbers (exponents and catalog settings), with the values built in
    built_in: Mapping[str, float] = field(default_factory=lambda: MappingProxyType({}))


# ---------------------------------------------------------------- shared with emitted modules
# The functions below are copied by source into every emitted module, so they use nothing but
# numpy (`np`), their arguments, builtins and each other.

def _prepare_arrays(X, y, weights, input_names):
    """The arrays as float64 with their shapes checked; raises ValueError with a plain message."""
    X = np.asarray(X, dtype=float)
    y = np.asarray(y, dtype=float).reshape(-1)
    if X.ndim != 2:
        raise ValueError("X must be a 2-D array (rows x inputs); it has %d dimension(s)" % X.ndim)
    n_rows, n_inputs = X.shape
    if input_names is not None and n_inputs != len(input_names):
        raise ValueError("X has %d column(s) but the model has %d input(s)" % (n_inputs, len(input_names)))
    if y.shape[0] != n_rows:
        raise ValueError("y has %d value(s) but X has %d row(s)" % (y.shape[0], n_rows))
    if weights is None:
        weights = np.ones(n_rows)
    weights = np.asarray(weights, dtype=float).reshape(-1)
    if weights.shape[0] != n_rows:
        raise ValueError("weights has %d value(s) but X has %d row(s)" % (weights.shape[0], n_rows))
    if not np.all(np.isfinite(X)):
        raise ValueError("X holds NaN or infinite values")
    if not np.all(np.isfinite(y)):
        raise ValueError("y holds NaN or infinite values")
    if not np.all(np.isfinite(weights)) or np.any(weights < 0):
        raise ValueError("row weights must be finite and >= 0")
    weight_total = float(np.sum(weights))
    if weight_total <= 0:
        raise ValueError("every row weight is zero")
    return X, y, weights, weight_total


def _choose_solver(problem, installed):
    """The solver for a problem: CLARABEL (interior point; handles every cone objc produces:
    LP, QP, second-order, exponential and power cones) where installed. HiGHS is not the default:
    through cvxpy 1.9 it received wrongly propagated variable bounds on hinge problems (an
    'optimal' w = 0) and reported an elementwise-maximum pinball infeasible."""
    if "CLARABEL" in installed:
        return "CLARABEL"
    if problem.is_qp() and "OSQP" in installed:
        return "OSQP"
    if "SCS" in installed:
        return "SCS"
    return None


def _solve_ladder(problem, name, ladder, verbose=False, warm_start=False):
    """Solve with each option set in turn until one ends in anything but 'inaccurate' (or an error);
    returns the options of the last attempt."""
    import warnings
    for k, options in enumerate(ladder):
        last = k == len(ladder) - 1
        try:
            with warnings.catch_warnings():
                # an inaccurate end is handled here (the next rung, or objc's own C422 error), so
                # cvxpy's printed advice would only mislead
                warnings.filterwarnings("ignore", message="Solution may be inaccurate")
                # an axis reduction (the multiclass losses' log_sum_exp and max over a row) has no
                # C++ canonicalization; cvxpy falls back to its SciPy one, which gives the same problem
                warnings.filterwarnings("ignore", message="The problem includes expressions that don't support CPP")
                problem.solve(solver=name, verbose=verbose, warm_start=warm_start, **dict(options))
        except Exception:
            if last:
                raise
            continue
        if last or not problem.status.endswith("inaccurate"):
            return dict(options)
    return dict(ladder[-1])


def _solve_built(cp, built, solver, ladders):
    """Solve a built problem; parameter values, objective, status and term values as plain data."""
    problem = built["problem"]
    name = solver.upper() if solver is not None else _choose_solver(problem, cp.installed_solvers())
    if name is None:
        raise ValueError("no suitable solver installed: install clarabel (pip install clarabel)")
    options = _solve_ladder(problem, name, ladders.get(name, ({},)))

    def plain(value):
        if value is None:
            return None
        value = np.asarray(value, dtype=float)
        return value.copy() if value.ndim else float(value)

    return {"params": {key: plain(var.value) for key, var in built["variables"].items()},
            "objective": None if problem.value is None else float(problem.value),
            "status": problem.status, "solver": name, "solver_options": options,
            "terms": [plain(t.value) if hasattr(t, "value") else float(t) for t in built["terms"]]}


# ---------------------------------------------------------------- errors

def _error(code: str, message: str, span: Span = NO_SPAN, hint: str = "", checked: CheckedObjective | None = None,
           notes: tuple[str, ...] = ()) -> SpecError:
    name = checked.source.name if checked is not None else ""
    return SpecError((Diagnostic(code, message, span, "error", hint, notes, name),),
                     checked.source if checked is not None else None)


def _table_span(checked: CheckedObjective) -> Span:
    return checked.spec.table.span if checked.spec.table is not None else NO_SPAN


def _require_accepted(checked: CheckedObjective) -> None:
    if checked.errors:
        raise SpecError(checked.errors, checked.source)
    if not checked.accepted:
        raise _error("C400", f"the goal is {checked.verdict}, so it cannot be handed to a convex solver",
                     checked.spec.goal_span, "rewrite the goal until `objc check` calls it convex", checked)


# ---------------------------------------------------------------- tree helpers

def _has_tunable(e: tt.TExpr) -> bool:
    return isinstance(e, tt.TunableRef) or any(_has_tunable(c) for c in tt.children(e))


def _has_difference(e: tt.TExpr) -> bool:
    return isinstance(e, tt.Neg) or (isinstance(e, tt.Const) and e.value < 0) or any(
        _has_difference(c) for c in tt.children(e))


def _param_affine(e: tt.TExpr) -> bool:
    """Whether a constant expression stays affine in the tunables (what DPP accepts as is)."""
    if not _has_tunable(e):
        return True
    if isinstance(e, tt.TunableRef):
        return True
    if isinstance(e, tt.Add):
        return _param_affine(e.left) and _param_affine(e.right)
    if isinstance(e, tt.Neg):
        return _param_affine(e.operand)
    if isinstance(e, tt.Mul):
        return (_param_affine(e.left) and _param_affine(e.right)
                and not (_has_tunable(e.left) and _has_tunable(e.right)))
    if isinstance(e, tt.Div):
        return _param_affine(e.left) and not _has_tunable(e.right)
    return False


def _factors(e: tt.TExpr, inverted: bool = False) -> list[tuple[tt.TExpr, bool]]:
    """A product flattened into its factors, each marked when it divides."""
    if isinstance(e, tt.Mul):
        return _factors(e.left, inverted) + _factors(e.right, inverted)
    if isinstance(e, tt.Div):
        return _factors(e.left, inverted) + _factors(e.right, not inverted)
    return [(e, inverted)]


def _needs_input_order(e: tt.TExpr) -> bool:
    if isinstance(e, tt.DataRef) and (e.kind in ("column", "feature") or (e.kind == "inputs" and e.shape.names)):
        return True
    if isinstance(e, tt.ParamRef) and e.entries is not None:
        return True
    return any(_needs_input_order(c) for c in tt.children(e))


def _all_exprs(checked: CheckedObjective) -> list[tt.TExpr]:
    spec = checked.spec
    out = [t.expr for t in checked.terms]
    if spec.score is not None:
        out.append(spec.score.expr)
    for c in spec.constraints:
        out.extend((c.left, c.right))
    return out


# ---------------------------------------------------------------- the translation (one for both uses)

class _Translator:
    """Typed tree to cvxpy expressions. The host supplies the leaves (data, variables, parameters)
    and what the catalog entries turn into; the real host returns cvxpy objects, the emitting host
    returns recorded syntax. Local to one build; holds no state of its own beyond the host."""

    def __init__(self, host: Any):
        self.host = host

    def expr(self, e: tt.TExpr) -> Any:
        h = self.host
        if e.depends == "const":
            return self.const(e)
        if e.depends == "data" and not _has_tunable(e):
            return h.numeric(e)
        if isinstance(e, tt.DataRef):
            return h.numeric(e)
        if isinstance(e, tt.ParamRef):
            v = h.variable(e.name)
            if not e.vector or e.entries is None:
                return v
            idx = [h.index(n) for n in e.entries]
            return v[idx] if e.shape.kind == "vector" else v[idx[0]]
        if isinstance(e, tt.ScoreRef):
            return h.score()
        if isinstance(e, tt.Apply):
            entry, options = CATALOG[e.entry], h.options(e)
            if entry.reads_second_moments:
                options = dict(options, m2=self.second_moments(e))
            return h.cvx(entry, [self.expr(a) for a in e.args], options, e)
        if isinstance(e, tt.CustomLoss):
            return self.expr(e.body)
        if isinstance(e, tt.Add):
            return self.expr(e.left) + self.expr(e.right)
        if isinstance(e, tt.Neg):
            return -self.expr(e.operand)
        if isinstance(e, (tt.Mul, tt.Div)):
            return self.product(e)
        if isinstance(e, tt.Dot):
            return self.dot(e)
        if isinstance(e, tt.Aggregate):
            v = self.expr(e.operand)
            if e.over == "rows":
                total = h.weights @ v
                if e.kind == "perrow":
                    return total / h.n_rows
                return total / h.weight_total if e.kind == "mean" else total
            s = h.cp.sum(v)
            if e.kind == "sum":
                return s
            names = e.operand.shape.names
            return s / (len(names) if names is not None else h.n_inputs)
        raise AssertionError(f"no cvxpy translation for {type(e).__name__}")

    def second_moments(self, e: tt.Apply) -> Any:
        """The second moments of the inputs `e`'s parameter weighs, from the catalog's kernel (a value
        for the real host, a recorded call for the emitting one)."""
        ref = e.args[0]
        names = ref.entries if isinstance(ref, tt.ParamRef) else None
        return self.host.second_moments(self.host.matrix(names), e.rows or "mean")

    def const(self, e: tt.TExpr) -> Any:
        """A constant: folded to a number without tunables, kept affine in the parameters where DPP
        allows, otherwise one derived parameter."""
        if not _has_tunable(e):
            with np.errstate(all="ignore"):
                return float(evaluate(e, EvalEnv([], {}, {}, np.ones(1))))
        if not _param_affine(e) or (_has_difference(e) and _expr_sign_flags(e)):
            # (a difference such as 1 - a: its sign comes from the declared ranges, which cvxpy cannot see)
            return self.host.derived(e)
        if isinstance(e, tt.TunableRef):
            return self.host.tunable(e)
        if isinstance(e, (tt.Add, tt.Neg, tt.Mul, tt.Div)):
            return tt.arithmetic(e, self.const)
        raise AssertionError(f"no constant translation for {type(e).__name__}")

    def product(self, e: tt.TExpr) -> Any:
        """Constant factors gathered into one coefficient (so tunables meet DPP), the rest multiplied
        elementwise in order."""
        parts = _factors(e)
        consts = [(f if not inv else tt.Div(tt.Const(1.0, f.span), f, f.span)) for f, inv in parts
                  if f.depends == "const"]
        rest = [(f, inv) for f, inv in parts if f.depends != "const"]
        coef = None
        for c in consts:
            coef = c if coef is None else tt.Mul(coef, c, c.span)
        out, out_vector = None, False
        for f, inv in rest:
            v = self.expr(f)
            vector = f.shape.kind != "scalar"
            if out is None:
                out = 1.0 / v if inv else v
            elif inv:
                out = out / v
            elif vector and out_vector:
                out = self.host.cp.multiply(out, v)
            else:
                out = out * v
            out_vector = out_vector or vector
        if coef is None:
            return out
        c = self.const(coef)
        if isinstance(c, float) and c == 1.0:
            return out
        return c * out

    def dot(self, e: tt.Dot) -> Any:
        h = self.host
        for mat, vec in ((e.right, e.left), (e.left, e.right)):
            if mat.shape.kind == "matrix" and isinstance(mat, tt.DataRef):
                return h.matrix(mat.shape.names) @ self.expr(vec)
        return self.expr(e.left) @ self.expr(e.right)


def _numeric_env(input_names: Sequence[str], X: np.ndarray, y: np.ndarray, weights: np.ndarray,
                 tunables: Mapping[str, float]) -> EvalEnv:
    return EvalEnv(list(input_names), {}, {n: X[:, i] for i, n in enumerate(input_names)}, y, None,
                dict(tunables), weights)


class _RealHost:
    """Leaves as cvxpy objects and NumPy arrays (one build)."""

    def __init__(self, cp: Any, checked: CheckedObjective, X: np.ndarray, y: np.ndarray, weights: np.ndarray,
                 weight_total: float, input_names: tuple[str, ...], values: Mapping[str, float]):
        self.cp, self.checked = cp, checked
        self.X, self.y, self.weights, self.weight_total = X, y, weights, weight_total
        self.input_names, self.values = input_names, values
        self.n_inputs = len(input_names)
        self.n_rows = X.shape[0]
        self._index = {n: i for i, n in enumerate(input_names)}
        k = len(checked.spec.table.classes) if checked.spec.table is not None else 0
        # by classes: W is inputs x K, b has K entries (one column / entry per class, in the listed order)
        self.variables = {p.name: (cp.Variable((len(input_names), k) if p.vector else k, name=p.name) if p.by_classes
                                   else cp.Variable(len(input_names), name=p.name) if p.vector
                                   else cp.Variable(name=p.name)) for p in checked.spec.parameters}
        self.parameters: dict[str, Any] = {}
        for t in checked.spec.tunables:
            sign = _sign_flags(t.low, t.high)
            self.parameters[t.name] = cp.Parameter(name=t.name, value=values[t.name], **sign)
        self.derived_params: list[tuple[Any, tt.TExpr]] = []
        self._score = None
        self._env = _numeric_env(input_names, X, y, weights, values)

    def index(self, name: str) -> int:
        if name not in self._index:
            raise _error("C403", f"the spec names input {name!r}, which is not among the data's inputs",
                         _table_span(self.checked), "inputs: " + ", ".join(repr(n) for n in self.input_names),
                         self.checked)
        return self._index[name]

    def variable(self, name: str) -> Any:
        return self.variables[name]

    def tunable(self, e: tt.TunableRef) -> Any:
        return self.parameters[e.name]

    def options(self, e: tt.Apply) -> dict[str, float]:
        return e.option_values(self.values)

    def derived(self, e: tt.TExpr) -> Any:
        p = self.cp.Parameter(value=_derived_value(e, self._env, self.checked), **_expr_sign_flags(e))
        self.derived_params.append((p, e))
        return p

    def numeric(self, e: tt.TExpr) -> Any:
        if isinstance(e, tt.DataRef) and e.kind in ("column", "feature"):
            return self.X[:, self.index(e.name)]
        with np.errstate(all="ignore"):
            value = evaluate(e, self._env)
        if not np.all(np.isfinite(value)):
            raise _error("C402", f"'{render(e)}' is NaN or infinite on some rows of this data", e.span,
                         "keep data transformations inside their domain (log of a positive column, ...)",
                         self.checked)
        return value

    def matrix(self, names: tuple[str, ...] | None) -> Any:
        return self.X if names is None else self.X[:, [self.index(n) for n in names]]

    def score(self) -> Any:
        return self._score

    def second_moments(self, X: Any, rows: str) -> Any:
        return _k_second_moments(X, self.weights, rows)

    def cvx(self, entry: Entry, args: list, options: dict, node: tt.TExpr) -> Any:
        out = entry.cvxpy(self.cp, *args, **options)
        if out is None:
            raise _error("C404", f"{entry.name} has no convex form a solver can take", node.span,
                         "use it only on data (in a `feature`) or for evaluation", self.checked)
        return out


def _derived_value(e: tt.TExpr, env: EvalEnv, checked: CheckedObjective) -> float:
    with np.errstate(all="ignore"):
        value = float(evaluate(e, env))
    if not np.isfinite(value):
        raise _error("C401", f"'{render(e)}' is not finite at these tunable values", e.span,
                     "keep the tunables away from the values that divide by zero", checked)
    return value


def _sign_flags(low: float, high: float) -> dict[str, bool]:
    if low >= 0:
        return {"nonneg": True}
    if high <= 0:
        return {"nonpos": True}
    return {}


def _expr_sign_flags(e: tt.TExpr) -> dict[str, bool]:
    s = analyse(e).sign
    if s.is_nonneg:
        return {"nonneg": True}
    if s.is_nonpos:
        return {"nonpos": True}
    return {}


# ---------------------------------------------------------------- in-memory build

def build_problem(checked: CheckedObjective, X: np.ndarray, y: np.ndarray, weights: np.ndarray | None,
                  input_names: Sequence[str], tunables: Mapping[str, float] | None = None) -> CvxpyBuild:
    """The checked objective as a DPP-compliant cvxpy problem on these arrays."""
    import cvxpy as cp

    _require_accepted(checked)
    input_names = tuple(str(n) for n in input_names)
    try:
        X, y, weights, weight_total = _prepare_arrays(X, y, weights, input_names)
    except ValueError as err:
        raise _error("C402", str(err), _table_span(checked), "pass X (rows x inputs), y and weights of one "
                     "length, finite, with weights >= 0 and not all zero", checked) from None
    values = _checked_tunables(checked, tunables)

    host = _RealHost(cp, checked, X, y, weights, weight_total, input_names, values)
    tr = _Translator(host)
    spec = checked.spec
    if spec.score is not None:
        host._score = tr.expr(spec.score.expr)
    terms = tuple(tr.expr(t.expr) for t in checked.terms)
    constraints = [_compare(tr.expr(c.left), c.op, tr.expr(c.right)) for c in spec.constraints]
    objective = functools.reduce(lambda a, b: a + b, terms)
    problem = cp.Problem(cp.Minimize(objective), constraints)
    built_in = {name: values[name] for name in _built_in_tunables(checked)}
    return CvxpyBuild(problem, MappingProxyType(dict(host.variables)), MappingProxyType(dict(host.parameters)),
                      host._score, terms, checked, input_names, X, y, weights, tuple(host.derived_params),
                      MappingProxyType(built_in))


def _built_in_tunables(checked: CheckedObjective) -> set[str]:
    """The tunables that set an exponent or a catalog setting somewhere (built in as numbers)."""
    names: set[str] = set()

    def walk(e: tt.TExpr) -> None:
        if isinstance(e, tt.Apply):
            names.update(ref.name for _, ref in e.tuned)
        for c in tt.children(e):
            walk(c)
    for e in _all_exprs(checked):
        walk(e)
    return names


def _compare(left: Any, op: str, right: Any) -> Any:
    if op == "<=":
        return left <= right
    if op == ">=":
        return left >= right
    return left == right


def _checked_tunables(checked: CheckedObjective, given: Mapping[str, float] | None) -> dict[str, float]:
    """The tunables' values, a refused one (`tunable_refusal`: the words of every other stage) as C401 at
    its `tune` line."""
    declared = {t.name: (t.default, t.low, t.high) for t in checked.spec.tunables}
    for name, value in (given or {}).items():
        refusal = solvers_src.tunable_refusal(name, value, declared)
        if refusal is not None:
            span = next((t.span for t in checked.spec.tunables if t.name == name), NO_SPAN)
            raise _error("C401", refusal[0], span, refusal[1], checked)
    return solvers_src.settled_tunables(declared, given, ValueError)


def set_tunables(built: CvxpyBuild, tunables: Mapping[str, float]) -> None:
    """New tunable values for an existing build (derived parameters follow); the problem is reused,
    so a DPP problem is not canonicalized again. A tunable built in as a number (an exponent or a
    catalog setting) cannot change here: build the problem again (`solve_build` does)."""
    values = _checked_tunables(built.checked, {**{n: p.value for n, p in built.parameters.items()}, **tunables})
    moved = [n for n, v in built.built_in.items() if values[n] != v]
    if moved:
        t = next(t for t in built.checked.spec.tunables if t.name == moved[0])
        raise _error("C401", f"tunable '{t.name}' sets an exponent or a catalog setting, which is built into the "
                     "problem as a number", t.span, "build the problem again for a new value (solve_build does)",
                     built.checked)
    for name, p in built.parameters.items():
        p.value = values[name]
    env = _numeric_env(built.input_names, built.X, built.y, built.weights, values)
    for p, e in built.derived:
        p.value = _derived_value(e, env, built.checked)


# ---------------------------------------------------------------- solving

def fit(checked: CheckedObjective, X: np.ndarray, y: np.ndarray, weights: np.ndarray | None,
        input_names: Sequence[str], tunables: Mapping[str, float] | None = None, solver: str | None = None,
        verbose: bool = False, warm_start: bool = False) -> FitResult:
    """Build the problem and solve it; every solver status other than optimal is a SpecError."""
    built = build_problem(checked, X, y, weights, input_names, tunables)
    return solve_build(built, solver=solver, verbose=verbose, warm_start=warm_start)


def bounds_propagation_sound(cp: Any) -> bool:
    """Whether this cvxpy's bound propagation (used only by solvers that take variable bounds, such
    as HiGHS) gives an unbounded hinge slack an unbounded range. cvxpy 1.9.3 computes NaN for
    X @ w, multiply(y, .) turns the NaN into 0, and pos(1 - m) gets the bounds [1, 1]: HiGHS then
    returns w = 0 as 'optimal'."""
    X = np.array([[1.0, -1.0], [-2.0, 0.5]])
    w = cp.Variable(2)
    with np.errstate(all="ignore"):
        import warnings
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            lb, ub = cp.pos(1 - cp.multiply(np.array([1.0, -1.0]), X @ w)).get_bounds()
    return bool(np.all(np.asarray(ub) == np.inf))


def solve_build(built: CvxpyBuild, tunables: Mapping[str, float] | None = None, solver: str | None = None,
                verbose: bool = False, warm_start: bool = False) -> FitResult:
    """Solve a build (after setting new tunable values, if given) and certify by the solver's status."""
    import cvxpy as cp

    checked = built.checked
    if tunables:
        values = _checked_tunables(checked, {**{n: p.value for n, p in built.parameters.items()}, **tunables})
        if any(values[n] != v for n, v in built.built_in.items()):
            # an exponent or a setting moved: a new problem with the new number in it
            built = build_problem(checked, built.X, built.y, built.weights, built.input_names, values)
        else:
            set_tunables(built, tunables)
    problem = built.problem
    installed = cp.installed_solvers()
    name = solver.upper() if solver else _choose_solver(problem, installed)
    if name is None or name not in ALLOWED_SOLVERS or name not in installed:
        usable = [s for s in ALLOWED_SOLVERS if s in installed]
        what = "no suitable solver is installed" if name is None else (
            f"solver {solver!r} is not one objc drives" if name not in ALLOWED_SOLVERS
            else f"solver {name} is not installed")
        raise _error("C410", what, NO_SPAN, "use one of: " + ", ".join(usable) if usable else
                     "install clarabel (pip install clarabel)", checked)
    if name == "OSQP" and not problem.is_qp():
        raise _error("C411", "OSQP solves quadratic programs only; this goal needs other cones (exponential, "
                     "second-order or power)", checked.spec.goal_span, "use CLARABEL or SCS", checked)
    kinked = [t for t in checked.terms if t.kind != "params" and not t.smooth]
    if name == "OSQP" and kinked:
        # measured: pinball + L2 on the diabetes data, 400000 OSQP iterations (33 s) and still 3.5e-6 off
        raise _error("C411", "OSQP (a first-order method) stalls when many rows sit at a kink of a nonsmooth "
                     "per-row loss (hinge, absolute, pinball, ...) and does not reach objc's tolerances",
                     kinked[0].span, "use CLARABEL (the default) or SCS; OSQP suits smooth per-row losses", checked)
    if name == "HIGHS":
        if not (problem.is_lp() or problem.is_qp()):
            raise _error("C411", "HiGHS solves linear and quadratic programs only; this goal needs other cones",
                         checked.spec.goal_span, "use CLARABEL or SCS", checked)
        if not bounds_propagation_sound(cp):
            raise _error("C412", f"cvxpy {cp.__version__} hands HiGHS wrongly propagated variable bounds "
                         "(a hinge slack fixed at 1), so HiGHS can return a wrong 'optimal' answer here",
                         NO_SPAN, "use CLARABEL (the default) or SCS", checked)
    started = time.perf_counter()
    try:
        options = _solve_ladder(problem, name, SOLVER_OPTIONS[name], verbose, warm_start)
    except cp.error.DCPError as err:
        raise _error("C404", f"cvxpy does not accept the problem as convex: {err}", checked.spec.goal_span,
                     "report this: objc's checker and cvxpy disagree", checked) from None
    except cp.error.SolverError as err:
        raise _error("C423", f"the solver {name} failed: {err}", checked.spec.goal_span,
                     _RETRY_HINT, checked) from None
    seconds = time.perf_counter() - started
    _raise_for_status(problem.status, name, checked)

    by_classes = {p.name for p in checked.spec.parameters if p.by_classes}
    params = {n: (np.array(v.value, dtype=float) if n in by_classes else
                  np.array(v.value, dtype=float).reshape(-1) if n in _vector_names(checked) else float(v.value))
              for n, v in built.variables.items()}
    values = {n: float(p.value) for n, p in built.parameters.items()}
    objective, term_values = _term_values(built, params, values)
    stats = problem.solver_stats
    return FitResult(params=params, objective=objective, term_values=term_values, status="optimal",
                     backend="cvxpy", method=name,
                     certificate=_certificate(name, problem, options, options != dict(SOLVER_OPTIONS[name][0])),
                     iterations=int(stats.num_iters or 0), passes=0, seconds=seconds,
                     extra={"solver_objective": float(problem.value), "dpp": problem.is_dpp(),
                            "tunables": values})


_RETRY_HINT = ("standardize the inputs (`standardize` in the table block), rescale very large tunables, or try "
               "another solver (CLARABEL, SCS)")


def _vector_names(checked: CheckedObjective) -> set[str]:
    return {p.name for p in checked.spec.parameters if p.vector}


def _raise_for_status(status: str, name: str, checked: CheckedObjective) -> None:
    spec = checked.spec
    keep = spec.constraints[0].span if spec.constraints else spec.goal_span
    if status == "optimal":
        return
    if status in ("infeasible", "infeasible_inaccurate"):
        raise _error("C420", f"{name} reports the constraints infeasible: no parameters satisfy every `keep` "
                     "statement at once" + (" (inaccurate)" if status.endswith("inaccurate") else ""), keep,
                     "loosen or remove a `keep` statement (a bound such as l1(w) <= r needs r >= 0)", checked)
    if status in ("unbounded", "unbounded_inaccurate"):
        raise _error("C421", f"{name} reports the goal unbounded below: it decreases without limit"
                     + (" (inaccurate)" if status.endswith("inaccurate") else ""), spec.goal_span,
                     "add a regularizer (e.g. + 0.5 * l2sq(w)) or a constraint; an affine goal needs bounds",
                     checked)
    if status == "infeasible_or_unbounded":
        raise _error("C421", f"{name} reports the problem infeasible or unbounded", spec.goal_span,
                     "check the `keep` statements, and that the goal is bounded below (add a regularizer)", checked)
    if status == "optimal_inaccurate":
        raise _error("C422", f"{name} stopped near an optimum without reaching its tolerances (inaccurate)",
                     spec.goal_span, _RETRY_HINT, checked)
    if status == "user_limit":
        raise _error("C423", f"{name} stopped at an iteration or time limit before an optimum", spec.goal_span,
                     _RETRY_HINT, checked)
    raise _error("C423", f"the solver {name} failed (status {status!r})", spec.goal_span, _RETRY_HINT, checked)


def _term_values(built: CvxpyBuild, params: dict, values: dict) -> tuple[float, tuple[float, ...]]:
    """Each term at the solution, evaluated from the typed tree (the cvxpy values where the score has
    a form the reference evaluation does not decompose)."""
    checked = built.checked
    if any(p.by_classes for p in checked.spec.parameters):
        return objective_terms(checked, None, built.X, built.y, built.weights, params, values)
    try:
        form = score_form(checked, built.input_names)
    except ValueError:
        form = None
    if form is not None:
        return objective_terms(checked, form, built.X, built.y, built.weights, params, values)
    vals = tuple(float(t.value) if hasattr(t, "value") else float(t) for t in built.terms)
    return float(sum(vals)), vals


def _certificate(name: str, problem: Any, options: Mapping[str, Any], relaxed: bool) -> Certificate:
    """The solver's own status, with its tolerances and whatever residuals it reports."""
    extra = problem.solver_stats.extra_stats
    obj = float(problem.value)
    absolute = None
    parts = [f"{name} reported optimal" + (" at looser tolerances (the tightest stalled)" if relaxed else "")]
    tol_key = _GAP_TOLERANCE.get(name)
    tolerance = float(options[tol_key]) if tol_key and tol_key in options else None
    if tolerance is not None:
        parts.append(", ".join(f"{k}={v:g}" for k, v in options.items() if k.startswith(("tol", "eps"))))
    if isinstance(extra, dict) and isinstance(extra.get("info"), dict):  # SCS
        info = extra["info"]
        if "gap" in info:
            absolute = float(info["gap"])
        parts.append(", ".join(f"{k}={info[k]:.3g}" for k in ("res_pri", "res_dual", "gap") if k in info))
    elif hasattr(extra, "info"):  # OSQP
        info = extra.info
        for k in ("prim_res", "dual_res", "duality_gap"):
            v = getattr(info, k, None)
            if isinstance(v, (int, float)):
                parts.append(f"{k}={v:.3g}")
                if k == "duality_gap":
                    absolute = abs(float(v))
    elif extra is not None and hasattr(extra, "max_primal_infeasibility"):  # HiGHS
        parts.append(f"max_primal_infeasibility={extra.max_primal_infeasibility:.3g}, "
                     f"max_dual_infeasibility={extra.max_dual_infeasibility:.3g}")
    relative = None if absolute is None else absolute / max(1.0, abs(obj))
    return Certificate("solver status", absolute, relative, tolerance, "; ".join(p for p in parts if p))


# ---------------------------------------------------------------- emission: the recorder

class _Unrecordable(Exception):
    """A catalog construction branched on its arguments; it is copied by source instead."""


def _to_ast(value: Any) -> ast.expr:
    if isinstance(value, _Sym):
        return value._node
    if value is None or isinstance(value, (bool, str)):
        return ast.Constant(value)
    if isinstance(value, (np.bool_,)):
        return ast.Constant(bool(value))
    if isinstance(value, (int, np.integer)):
        v = int(value)
        return ast.Constant(v) if v >= 0 else ast.UnaryOp(ast.USub(), ast.Constant(-v))
    if isinstance(value, (float, np.floating)):
        v = float(value)
        if not np.isfinite(v):
            return ast.Call(ast.Name("float", ast.Load()), [ast.Constant(repr(v))], [])
        neg = v < 0 or (v == 0 and np.signbit(v))
        return ast.UnaryOp(ast.USub(), ast.Constant(-v)) if neg else ast.Constant(v)
    if isinstance(value, tuple):
        return ast.Tuple([_to_ast(v) for v in value], ast.Load())
    if isinstance(value, list):
        return ast.List([_to_ast(v) for v in value], ast.Load())
    if isinstance(value, slice):
        return ast.Slice(*(None if v is None else _to_ast(v) for v in (value.start, value.stop, value.step)))
    if isinstance(value, Mapping):
        return ast.Dict([_to_ast(k) for k in value], [_to_ast(v) for v in value.values()])
    raise _Unrecordable(type(value).__name__)


def _binop(op: ast.operator) -> tuple[Callable, Callable]:
    def fwd(self, other):
        return _Sym(ast.BinOp(self._node, op, _to_ast(other)))

    def rev(self, other):
        return _Sym(ast.BinOp(_to_ast(other), op, self._node))
    return fwd, rev


class _Sym:
    """Stands in for `cp`, the data and the variables while a construction runs: every operation
    becomes syntax. Anything that needs a value (a truth test, a length) cannot be recorded."""

    __slots__ = ("_node",)

    def __init__(self, node: ast.expr):
        object.__setattr__(self, "_node", node)

    def __getattr__(self, name: str) -> "_Sym":
        if name.startswith("__"):
            raise AttributeError(name)
        return _Sym(ast.Attribute(self._node, name, ast.Load()))

    def __call__(self, *args: Any, **kwargs: Any) -> "_Sym":
        if not all(k.isidentifier() for k in kwargs):
            raise _Unrecordable("keyword")
        return _Sym(ast.Call(self._node, [_to_ast(a) for a in args],
                             [ast.keyword(k, _to_ast(v)) for k, v in kwargs.items()]))

    def __getitem__(self, key: Any) -> "_Sym":
        return _Sym(ast.Subscript(self._node, _to_ast(key), ast.Load()))

    __add__, __radd__ = _binop(ast.Add())
    __sub__, __rsub__ = _binop(ast.Sub())
    __mul__, __rmul__ = _binop(ast.Mult())
    __truediv__, __rtruediv__ = _binop(ast.Div())
    __matmul__, __rmatmul__ = _binop(ast.MatMult())
    __pow__, __rpow__ = _binop(ast.Pow())

    def __neg__(self) -> "_Sym":
        return _Sym(ast.UnaryOp(ast.USub(), self._node))

    def __pos__(self) -> "_Sym":
        return self

    def _compare(self, op: ast.cmpop, other: Any) -> "_Sym":
        return _Sym(ast.Compare(self._node, [op], [_to_ast(other)]))

    def __le__(self, other: Any) -> "_Sym":
        return self._compare(ast.LtE(), other)

    def __ge__(self, other: Any) -> "_Sym":
        return self._compare(ast.GtE(), other)

    def __eq__(self, other: Any) -> "_Sym":  # type: ignore[override]
        return self._compare(ast.Eq(), other)

    def __lt__(self, other: Any) -> "_Sym":
        return self._compare(ast.Lt(), other)

    def __gt__(self, other: Any) -> "_Sym":
        return self._compare(ast.Gt(), other)

    __hash__ = object.__hash__

    def _refuse(self, *_a: Any) -> Any:
        raise _Unrecordable("value needed")

    __bool__ = __len__ = __iter__ = __index__ = __float__ = __int__ = _refuse  # type: ignore[assignment]


def _function_node(name: str, args: ast.arguments, body: list[ast.stmt]) -> ast.FunctionDef:
    node = ast.FunctionDef(name=name, args=args, body=body, decorator_list=[], returns=None)
    if "type_params" in ast.FunctionDef._fields:  # Python 3.12+
        node.type_params = []
    return node


def _name(ident: str) -> _Sym:
    return _Sym(ast.Name(ident, ast.Load()))


# ---------------------------------------------------------------- emission: copying functions by source

_BUILTINS = frozenset(dir(builtins))


def _function_def(fn: Callable) -> ast.FunctionDef:
    tree = ast.parse(textwrap.dedent(inspect.getsource(fn)))
    node = tree.body[0]
    if not isinstance(node, ast.FunctionDef):
        raise AssertionError(f"{fn!r} is not a plain function")
    return _plain(node)


def _plain(node: ast.FunctionDef) -> ast.FunctionDef:
    """The function without annotations or decorators (they could name things the module lacks)."""
    node.decorator_list = []
    node.returns = None
    for a in node.args.posonlyargs + node.args.args + node.args.kwonlyargs + [node.args.vararg, node.args.kwarg]:
        if a is not None:
            a.annotation = None
    return node


def _free_names(fn: ast.FunctionDef) -> list[str]:
    bound = {a.arg for a in fn.args.posonlyargs + fn.args.args + fn.args.kwonlyargs}
    bound |= {a.arg for a in (fn.args.vararg, fn.args.kwarg) if a is not None}
    stored, loaded = set(), []
    for node in ast.walk(fn):
        if isinstance(node, ast.Name):
            if isinstance(node.ctx, ast.Store):
                stored.add(node.id)
            elif node.id not in loaded:
                loaded.append(node.id)
        elif isinstance(node, (ast.FunctionDef, ast.Lambda)) and node is not fn:
            bound |= {a.arg for a in node.args.args}
            if isinstance(node, ast.FunctionDef):
                stored.add(node.name)
        elif isinstance(node, ast.Import):  # a standard-library import inside the function travels with it
            stored |= {(a.asname or a.name).split(".")[0] for a in node.names}
    return [n for n in loaded if n not in bound and n not in stored and n not in _BUILTINS and n not in ("np", "cp")]


@functools.lru_cache(maxsize=None)
def _catalog_lambda(entry_name: str, field: str) -> ast.Lambda | None:
    """The lambda written for one field of one catalog entry, from the catalog's source."""
    tree = ast.parse(inspect.getsource(catalog_module))
    position = [f.name for f in fields(Entry)].index(field)
    for node in ast.walk(tree):
        if isinstance(node, ast.Call) and isinstance(node.func, ast.Name) and node.func.id == "Entry" and \
                node.args and isinstance(node.args[0], ast.Constant) and node.args[0].value == entry_name:
            value = next((k.value for k in node.keywords if k.arg == field), None)
            if value is None and len(node.args) > position:
                value = node.args[position]
            return value if isinstance(value, ast.Lambda) else None
    return None


class _Emitter:
    """The module being written: helper functions copied by source, in first-use order."""

    def __init__(self):
        self.helpers: dict[str, ast.FunctionDef] = {}

    def copy(self, fn: Callable, namespace: Any) -> str:
        """Copy a function (and the functions of `namespace` it calls) into the module."""
        name = fn.__name__
        if name in self.helpers:
            return name
        node = _function_def(fn)
        self.helpers[name] = node
        self._dependencies(node, namespace)
        return name

    def _dependencies(self, node: ast.FunctionDef, namespace: Any) -> None:
        for free in _free_names(node):
            target = getattr(namespace, free, None)
            if not (inspect.isfunction(target) and target.__module__ == namespace.__name__):
                raise AssertionError(f"{node.name} uses {free!r}, which an emitted module cannot have")
            self.copy(target, namespace)

    def construction(self, entry: Entry) -> str:
        """A function for an entry's cvxpy construction (the recorder could not replay it)."""
        fn = entry.cvxpy
        if fn.__name__ != "<lambda>":
            return self.copy(fn, catalog_module)
        name = f"_cvx_{entry.name}"
        if name in self.helpers:
            return name
        lam = _catalog_lambda(entry.name, "cvxpy")
        if lam is None or not name.isidentifier():
            raise AssertionError(f"the cvxpy construction of {entry.name} cannot be found in the catalog source")
        node = _function_node(name, lam.args, [ast.Return(lam.body)])
        self.helpers[name] = node
        self._dependencies(node, catalog_module)
        return name

    def kernel(self, entry: Entry) -> str:
        return self.copy(entry.value, catalog_module)


# ---------------------------------------------------------------- emission: names

# every name the emitted module binds itself; spec names that match one get a generated name
_MODULE_NAMES = frozenset({
    "np", "cp", "X", "y", "weights", "solver", "tunables", "values", "weight_total", "n_inputs", "terms",
    "constraints", "problem", "variables", "parameters", "built", "build", "solve", "SPEC_NAME", "SPEC_TEXT",
    "SPEC_SHA256", "VERDICT", "INPUT_NAMES", "PARAMETERS", "TUNABLES", "SOLVER_OPTIONS"})


def _safe_identifier(name: str) -> bool:
    """A spec name usable as a Python identifier as it is: ASCII (no normalization surprises), not a
    keyword or builtin, not private, not a name the module binds."""
    return (name.isascii() and name.isidentifier() and not keyword.iskeyword(name)
            and not keyword.issoftkeyword(name) and not name.startswith("_") and name not in _BUILTINS
            and name not in _MODULE_NAMES)


class _Names:
    def __init__(self):
        self.used: set[str] = set()
        self.count = 0

    def of(self, name: str, kind: str) -> str:
        if _safe_identifier(name) and name not in self.used:
            self.used.add(name)
            return name
        while True:  # generated names start with '_', which no kept spec name does
            self.count += 1
            candidate = f"_{kind}{self.count}"
            if candidate not in self.used:
                self.used.add(candidate)
                return candidate


class _EmitHost:
    """Leaves as recorded syntax; side statements (derived parameters) collected in order."""

    def __init__(self, emitter: _Emitter, checked: CheckedObjective, input_names: tuple[str, ...] | None,
                 idents: Mapping[str, str], score_ident: str | None, names: _Names):
        self.emitter, self.checked, self.input_names = emitter, checked, input_names
        self.idents, self.names = idents, names
        self.cp, self.np = _name("cp"), _name("np")
        self.X, self.y, self.weights = _name("X"), _name("y"), _name("weights")
        self.weight_total, self.n_inputs = _name("weight_total"), _name("n_inputs")
        self.n_rows = _name("X").shape[0]
        self.score_ident = score_ident
        self.derived_statements: list[ast.stmt] = []

    def index(self, name: str) -> int:
        if self.input_names is None or name not in self.input_names:
            raise _error("C431" if self.input_names is None else "C403",
                         f"the spec names input {name!r}, but " + (
                             "the order of the inputs is not known" if self.input_names is None
                             else "it is not among the inputs"), _table_span(self.checked),
                         "pass input_names to emit_module (the columns of X, in order)", self.checked)
        return self.input_names.index(name)

    def variable(self, name: str) -> _Sym:
        return _name(self.idents[("param", name)])

    def tunable(self, e: tt.TunableRef) -> _Sym:
        return _name(self.idents[("tunable", e.name)])

    def options(self, e: tt.Apply) -> dict[str, Any]:
        # a tunable setting is read from the checked values when the module builds its problem
        tuned = dict(e.tuned)
        return {k: (_name("values")[tuned[k].name] if k in tuned else v) for k, v in e.options}

    def derived(self, e: tt.TExpr) -> _Sym:
        ident = self.names.of("", "derived")
        value = _Sym(ast.Call(ast.Name("float", ast.Load()), [_to_ast(self.numeric(e))], []))
        call = self.cp.Parameter(value=value, **_expr_sign_flags(e))
        self.derived_statements.append(ast.Assign([ast.Name(ident, ast.Store())], _to_ast(call)))
        return _name(ident)

    def numeric(self, e: tt.TExpr) -> Any:
        """A data-only (or tunable-only) expression with the catalog's NumPy kernels."""
        if isinstance(e, tt.Const):
            return e.value
        if isinstance(e, tt.TunableRef):
            return _name("values")[e.name]
        if isinstance(e, tt.DataRef):
            if e.kind == "target":
                return self.y
            if e.kind == "inputs":
                return self.matrix(e.shape.names)
            return self.X[:, self.index(e.name)]
        if isinstance(e, tt.Apply):
            entry = CATALOG[e.entry]
            return _name(self.emitter.kernel(entry))(*[self.numeric(a) for a in e.args], **self.options(e))
        if isinstance(e, tt.CustomLoss):
            return self.numeric(e.body)
        if isinstance(e, (tt.Add, tt.Neg, tt.Mul, tt.Div)):
            return tt.arithmetic(e, self.numeric)
        if isinstance(e, tt.Aggregate) and e.over == "rows":
            total = self.weights @ self.numeric(e.operand)
            if e.kind == "perrow":
                return total / self.n_rows
            return total / self.weight_total if e.kind == "mean" else total
        raise AssertionError(f"no NumPy translation for {type(e).__name__}")

    def matrix(self, names: tuple[str, ...] | None) -> _Sym:
        return self.X if names is None else self.X[:, [self.index(n) for n in names]]

    def score(self) -> _Sym:
        return _name(self.score_ident)

    def second_moments(self, X: _Sym, rows: str) -> _Sym:
        return _name(self.emitter.copy(_k_second_moments, catalog_module))(X, self.weights, rows)

    def cvx(self, entry: Entry, args: list, options: dict, node: tt.TExpr) -> Any:
        try:
            out = entry.cvxpy(self.cp, *args, **options)
        except Exception:  # noqa: BLE001 - anything the recorder cannot replay is copied instead
            out = _name(self.emitter.construction(entry))(self.cp, *args, **options)
        if out is None:
            raise _error("C404", f"{entry.name} has no convex form a solver can take", node.span,
                         "use it only on data (in a `feature`) or for evaluation", self.checked)
        return out


# ---------------------------------------------------------------- emission: the module

def _assign(target: str, value: Any) -> ast.Assign:
    return ast.Assign([ast.Name(target, ast.Store())], _to_ast(value))


def _docstring(checked: CheckedObjective) -> str:
    # the docstring carries the text with its line ends made plain (a carriage return cannot sit in
    # a docstring unchanged); SPEC_TEXT holds it exactly, and the hash is of that exact text
    text = checked.spec.text.replace("\r\n", "\n").replace("\r", "\n")
    return (f"A convex training problem for cvxpy, written by objc from the spec {checked.source.name!r}.\n\n"
            f"spec sha256: {checked.spec_hash}\nverdict: {checked.verdict}\n\n"
            "build(X, y, weights=None, **tunables) returns the cvxpy problem and its pieces;\n"
            "solve(X, y, weights=None, solver=None, **tunables) returns parameter values, objective and status.\n"
            "X and y are passed by position; tunables by their spec names. Needs numpy and cvxpy only.\n\n"
            "--- spec ---\n" + text)


def _emitted_function(name: str, args: list[str], defaults: list[Any], body: list[ast.stmt],
                      posonly: int = 0, kwarg: str | None = None) -> ast.FunctionDef:
    arguments = ast.arguments(posonlyargs=[ast.arg(a) for a in args[:posonly]],
                              args=[ast.arg(a) for a in args[posonly:]], vararg=None, kwonlyargs=[],
                              kw_defaults=[], kwarg=ast.arg(kwarg) if kwarg else None,
                              defaults=[_to_ast(d) for d in defaults])
    return _function_node(name, arguments, body)


def emit_module(checked: CheckedObjective, input_names: Sequence[str] | None = None) -> str:
    """A standalone Python module (numpy and cvxpy only) that builds and solves the same problem from
    arrays. `input_names` (the columns of X, in order) is needed only when the spec selects inputs by
    name and does not list them all itself. The same spec always gives the same text."""
    _require_accepted(checked)
    spec = checked.spec
    if input_names is None and spec.table is not None:
        input_names = spec.table.explicit_inputs()
    names_tuple = None if input_names is None else tuple(str(n) for n in input_names)
    if names_tuple is None and any(_needs_input_order(e) for e in _all_exprs(checked)):
        raise _error("C431", "the spec selects inputs by name, but it does not list its inputs one by one, so "
                     "their order in X is unknown", _table_span(checked),
                     "pass input_names (the columns of X, in order) to emit_module", checked)
    for t in spec.tunables:
        if t.name in ("weights", "solver"):
            raise _error("C430", f"tunable '{t.name}' has the name of an argument of the emitted build/solve",
                         t.span, "rename the tunable", checked)

    names = _Names()
    idents: dict[tuple[str, str], str] = {}
    for t in spec.tunables:
        idents[("tunable", t.name)] = names.of(t.name, "tunable")
    for p in spec.parameters:
        idents[("param", p.name)] = names.of(p.name, "param")
    score_ident = names.of(spec.score.name, "score") if spec.score is not None else None

    emitter = _Emitter()
    host = _EmitHost(emitter, checked, names_tuple, idents, score_ident, names)
    tr = _Translator(host)
    score_value = tr.expr(spec.score.expr) if spec.score is not None else None
    term_values = [tr.expr(t.expr) for t in checked.terms]
    constraint_values = [_compare(tr.expr(c.left), c.op, tr.expr(c.right)) for c in spec.constraints]

    cp = host.cp
    body: list[ast.stmt] = [
        ast.Assign([ast.Tuple([ast.Name(n, ast.Store()) for n in ("X", "y", "weights", "weight_total")],
                              ast.Store())],
                   _to_ast(_name(emitter.copy(_prepare_arrays, _this_module()))(
                       _name("X"), _name("y"), _name("weights"), _name("INPUT_NAMES")))),
        _assign("n_inputs", _name("X").shape[1]),
        _assign("values", _name(emitter.copy(solvers_src.settled_tunables, solvers_src))(_name("TUNABLES"), _name("tunables"),
                                                                              _name("ValueError"))),
    ]
    for t in spec.tunables:
        body.append(_assign(idents[("tunable", t.name)],
                            cp.Parameter(name=t.name, value=_name("values")[t.name], **_sign_flags(t.low, t.high))))
    body.extend(host.derived_statements)
    k = len(spec.table.classes) if spec.table is not None else 0
    for p in spec.parameters:
        if p.by_classes:  # W: inputs x K, b: K, one column / entry per class in the listed order
            var = cp.Variable((_name("n_inputs"), k) if p.vector else k, name=p.name)
        else:
            var = cp.Variable(_name("n_inputs"), name=p.name) if p.vector else cp.Variable(name=p.name)
        body.append(_assign(idents[("param", p.name)], var))
    if score_ident is not None:
        body.append(_assign(score_ident, score_value))
    body.append(_assign("terms", list(term_values)))
    body.append(_assign("constraints", list(constraint_values)))
    objective = functools.reduce(lambda a, b: a + b, [_name("terms")[i] for i in range(len(term_values))])
    body.append(_assign("problem", cp.Problem(cp.Minimize(objective), _name("constraints"))))
    result = {
        "problem": _name("problem"),
        "variables": {p.name: _name(idents[("param", p.name)]) for p in spec.parameters},
        "parameters": {t.name: _name(idents[("tunable", t.name)]) for t in spec.tunables},
        "score": _name(score_ident) if score_ident is not None else None,
        "terms": _name("terms"),
        "constraints": _name("constraints"),
    }
    body.append(ast.Return(_to_ast(result)))
    build_fn = _emitted_function("build", ["X", "y", "weights"], [None], body, posonly=2, kwarg="tunables")

    solve_name = emitter.copy(_solve_built, _this_module())
    solve_body: list[ast.stmt] = [
        _assign("built", _name("build")(_name("X"), _name("y"), _name("weights"), **{})),
        ast.Return(_to_ast(_name(solve_name)(cp, _name("built"), _name("solver"), _name("SOLVER_OPTIONS")))),
    ]
    # build(X, y, weights, **tunables): a keyword splat the recorder does not write; add it here
    call = solve_body[0].value
    assert isinstance(call, ast.Call)
    call.keywords.append(ast.keyword(None, ast.Name("tunables", ast.Load())))
    solve_fn = _emitted_function("solve", ["X", "y", "weights", "solver"], [None, None], solve_body, posonly=2,
                                 kwarg="tunables")

    module_body: list[ast.stmt] = [
        ast.Expr(ast.Constant(_docstring(checked))),
        ast.Import([ast.alias("numpy", "np")]),
        ast.Import([ast.alias("cvxpy", "cp")]),
        _assign("SPEC_NAME", checked.source.name),
        _assign("SPEC_TEXT", spec.text),
        _assign("SPEC_SHA256", checked.spec_hash),
        _assign("VERDICT", checked.verdict),
        _assign("INPUT_NAMES", names_tuple),
        _assign("PARAMETERS", {p.name: ("vector" if p.vector else "scalar") for p in spec.parameters}),
        _assign("TUNABLES", {t.name: (float(t.default), float(t.low), float(t.high)) for t in spec.tunables}),
        _assign("SOLVER_OPTIONS", {k: tuple(dict(o) for o in v) for k, v in SOLVER_OPTIONS.items()}),
        *emitter.helpers.values(),
        build_fn,
        solve_fn,
    ]
    module = ast.fix_missing_locations(ast.Module(body=module_body, type_ignores=[]))
    return ast.unparse(module) + "\n"


def _this_module() -> Any:
    import sys
    return sys.modules[__name__]
