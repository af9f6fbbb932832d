"""Syntax tree to typed tree: bind every name, work out shapes, keep row-level and
parameter-level expressions apart. Every problem is collected; one SpecError is raised at the end.
"""

from __future__ import annotations

import difflib
import math
from dataclasses import replace

from objc import syntax_tree as st
from objc import typed_tree as tt
from objc.catalog import CATALOG, GROUP_NORM, INFIX
from objc.diagnostics import Diagnostic, SpecError
from objc.feature_formula import check_formula
from objc.source_text import SourceText, Span
from objc.typed_tree import CLASSES, ROW_CLASSES, ROWS, SCALAR, WEIGHTS, Shape

_ORDER = {"const": 0, "data": 1, "params": 2}
BUILTIN_INPUTS = "x"
BUILTIN_TARGET = "y"


_MAX_MAP_INPUTS = 100_000  # a map making more inputs than this is a mistake, not a model
_MAX_MAP_DEGREE = 20
# what each map clause may set (allowed, required), and how it is written
_MAP_SETTINGS = {
    "onehot": ({"unseen"}, ()), "powers": ({"degree"}, ("degree",)), "monomials": ({"degree"}, ("degree",)),
    "pairs": (set(), ()), "spline": ({"degree", "knots"}, ("degree", "knots")),
    "fourier": ({"count", "bandwidth", "seed"}, ("count", "bandwidth", "seed")),
}
_MAP_EXAMPLES = {
    "onehot": "onehot city unseen zeros", "powers": "powers temp, rain degree 3",
    "monomials": "monomials temp, rain degree 2", "pairs": "pairs temp, rain, wind",
    "spline": "spline temp degree 3 knots 25%, 50%, 75%",
    "fourier": "fourier kern = temp, rain count 200 bandwidth 1.5 seed 7",
}


def _max_dep(*nodes) -> str:
    return max((n.depends for n in nodes), key=_ORDER.__getitem__)


