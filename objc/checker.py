"""One bottom-up pass over the typed tree: curvature, sign and smoothness of every node, a verdict
per goal term and overall, explanations that point at the text, a witness search where the
composition rules cannot decide, and the warnings of the trade.

"not convex" is a claim objc makes only with a witness: two points where midpoint convexity of the
WHOLE goal fails, found numerically and evaluated again before it is reported. Like terms (the same
function of the same argument) are collected before curvature is judged, so `l2sq(w) - 0.2 *
l2sq(w)` is the convex 0.8 * l2sq(w); the signs of constant factors come from the declared ranges
of the tunables (objc/intervals.py). Where the rules fail and no witness turns up, the verdict is
"not provable", with the rule that failed.
"""

from __future__ import annotations

import hashlib
import itertools
import math
from dataclasses import dataclass, field, fields, is_dataclass, replace
from typing import Literal

import numpy as np

from objc import typed_tree as tt
from objc.catalog import CATALOG, _k_dropout_factor, _k_second_moments
from objc.curvature import (ArgumentFault, Curvature, Monotonicity, Sign, compose, curvature_add,
                            curvature_scale, sign_add, sign_mul)
from objc.diagnostics import Diagnostic
from objc.intervals import interval_of
from objc.source_text import SourceText, Span

Verdict = Literal["convex", "concave", "affine", "constant", "not provable", "not convex", "not subdifferentiable"]


@dataclass(frozen=True)
class Fault:
    """Why a subexpression is not provably convex: where, which rule, and what would fix it."""

    span: Span
    message: str
    hint: str = ""
    kind: str = ""  # "tunable sign": a factor whose sign the declared tunable ranges leave open


@dataclass(frozen=True)
class Facts:
    curvature: Curvature
    sign: Sign
    smooth: bool
    fault: Fault | None = None
    uses_zero_one: Span | None = None


ParamPoint = tuple[tuple[str, "float | tuple[float, ...]"], ...]


@dataclass(frozen=True)
class Witness:
    """Two points where midpoint convexity of the whole goal fails, found numerically and evaluated
    again on the whole goal before it is reported.

    `variable`, `a` and `b` say where in the reader's terms (a margin, a score, or the learned
    values); `point_a` / `point_b` are the learned parameters in full (vectors in the order of
    `inputs`), `row` and `label` the one made-up data row, `tunables` the tunable values: enough to
    evaluate the goal again by any other means."""

    variable: str
    a: float | tuple[float, ...]
    b: float | tuple[float, ...]
    value_mid: float
    value_avg: float
    setting: str = ""  # tunable values the witness needs, if any
    point_a: ParamPoint = ()
    point_b: ParamPoint = ()
    inputs: tuple[str, ...] = ()
    row: tuple[tuple[str, float], ...] = ()
    label: float = 1.0
    tunables: tuple[tuple[str, float], ...] = ()

    def params(self, which: Literal["a", "b", "mid"]) -> dict[str, float | np.ndarray]:
        """The learned parameters at one end (or at the midpoint), as arrays."""
        pa = {k: np.asarray(v, dtype=float) if isinstance(v, tuple) else float(v) for k, v in self.point_a}
        pb = {k: np.asarray(v, dtype=float) if isinstance(v, tuple) else float(v) for k, v in self.point_b}
        if which == "a":
            return pa
        if which == "b":
            return pb
        return {k: (pa[k] + pb[k]) / 2 for k in pa}

    def describe(self) -> str:
        def fmt(v):
            return f"{v:.4g}" if isinstance(v, float) else "(" + ", ".join(f"{t:.3g}" for t in v) + ")"
        at = f" (with {self.setting})" if self.setting else ""
        return (f"at {self.variable} = {fmt(self.a)} and {self.variable} = {fmt(self.b)}{at}, on one made-up row "
                f"with y = {self.label:+g}, the goal's value at the midpoint is {self.value_mid:.6g}, above the "
                f"average of its values at the ends {self.value_avg:.6g}")


@dataclass(frozen=True)
class Term:
    """One additive term of the goal: coefficient x core."""

    index: int
    span: Span
    text: str
    coefficient: float | None  # with tunables at their defaults; None if it involves data
    coefficient_text: str
    coefficient_sign: Sign
    core: tt.TExpr
    expr: tt.TExpr  # coefficient x core, as analysed
    kind: Literal["rows", "params", "mixed", "constant"]
    aggregate: Literal["mean", "sum", "perrow", None]
    body: tt.TExpr | None  # the per-row expression inside the aggregate (kind "rows")
    curvature: Curvature  # of coefficient x core
    smooth: bool
    verdict: Verdict
    role: Literal["margin", "residual", "score", None]
    losses: tuple[str, ...]  # catalog or custom loss names used in the body
    known_loss: tuple[str, tuple[tuple[str, float], ...]] | None  # body is exactly a catalog loss
    explanation: tuple[str, ...] = ()
    witness: Witness | None = None  # the goal's witness, when it breaks this term's convexity too
    tunables: tuple[str, ...] = ()
    # like terms collected into this one: their numbers as written (1-based) and texts; () if one term
    parts: tuple[int, ...] = ()
    part_texts: tuple[str, ...] = ()


@dataclass(frozen=True)
class ConstraintInfo:
    span: Span
    text: str
    curvature_ok: bool
    kind: str  # "sign", "bound", "box", "l1 ball", "l2 ball", "general"


@dataclass(frozen=True)
class CheckedObjective:
    spec: tt.ResolvedSpec
    source: SourceText
    spec_hash: str
    terms: tuple[Term, ...]
    constraints: tuple[ConstraintInfo, ...]
    verdict: Verdict
    smooth: bool
    task: Literal["margin", "residual", "multiclass", None]
    errors: tuple[Diagnostic, ...]
    warnings: tuple[Diagnostic, ...]
    expanded: str
    penalizes_intercept: bool
    intercept: str | None
    witness: Witness | None = None  # two points where midpoint convexity of the whole goal fails

    @property
    def accepted(self) -> bool:
        return not self.errors and self.verdict in ("convex", "affine")

    @property
    def subdifferentiable(self) -> bool:
        return self.verdict != "not subdifferentiable"


# ---------------------------------------------------------------- rendering

def render(e: tt.TExpr, prec: int = 0) -> str:
    """A typed expression as readable math text (used in reports and the expanded objective)."""
    def wrap(s: str, p: int) -> str:
        return f"({s})" if p < prec else s
    if isinstance(e, tt.Const):
        return f"{e.value:g}"
    if isinstance(e, tt.TunableRef):
        return e.name
    if isinstance(e, tt.DataRef):
        if e.kind == "inputs":
            return "x" if e.shape.names is None else f"x[{', '.join(e.shape.names)}]"
        return e.name
    if isinstance(e, tt.ParamRef):
        return e.name if e.entries is None else f"{e.name}[{', '.join(e.entries)}]"
    if isinstance(e, tt.ScoreRef):
        return e.name
    if isinstance(e, tt.Apply):
        tuned = dict(e.tuned)
        if CATALOG[e.entry].infix:  # base^p: the one entry written as an operator
            (setting, value), = e.options
            return wrap(f"{render(e.args[0], 4)}{CATALOG[e.entry].infix}" + (
                tuned[setting].name if setting in tuned else f"{value:g}"), 3)
        opts = [tuned[k].name if k in tuned else f"{v:g}" for k, v in e.options] if CATALOG[e.entry].options else []
        return f"{e.entry}({', '.join([render(a) for a in e.args] + opts)})"
    if isinstance(e, tt.CustomLoss):
        return f"{e.name}({render(e.arg)})"
    if isinstance(e, tt.Add):
        if isinstance(e.right, tt.Neg):
            return wrap(f"{render(e.left, 1)} - {render(e.right.operand, 2)}", 1)
        return wrap(f"{render(e.left, 1)} + {render(e.right, 1)}", 1)
    if isinstance(e, tt.Neg):
        return wrap(f"-{render(e.operand, 3)}", 2)
    if isinstance(e, tt.Mul):
        return wrap(f"{render(e.left, 2)} * {render(e.right, 3)}", 2)
    if isinstance(e, tt.Div):
        return wrap(f"{render(e.left, 2)} / {render(e.right, 3)}", 2)
    if isinstance(e, tt.Dot):
        return wrap(f"{render(e.left, 2)} . {render(e.right, 3)}", 2)
    if isinstance(e, tt.Aggregate):
        return wrap(f"{e.kind} {render(e.operand, 3)}", 2)
    raise AssertionError(e)


# ---------------------------------------------------------------- the analysis of one node

def _is_target(e: tt.TExpr) -> bool:
    return isinstance(e, tt.DataRef) and e.kind == "target"


def loss_role(arg: tt.TExpr) -> Literal["margin", "residual", "score", None]:
    """Whether a loss argument is the margin y*s, the residual y - s, or the score itself."""
    if isinstance(arg, tt.Mul) and {type(arg.left), type(arg.right)} == {tt.DataRef, tt.ScoreRef}:
        data = arg.left if isinstance(arg.left, tt.DataRef) else arg.right
        if _is_target(data):
            return "margin"
    if isinstance(arg, tt.Add) and _is_target(arg.left) and isinstance(arg.right, tt.Neg) and isinstance(
            arg.right.operand, tt.ScoreRef):
        return "residual"
    if isinstance(arg, tt.ScoreRef):
        return "score"
    return None


def _mono_word(m: Monotonicity) -> str:
    return {Monotonicity.INCREASING: "nondecreasing", Monotonicity.DECREASING: "nonincreasing"}.get(m, "not monotone")