class _Resolver:
    """Holds the declarations of one spec while its expressions are resolved (local to one call)."""

    def __init__(self, source: SourceText, tree: st.SpecTree):
        self.source = source
        self.tree = tree
        self.errors: list[Diagnostic] = []
        self.tunables: dict[str, tt.Tunable] = {}
        self.params: dict[str, tt.Parameter] = {}
        self.losses: dict[str, st.LossStmt] = {}
        self.score_stmt: st.ScoreStmt | None = None
        self.score: tt.ScoreRef | None = None
        self.table: tt.TableBinding | None = None
        self.columns: set[str] = set()  # names usable as per-row data in expressions
        self.groups: dict[str, tuple[str, ...]] = {}
        self._loss_stack: list[str] = []

    # ------------------------------------------------------------ reporting
    def error(self, code: str, message: str, span: Span, hint: str = "", notes: tuple[str, ...] = ()) -> None:
        self.errors.append(Diagnostic(code, message, span, "error", hint, notes, self.source.name))

    def suggest(self, name: str, candidates) -> str:
        close = difflib.get_close_matches(name, sorted(candidates), n=1, cutoff=0.6)
        return f"did you mean '{close[0]}'?" if close else ""

    # ------------------------------------------------------------ declarations
    def declare(self) -> None:
        seen: dict[str, Span] = {}

        def claim(name: str, span: Span, what: str) -> bool:
            if name in (BUILTIN_INPUTS, BUILTIN_TARGET):
                self.error("E201", f"'{name}' is built in ({'the input matrix' if name == 'x' else 'the target'})"
                           f" and cannot be declared as a {what}", span, hint="pick another name")
                return False
            if name in seen:
                self.error("E202", f"'{name}' is declared twice", span,
                           notes=(f"first declared at line {seen[name].line}",), hint="rename one of them")
                return False
            if name in CATALOG or name == GROUP_NORM:
                self.error("E203", f"'{name}' is the name of a catalog function and cannot be redeclared", span,
                           hint="pick another name")
                return False
            seen[name] = span
            return True

        table_parts: dict[str, object] = {}
        for s in self.tree.statements:
            if isinstance(s, st.TableStmt):
                if self.table is not None or "name" in table_parts:
                    self.error("E204", "a spec binds one table; this is a second `table` statement", s.span,
                               hint="use `validate on \"file\"` for a validation table")
                    continue
                table_parts.update(name=s.name, path=s.path, span=s.span)
            elif isinstance(s, st.TuneStmt):
                if claim(s.name, s.span, "tunable"):
                    if not (s.low <= s.default <= s.high):
                        self.error("E205", f"tunable '{s.name}' has default {s.default:g} outside its range "
                                   f"{s.low:g} .. {s.high:g}", s.span, hint="move the default inside the range")
                    self.tunables[s.name] = tt.Tunable(s.name, s.default, s.low, s.high, s.span, s.range_span)
            elif isinstance(s, st.LearnStmt):
                for item in s.items:
                    if claim(item.name, item.span, "learned parameter"):
                        self.params[item.name] = tt.Parameter(item.name, item.over_inputs, item.span,
                                                              item.by_classes)
            elif isinstance(s, st.LossStmt):
                if claim(s.name, s.span, "loss"):
                    self.losses[s.name] = s
            elif isinstance(s, st.ScoreStmt):
                if self.score_stmt is not None:
                    self.error("E206", "a spec has one score; this is a second `score` statement", s.span)
                elif claim(s.name, s.span, "score"):
                    self.score_stmt = s
            elif isinstance(s, (st.TargetClause, st.InputsClause, st.FeatureClause, st.RowWeightClause,
                                st.ClassWeightClause, st.StandardizeClause, st.HoldoutClause, st.ValidateClause,
                                st.MissingClause, st.GroupClause, st.MapClause)):
                if "name" not in table_parts:
                    self.error("E207", "this clause describes a table, but no `table` statement comes before it",
                               s.span, hint='start the spec with: table NAME from "file.csv"')
                    continue
                self._table_clause(s, table_parts, claim)
        if "name" in table_parts:
            self._class_weights_by_label(table_parts)
            self.table = tt.TableBinding(**table_parts)
        self._classes_parameters()

    def _class_weights_by_label(self, parts: dict) -> None:
        """Class weights of a `classes` target name its labels; of a +1/-1 target, +1 and -1."""
        raw = parts.pop("_class_weight_items", ())
        classes = parts.get("classes", ())
        if classes:
            known = {_label_key(c): c for c in classes}
            out = []
            for cw in raw:
                if _label_key(cw.label) not in known:
                    self.error("E212", f"class weight for {_label_text(cw.label)}, which is not one of the target's "
                               f"classes ({', '.join(_label_text(c) for c in classes)})", cw.span,
                               hint="name a class as the `target ... classes` clause lists it")
                elif any(_label_key(cw.label) == _label_key(o) for o, _w in out):
                    self.error("E212", f"class {_label_text(cw.label)} is given two class weights", cw.span)
                else:
                    out.append((known[_label_key(cw.label)], cw.weight))
            if raw:
                parts["class_label_weights"] = tuple(out)
                parts.pop("class_weights", None)
            return
        for cw in raw:
            if cw.label not in (1.0, -1.0):
                self.error("E212", f"class weights are given for labels +1 and -1, not {_label_text(cw.label)}",
                           cw.span, hint="a class named by its label needs a target with classes: "
                           "target COLUMN classes a, b, c" if isinstance(cw.label, str) else "")

    def _classes_parameters(self) -> None:
        """A parameter `by classes` needs a target with classes (E253)."""
        if self.table is not None and self.table.classes:
            return
        for p in self.params.values():
            if p.by_classes:
                self.error("E253", f"'{p.name}' is learned by classes, but the target has no classes", p.span,
                           hint="list the classes in the table block: target kind classes a, b, c (three or "
                           "more); for two classes map them to +1 and -1 (target late: yes -> +1, no -> -1) and "
                           f"learn {p.name} {'over inputs' if p.vector else ''}".rstrip())

    def _table_clause(self, s, parts: dict, claim) -> None:
        def once(key: str, what: str) -> bool:
            if key in parts:
                self.error("E208", f"the table already has {what}", s.span, hint="keep one of them")
                return False
            return True

        if isinstance(s, st.TargetClause):
            if once("target", "a target"):
                parts["target"] = s.column
                parts["target_span"] = s.span
                if s.classes:
                    self._target_classes(s, parts)
                if s.labels:
                    values = [p.value for p in s.labels]
                    for p in s.labels:
                        if p.label not in (1.0, -1.0):
                            self.error("E209", f"label '{p.value}' maps to {p.label:g}; labels map to +1 or -1",
                                       p.span, hint=f"write {p.value} -> +1 or {p.value} -> -1")
                    if len(set(map(str, values))) != len(values):
                        self.error("E210", "the same target value is mapped twice", s.span)
                    if all(p.label in (1.0, -1.0) for p in s.labels) and {p.label for p in s.labels} != {1.0, -1.0}:
                        self.error("E211", "the label map must send at least one value to +1 and one to -1", s.span)
                    parts["label_map"] = tt.LabelMap(tuple((p.value, p.label) for p in s.labels), s.span)
        elif isinstance(s, st.InputsClause):
            parts["inputs"] = tuple(parts.get("inputs", ())) + s.items
            parts["excluded"] = tuple(parts.get("excluded", ())) + s.excluded
            parts.setdefault("inputs_span", s.span)
            for item in s.items:
                if item.kind == "column":
                    self.columns.add(item.text)
        elif isinstance(s, st.FeatureClause):
            if claim(s.name, s.span, "feature"):
                cols = self._feature_columns(s.expr)
                parts["features"] = tuple(parts.get("features", ())) + (tt.DerivedFeature(s.name, s.expr, cols, s.span),)
                self.columns.add(s.name)
        elif isinstance(s, st.RowWeightClause):
            if once("row_weight", "a row weight column"):
                parts["row_weight"], parts["row_weight_span"] = s.column, s.span
        elif isinstance(s, st.ClassWeightClause):
            if once("class_weights", "class weights"):
                parts["_class_weight_items"] = s.weights  # checked against the target once it is known
                for cw in s.weights:
                    if cw.weight < 0:
                        self.error("E213", f"class weight {cw.weight:g} is negative; weights must be >= 0", cw.span,
                                   hint="a negative weight would reward errors and break convexity")
                parts["class_weights"] = tuple((cw.label, cw.weight) for cw in s.weights
                                               if not isinstance(cw.label, str))
                parts["class_weights_span"] = s.span
        elif isinstance(s, st.StandardizeClause):
            parts["standardize"] = True
        elif isinstance(s, st.HoldoutClause):
            if once("holdout", "a holdout") and "validation_path" not in parts:
                if not (0.0 < s.fraction < 1.0):
                    self.error("E214", f"holdout must be a share strictly between 0 and 1 (or 0% and 100%), "
                               f"got {s.fraction:g}", s.span, hint="e.g. holdout 20% seed 7")
                parts["holdout"], parts["holdout_span"] = s.fraction, s.span
                parts["holdout_seed"] = s.seed if s.seed is not None else 0
            elif "validation_path" in parts:
                self.error("E215", "a table has either a holdout or a validation table, not both", s.span)
        elif isinstance(s, st.ValidateClause):
            if "holdout" in parts:
                self.error("E215", "a table has either a holdout or a validation table, not both", s.span)
            elif once("validation_path", "a validation table"):
                parts["validation_path"], parts["validation_span"] = s.path, s.span
        elif isinstance(s, st.MissingClause):
            if s.policy not in ("fail", "drop"):
                self.error("E216", f"unknown missing-value policy '{s.policy}'", s.span,
                           hint="write `missing fail` (the default) or `missing drop`")
            elif once("missing", "a missing-value policy"):
                parts["missing"] = s.policy
        elif isinstance(s, st.GroupClause):
            if claim(s.name, s.span, "group"):
                self.groups[s.name] = s.columns
                parts["groups"] = tuple(parts.get("groups", ())) + ((s.name, s.columns),)
        elif isinstance(s, st.MapClause):
            m = self._feature_map(s)
            if m is not None and (m.name is None or claim(m.name, s.span, "feature map")):
                parts["maps"] = tuple(parts.get("maps", ())) + (m,)
                if m.name is not None:  # a fourier map's inputs form a group under its name
                    made = tt.map_fixed_names(m) or ()
                    self.groups[m.name] = made
                    parts["groups"] = tuple(parts.get("groups", ())) + ((m.name, made),)

    def _target_classes(self, s: st.TargetClause, parts: dict) -> None:
        """`target kind classes a, b, c`: three or more distinct labels (E254)."""
        labels = tuple(v for v, _span in s.classes)
        keys = [_label_key(v) for v in labels]
        for k, (v, span) in enumerate(s.classes):
            if keys[k] in keys[:k]:
                self.error("E254", f"class {_label_text(v)} is listed twice", span, hint="list each class once")
                return
        if len(labels) < 3:
            listed = ", ".join(_label_text(v) for v in labels)
            pair = (f"target {s.column}: {_label_text(labels[0])} -> +1, {_label_text(labels[1])} -> -1"
                    if len(labels) == 2 else f"target {s.column}: yes -> +1, no -> -1")
            self.error("E254", f"a target with classes needs three or more; this lists {len(labels)} ({listed})",
                       s.span, hint=f"for two classes map them to +1 and -1: {pair}, with a margin loss such as "
                       "logistic(y * s)")
            return
        parts["classes"] = labels

    def _feature_map(self, s: st.MapClause) -> tt.FeatureMap | None:
        """A map clause with its settings checked (E251: which settings; E252: their values)."""
        example = _MAP_EXAMPLES[s.kind]
        allowed, required = _MAP_SETTINGS[s.kind]
        given: dict[str, st.MapSetting] = {}
        ok = True
        for setting in s.settings:
            if setting.key not in allowed:
                close = self.suggest(setting.key, allowed)
                self.error("E251", f"`{s.kind}` has no setting '{setting.key}'"
                           + (f"; its settings are {', '.join(sorted(allowed))}" if allowed else "; it takes none"),
                           setting.span, hint=close or f"e.g. {example}")
                ok = False
            elif setting.key in given:
                self.error("E251", f"`{s.kind}` sets '{setting.key}' twice", setting.span, hint="keep one of them")
                ok = False
            else:
                given[setting.key] = setting
        missing = [k for k in required if k not in given]
        if missing:
            self.error("E251", f"`{s.kind}` needs its {' and '.join(missing)}", s.span, hint=f"e.g. {example}")
            ok = False
        if len(set(s.columns)) != len(s.columns):
            self.error("E252", f"`{s.kind}` lists a column twice", s.span, hint=f"e.g. {example}")
            ok = False
        if s.kind == "pairs" and len(s.columns) < 2:
            self.error("E252", "`pairs` multiplies columns two by two, so it needs two columns or more", s.span,
                       hint=f"e.g. {example}")
            ok = False

        def number(key: str, whole: bool, low: float, what: str) -> float | None:
            setting = given.get(key)
            if setting is None:
                return None
            v = setting.values[0] if len(setting.values) == 1 else None
            if not isinstance(v, float) or not math.isfinite(v) or v < low or (whole and not v.is_integer()):
                self.error("E252", f"the {key} of `{s.kind}` must be {what}, not "
                           f"{', '.join(f'{x:g}' if isinstance(x, float) else x for x in setting.values)}", setting.span,
                           hint=f"e.g. {example}")
                return None
            return v

        fields: dict = {}
        if "degree" in allowed:
            degree = number("degree", True, 1, "a whole number, 1 or more")
            ok = ok and ("degree" not in given or degree is not None)
            fields["degree"] = int(degree) if degree is not None else 1
            if degree is not None and s.kind == "monomials" and \
                    len(tt.map_exponents("monomials", len(s.columns), int(degree))) > _MAX_MAP_INPUTS:
                self.error("E252", f"`monomials` of {len(s.columns)} columns up to degree {int(degree)} makes more "
                           f"than {_MAX_MAP_INPUTS} inputs", given["degree"].span, hint="use fewer columns or a lower "
                           "degree, or `pairs`")
                ok = False
            elif degree is not None and degree > _MAX_MAP_DEGREE:
                self.error("E252", f"degree {int(degree)} is more than {_MAX_MAP_DEGREE}: its powers overflow "
                           "on ordinary data", given["degree"].span, hint=f"e.g. {example}")
                ok = False
        if s.kind == "fourier":
            count = number("count", True, 1, f"a whole number from 1 to {_MAX_MAP_INPUTS}")
            if count is not None and count > _MAX_MAP_INPUTS:
                self.error("E252", f"the count of `fourier` must be a whole number from 1 to {_MAX_MAP_INPUTS}, "
                           f"not {count:g}", given["count"].span, hint=f"e.g. {example}")
                count = None
            bandwidth = number("bandwidth", False, 0, "a positive number (the kernel's length scale)")
            if bandwidth == 0:
                self.error("E252", "the bandwidth of `fourier` must be a positive number (the kernel's length "
                           "scale), not 0", given["bandwidth"].span, hint=f"e.g. {example}")
                bandwidth = None
            seed = number("seed", True, 0, "a whole number, 0 or more")
            if seed is not None and seed >= 2 ** 63:
                self.error("E252", "the seed of `fourier` must be below 2^63", given["seed"].span)
                seed = None
            ok = ok and None not in (count, bandwidth, seed)
            if ok:
                fields.update(count=int(count), bandwidth=float(bandwidth), seed=int(seed), name=s.name)
        if s.kind == "spline" and "knots" in given:
            knots = given["knots"]
            qs = knots.values
            if not all(isinstance(q, float) and 0.0 < q < 1.0 for q in qs):
                self.error("E252", "the knots of `spline` are shares of the training rows strictly between 0 and 1 "
                           "(0% and 100%)", knots.span, hint=f"e.g. {example}")
                ok = False
            elif any(b <= a for a, b in zip(qs, qs[1:])):
                self.error("E252", "the knots of `spline` must be listed in increasing order, each once", knots.span,
                           hint=f"e.g. {example}")
                ok = False
            else:
                fields["quantiles"] = tuple(float(q) for q in qs)
        if s.kind == "onehot" and "unseen" in given:
            policy = given["unseen"].values
            if policy not in (("fail",), ("zeros",)):
                self.error("E252", f"`unseen` says what a category not seen in training does: `unseen fail` (the "
                           f"default: an error) or `unseen zeros` (every indicator 0), not "
                           f"{', '.join(str(v) for v in policy)}", given["unseen"].span)
                ok = False
            else:
                fields["unseen"] = policy[0]
        if not ok:
            return None
        return tt.FeatureMap(s.kind, s.columns, s.span, **fields)

    def _feature_columns(self, expr: st.Expr) -> tuple[str, ...]:
        """Report what in a feature formula breaks its rules (objc/feature_formula.py); list its columns."""
        # learn and tune usually come after the table block, so look at the whole spec
        not_columns = {BUILTIN_TARGET: "the target", BUILTIN_INPUTS: "the input matrix"}
        for s in self.tree.statements:
            if isinstance(s, st.LearnStmt):
                not_columns.update((i.name, "a learned parameter") for i in s.items)
            elif isinstance(s, st.TuneStmt):
                not_columns[s.name] = "a tunable"
            elif isinstance(s, st.ScoreStmt):
                not_columns[s.name] = "the score"
        checked = check_formula(expr, not_columns)
        self.errors.extend(replace(d, source_name=self.source.name) for d in checked.diagnostics)
        return checked.columns

    # ------------------------------------------------------------ expressions
    def expr(self, e: st.Expr, loss_env: dict[str, tt.TExpr] | None = None, where: str = "goal") -> tt.TExpr:
        """Resolve one expression; on an error, record it and return a harmless constant."""
        bad = tt.Const(0.0, e.span)
        if isinstance(e, st.Number):
            if not math.isfinite(e.value):
                self.error("E248", "this number is too large to represent", e.span, hint="use a smaller value")
            return tt.Const(e.value, e.span)
        if isinstance(e, st.Name):
            return self._name(e, loss_env, where) or bad
        if isinstance(e, st.Negate):
            inner = self.expr(e.operand, loss_env, where)
            return tt.Neg(inner, e.span, inner.shape, inner.depends)
        if isinstance(e, st.Binary):
            return self._binary(e, loss_env, where)
        if isinstance(e, st.Power):
            base = self.expr(e.base, loss_env, where)
            exp = e.exponent
            value = st.literal_number(exp)
            tuned = self._tunable_setting(exp, loss_env)
            if tuned is not None:
                return self._tuned_power(e, base, tuned) or bad
            if value is None:
                self.error("E219", "an exponent must be a literal number or a tunable", exp.span,
                           hint="write e.g. x ^ 2, or declare `tune q = 2 within 1 .. 4` and write x ^ q; an "
                                "expression as exponent is not allowed")
                return bad
            if base.shape.kind == "matrix":
                self.error("E220", "x is the input matrix; raise a column or a feature instead", base.span)
                return bad
            if not math.isfinite(value):
                self.error("E248", "this number is too large to represent", exp.span, hint="use a smaller value")
                return bad
            folded = base.value if isinstance(base, tt.Const) else (
                -base.operand.value if isinstance(base, tt.Neg) and isinstance(base.operand, tt.Const) else None)
            if folded is not None and folded < 0 and not float(value).is_integer():
                self.error("E249", f"a negative number to the power {value:g} is not a real number", e.span)
                return bad
            power = INFIX["^"]
            return tt.Apply(power.name, (base,), ((power.options[0].name, float(value)),), e.span, base.shape,
                            base.depends)
        if isinstance(e, st.Aggregate):
            reported = len(self.errors)
            inner = self.expr(e.operand, loss_env, where)
            if len(self.errors) > reported:
                return bad  # the operand is already reported; its stand-in value says nothing of its shape
            if inner.shape.kind == "rows":
                over = "rows"
            elif inner.shape.kind == "rowclasses":
                self.error("E221", f"`{e.kind}` needs one value per row; this is {inner.shape.describe()}", e.span,
                           hint=f"apply a multiclass loss first: {e.kind} softmax_ce(s, y)")
                return bad
            elif inner.shape.kind == "vector" and e.kind == "perrow":
                self.error("E250", "`perrow` divides by the number of rows, so it needs one value per row; this is "
                           f"{inner.shape.describe()}", e.span,
                           hint="average a vector's entries with `mean`, or add them with `sum`")
                return bad
            elif inner.shape.kind == "vector":
                over = "entries"
            else:
                self.error("E221", f"`{e.kind}` needs one value per row or a vector; this is "
                           f"{inner.shape.describe()}", e.span,
                           hint=f"drop `{e.kind}`, or apply it to a per-row expression such as hinge(y * s)")
                return bad
            return tt.Aggregate(e.kind, inner, over, e.span, SCALAR, inner.depends)
        if isinstance(e, st.Select):
            return self._select(e, loss_env, where)
        if isinstance(e, st.Call):
            return self._call(e, loss_env, where)
        raise AssertionError(f"unknown syntax node {e!r}")  # grammar and tree are out of step

    def _name(self, e: st.Name, loss_env, where: str) -> tt.TExpr | None:
        n = e.id
        if loss_env is not None:
            if n in loss_env:
                return loss_env[n]
            if n in self.tunables:
                t = self.tunables[n]
                return tt.TunableRef(n, t.default, t.low, t.high, e.span)
            self.error("E222", f"a loss is a function of its one variable; '{n}' is not allowed in its body",
                       e.span, hint="use only the loss's variable, numbers, tunables and catalog functions")
            return None
        if n in self.tunables:
            t = self.tunables[n]
            return tt.TunableRef(n, t.default, t.low, t.high, e.span)
        if n in self.params:
            p = self.params[n]
            shape = (WEIGHTS if p.vector else CLASSES) if p.by_classes else Shape("vector", None) if p.vector else SCALAR
            return tt.ParamRef(n, p.vector, e.span, shape)
        if self.score_stmt is not None and n == self.score_stmt.name:
            if where == "score":
                self.error("E223", "the score cannot refer to itself", e.span)
                return None
            if self.score is None:
                return None
            return replace(self.score, span=e.span)
        if n == BUILTIN_INPUTS:
            if self.table is None:
                self.error("E224", "`x` stands for the table's inputs, but the spec binds no table", e.span,
                           hint='add: table NAME from "file.csv" with an `inputs` clause')
                return None
            return tt.DataRef("x", "inputs", e.span, Shape("matrix", None))
        if n == BUILTIN_TARGET:
            if self.table is None or self.table.target is None:
                self.error("E225", "`y` stands for the table's target, but no `target` clause names it", e.span,
                           hint="add a clause: target COLUMN (with a label map for classification)")
                return None
            return tt.DataRef("y", "target", e.span)
        if n in self.columns:
            kind = "feature" if any(f.name == n for f in (self.table.features if self.table else ())) else "column"
            return tt.DataRef(n, kind, e.span)
        if n in self.losses or n in CATALOG:
            self.error("E226", f"'{n}' is a function; call it with an argument, e.g. {n}(y * s)", e.span)
            return None
        known = set(self.tunables) | set(self.params) | set(self.columns) | {BUILTIN_INPUTS, BUILTIN_TARGET}
        if self.score_stmt is not None:
            known.add(self.score_stmt.name)
        hint = self.suggest(n, known)
        if not hint and self.table is not None and self.table.explicit_inputs() is None:
            hint = "a column chosen by a pattern is used through x (w . x) or as x[\"name\"], not by bare name"
        self.error("E227", f"unknown name '{n}'", e.span, hint=hint or "declare it with `tune`, `learn`, "
                   "`score`, or list it under `inputs`")
        return None

    def _binary(self, e: st.Binary, loss_env, where: str) -> tt.TExpr:
        reported = len(self.errors)
        left = self.expr(e.left, loss_env, where)
        right = self.expr(e.right, loss_env, where)
        bad = tt.Const(0.0, e.span)
        if len(self.errors) > reported:
            return bad  # a side is already reported; its stand-in says nothing of its shape
        dep = _max_dep(left, right)
        if e.op == ".":
            return self._dot(left, right, e.span) or bad
        if "matrix" in (left.shape.kind, right.shape.kind):
            self.error("E228", "x is the input matrix; it can only appear in a dot product such as w . x",
                       (left if left.shape.kind == "matrix" else right).span, hint="write w . x")
            return bad
        shape = self._broadcast(left, right, e)
        if shape is None:
            return bad
        if e.op == "+":
            return tt.Add(left, right, e.span, shape, dep)
        if e.op == "-":
            neg = tt.Neg(right, right.span, right.shape, right.depends)
            return tt.Add(left, neg, e.span, shape, dep)
        if e.op == "*":
            return tt.Mul(left, right, e.span, shape, dep)
        if e.op == "/":
            return tt.Div(left, right, e.span, shape, dep)
        raise AssertionError(e.op)

    def _broadcast(self, left: tt.TExpr, right: tt.TExpr, e) -> Shape | None:
        a, b = left.shape, right.shape
        if a.kind == "scalar":
            return b
        if b.kind == "scalar":
            return a
        if a.kind == b.kind == "rows":
            return ROWS
        if {a.kind, b.kind} <= {"rowclasses", "classes"} and "rowclasses" in (a.kind, b.kind) and e.op in "+-":
            return ROW_CLASSES  # W . x + b: an intercept per class added to every row's K scores
        if "rowclasses" in (a.kind, b.kind) and "rows" in (a.kind, b.kind):
            self.error("E230", f"cannot combine {a.describe()} with {b.describe()}: with a target with classes the "
                       "score gives K values per row, and y holds each row's class, so y * s and y - s have no "
                       "meaning here", e.span,
                       hint="use a multiclass loss of the score and the target: softmax_ce(s, y), cs_hinge(s, y) or "
                            "ww_hinge(s, y)")
            return None
        if a.kind == b.kind == "vector":
            if a.names is not None and b.names is not None and len(a.names) != len(b.names):
                self.error("E229", f"vectors of different lengths ({len(a.names)} and {len(b.names)})", e.span)
                return None
            return a
        self.error("E230", f"cannot combine {a.describe()} with {b.describe()}", e.span,
                   hint="per-row expressions meet parameter vectors only through the score (w . x); "
                        "aggregate per-row values with mean or sum first")
        return None

    def _dot(self, left: tt.TExpr, right: tt.TExpr, span: Span) -> tt.TExpr | None:
        kinds = {left.shape.kind, right.shape.kind}
        if kinds == {"weights", "matrix"}:
            mat = right if left.shape.kind == "weights" else left
            if mat.shape.names is not None:
                self.error("E231", "a weight matrix learned by classes runs over every input; dot it with the whole "
                           "x", span, hint="write W . x")
                return None
            return tt.Dot(left, right, span, ROW_CLASSES, _max_dep(left, right))
        if "weights" in kinds or "classes" in kinds:
            self.error("E232", f"a parameter learned by classes enters the score as W . x + b (W over inputs by "
                       f"classes, b by classes); got {left.shape.describe()} . {right.shape.describe()}", span,
                       hint="write score s = W . x + b")
            return None
        if kinds == {"vector", "matrix"}:
            vec = left if left.shape.kind == "vector" else right
            mat = right if vec is left else left
            if vec.shape.names != mat.shape.names and None not in (vec.shape.names, mat.shape.names):
                if len(vec.shape.names) != len(mat.shape.names):
                    self.error("E231", "the two sides of the dot product select different inputs", span,
                               hint="select the same inputs on both sides, e.g. w[a, b] . x[a, b]")
                    return None
            elif (vec.shape.names is None) != (mat.shape.names is None):
                self.error("E231", "the two sides of the dot product select different inputs", span,
                           hint="use w . x, or select the same inputs on both sides: w[a, b] . x[a, b]")
                return None
            return tt.Dot(left, right, span, ROWS, _max_dep(left, right))
        if kinds == {"vector"}:
            return tt.Dot(left, right, span, SCALAR, _max_dep(left, right))
        self.error("E232", f"a dot product takes a weight vector and x (or two vectors); got "
                   f"{left.shape.describe()} and {right.shape.describe()}", span, hint="write w . x")
        return None

    def _select(self, e: st.Select, loss_env, where: str) -> tt.TExpr:
        base = self.expr(e.base, loss_env, where)
        bad = tt.Const(0.0, e.span)
        if not ((isinstance(base, tt.ParamRef) and base.vector) or
                (isinstance(base, tt.DataRef) and base.kind == "inputs")):
            self.error("E233", "only a weight vector over the inputs (e.g. w) or x can be indexed by input names",
                       e.span)
            return bad
        if isinstance(base, tt.ParamRef) and base.shape.kind in ("weights", "classes"):
            self.error("E256", f"'{base.name}' is learned by classes: selecting its entries by name is not supported",
                       e.span, hint=f"penalize or bound the whole parameter ({base.name} as it is: l2sq({base.name}), "
                                    f"l1({base.name}), inputs_l2({base.name}), keep {base.name} >= 0)")
            return bad
        names: list[str] = []
        explicit = self.table.explicit_inputs() if self.table else None
        for key in e.keys:
            if key in self.groups:
                names.extend(self.groups[key])
            elif explicit is not None and key not in explicit:
                self.error("E234", f"'{key}' is not one of the inputs", e.span,
                           hint=self.suggest(key, set(explicit) | set(self.groups)) or
                           "inputs: " + ", ".join(explicit))
                return bad
            else:
                names.append(key)
        if len(set(names)) != len(names):
            self.error("E235", "an input is selected twice", e.span)
            return bad
        if isinstance(base, tt.DataRef):
            if len(names) == 1:
                return tt.DataRef(names[0], "column", e.span)
            return tt.DataRef("x", "inputs", e.span, Shape("matrix", tuple(names)))
        shape = Shape("vector", tuple(names)) if len(names) > 1 else SCALAR
        return tt.ParamRef(base.name, True, e.span, shape, "params", tuple(names))

    def _call(self, e: st.Call, loss_env, where: str) -> tt.TExpr:
        bad = tt.Const(0.0, e.span)
        if e.func in self.losses:
            return self._custom_loss(e, loss_env, where) or bad
        if e.func == GROUP_NORM:
            return self._group_norm(e, loss_env, where) or bad
        entry = CATALOG.get(e.func)
        if entry is None:
            hint = self.suggest(e.func, set(CATALOG) | set(self.losses) | {GROUP_NORM})
            self.error("E236", f"unknown function '{e.func}'", e.func_span,
                       hint=hint or "see docs/language.md for the catalog, or define it with `loss`")
            return bad
        n_expr = len(e.args) if entry.arity == 0 else min(len(e.args), entry.arity)
        if entry.arity == 0 and len(e.args) < 2:
            self.error("E237", f"{e.func} takes two or more arguments", e.span)
            return bad
        if entry.arity and len(e.args) < entry.arity:
            self.error("E237", f"{e.func} takes {entry.arity} argument(s), got {len(e.args)}", e.span,
                       hint=f"{e.func}: {entry.formula}")
            return bad
        reported = len(self.errors)
        args = tuple(self.expr(a, loss_env, where) for a in e.args[:n_expr])
        if len(self.errors) > reported:
            return bad  # an argument is already reported; its stand-in says nothing of its shape
        literal_options = []
        tuned: list[tuple[str, tt.TunableRef]] = []
        for k, a in enumerate(e.args[n_expr:]):
            v = a.value if isinstance(a, st.Number) else (
                -a.operand.value if isinstance(a, st.Negate) and isinstance(a.operand, st.Number) else None)
            ref = self._tunable_setting(a, loss_env)
            if ref is not None and k < len(entry.options):
                if not self._tunable_range_admitted(entry.name, entry.options[k], ref, a.span):
                    return bad
                tuned.append((entry.options[k].name, ref))
                v = ref.default
            elif ref is not None:
                v = ref.default  # one setting too many: resolve_options says so below
            if v is None:
                self.error("E238", f"the setting of {e.func} must be a literal number or a tunable", a.span,
                           hint=(f"e.g. {e.func}(r, {entry.options[0].default:g}), or a tunable declared with "
                                 "`tune`" if entry.options else ""))
                return bad
            literal_options.append(v)
        try:
            options = entry.resolve_options(tuple(literal_options))
        except ValueError as err:
            self.error("E239", str(err), e.span)
            return bad
        if entry.infix and tuned:
            return self._tuned_power(e, args[0], tuned[0][1]) or bad
        for a in args:
            if a.shape.kind == "matrix":
                self.error("E228", "x is the input matrix; it can only appear in a dot product such as w . x",
                           a.span, hint="write w . x")
                return bad
        if entry.role == "multiclass":
            return self._multiclass_loss(e, entry, args) or bad
        if entry.kind == "norm" and args[0].shape.kind in ("weights", "classes"):
            a = args[0]
            if not entry.on_class_matrix or (entry.name == "l2" and a.shape.kind == "weights"):
                ok = [n for n, en in CATALOG.items() if en.on_class_matrix and en.trainable
                      and (a.shape.kind == "classes" or n != "l2")]
                self.error("E240", f"{e.func} does not apply to {a.shape.describe()}", e.span,
                           hint="norms of a parameter learned by classes: " + ", ".join(f"{n}({render_name(a)})"
                                                                              for n in ok))
                return bad
            return tt.Apply(entry.name, args, tuple(options.items()), e.span, SCALAR, a.depends, tuple(tuned))
        if entry.on_class_matrix == "only":
            self.error("E240", f"{e.func} sums the L2 norm of each input's weights across the classes; it takes a "
                       "weight matrix learned by classes (learn W over inputs by classes)", e.span,
                       hint=f"write {e.func}(W); for a weight vector, group_l2(w) or l2(w)")
            return bad
        for a in args:
            if a.shape.kind in ("weights", "classes", "rowclasses"):
                self.error("E230", f"{e.func} takes a number or one value per row; its argument is "
                           f"{a.shape.describe()}", a.span,
                           hint="the K scores of a row go into a multiclass loss (softmax_ce(s, y), cs_hinge(s, y), "
                                "ww_hinge(s, y)); a parameter learned by classes into a norm such as l2sq(W)")
                return bad
        if entry.kind == "norm":
            a = args[0]
            if a.shape.kind != "vector":
                self.error("E240", f"{e.func} is a norm of a weight vector; its argument is {a.shape.describe()}",
                           e.span, hint=f"write {e.func}(w)" + (" (per-row losses go inside mean or sum)"
                                                                 if a.shape.kind == "rows" else ""))
                return bad
            return tt.Apply(entry.name, args, tuple(options.items()), e.span, SCALAR, a.depends, tuple(tuned))
        softplus_arg = _softplus_form(entry.name, args)
        if softplus_arg is not None:
            # log(1 + exp(u)) is softplus(u): the same function, in the form the composition rules can
            # prove convex (and that evaluates without overflow)
            return tt.Apply("softplus", (softplus_arg,), (), e.span, softplus_arg.shape, softplus_arg.depends)
        shape = SCALAR
        for a in args:
            if a.shape.kind != "scalar":
                if shape.kind != "scalar" and shape.kind != a.shape.kind:
                    self.error("E230", f"cannot combine {shape.describe()} with {a.shape.describe()}", e.span)
                    return bad
                shape = a.shape
        return tt.Apply(entry.name, args, tuple(options.items()), e.span, shape, _max_dep(*args), tuple(tuned))

    def _multiclass_loss(self, e: st.Call, entry, args: tuple[tt.TExpr, ...]) -> tt.TExpr | None:
        """softmax_ce(s, y) and the multiclass hinges: the K scores of each row and the row's class."""
        s, y = args
        example = f"{e.func}(s, y)"
        if self.table is None or not self.table.classes:
            self.error("E255", f"{e.func} is a loss over K >= 3 classes, but the target has no classes", e.span,
                       hint="list the classes (target kind classes a, b, c) and learn W over inputs by classes, b "
                            "by classes; for a +1/-1 target use a margin loss such as logistic(y * s) or hinge(y * s)")
            return None
        if s.shape.kind != "rowclasses":
            why = ("; a weight vector gives one score per row: learn W over inputs by classes"
                   if s.shape.kind == "rows" else "")
            self.error("E255", f"the first argument of {e.func} is the K scores of each row (a score W . x + b with "
                       f"W learned by classes); it is {s.shape.describe()}{why}", e.args[0].span,
                       hint=f"learn W over inputs by classes, b by classes; score s = W . x + b; then {example}")
            return None
        if not (isinstance(y, tt.DataRef) and y.kind == "target"):
            self.error("E255", f"the second argument of {e.func} is the target y (each row's class)", e.args[1].span,
                       hint=f"write {example}")
            return None
        return tt.Apply(entry.name, args, (), e.span, ROWS, "params")

    def _normalized_like_rows(self, goal: tt.TExpr) -> tt.TExpr:
        """A data-scaled norm (dropridge) averages the rows exactly as the goal's per-row loss does: it
        takes the one row aggregate of the goal (mean, perrow or sum) and is refused when there is none
        or several kinds."""
        uses = _second_moment_uses(goal)
        if not uses:
            return goal
        kinds = sorted({a.kind for a in _row_aggregates(goal)})
        if len(kinds) != 1:
            said = ("the goal has no per-row term (mean, sum or perrow over the rows)" if not kinds else
                    f"the goal's per-row terms use {' and '.join(kinds)}")
            self.error("E270", f"{uses[0].entry} averages its inputs' squares over the rows the way the goal's "
                       f"per-row loss does, and {said}", uses[0].span,
                       hint="use one of mean, sum or perrow for every per-row term of the goal")
            return goal
        kind = kinds[0]

        def bind(e: tt.TExpr) -> tt.TExpr:
            e = tt.map_children(e, bind)
            return replace(e, rows=kind) if isinstance(e, tt.Apply) and CATALOG[e.entry].reads_second_moments else e
        return bind(goal)

    def _tunable_setting(self, e: st.Expr, loss_env) -> tt.TunableRef | None:
        """The tunable a setting or exponent names, if it is a bare tunable name (not a loss's variable)."""
        if not isinstance(e, st.Name) or e.id not in self.tunables or (loss_env is not None and e.id in loss_env):
            return None
        t = self.tunables[e.id]
        return tt.TunableRef(t.name, t.default, t.low, t.high, e.span)

    def _tunable_range_admitted(self, func: str, opt, ref: tt.TunableRef, use: Span) -> bool:
        """A setting holds for every value a fit or a sweep may give its tunable, so the WHOLE declared
        range must lie inside the setting's domain (the domain is an interval: both ends suffice)."""
        if opt.admits(ref.low) and opt.admits(ref.high):
            return True
        t = self.tunables[ref.name]
        bad_end = ref.low if not opt.admits(ref.low) else ref.high
        lo, hi = max(ref.low, opt.low), min(ref.high, opt.high)
        width = hi - lo if math.isfinite(hi - lo) and hi > lo else 1.0
        if lo == opt.low and opt.low_open:
            lo = opt.low + 0.05 * width
        if hi == opt.high and opt.high_open:
            hi = opt.high - 0.05 * width
        fix = ""
        if lo <= hi:
            default = min(max(ref.default, lo), hi)
            fix = f"e.g. tune {ref.name} = {default:g} within {lo:.3g} .. {hi:.3g}"
        self.error("E239", f"tunable '{ref.name}' sets {func}'s {opt.name} ({opt.meaning}), which must lie in "
                   f"{opt.describe_range()}; its declared range {ref.low:g} .. {ref.high:g} reaches {bad_end:g}",
                   t.range_span or t.span,
                   hint=f"declare a range inside {opt.describe_range()}" + (f": {fix}" if fix else ""),
                   notes=(f"used as the setting of {func} at line {use.line}, column {use.column}",))
        return False

    def _tuned_power(self, e, base: tt.TExpr, ref: tt.TunableRef) -> tt.TExpr | None:
        """base ^ q for a tunable q: its curvature over q's whole declared range is the checker's job."""
        if base.shape.kind == "matrix":
            self.error("E220", "x is the input matrix; raise a column or a feature instead", base.span)
            return None
        folded = base.value if isinstance(base, tt.Const) else (
            -base.operand.value if isinstance(base, tt.Neg) and isinstance(base.operand, tt.Const) else None)
        if folded is not None and folded < 0:
            self.error("E249", f"a negative number to the tunable power '{ref.name}' is not a real number for "
                       "fractional values of it", e.span, hint="raise a nonnegative number")
            return None
        power = INFIX["^"]
        key = power.options[0].name
        return tt.Apply(power.name, (base,), ((key, float(ref.default)),), e.span, base.shape, base.depends,
                        ((key, ref),))

    def _custom_loss(self, e: st.Call, loss_env, where: str) -> tt.TExpr | None:
        d = self.losses[e.func]
        if len(e.args) != 1:
            self.error("E237", f"loss {d.name} takes one argument, got {len(e.args)}", e.span,
                       hint=f"defined at line {d.span.line}: loss {d.name}({d.param}) = ...")
            return None
        if d.name in self._loss_stack:
            self.error("E241", f"loss {d.name} refers to itself", e.span)
            return None
        arg = self.expr(e.args[0], loss_env, where)
        self._loss_stack.append(d.name)
        body = self.expr(d.expr, {d.param: arg}, where)
        self._loss_stack.pop()
        return tt.CustomLoss(d.name, arg, body, d.param, d.span, e.span, body.shape, _max_dep(arg, body))

    def _group_norm(self, e: st.Call, loss_env, where: str) -> tt.TExpr | None:
        if len(e.args) != 1:
            self.error("E237", f"{GROUP_NORM} takes one argument (a weight vector)", e.span)
            return None
        arg = self.expr(e.args[0], loss_env, where)
        if isinstance(arg, tt.ParamRef) and arg.shape.kind in ("weights", "classes"):
            self.error("E240", f"{GROUP_NORM} sums norms over groups of a weight vector; for a matrix learned by "
                       "classes, inputs_l2(W) sums the norm of each input's weights across the classes", e.span,
                       hint="write inputs_l2(W)")
            return None
        if not (isinstance(arg, tt.ParamRef) and arg.vector and arg.shape.names is None):
            self.error("E240", f"{GROUP_NORM} takes the whole weight vector, e.g. {GROUP_NORM}(w)", e.span)
            return None
        if not self.groups:
            self.error("E242", f"{GROUP_NORM} sums an L2 norm per group, but the table declares no `group`",
                       e.span, hint="declare groups in the table block: group color = red, green, blue")
            return None
        total: tt.TExpr | None = None
        for gname, cols in self.groups.items():
            part = tt.ParamRef(arg.name, True, e.span, Shape("vector", cols), "params", cols)
            norm = tt.Apply("l2", (part,), (), e.span, SCALAR, "params")
            total = norm if total is None else tt.Add(total, norm, e.span, SCALAR, "params")
        return total

    # ------------------------------------------------------------ whole spec
    def run(self) -> tt.ResolvedSpec:
        self.declare()
        if self.score_stmt is not None:
            expr = self.expr(self.score_stmt.expr, None, "score")
            if expr.shape.kind not in ("rows", "scalar", "rowclasses"):
                self.error("E243", f"the score must give one value per row (or, with classes, K values per row); "
                           f"it is {expr.shape.describe()}", self.score_stmt.expr.span,
                           hint="write score s = W . x + b" if self.table is not None and self.table.classes
                           else "write score s = w . x + b")
            self.score = tt.ScoreRef(self.score_stmt.name, expr, self.score_stmt.span,
                                     ROW_CLASSES if expr.shape.kind == "rowclasses" else ROWS)
        goals = [s for s in self.tree.statements if isinstance(s, st.GoalStmt)]
        goal: tt.TExpr = tt.Const(0.0, Span(1, 1, 1, 2))
        goal_span = Span(1, 1, 1, 2)
        if not goals:
            self.error("E244", "the spec has no `goal` statement: nothing to minimize", Span(1, 1, 1, 2),
                       hint="add e.g.: goal mean logistic(y * s) + 0.5 * l2sq(w)")
        else:
            for extra in goals[1:]:
                self.error("E245", "a spec has one goal; add terms to it with + instead", extra.span)
            goal_span = goals[0].span
            goal = self._normalized_like_rows(self.expr(goals[0].expr))
            if goal.shape.kind != "scalar":
                self.error("E246", f"the goal must be a single number; it is {goal.shape.describe()}",
                           goals[0].expr.span, hint="wrap per-row losses in mean or sum: mean hinge(y * s)")
        if not self.params:
            self.error("E247", "nothing is learned: the spec has no `learn` statement", goal_span,
                       hint="add: learn w over inputs, b")
        constraints = []
        for s in self.tree.statements:
            if isinstance(s, st.KeepStmt):
                left, right = self.expr(s.left, None, "keep"), self.expr(s.right, None, "keep")
                for use in _second_moment_uses(left) + _second_moment_uses(right):
                    self.error("E271", f"{use.entry} is a penalty that reads the training rows; it cannot bound "
                               "the weights in a `keep` constraint", use.span,
                               hint="move it into the goal, or bound l2sq(w) instead")
                constraints.append(tt.Constraint(left, s.op, right, s.span))
        for name, stmt in self.losses.items():  # a loss defined but never used is still checked
            self.expr(stmt.expr, {stmt.param: tt.Const(0.0, stmt.span)}, "loss")
        if self.errors:
            # a loss body is resolved at each use and once more on its own: report each problem once
            raise SpecError(tuple(dict.fromkeys(self.errors)), self.source)
        return tt.ResolvedSpec(self.source.name, self.source.text, self.table, tuple(self.tunables.values()),
                               tuple(self.params.values()), self.score, goal, goal_span, tuple(constraints),
                               tuple(self.losses))