def analyse(e: tt.TExpr) -> Facts:
    """Curvature (in the learned parameters), sign and smoothness of a typed expression."""
    facts = _analyse(e)
    if facts.sign != Sign.ZERO and e.depends == "const":
        # sign arithmetic cannot tell that 1 - 0.3 or 1 - a (a within 0 .. 1) is nonnegative, or that
        # hinge(1) is zero: the interval over the declared ranges can (exact for a pure number)
        s = Sign.of_range(*interval_of(e))
        if s != Sign.UNKNOWN:
            facts = replace(facts, sign=s)
    return facts


def _analyse(e: tt.TExpr) -> Facts:
    C = Curvature
    if isinstance(e, tt.Const):
        return Facts(C.CONSTANT, Sign.of_value(e.value), True)
    if isinstance(e, tt.TunableRef):
        return Facts(C.CONSTANT, Sign.of_range(e.low, e.high), True)
    if isinstance(e, tt.DataRef):
        return Facts(C.CONSTANT, Sign.UNKNOWN, True)
    if isinstance(e, tt.ParamRef):
        return Facts(C.AFFINE, Sign.UNKNOWN, True)
    if isinstance(e, tt.ScoreRef):
        f = analyse(e.expr)
        return Facts(C.AFFINE if f.curvature.is_affine else f.curvature, f.sign, f.smooth,
                     f.fault if not f.curvature.is_affine else None)
    if isinstance(e, tt.CustomLoss):
        f = analyse(e.body)
        return f
    if isinstance(e, tt.Neg):
        f = analyse(e.operand)
        return Facts(f.curvature.negate(), f.sign.negate(), f.smooth, f.fault, f.uses_zero_one)
    if isinstance(e, tt.Aggregate):
        f = analyse(e.operand)
        return f
    if isinstance(e, tt.Add):
        a, b = analyse(e.left), analyse(e.right)
        curv = curvature_add(a.curvature, b.curvature)
        fault = a.fault or b.fault
        if curv == C.UNKNOWN and fault is None:
            concave_side = e.right if b.curvature == C.CONCAVE else e.left
            fault = Fault(concave_side.span, f"'{render(concave_side)}' is concave (a convex expression with a "
                          "minus sign, or a concave atom), and adding it to a convex expression is not covered "
                          "by the composition rules",
                          "remove the subtraction, or move the concave part into a constraint")
        return Facts(curv, sign_add(a.sign, b.sign), a.smooth and b.smooth, fault,
                     a.uses_zero_one or b.uses_zero_one)
    if isinstance(e, (tt.Mul, tt.Div)):
        a, b = analyse(e.left), analyse(e.right)
        z = a.uses_zero_one or b.uses_zero_one
        sign = sign_mul(a.sign, b.sign)
        if isinstance(e, tt.Div):
            if b.curvature != C.CONSTANT:
                return Facts(C.UNKNOWN, sign, False, a.fault or b.fault or Fault(
                    e.right.span, f"division by '{render(e.right)}', which depends on learned parameters",
                    "divide only by numbers, tunables or data"), z)
            if isinstance(e.right, tt.Const) and e.right.value == 0:
                return Facts(C.UNKNOWN, sign, False, Fault(e.right.span, "division by zero"), z)
            curv = curvature_scale(a.curvature, b.sign)
            fault = a.fault
            if curv == C.UNKNOWN and fault is None:
                fault = _unknown_factor_fault(e.right, b.sign)
            return Facts(curv, sign, a.smooth, fault, z)
        if a.curvature == C.CONSTANT or b.curvature == C.CONSTANT:
            const_side, other, of = (e.left, e.right, b) if a.curvature == C.CONSTANT else (e.right, e.left, a)
            cf = a if of is b else b
            curv = curvature_scale(of.curvature, cf.sign)
            fault = of.fault
            if curv == C.UNKNOWN and fault is None:
                fault = _unknown_factor_fault(const_side, cf.sign)
            return Facts(curv, sign, of.smooth, fault, z)
        return Facts(C.UNKNOWN, sign, a.smooth and b.smooth, a.fault or b.fault or Fault(
            e.span, f"'{render(e)}' multiplies two expressions that both depend on learned parameters; "
            "such a product is not affine and not covered by the composition rules",
            "keep one side of every product free of learned parameters (numbers, tunables or data)"), z)
    if isinstance(e, tt.Dot):
        a, b = analyse(e.left), analyse(e.right)
        if a.curvature == C.CONSTANT or b.curvature == C.CONSTANT:
            other = b if a.curvature == C.CONSTANT else a
            curv = C.AFFINE if other.curvature.is_affine else C.UNKNOWN
            return Facts(curv if curv != C.AFFINE or other.curvature != C.CONSTANT else C.CONSTANT,
                         Sign.UNKNOWN, True, other.fault)
        return Facts(C.UNKNOWN, Sign.UNKNOWN, True, Fault(
            e.span, f"'{render(e)}' is a dot product of two learned vectors: not affine",
            "dot a learned vector with x or with data"))
    if isinstance(e, tt.Apply):
        entry = CATALOG[e.entry]
        opts = e.option_dict
        facts = [analyse(a) for a in e.args]
        if e.tuned:
            tuned_facts = _tuned_setting_facts(e, entry, facts)
            if tuned_facts is not None:
                return tuned_facts
        z = next((f.uses_zero_one for f in facts if f.uses_zero_one), None)
        if not entry.trainable:
            z = z or e.span
        signs = tuple(f.sign for f in facts)
        sign = entry.sign(signs, opts)
        smooth = entry.smooth(opts) and all(f.smooth for f in facts)
        if entry.smooths_zero_kink(opts) and _kink_at_zero_only(e.args[0]):
            smooth = True  # max(0, u)^p with p >= 2 is continuously differentiable: the kink has value 0
        inner_fault = next((f.fault for f in facts if f.fault), None)
        atom_curv = entry.curvature(opts)
        args = [(f.curvature, entry.monotonicity(i, f.sign, opts)) for i, f in enumerate(facts)]
        curv, faults = compose(atom_curv, args)
        fault = inner_fault
        if entry.needs_nonneg_argument(opts) and not facts[0].sign.is_nonneg \
                and facts[0].curvature != C.CONSTANT:
            p = opts["p"]
            return Facts(C.UNKNOWN, sign, smooth, fault or Fault(
                e.span, f"'{render(e)}': u^{p:g} is convex only where u >= 0, and the sign of "
                f"'{render(e.args[0])}' is not known", f"write abs(u)^{p:g} or pos(u)^{p:g} for a convex "
                "function on the whole line"), z)
        if curv == C.UNKNOWN and fault is None:
            fault = _apply_fault(e, entry, atom_curv, faults, facts)
        return Facts(curv, sign, smooth, fault, z)
    raise AssertionError(e)


def _tuned_setting_facts(e: tt.Apply, entry, facts: list[Facts]) -> Facts | None:
    """Facts of an entry whose settings are tunables: the composition rules must hold for every value
    of the declared ranges. For a setting the curvature depends on (the catalog entry's `setting_rule`:
    power's exponent) the range decides the rule; for any other setting the entry's facts must be the same
    at both ends of the range and at the default, else the term is not provable."""
    tuned = dict(e.tuned)
    z = next((f.uses_zero_one for f in facts if f.uses_zero_one), None)
    if not entry.trainable:
        z = z or e.span
    inner_fault = next((f.fault for f in facts if f.fault), None)
    rule = entry.setting_rule
    if rule is not None and rule.option in tuned:
        q = tuned[rule.option]
        base = facts[0]
        # as for a literal setting: pos(u)^q is continuously differentiable once every q smooths the kink, and a
        # larger setting smooths no less (x^p: p >= 2), so the range's low end decides
        smooth = base.smooth or (entry.smooths_zero_kink({rule.option: q.low}) and _kink_at_zero_only(e.args[0]))
        sign = rule.value_sign or entry.sign(tuple(f.sign for f in facts), {rule.option: q.low})
        if base.curvature == Curvature.CONSTANT:
            return Facts(Curvature.CONSTANT, sign, True, inner_fault, z)
        rng = f"{q.name} in {q.low:g} .. {q.high:g}"
        found = rule.over(q.low, q.high)
        if found is None:
            return Facts(Curvature.UNKNOWN, sign, smooth, inner_fault or Fault(
                e.span, f"'{render(e)}' with {rng}: {rule.why(q.low, q.high)}, so no one composition rule holds "
                "over it", rule.hint(q.name, q.default, q.high)), z)
        atom_curv, mono = found
        if rule.sign_needed and q.low < q.high and not base.sign.is_nonneg:
            return Facts(Curvature.UNKNOWN, sign, smooth, inner_fault or Fault(
                e.span, f"'{render(e)}' with {rng}: {rule.sign_fault}, and '{render(e.args[0])}' is not known to "
                "be nonnegative", rule.sign_hint(q.name)), z)
        curv, faults = compose(atom_curv, [(base.curvature, mono)])
        fault = inner_fault
        if curv == Curvature.UNKNOWN and fault is None:
            f0 = faults[0]
            need = ("convex" if f0.monotonicity == Monotonicity.INCREASING else "concave") \
                if f0.wanted == "convex" else ("concave" if f0.monotonicity == Monotonicity.INCREASING else "convex")
            fault = Fault(e.span, f"'{render(e)}' with {rng}: {entry.name} is {atom_curv.value} and "
                          f"{_mono_word(mono)} in its argument over that range, so the argument must be {need}; "
                          f"'{render(e.args[0])}' is {base.curvature.value}",
                          "rewrite the argument, or change the declared range")
        return Facts(curv, sign, smooth, fault, z)
    # a setting the curvature does not depend on: the entry's facts must agree over the range
    signs = tuple(f.sign for f in facts)
    ends = [e.option_values({r.name: r.low for r in tuned.values()}),
            e.option_values({r.name: r.high for r in tuned.values()}), e.option_dict]
    summary = {(entry.curvature(o), tuple(entry.monotonicity(i, f.sign, o) for i, f in enumerate(facts)),
                entry.sign(signs, o), entry.smooth(o)) for o in ends}
    if len(summary) == 1:
        return None
    names = ", ".join(r.name for r in tuned.values())
    return Facts(Curvature.UNKNOWN, entry.sign(signs, e.option_dict), False, inner_fault or Fault(
        e.span, f"'{render(e)}': the facts of {entry.name} change over the declared range of {names}",
        "use a literal setting"), z)


def _unknown_factor_fault(factor: tt.TExpr, sign: Sign) -> Fault:
    if isinstance(factor, tt.TunableRef):
        return Fault(factor.span, f"tunable '{factor.name}' ranges over {factor.low:g} .. {factor.high:g}, so its "
                     "sign is not known and the term it multiplies may flip from convex to concave",
                     f"declare a range that excludes negatives, e.g. tune {factor.name} = {factor.default:g} within "
                     f"{max(factor.low, 0):g} .. {factor.high:g}", kind="tunable sign")
    tunables = list({t.name: t for t in _contains(factor, tt.TunableRef)}.values())
    if tunables and not _contains(factor, tt.DataRef) and sign == Sign.UNKNOWN:
        lo, hi = interval_of(factor)
        ranges = ", ".join(f"{t.name} within {t.low:g} .. {t.high:g}" for t in tunables)
        return Fault(factor.span, f"'{render(factor)}' ranges over {lo:g} .. {hi:g} when {ranges}, so its sign is "
                     "not known and the term it multiplies may flip from convex to concave",
                     f"declare tunable ranges that keep '{render(factor)}' nonnegative", kind="tunable sign")
    if isinstance(factor, tt.DataRef) or sign == Sign.UNKNOWN:
        return Fault(factor.span, f"'{render(factor)}' has no known sign, so the term it multiplies may flip "
                     "from convex to concave", "multiply convex terms only by numbers or tunables with a "
                     "nonnegative range; row weights belong in a `rowweight` clause")
    return Fault(factor.span, f"'{render(factor)}' is negative, which turns a convex term concave",
                 "use a nonnegative weight")


def _apply_fault(e: tt.Apply, entry, atom_curv: Curvature, faults: tuple[ArgumentFault, ...], facts) -> Fault:
    name = f"x{entry.infix}{entry.options[0].name}" if entry.infix else entry.name
    if atom_curv == Curvature.UNKNOWN:
        return Fault(e.span, f"{name} is neither convex nor concave, so '{render(e)}' is not covered by the "
                     "composition rules", "use a convex loss from the catalog (e.g. logistic or hinge)")
    f = faults[0]
    arg = e.args[f.index]
    mono = _mono_word(f.monotonicity)
    need = ("convex" if f.monotonicity == Monotonicity.INCREASING else "concave") if f.wanted == "convex" else (
        "concave" if f.monotonicity == Monotonicity.INCREASING else "convex")
    if f.monotonicity == Monotonicity.NONE:
        rule = (f"{name} is {atom_curv.value} but not monotone in this argument (its sign is not known), so the "
                "argument must be affine")
    else:
        rule = f"{name} is {atom_curv.value} and {mono} here, so its argument must be {need} (or affine)"
    msg = f"'{render(e)}': {rule}; '{render(arg)}' is {f.arg_curvature.value}"
    hint = ""
    if f.monotonicity == Monotonicity.NONE and entry.sign_hint:
        hint = entry.sign_hint
    elif entry.rule_hint:
        hint = entry.rule_hint
    elif atom_curv == Curvature.CONCAVE:
        hint = "a concave atom can only take concave or affine arguments; rewrite the expression or use a convex atom"
    else:
        hint = "rewrite so the argument is affine, or use an atom whose monotonicity fits"
    return Fault(e.span, msg, hint)


def _kink_at_zero_only(e: tt.TExpr) -> bool:
    if isinstance(e, tt.Apply) and CATALOG[e.entry].kink_at_zero_value:
        return analyse(e.args[0]).smooth
    if isinstance(e, tt.Apply) and CATALOG[e.entry].kink_at_zero_value_beside_zero and len(e.args) == 2:
        zero = [a for a in e.args if isinstance(a, tt.Const) and a.value == 0]
        other = [a for a in e.args if not (isinstance(a, tt.Const) and a.value == 0)]
        return len(zero) == 1 and len(other) == 1 and analyse(other[0]).smooth
    return False


# ---------------------------------------------------------------- numerical evaluation (witnesses)

@dataclass
class EvalEnv:
    """Values for one numerical evaluation: learned parameters, data of a few rows, tunables."""

    inputs: list[str]
    params: dict[str, np.ndarray | float]
    columns: dict[str, np.ndarray]
    y: np.ndarray
    score_override: np.ndarray | None = None
    tunables: dict[str, float] = field(default_factory=dict)
    weights: np.ndarray | None = None  # row x class weights; None: every row weighs 1


def evaluate(e: tt.TExpr, env: EvalEnv):
    """Numeric value of a typed expression (scalars, per-row arrays, or vectors)."""
    if isinstance(e, tt.Const):
        return e.value
    if isinstance(e, tt.TunableRef):
        return env.tunables.get(e.name, e.default)
    if isinstance(e, tt.DataRef):
        if e.kind == "target":
            return env.y
        if e.kind == "inputs":
            names = env.inputs if e.shape.names is None else list(e.shape.names)
            return np.stack([env.columns[n] for n in names], axis=1)
        return env.columns[e.name]
    if isinstance(e, tt.ParamRef):
        v = env.params[e.name]
        if not e.vector:
            return v
        if e.entries is None:
            return v
        idx = [env.inputs.index(n) for n in e.entries]
        return v[idx] if e.shape.kind == "vector" else float(v[idx[0]])
    if isinstance(e, tt.ScoreRef):
        if env.score_override is not None:
            return env.score_override
        return evaluate(e.expr, env)
    if isinstance(e, tt.CustomLoss):
        return evaluate(e.body, env)
    if isinstance(e, (tt.Neg, tt.Add, tt.Mul)):
        return tt.arithmetic(e, lambda part: evaluate(part, env))
    if isinstance(e, tt.Div):
        with np.errstate(divide="ignore", invalid="ignore"):  # `/ 0` is reported by analyse, not raised here
            return np.divide(evaluate(e.left, env), evaluate(e.right, env))
    if isinstance(e, tt.Dot):
        a, b = evaluate(e.left, env), evaluate(e.right, env)
        if np.ndim(a) == 2 and np.ndim(b) == 2:  # W . x with W learned by classes: rows x K
            return b @ a if isinstance(e.right, tt.DataRef) and e.right.kind == "inputs" else a @ b
        if np.ndim(a) == 2:
            return a @ b
        if np.ndim(b) == 2:
            return b @ a
        return float(np.dot(a, b))
    if isinstance(e, tt.Aggregate):
        v = np.asarray(evaluate(e.operand, env), dtype=float)
        if e.over == "rows" and env.weights is not None:
            c = env.weights
            v = np.broadcast_to(v, c.shape)
            total = float(np.dot(c, v))
            # mean: sum c_i E_i / sum c_i; perrow: sum c_i E_i / n, n the number of rows
            return total / float(np.sum(c)) if e.kind == "mean" else total / c.size if e.kind == "perrow" else total
        return float(np.mean(v)) if e.kind in ("mean", "perrow") else float(np.sum(v))
    if isinstance(e, tt.Apply):
        entry = CATALOG[e.entry]
        args = [evaluate(a, env) for a in e.args]
        if entry.reads_second_moments:
            return entry.value(*args, **e.option_values(env.tunables), m2=_second_moments_of(e, env))
        return entry.value(*args, **e.option_values(env.tunables))
    raise AssertionError(e)


def _second_moments_of(e: tt.Apply, env: EvalEnv) -> np.ndarray:
    """The second moments of the inputs `e`'s parameter weighs, on the rows `env` holds."""
    ref = e.args[0]
    names = list(ref.entries) if isinstance(ref, tt.ParamRef) and ref.entries is not None else list(env.inputs)
    n = np.size(env.y)
    X = np.column_stack([np.broadcast_to(np.asarray(env.columns[k], dtype=float), (n,)) for k in names])
    c = np.ones(n) if env.weights is None else np.asarray(env.weights, dtype=float)
    return _k_second_moments(X, c, e.rows or "mean")


def _inputs_for(spec: tt.ResolvedSpec) -> list[str]:
    names: list[str] = []
    if spec.table is not None:
        names = list(spec.table.explicit_inputs() or ())
        for _g, cols in spec.table.groups:
            names.extend(c for c in cols if c not in names)

    def collect(e):
        if isinstance(e, tt.ParamRef) and e.entries:
            names.extend(n for n in e.entries if n not in names)
        for child in tt.children(e):
            collect(child)
    collect(spec.goal)
    if spec.score is not None:
        collect(spec.score.expr)
    while len(names) < 3:
        names.append(f"_extra{len(names)}")
    return names


def _data_columns(e: tt.TExpr, out: set[str]) -> set[str]:
    if isinstance(e, tt.DataRef) and e.kind in ("column", "feature"):
        out.add(e.name)
    for c in tt.children(e):
        _data_columns(c, out)
    return out