def render_name(e: tt.TExpr) -> str:
    return e.name if isinstance(e, tt.ParamRef) else "W"


def _row_aggregates(e: tt.TExpr) -> list[tt.Aggregate]:
    found = [e] if isinstance(e, tt.Aggregate) and e.over == "rows" else []
    for child in tt.children(e):
        found += _row_aggregates(child)
    return found


def _second_moment_uses(e: tt.TExpr) -> list[tt.Apply]:
    found = [e] if isinstance(e, tt.Apply) and CATALOG[e.entry].reads_second_moments else []
    for child in tt.children(e):
        found += _second_moment_uses(child)
    return found


def _label_key(v: str | float) -> tuple[str, str | float]:
    """A class label compared as the table holds it: text with text, numbers with numbers."""
    return ("text", v) if isinstance(v, str) else ("number", float(v))


def _label_text(v: str | float) -> str:
    return v if isinstance(v, str) else f"{v:g}"


def _softplus_form(name: str, args: tuple[tt.TExpr, ...]) -> tt.TExpr | None:
    """The u of log(1 + exp(u)), log(exp(u) + 1) or log1p(exp(u)), else None."""
    def exp_arg(e: tt.TExpr) -> tt.TExpr | None:
        return e.args[0] if isinstance(e, tt.Apply) and e.entry == "exp" else None
    if name == "log1p" and len(args) == 1:
        return exp_arg(args[0])
    if name == "log" and len(args) == 1 and isinstance(args[0], tt.Add):
        left, right = args[0].left, args[0].right
        for one, other in ((left, right), (right, left)):
            if isinstance(one, tt.Const) and one.value == 1.0 and exp_arg(other) is not None:
                return exp_arg(other)
    return None


def resolve(tree: st.SpecTree, source: SourceText) -> tt.ResolvedSpec:
    """Bind names and shapes; raise SpecError listing every problem found."""
    return _Resolver(source, tree).run()