# A violation counts when the value at the midpoint lies above the chord by more than this share of
# (1 + |chord value|): far above rounding, so a convex goal does not produce one (common practice, no
# published source; the concave kinks of the losses refused here give violations of order 1e-2).
_GAP = 1e-6
_LINE_GRID = np.linspace(-2.0, 2.0, 81)  # steps along a random line, in units of its direction
_SCORE_GRID = np.linspace(-8.0, 8.0, 81)  # score values a score-moving line runs over


def _relative_gap(fa: float, fb: float, fm: float) -> float:
    if not (np.isfinite(fa) and np.isfinite(fb) and np.isfinite(fm)):
        return -math.inf
    avg = (fa + fb) / 2
    return (fm - avg) / (1.0 + abs(avg))


def _widest_on_grid(values: np.ndarray) -> tuple[int, int, float]:
    """On an evenly spaced grid, the pair (i, j) with i + j even (so the midpoint is grid point
    (i + j) / 2) whose midpoint value lies furthest above the chord, and that relative gap."""
    i, j = np.triu_indices(len(values), 1)
    keep = (i + j) % 2 == 0
    i, j = i[keep], j[keep]
    fa, fb, fm = values[i], values[j], values[(i + j) // 2]
    avg = (fa + fb) / 2
    gap = np.where(np.isfinite(fa) & np.isfinite(fb) & np.isfinite(fm), (fm - avg) / (1.0 + np.abs(avg)), -np.inf)
    k = int(np.argmax(gap))
    return int(i[k]), int(j[k]), float(gap[k])


def _tunable_settings(tunables: list[tt.Tunable]) -> list[dict[str, float]]:
    """The tunable values a witness may use: the defaults first, then the corners of the declared
    ranges (every corner up to three tunables, else all-low and all-high)."""
    if len(tunables) <= 3:
        corners = [dict(zip([t.name for t in tunables], c))
                   for c in itertools.product(*[(t.low, t.high) for t in tunables])]
    else:
        corners = [{t.name: t.low for t in tunables}, {t.name: t.high for t in tunables}]
    # the defaults spelled out, so a witness always says at which tunable values it holds
    out: list[dict[str, float]] = [{t.name: t.default for t in tunables}]
    for c in corners:
        if c and c not in out:
            out.append(c)
    return out


class _Probe:
    """The whole goal as a function of the learned parameters (flattened in the order of
    spec.parameters, vectors over `inputs`), on one made-up data row with a given label and given
    tunable values."""

    def __init__(self, goal: tt.TExpr, spec: tt.ResolvedSpec, inputs: list[str], row: dict[str, float],
                 label: float, tun: dict[str, float]):
        self.goal, self.spec, self.inputs, self.label, self.tun = goal, spec, inputs, label, tun
        self.row = row
        self.columns = {c: np.array([v]) for c, v in row.items()}
        self.layout = [(p.name, p.vector, len(inputs) if p.vector else 1) for p in spec.parameters]
        self.size = sum(n for _, _, n in self.layout)

    def params(self, theta: np.ndarray) -> dict[str, np.ndarray | float]:
        out: dict[str, np.ndarray | float] = {}
        k = 0
        for name, vector, n in self.layout:
            out[name] = theta[k:k + n].copy() if vector else float(theta[k])
            k += n
        return out

    def env(self, theta: np.ndarray) -> EvalEnv:
        return EvalEnv(self.inputs, self.params(theta), self.columns, np.array([self.label]), None, self.tun)

    def value(self, theta: np.ndarray) -> float:
        return float(np.sum(evaluate(self.goal, self.env(theta))))

    def score(self, theta: np.ndarray) -> float:
        return float(np.sum(evaluate(self.spec.score.expr, self.env(theta))))

    def score_gradient(self) -> tuple[float, np.ndarray] | None:
        """The score at 0 and its change per unit step in each parameter (its gradient when affine)."""
        if self.spec.score is None or self.size == 0:
            return None
        zero = np.zeros(self.size)
        s0 = self.score(zero)
        grad = np.array([self.score(np.eye(self.size)[k]) - s0 for k in range(self.size)])
        if not (np.isfinite(s0) and np.all(np.isfinite(grad))):
            return None
        return s0, grad

    def score_line(self) -> tuple[float, np.ndarray] | None:
        """(score at 0, a direction that moves the score by one per unit step): along the intercept
        where there is one, so the weights stay at 0, else along the score's own gradient."""
        sg = self.score_gradient()
        if sg is None:
            return None
        s0, grad = sg
        k = 0
        for _name, vector, n in self.layout:
            if not vector and abs(grad[k]) > 1e-12:
                return s0, np.eye(self.size)[k] / grad[k]
            k += n
        g2 = float(grad @ grad)
        return (s0, grad / g2) if g2 > 1e-24 else None

    def lines(self, rng: np.random.Generator) -> list[tuple[np.ndarray, np.ndarray, np.ndarray, bool]]:
        """(start, direction, steps, is the score line) for every line searched: the score line, then
        random lines at four scales, each also with its direction stripped of the part that moves
        the score (so the penalties are probed with the loss terms held still)."""
        out = []
        line = self.score_line()
        if line is not None:
            s0, d = line
            out.append((np.zeros(self.size), d, _SCORE_GRID - s0, True))
        sg = self.score_gradient()
        grad = sg[1] if sg is not None else None
        for scale in (0.3, 1.0, 3.0, 10.0):
            start = rng.normal(scale=scale, size=self.size)
            d = rng.normal(size=self.size)
            d /= max(float(np.linalg.norm(d)), 1e-300)
            out.append((start, d * scale, _LINE_GRID, False))
            if grad is not None and float(grad @ grad) > 1e-24:
                flat = d - (d @ grad) / (grad @ grad) * grad
                if np.linalg.norm(flat) > 1e-9:
                    out.append((start, flat / np.linalg.norm(flat) * scale, _LINE_GRID, False))
        return out

    def witness(self, ta: np.ndarray, tb: np.ndarray, on_score_line: bool) -> Witness | None:
        """The witness at these two points if the whole goal, evaluated again from scratch there and
        at their exact midpoint, breaks midpoint convexity; else None."""
        fa, fb, fm = self.value(ta), self.value(tb), self.value((ta + tb) / 2)
        if _relative_gap(fa, fb, fm) <= _GAP:
            return None
        if on_score_line and _margin_only(self.goal):
            variable, a, b = "the margin m", self.label * self.score(ta), self.label * self.score(tb)
        elif on_score_line and _residual_only(self.goal):
            variable, a, b = "the residual r", self.label - self.score(ta), self.label - self.score(tb)
        elif on_score_line:
            variable, a, b = "the score s", self.score(ta), self.score(tb)
        else:
            names = [name for name, _, _ in self.layout]
            variable = f"({', '.join(names)})"
            a, b = tuple(float(v) for v in ta), tuple(float(v) for v in tb)

        def point(theta):
            return tuple((k, tuple(float(x) for x in v) if isinstance(v, np.ndarray) else float(v))
                         for k, v in self.params(theta).items())
        return Witness(variable, a, b, fm, (fa + fb) / 2, ", ".join(f"{k} = {v:g}" for k, v in self.tun.items()),
                       point(ta), point(tb), tuple(self.inputs), tuple(self.row.items()), self.label,
                       tuple(self.tun.items()))


def find_witness(e: tt.TExpr, spec: tt.ResolvedSpec, seed: int = 0) -> Witness | None:
    """Two points where midpoint convexity of `e` (the whole goal, in the learned parameters) fails
    on one made-up data row, or None.

    Searched along lines in parameter space, at the tunables' defaults and then at the corners of
    their ranges, for each label +1 / -1: the line that moves only the score (through the
    intercept, weights held at 0, where there is one), and random lines with and without the part
    that moves the score. The widest violation on a line is evaluated again on the whole goal at
    the two points and their exact midpoint, and reported only if it holds there."""
    rng = np.random.default_rng(seed)
    inputs = _inputs_for(spec)
    score_expr = spec.score.expr if spec.score is not None else None
    cols = sorted(_data_columns(e, set()) | (_data_columns(score_expr, set()) if score_expr is not None else set())
                  | set(inputs))
    used = {t.name for t in _contains(e, tt.TunableRef)} | (
        {t.name for t in _contains(score_expr, tt.TunableRef)} if score_expr is not None else set())
    settings = _tunable_settings([t for t in spec.tunables if t.name in used])
    # data away from 0 so products show their shape, and data of both signs
    rows = {1.0: {c: 1.0 + abs(float(rng.normal())) for c in cols}, -1.0: {c: float(rng.normal()) for c in cols}}
    score_affine = score_expr is not None and analyse(score_expr).curvature.is_affine
    # the parameters reach the goal only through an affine score: the goal along the score line is
    # the per-row body at one row, which can be evaluated for many score values at once
    rows_only = _contains_rows(e) and score_affine and not _contains(_strip_scores(e), tt.ParamRef)
    with np.errstate(all="ignore"):
        for tun in settings:
            for label, row in rows.items():
                probe = _Probe(e, spec, inputs, row, label, tun)
                found = _score_grid_witness(probe, rng) if rows_only else _line_witness(probe, rng)
                if found is not None:
                    return found
    return None


def _score_grid_witness(probe: _Probe, rng: np.random.Generator) -> Witness | None:
    line = probe.score_line()
    if line is None:
        return _line_witness(probe, rng)
    s0, d = line
    grid = np.concatenate([np.linspace(-6.0, 6.0, 61), rng.uniform(-12.0, 12.0, 60)])
    a, b = np.meshgrid(grid, grid, indexing="ij")
    a, b = a.ravel(), b.ravel()
    n = a.size
    body = _rows_body(probe.goal)

    def f(s):
        env = EvalEnv(probe.inputs, {}, {c: np.full(n, v) for c, v in probe.row.items()}, np.full(n, probe.label), s,
                      probe.tun)
        return np.broadcast_to(np.asarray(evaluate(body, env), dtype=float), (n,))
    fa, fb, fm = f(a), f(b), f((a + b) / 2)
    avg = (fa + fb) / 2
    gap = np.where(np.isfinite(fm) & np.isfinite(avg), (fm - avg) / (1.0 + np.abs(avg)), -np.inf)
    zero = np.zeros(probe.size)
    for k in np.argsort(-gap)[:5]:
        if gap[k] <= _GAP:
            break
        found = probe.witness(zero + (a[k] - s0) * d, zero + (b[k] - s0) * d, True)
        if found is not None:
            return found
    return None


def _line_witness(probe: _Probe, rng: np.random.Generator) -> Witness | None:
    for start, d, steps, on_score_line in probe.lines(rng):
        values = np.array([probe.value(start + t * d) for t in steps])
        i, j, gap = _widest_on_grid(values)
        if gap > _GAP:
            found = probe.witness(start + steps[i] * d, start + steps[j] * d, on_score_line)
            if found is not None:
                return found
    return None


def _breaks(e: tt.TExpr, w: Witness) -> bool:
    """Whether `e` (one term) also breaks midpoint convexity at the goal's witness points."""
    def at(which):
        env = EvalEnv(list(w.inputs), w.params(which), {c: np.array([v]) for c, v in w.row}, np.array([w.label]),
                      None, dict(w.tunables))
        return float(np.sum(evaluate(e, env)))
    with np.errstate(all="ignore"):
        return _relative_gap(at("a"), at("b"), at("mid")) > _GAP


def _rows_body(e: tt.TExpr) -> tt.TExpr:
    """e with every row aggregate replaced by its per-row operand (so rows can be evaluated one by one)."""
    if isinstance(e, tt.Aggregate) and e.over == "rows":
        return e.operand
    return tt.map_children(e, _rows_body)


def _margin_only(e: tt.TExpr) -> bool:
    """Every use of the score is inside y * s (so the witness can be stated in the margin)."""
    scores = _contains(e, tt.ScoreRef)
    margins = [n for n in _contains(e, tt.Mul) if loss_role(n) == "margin"]
    return bool(scores) and len(scores) == len(margins)


def _residual_only(e: tt.TExpr) -> bool:
    """Every use of the score is inside y - s (so the witness can be stated in the residual)."""
    scores = _contains(e, tt.ScoreRef)
    residuals = [n for n in _contains(e, tt.Add) if loss_role(n) == "residual"]
    return bool(scores) and len(scores) == len(residuals)


def _contains_rows(e: tt.TExpr) -> bool:
    if isinstance(e, tt.Aggregate) and e.over == "rows":
        return True
    return any(_contains_rows(c) for c in tt.children(e))


def _contains(e: tt.TExpr, kind) -> list[tt.TExpr]:
    found = [e] if isinstance(e, kind) else []
    for c in tt.children(e):
        found.extend(_contains(c, kind))
    return found


# ---------------------------------------------------------------- terms

def _split_terms(goal: tt.TExpr) -> list[tuple[list[tt.TExpr], bool, tt.TExpr]]:
    """Flatten the goal into (constant factors, negated, core) triples."""
    out = []

    def walk(e, factors, negated):
        if isinstance(e, tt.Add):
            walk(e.left, factors, negated)
            walk(e.right, factors, negated)
        elif isinstance(e, tt.Neg):
            walk(e.operand, factors, not negated)
        elif isinstance(e, tt.Mul) and e.shape.kind == "scalar" and e.left.depends != "params" and \
                e.left.shape.kind == "scalar" and e.right.depends == "params":
            walk(e.right, factors + [e.left], negated)
        elif isinstance(e, tt.Mul) and e.shape.kind == "scalar" and e.right.depends != "params" and \
                e.right.shape.kind == "scalar" and e.left.depends == "params":
            walk(e.left, factors + [e.right], negated)
        elif isinstance(e, tt.Div) and e.right.depends != "params" and e.left.depends == "params":
            walk(e.left, factors + [tt.Div(tt.Const(1.0, e.right.span), e.right, e.right.span)], negated)
        else:
            out.append((factors, negated, e))
    walk(goal, [], False)
    return out


def _coefficient(factors: list[tt.TExpr], negated: bool) -> tuple[float | None, str, Sign, tuple[str, ...]]:
    value: float | None = -1.0 if negated else 1.0
    names: list[str] = []
    sign = Sign.NONPOS if negated else Sign.NONNEG
    for f in factors:
        facts = analyse(f)
        sign = sign_mul(sign, facts.sign)
        for t in _contains(f, tt.TunableRef):
            names.append(t.name)
        try:
            v = evaluate(f, EvalEnv([], {}, {}, np.ones(1)))
            value = None if value is None or np.ndim(v) else value * float(v)
        except (KeyError, ValueError, TypeError):
            value = None
    numeric = 1.0
    text_parts = []
    for f in factors:
        if isinstance(f, tt.TunableRef):
            text_parts.append(f.name)
        elif not _contains(f, tt.TunableRef) and not _contains(f, tt.DataRef):
            numeric *= float(evaluate(f, EvalEnv([], {}, {}, np.ones(1))))
        else:
            text_parts.append(f"({render(f)})")
    if negated:
        numeric = -numeric
    text = " * ".join(([f"{numeric:g}"] if numeric != 1.0 or not text_parts else []) + text_parts)
    return value, text, sign, tuple(names)


@dataclass(frozen=True)
class _Part:
    """One additive term of the goal as written: constant factors, a sign, and the core they scale."""

    number: int  # 1-based, in the order written
    factors: tuple[tt.TExpr, ...]
    negated: bool
    core: tt.TExpr
    span: Span
    text: str


def _balanced(text: str) -> bool:
    depth = 0
    for ch in text:
        depth += {"(": 1, ")": -1}.get(ch, 0)
        if depth < 0:
            return False
    return depth == 0


def _scaled(core: tt.TExpr, factors: list[tt.TExpr], negated: bool) -> tt.TExpr:
    """coefficient x core as the backends read it: factors multiplied on from the left, then the sign."""
    whole = core
    for f in factors:
        whole = tt.Mul(f, whole, core.span, core.shape, "params")
    if negated:
        whole = tt.Neg(whole, core.span, core.shape, core.depends)
    return whole


def _parts(goal: tt.TExpr, source: SourceText) -> list[_Part]:
    out = []
    for k, (factors, negated, core) in enumerate(_split_terms(goal)):
        span = core.span
        for f in factors:
            span = span.cover(f.span)
        shown = source.snippet(span) if span.line == span.end_line else ""
        if not shown or not _balanced(shown):
            # a factor distributed over a parenthesized sum, or a term over several lines: written out
            coef = _coefficient(factors, False)[1]
            shown = render(core) if coef in ("1", "") else f"{coef} * {render(core, 3)}"
        out.append(_Part(k + 1, tuple(factors), negated, core, span, ("- " + shown) if negated else shown))
    return out


def _structure(e):
    """A node's structure without its source spans: equal for the same expression written twice."""
    if isinstance(e, tuple):
        return tuple(_structure(x) for x in e)
    if is_dataclass(e) and not isinstance(e, type):
        return (type(e).__name__,) + tuple((f.name, _structure(getattr(e, f.name))) for f in fields(e)
                                           if not isinstance(getattr(e, f.name), Span))
    return e


def _collect(parts: list[_Part]) -> list[list[_Part]]:
    """Like terms grouped: the same core (catalog entry, custom loss or aggregate of one, on the same
    argument) under constant factors, in the order each core first appears. c1 * f + c2 * f is
    (c1 + c2) * f for any f, so collecting changes no value; it lets the rules see, for example, that
    l2sq(w) - 0.2 * l2sq(w) is 0.8 * l2sq(w)."""
    groups: dict[object, list[_Part]] = {}
    for p in parts:
        key = _structure(p.core) if p.core.depends == "params" else ("as written", p.number)
        groups.setdefault(key, []).append(p)
    return list(groups.values())


def _summed_coefficient(group: list[_Part]) -> tt.TExpr:
    """The sum of the coefficients of like terms as one constant expression: pure numbers folded into
    one number, coefficients with tunables (or data) kept as written, e.g. `lam - 0.2`."""
    span = group[0].span
    numeric = 0.0
    symbolic: list[tuple[tt.TExpr, bool]] = []
    for p in group:
        product = None
        if not any(_contains(f, tt.TunableRef) or _contains(f, tt.DataRef) for f in p.factors):
            with np.errstate(all="ignore"):
                v = float(np.prod([float(evaluate(f, EvalEnv([], {}, {}, np.ones(1)))) for f in p.factors]))
            if np.isfinite(v):
                numeric += -v if p.negated else v
                continue
        for f in p.factors:
            product = f if product is None else tt.Mul(product, f, span, tt.SCALAR, "data" if (
                product.depends == "data" or f.depends == "data") else "const")
        symbolic.append((product if product is not None else tt.Const(1.0, span), p.negated))
    if not symbolic:
        return tt.Const(numeric, span)
    if numeric != 0:
        symbolic.append((tt.Const(abs(numeric), span), numeric < 0))
    out = None
    for e, negative in symbolic:
        e = tt.Neg(e, span, tt.SCALAR, e.depends) if negative else e
        out = e if out is None else tt.Add(out, e, span, tt.SCALAR, "data" if "data" in (out.depends, e.depends)
                                             else "const")
    return out


def _verdict(c: Curvature) -> Verdict:
    return {Curvature.CONSTANT: "constant", Curvature.AFFINE: "affine", Curvature.CONVEX: "convex",
            Curvature.CONCAVE: "concave", Curvature.UNKNOWN: "not provable"}[c]


def _classify_constraint(c: tt.Constraint) -> str:
    left, right = c.left, c.right
    params_side = left if left.depends == "params" else right
    if isinstance(params_side, tt.ParamRef) and (right if params_side is left else left).depends == "const":
        return "sign" if isinstance(right if params_side is left else left, tt.Const) and \
            (right if params_side is left else left).value == 0 else "bound"
    shape = CATALOG[params_side.entry].constraint_set if isinstance(params_side, tt.Apply) else ""
    if shape == "box" and isinstance(params_side.args[0], tt.ParamRef):
        return "box"
    if shape.endswith("ball"):
        return shape
    return "general"


def check(spec: tt.ResolvedSpec, source: SourceText | None = None) -> CheckedObjective:
    """The checked objective: verdicts, explanations, warnings and the expanded objective."""
    source = source or SourceText(spec.source_name, spec.text)
    errors: list[Diagnostic] = []
    warnings: list[Diagnostic] = []

    def err(code, msg, span, hint="", notes=()):
        errors.append(Diagnostic(code, msg, span, "error", hint, tuple(notes), source.name))

    def warn(code, msg, span, hint="", notes=()):
        warnings.append(Diagnostic(code, msg, span, "warning", hint, tuple(notes), source.name))

    # ---- the score must be affine in the learned parameters
    if spec.score is not None:
        sf = analyse(spec.score.expr)
        if not sf.curvature.is_affine:
            where = sf.fault.span if sf.fault else spec.score.span
            err("E301", "the score is not affine in the learned parameters" +
                (f": {sf.fault.message}" if sf.fault else ""), where,
                hint=(sf.fault.hint if sf.fault else "") or "write the score as w . x + b (data may be transformed "
                "freely with `feature`, learned quantities may not)",
                notes=("every loss of the margin or residual is convex only when the score is affine in what is "
                       "learned",))
        elif sf.curvature == Curvature.CONSTANT:
            err("E302", "the score does not depend on anything learned", spec.score.span, hint="write w . x + b")

    # ---- per-row expressions reach learned parameters only through the score
    for agg in _contains(spec.goal, tt.Aggregate):
        if agg.over != "rows":
            continue
        for p in _contains(_strip_scores(agg.operand), tt.ParamRef):
            err("E303", f"'{render(p)}' is used inside a per-row expression; learned parameters enter per-row "
                "terms only through the score", p.span, hint="put it in the score (score s = w . x + b) and use s")
            break

    # ---- terms: split as written, like terms collected, each judged, then the whole goal
    terms: list[Term] = []
    overall = Curvature.CONSTANT
    zero_one_span: Span | None = None
    for i, group in enumerate(_collect(_parts(spec.goal, source))):
        core = group[0].core
        if len(group) == 1:
            factors, negated = list(group[0].factors), group[0].negated
            value, ctext, csign, tun = _coefficient(factors, negated)
            whole = _scaled(core, factors, negated)
            span, text = group[0].span, group[0].text
        else:
            coef = _summed_coefficient(group)
            value, ctext, csign, tun = _coefficient([coef], False)
            ctext = render(coef)
            whole = tt.Mul(coef, core, core.span, core.shape, "params")
            span = group[0].span
            text = group[0].text + "".join(f" - {p.text[2:]}" if p.text.startswith("- ") else f" + {p.text}"
                                           for p in group[1:])
        facts = analyse(whole)
        if facts.uses_zero_one:
            zero_one_span = zero_one_span or facts.uses_zero_one
        is_rows = isinstance(core, tt.Aggregate) and core.over == "rows"
        kind = "rows" if is_rows else ("params" if not _contains_rows(core) else "mixed")
        if core.depends != "params" and not is_rows:
            kind = "constant"
        body = core.operand if is_rows else None
        roles = set()
        losses = []
        known = None
        if body is not None:
            for node in _contains(body, tt.Apply) + _contains(body, tt.CustomLoss):
                if isinstance(node, tt.Apply) and CATALOG[node.entry].kind != "loss":
                    continue
                if isinstance(node, tt.Apply) and CATALOG[node.entry].role == "multiclass":
                    roles.add("multiclass")
                    losses.append(node.entry)
                    continue
                arg = node.arg if isinstance(node, tt.CustomLoss) else node.args[0]
                r = loss_role(arg)
                if r:
                    roles.add(r)
                losses.append(node.name if isinstance(node, tt.CustomLoss) else node.entry)
            for node in _contains(body, tt.Mul) + _contains(body, tt.Add):
                r = loss_role(node)
                if r in ("margin", "residual"):
                    roles.add(r)
            if isinstance(body, tt.Apply) and CATALOG[body.entry].kind == "loss" and \
                    loss_role(body.args[0]) == CATALOG[body.entry].role:
                known = (body.entry, body.options)
            if isinstance(body, tt.Apply) and CATALOG[body.entry].role == "multiclass":
                known = (body.entry, body.options)
        role = next(iter(roles)) if len(roles) == 1 else (None if not roles else "mixed")
        verdict = "not subdifferentiable" if facts.uses_zero_one else _verdict(facts.curvature)
        explanation: list[str] = []
        if facts.fault:
            explanation.append(f"line {facts.fault.span.line}, column {facts.fault.span.column}: {facts.fault.message}")
        for node in _contains(core, tt.Apply):
            rule = CATALOG[node.entry].convexity_rule
            if rule and f"{node.entry}: {rule}" not in explanation:
                explanation.append(f"{node.entry}: {rule}")
        numbers = tuple(p.number for p in group) if len(group) > 1 else ()
        terms.append(Term(i, span, text,
                          value, ctext, csign, core, whole, kind, core.kind if is_rows else None, body,
                          facts.curvature, facts.smooth, verdict, role if role != "mixed" else None,
                          tuple(dict.fromkeys(losses)), known, tuple(explanation), None, tun,
                          numbers, tuple(p.text for p in group) if numbers else ()))
        overall = curvature_add(overall, facts.curvature)
        if role == "mixed":
            err("E304", "one term mixes margin and residual losses", span)

    # ---- the whole goal: a witness wherever the rules do not prove it convex
    goal_witness = None
    by_classes = any(p.by_classes for p in spec.parameters)
    # the witness search probes vectors over the inputs; a matrix learned by classes is not searched
    if zero_one_span is None and overall in (Curvature.UNKNOWN, Curvature.CONCAVE) and not by_classes:
        goal_witness = find_witness(spec.goal, spec)
    if goal_witness is not None:
        counterexample = f"counterexample: {goal_witness.describe()}"
        for k, t in enumerate(terms):
            # a term is called not convex only where the goal's witness breaks the term itself too
            if t.curvature in (Curvature.UNKNOWN, Curvature.CONCAVE) and t.verdict != "not subdifferentiable" \
                    and _breaks(t.expr, goal_witness):
                terms[k] = replace(t, verdict="not convex" if t.curvature == Curvature.UNKNOWN else t.verdict,
                                   witness=goal_witness, explanation=t.explanation + (counterexample,))
        errors[:] = [replace(d, notes=d.notes + (counterexample,)) if d.code == "E301" else d for d in errors]
    witness_notes = [f"counterexample: {goal_witness.describe()}"] if goal_witness is not None else []
    no_witness_note = ("no counterexample was found numerically, so the goal may well be convex; objc does not call "
                       "it non-convex, but it cannot certify it either")

    # ---- term-level errors and warnings
    for t in terms:
        if t.verdict == "not subdifferentiable":
            where = zero_one_span or t.span
            node = next((n for n in _contains(t.expr, tt.Apply) if not CATALOG[n.entry].trainable), None)
            refusal = CATALOG[node.entry].refusal if node is not None else ""
            err("E310", refusal or "the 0-1 loss is discontinuous: it cannot be trained on (no subgradient carries "
                "information), only evaluated", node.span if node is not None else where,
                hint=(CATALOG[node.entry].refusal_hint if node is not None else "") or
                "train with a surrogate such as hinge(y * s) or logistic(y * s); `objc eval` reports the 0-1 "
                "error of every model")
        elif overall == Curvature.CONCAVE:
            pass  # reported once for the whole goal below
        elif t.verdict in ("not convex", "not provable", "concave"):
            f = analyse(t.expr)
            fault = f.fault
            span = fault.span if fault else t.span
            if spec.score is not None and fault is not None and _within(fault.span, spec.score.span):
                continue  # already reported as a score that is not affine
            if t.curvature == Curvature.CONCAVE and goal_witness is not None:
                err("E312", f"term {t.index + 1} is concave, and the goal with it is not convex: minimizing it is "
                    "not a convex problem", span,
                    hint="a convex penalty with a minus sign (or a negative weight) is concave: add penalties, "
                    "never subtract them", notes=witness_notes)
            elif t.curvature == Curvature.CONCAVE:
                err("E313", f"term {t.index + 1} is concave, and a concave term added to convex ones is not covered "
                    "by the composition rules", span,
                    hint="objc collects like terms (the same function of the same argument) before judging; write "
                    "the goal so that every term left is convex", notes=[no_witness_note])
            elif fault is not None and fault.kind == "tunable sign":
                err("E315", f"term {t.index + 1}: {fault.message}", span, hint=fault.hint,
                    notes=witness_notes or [no_witness_note])
            elif goal_witness is not None:
                msg = (f"term {t.index + 1} is not convex" if t.verdict == "not convex" else
                       f"the goal is not convex, and term {t.index + 1} is where the composition rules fail")
                hint = (fault.hint if fault else "") or "use a convex loss"
                err("E311", msg + (f": {fault.message}" if fault else ""), span, hint=hint, notes=witness_notes)
            else:
                err("E313", f"term {t.index + 1} is not provable by the composition rules" +
                    (f": {fault.message}" if fault else ""), span,
                    hint=(fault.hint if fault else ""), notes=[no_witness_note])
        if t.kind == "mixed":
            warn("W320", f"term {t.index + 1} mixes per-row aggregates with other expressions inside a nonlinear "
                 "function; only the cvxpy backend can solve it", t.span)
    if terms and all(t.verdict in ("convex", "affine", "constant") for t in terms) and \
            overall == Curvature.UNKNOWN:
        err("E314", "the terms are each fine but their sum is not provably convex", spec.goal_span)
    if overall == Curvature.CONCAVE and zero_one_span is None:
        err("E316", "the goal is concave as a whole (every term is concave or affine): minimizing a concave "
            "function is not a convex problem", spec.goal_span,
            hint="a goal to minimize needs convex losses and penalties with nonnegative weights; a concave goal is "
            "usually a maximization written without negating it", notes=witness_notes)

    task: Literal["margin", "residual", "multiclass", None] = None
    roles = {t.role for t in terms if t.role in ("margin", "residual", "multiclass")}
    classes = spec.table.classes if spec.table is not None else ()
    if classes and roles - {"multiclass"}:
        t = next(t for t in terms if t.role in roles - {"multiclass"})
        err("E306", f"term {t.index + 1} is a {t.role} loss, but the target has {len(classes)} classes: a margin "
            "loss needs a +1/-1 target and a residual loss a real one", t.span,
            hint="use a multiclass loss of the K scores: softmax_ce(s, y), cs_hinge(s, y) or ww_hinge(s, y), with "
                 "learn W over inputs by classes, b by classes and score s = W . x + b")
        roles = set()
    elif classes and spec.score is not None and spec.score.shape.kind == "rowclasses":
        form = multiclass_form(spec)
        if form is None:
            err("E307", "with classes the score is W . x + b (or W . x): W learned over inputs by classes and b by "
                "classes", spec.score.span, hint="write score s = W . x + b")
    if len(roles) > 1:
        err("E305", "the goal mixes margin losses (of y * s) and residual losses (of y - s); the target cannot be "
            "both +1/-1 labels and a real value", spec.goal_span)
    elif roles:
        task = roles.pop()

    for t in terms:
        for node in _contains(t.core, tt.Apply):
            for code, message, hint in CATALOG[node.entry].training_warnings:
                warn(code, message, node.span, hint=hint)
        for node in _contains(t.core, tt.CustomLoss):
            if loss_role(node.arg) == "margin":
                note = _calibration_note(node)
                if note:
                    warn("W302", f"custom loss {node.name} {note}", node.definition_span)
        for tn in _contains(t.expr, tt.TunableRef):
            if tn.low < 0 < tn.high or tn.high <= 0 and tn.low < 0:
                if t.verdict in ("convex", "affine"):
                    warn("W303", f"tunable '{tn.name}' may be negative ({tn.low:g} .. {tn.high:g})", tn.span,
                         hint="declare a nonnegative range for a weight")

    has_penalty = any(t.kind == "params" and _contains(t.core, tt.ParamRef) for t in terms)
    if task == "margin":
        if spec.table is not None and spec.table.label_map is None:
            warn("W304", "margin losses need labels -1/+1, and the target has no label map; the table's target "
                 "must already hold -1 and +1", spec.table.target_span or spec.table.span,
                 hint="map the values, e.g. target late: yes -> +1, no -> -1")
        vanishing = {"logistic", "exponential", "softplus"}
        used = {n.entry for t in terms for n in _contains(t.core, tt.Apply)}
        if used & vanishing and not has_penalty and not spec.constraints:
            warn("W305", "no regularizer and no constraint: on separable data the " + "/".join(sorted(used & vanishing))
                 + " loss has no minimizer (the weights grow without bound)", spec.goal_span,
                 hint="add a penalty such as + 0.5 * l2sq(w)")
    if overall == Curvature.AFFINE and not spec.constraints:
        warn("W306", "the goal is affine in the learned parameters: it is unbounded below unless constraints "
             "bound it", spec.goal_span)
    if spec.table is not None:
        columns = set(spec.table.explicit_inputs() or ()) | {i.text for i in spec.table.inputs if i.kind == "column"}
        for p in list(spec.parameters) + list(spec.tunables):
            if p.name in columns:
                warn("W308", f"'{p.name}' names both an input column and a {'tunable' if isinstance(p, tt.Tunable) else 'learned parameter'}; "
                     f"in expressions it means the {'tunable' if isinstance(p, tt.Tunable) else 'parameter'}",
                     p.span, hint=f"use x[{p.name}] for the column, or rename the "
                     f"{'tunable' if isinstance(p, tt.Tunable) else 'parameter'}")
    used_params = {p.name for p in _contains(spec.goal, tt.ParamRef)} | (
        {p.name for p in _contains(spec.score.expr, tt.ParamRef)} if spec.score else set())
    for p in spec.parameters:
        if p.name not in used_params:
            warn("W307", f"learned parameter '{p.name}' is never used", p.span)

    # ---- constraints
    cinfo = []
    for c in spec.constraints:
        lf, rf = analyse(c.left), analyse(c.right)
        text = source.snippet(c.span)
        if c.left.shape.kind == "rows" or c.right.shape.kind == "rows":
            err("E320", "constraints hold on learned parameters, not on rows", c.span)
            cinfo.append(ConstraintInfo(c.span, text, False, "general"))
            continue
        if c.left.depends != "params" and c.right.depends != "params":
            err("E321", "this constraint involves no learned parameter", c.span)
            cinfo.append(ConstraintInfo(c.span, text, False, "general"))
            continue
        if c.op == "<=":
            ok = lf.curvature.is_convex and rf.curvature.is_concave
            need = "convex <= concave"
        elif c.op == ">=":
            ok = lf.curvature.is_concave and rf.curvature.is_convex
            need = "concave >= convex"
        else:
            ok = lf.curvature.is_affine and rf.curvature.is_affine
            need = "affine == affine"
        if not ok:
            err("E322", f"this constraint does not keep the problem convex: it needs {need}, and has "
                f"{lf.curvature.value} {c.op} {rf.curvature.value}", c.span,
                hint="e.g. keep l1(w) <= 10, keep abs(w) <= 5, keep w[a] >= 0")
        cinfo.append(ConstraintInfo(c.span, text, ok, _classify_constraint(c)))

    intercept = None
    if spec.score is not None:
        for node in _contains(spec.score.expr, tt.ParamRef):
            if not node.vector:
                intercept = node.name
    penalized = intercept is not None and any(
        t.kind == "params" and any(p.name == intercept for p in _contains(t.core, tt.ParamRef)) for t in terms)

    if zero_one_span is not None:
        verdict: Verdict = "not subdifferentiable"
    elif overall == Curvature.UNKNOWN:
        verdict = "not convex" if goal_witness is not None else "not provable"
    else:
        verdict = _verdict(overall)  # proved: convex, affine, constant, or concave as a whole
    smooth = all(t.smooth for t in terms)
    spec_hash = hashlib.sha256(spec.text.encode("utf-8")).hexdigest()
    expanded = _expanded(spec, terms, intercept, penalized)
    return CheckedObjective(spec, source, spec_hash, tuple(terms), tuple(cinfo), verdict, smooth, task,
                            tuple(errors), tuple(warnings), expanded, penalized, intercept, goal_witness)


def _row_formula(formula: str) -> str:
    """A multiclass loss's catalog formula written for row i (s_k -> s_ik, y -> y_i)."""
    return (formula.replace("s_k", "s_ik").replace("s_y", "s_i,y_i").replace("k != y", "k != y_i"))


def _class_norm_text(e: tt.Apply) -> str:
    """A norm of a parameter learned by classes, as math text."""
    name = render(e.args[0])
    return {"l2sq": f"||{name}||_F^2", "l1": f"sum_jk |{name}_jk|" if e.args[0].shape.kind == "weights"
            else f"sum_k |{name}_k|", "inputs_l2": f"sum_j ||{name}[j, :]||_2", "l2": f"||{name}||_2"}.get(
        e.entry, render(e))


def multiclass_form(spec: tt.ResolvedSpec) -> tuple[str, str | None] | None:
    """(W, b or None) when the score is W . x + b (or W . x) with W over inputs by classes and b by
    classes; None for any other score."""
    if spec.score is None:
        return None
    e = spec.score.expr
    params = {p.name: p for p in spec.parameters}

    def weights(d) -> str | None:
        if not isinstance(d, tt.Dot):
            return None
        for p, x in ((d.left, d.right), (d.right, d.left)):
            if isinstance(p, tt.ParamRef) and p.shape.kind == "weights" and isinstance(x, tt.DataRef) and \
                    x.kind == "inputs" and x.shape.names is None and p.entries is None:
                return p.name
        return None
    if weights(e) is not None:
        return weights(e), None
    if isinstance(e, tt.Add):
        for d, b in ((e.left, e.right), (e.right, e.left)):
            if weights(d) is not None and isinstance(b, tt.ParamRef) and b.shape.kind == "classes" and \
                    params[b.name].by_classes and not params[b.name].vector:
                return weights(d), b.name
    return None


def _substitute_arg(node: tt.CustomLoss) -> tt.TExpr:
    """The custom loss body with its argument shown as the loss's own variable again."""
    def sub(e: tt.TExpr) -> tt.TExpr:
        return tt.DataRef(node.param, "column", e.span) if e == node.arg else tt.map_children(e, sub)
    return sub(node.body)


def _within(inner: Span, outer: Span) -> bool:
    return (outer.line, outer.column) <= (inner.line, inner.column) and \
        (inner.end_line, inner.end_column) <= (outer.end_line, outer.end_column)


def _strip_scores(e: tt.TExpr) -> tt.TExpr:
    """The expression with every score reference replaced by a constant (to find stray parameters)."""
    return tt.Const(0.0, e.span) if isinstance(e, tt.ScoreRef) else tt.map_children(e, _strip_scores)


def _calibration_note(node: tt.CustomLoss) -> str:
    """Bartlett, Jordan & McAuliffe (2006): a convex margin loss is classification-calibrated iff it is
    differentiable at 0 with a negative derivative. Checked numerically on the loss body."""
    def phi(m: float) -> float:
        env = EvalEnv(["_a", "_b", "_c"], {}, {}, np.ones(1), np.array([m]))
        return float(np.sum(evaluate(node.body, env)))
    h = 1e-6
    with np.errstate(all="ignore"):
        right = (phi(h) - phi(0.0)) / h
        left = (phi(0.0) - phi(-h)) / h
    if not (np.isfinite(left) and np.isfinite(right)):
        return ""
    if abs(right - left) > 1e-3 * (1 + abs(left)):
        return "is not differentiable at margin 0, so it is not classification-calibrated (Bartlett, Jordan & " \
               "McAuliffe 2006)"
    if right >= -1e-9:
        return "does not decrease at margin 0, so it is not classification-calibrated (Bartlett, Jordan & " \
               "McAuliffe 2006)"
    return ""


def _dropout_lines(spec: tt.ResolvedSpec, terms: list[Term]) -> list[str]:
    """What each data-scaled ridge equals, and whether it is the exact dropout average here."""
    uses = list(dict.fromkeys(u for t in terms for u in _contains(t.core, tt.Apply)
                              if CATALOG[u.entry].reads_second_moments))
    if not uses:
        return []
    row_terms = [t for t in terms if t.kind == "rows"]
    losses = sorted({t.known_loss[0] if t.known_loss else (t.losses[0] if t.losses else "a custom loss")
                     for t in row_terms})
    exact = len(row_terms) == 1 and row_terms[0].known_loss is not None and \
        row_terms[0].known_loss[0] == "squared" and row_terms[0].role == "residual"
    out = []
    for u in uses:
        weights = render(u.args[0])
        norm = {"mean": "(1 / sum_i c_i) * sum_i c_i", "perrow": "(1 / n) * sum_i c_i"}.get(u.rows or "", "sum_i c_i")
        drop = u.setting("p")
        factor = f"{drop.name} / (2 (1 - {drop.name}))" if isinstance(drop, tt.TunableRef) else \
            f"{_k_dropout_factor(drop.value):.6g}"
        squares = f"sum_j m2_j sum_k {weights}_jk^2" if u.args[0].shape.kind == "weights" else \
            f"sum_j m2_j {weights}_j^2"
        out.append(f"  {render(u)} = {factor} * {squares}, m2_j = {norm} * x_ij^2 over the inputs {weights} weighs "
                   "(as the score sees them)")
    if exact:
        k = row_terms[0].coefficient_text
        scale = "" if k in ("1", "") else f" (the goal weighs the loss by {k}: the exact average adds {k} times it)"
        out.append("  dropridge is exactly what dropping each input with that probability (the kept ones scaled by "
                   "1 / (1 - p)) adds to the average squared loss (Wager, Wang & Liang 2013)" + scale)
    else:
        out.append(f"  for {', '.join(losses) or 'this goal'} dropridge is only the quadratic approximation of "
                   "dropout's average (the loss's curvature taken as 1); it is exact for the squared loss alone")
    return out


def _expanded(spec: tt.ResolvedSpec, terms: list[Term], intercept: str | None,
              penalized: bool) -> str:
    """The goal with every weight multiplied out and every convention spelled out."""
    learned = ", ".join((f"{p.name} (one weight per input and class)" if p.vector else f"{p.name} (one per class)")
                        if p.by_classes else f"{p.name} (one weight per input)" if p.vector else f"{p.name} (a number)"
                        for p in spec.parameters)
    form = multiclass_form(spec) if spec.table is not None and spec.table.classes else None
    lines = [f"minimize over {learned}:"]
    for k, t in enumerate(terms):
        lead = "    " if k == 0 else "  + "
        coef = t.coefficient_text
        if t.kind == "rows" and form is not None and isinstance(t.body, tt.Apply) and \
                CATALOG[t.body.entry].role == "multiclass":
            body = _row_formula(CATALOG[t.body.entry].formula)
            core = {"mean": f"sum_i c_i ({body}) / sum_i c_i", "perrow": f"sum_i c_i ({body}) / n"}.get(
                t.aggregate or "", f"sum_i c_i ({body})")
        elif t.kind == "params" and isinstance(t.core, tt.Apply) and t.core.args and \
                t.core.args[0].shape.kind in ("weights", "classes"):
            core = _class_norm_text(t.core)
        elif t.kind == "rows" and t.body is not None:
            body = render(t.body, 3).replace("y * s", "y_i * s_i").replace("y - s", "y_i - s_i")
            agg = {"mean": "(1 / sum_i c_i) * sum_i c_i * ", "perrow": "(1 / n) * sum_i c_i * "}.get(
                t.aggregate or "", "sum_i c_i * ")
            core = f"{agg}{body}"
        else:
            core = render(t.core)
        # a summed coefficient with tunables, e.g. (lam - 0.2), is shown whole in parentheses
        compound = bool(t.parts) and isinstance(t.expr, tt.Mul) and isinstance(t.expr.left, tt.Add)
        negative = coef.startswith("-") and not compound
        if negative:
            coef = coef[1:]
            coef = coef[4:] if coef.startswith("1 * ") else coef
            lead = "  - " if k else "    -"
        if compound:
            coef = f"({coef})"
        text = core if coef in ("1", "") else f"{coef} * [{core}]"
        lines.append(f"{lead}{text}")
    collected = [t for t in terms if t.parts]
    if collected:
        lines.append("  like terms collected: " + "; ".join(
            f"terms {', '.join(str(n) for n in t.parts[:-1])} and {t.parts[-1]} as written ({t.text}) into term "
            f"{t.index + 1}" for t in collected))
    if spec.score is not None and form is not None:
        classes = spec.table.classes
        s_name = spec.score.name
        lines.append(f"where {s_name}_i = {form[0]}^T x_i" + (f" + {form[1]}" if form[1] else "") +
                     f", the K = {len(classes)} scores of row i ({s_name}_ik for class k), and y_i the class of row i;"
                     f" classes in order: {', '.join(c if isinstance(c, str) else f'{c:g}' for c in classes)}")
    elif spec.score is not None:
        lines.append(f"where {spec.score.name} = {render(spec.score.expr)}, one value per row i")
    defined = {}
    for t in terms:
        for node in _contains(t.core, tt.CustomLoss):
            defined.setdefault(node.name, node)
    for name, node in defined.items():
        body = render(_substitute_arg(node))
        lines.append(f"  {name}({node.param}) = {body}")
    lines += _dropout_lines(spec, terms)
    weight_parts = []
    tb = spec.table
    if tb is not None and tb.row_weight:
        weight_parts.append(f"row weight from column '{tb.row_weight}'")
    if tb is not None and tb.class_weights:
        weight_parts.append("class weight " + ", ".join(f"{l:+g}: {w:g}" for l, w in tb.class_weights))
    if tb is not None and tb.class_label_weights:
        weight_parts.append("class weight " + ", ".join(
            f"{l if isinstance(l, str) else format(l, 'g')}: {w:g}" for l, w in tb.class_label_weights)
            + " (1 for a class not listed)")
    lines.append("  c_i = " + (" x ".join(weight_parts) if weight_parts else "1 for every row (no row or class "
                                                                                "weights)"))
    if any(t.aggregate == "mean" for t in terms):
        lines.append("  mean = weighted mean: sum_i c_i l_i / sum_i c_i;  sum = sum_i c_i l_i")
    if any(t.aggregate == "perrow" for t in terms):
        lines.append("  perrow = sum_i c_i l_i / n, with n the number of training rows (whatever the weights)")
    if tb is not None and tb.standardize:
        lines.append("  inputs are standardized with the training rows' mean and standard deviation")
    for t in terms:
        if t.tunables or _contains(t.expr, tt.TunableRef):  # in a coefficient, an exponent or a setting
            lines.append("  tunables at their defaults: " + ", ".join(
                f"{tn.name} = {tn.default:g} (range {tn.low:g} .. {tn.high:g})" for tn in spec.tunables))
            break
    if intercept:
        lines.append(f"  intercept {intercept}: " + ("penalized, as the goal says" if penalized else "not penalized"))
    if spec.constraints:
        lines.append("subject to:")
        lines.extend(f"    {render(c.left)} {c.op} {render(c.right)}" for c in spec.constraints)
    return "\n".join(lines)

