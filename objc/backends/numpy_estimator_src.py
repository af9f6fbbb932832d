"""The estimator and the command line of every generated NumPy module, copied from here by source.

Like numpy_solvers_src.py, every top-level function and class here is copied into the generated
module (imports excluded); names such as SPEC, run_solver and decision_values are the module's
own. The generated module adds `class Model(EstimatorBase)` with the spec's tunables as keyword
arguments.
"""

import math
import re
import sys

import numpy as np

# imported here so the file runs as a module of objc; a generated module drops every import of this file
# and has these names itself (the solver code, the maps' math and the missing-cell spellings, pasted in)
from objc.backends.numpy_solvers_src import (_default_input_names, _is_sparse, as_data_matrix, decision_values,
                                             resolve_tunables, run_solver)
from objc.cells import MISSING_CELLS as _MISSING_CELLS
from objc.tables import map_category_text, map_fit, map_outputs, map_unseen_rows, standard_scales
# the spec's table is the generated module's own (SPEC = {...}, written before this code); this stand-in
# only lets the file import as a module of objc. An annotated assignment, so it is not copied.
SPEC: dict = {}


# ---------------------------------------------------------------- the estimator

class EstimatorBase:
    """scikit-learn conventions without scikit-learn: fit / predict / decision_function / score,
    get_params / set_params, fitted attributes ending in '_'."""

    _param_names = ()

    def get_params(self, deep=True):
        return {name: getattr(self, name) for name in self._param_names}

    def set_params(self, **params):
        for key, value in params.items():
            if key not in self._param_names:
                raise ValueError(f"Invalid parameter {key!r} for estimator {type(self).__name__}. "
                                 f"Valid parameters are: {sorted(self._param_names)!r}.")
            setattr(self, key, value)
        return self

    def __repr__(self):
        args = ", ".join(f"{k}={v!r}" for k, v in self.get_params().items())
        return f"{type(self).__name__}({args})"

    def __sklearn_tags__(self):
        # only scikit-learn calls this, so importing it here adds no dependency
        from sklearn.utils import ClassifierTags, InputTags, RegressorTags, Tags, TargetTags
        classifier = SPEC["task"] == "margin"
        return Tags(estimator_type="classifier" if classifier else "regressor",
                    target_tags=TargetTags(required=True),
                    classifier_tags=ClassifierTags(multi_class=False) if classifier else None,
                    regressor_tags=None if classifier else RegressorTags(),
                    input_tags=InputTags(sparse=True))

    # ---- helpers

    def _tunable_values(self):
        return {spec_name: float(getattr(self, arg)) for spec_name, arg in SPEC["tunable_arguments"].items()}

    def _matrix(self, X, reset):
        if X is None:
            raise ValueError(f"{type(self).__name__} needs X (a 2D array), got None")
        names = None
        table = SPEC["table"]
        if hasattr(X, "columns") and not _is_sparse(X):
            if table is not None:
                # the spec's inputs by name, its derived inputs, and its feature maps (fitted on the rows fit sees)
                X, names, state = _frame_inputs(X, table, None if reset else getattr(self, "map_state_", None))
                if reset:
                    self.map_state_ = state
            else:
                names = tuple(str(c) for c in X.columns)
        elif table is not None and table["features"]:
            raise ValueError("the spec derives inputs (" + ", ".join(f for f, _fn in table["features"])
                             + ") from named columns: pass X as a pandas DataFrame holding the table's columns")
        if not _is_sparse(X):
            X = np.asarray(X)
            if np.iscomplexobj(X):
                raise ValueError("Complex data not supported")
            if X.dtype == object:
                X = X.astype(np.float64)  # a TypeError or ValueError here names the bad value
            if X.ndim == 1:
                raise ValueError("Expected 2D array, got 1D array instead. Reshape your data either using "
                                 "array.reshape(-1, 1) if your data has a single feature or array.reshape(1, -1) "
                                 "if it contains a single sample.")
        X = as_data_matrix(X)
        n, p = X.shape
        if n == 0:
            raise ValueError(f"Found array with 0 sample(s) (shape={X.shape}) while a minimum of 1 is required.")
        if p == 0:
            raise ValueError(f"Found array with 0 feature(s) (shape={X.shape}) while a minimum of 1 is required.")
        if reset:
            self.n_features_in_ = p
            if names is not None:
                self.feature_names_in_ = np.asarray(names, dtype=object)
            elif hasattr(self, "feature_names_in_"):
                del self.feature_names_in_
        elif p != self.n_features_in_:
            raise ValueError(f"X has {p} features, but {type(self).__name__} is expecting {self.n_features_in_} "
                             "features as input.")
        return X, names

    def _input_names(self, names, p):
        if names is not None:
            return names
        return _default_input_names(SPEC, p)

    def _standardized(self, X, fitting):
        table = SPEC["table"]
        if table is None or not table["standardize"]:
            return X
        if _is_sparse(X):
            raise ValueError("the spec standardizes its inputs, which would densify a sparse X; pass a dense array")
        if fitting:
            names = list(getattr(self, "feature_names_in_", ()))
            unscaled = _map_unscaled(table, getattr(self, "map_state_", None))  # onehot indicators stay 0/1
            means, scales, problems = standard_scales(X, [j < len(names) and names[j] in unscaled
                                                          for j in range(X.shape[1])])
            if problems:
                raise ValueError(_scaling_refusal(problems, names))
            self.input_mean_, self.input_scale_ = means, scales
        return (X - self.input_mean_) / self.input_scale_

    def _check_fitted(self):
        if not hasattr(self, "params_"):
            message = (f"This {type(self).__name__} instance is not fitted yet. Call 'fit' with appropriate "
                       "arguments before using this estimator.")
            # scikit-learn's own error type when scikit-learn is already loaded (never imported here)
            loaded = sys.modules.get("sklearn.exceptions")
            raise (loaded.NotFittedError if loaded is not None else _NotFitted)(message)

    # ---- the public methods

    def fit(self, X, y=None, sample_weight=None):
        if y is None:
            raise ValueError(f"{type(self).__name__} requires y to be passed, but the target y is None")
        X, names = self._matrix(X, reset=True)
        n, p = X.shape
        y = np.asarray(y)
        if y.ndim == 2 and y.shape[1] == 1:
            import warnings  # here, not at the top: the generated module's header imports only what the solver needs
            # scikit-learn's warning type when scikit-learn is already loaded (never imported here)
            loaded = sys.modules.get("sklearn.exceptions")
            warnings.warn("A column-vector y was passed when a 1d array was expected; it is read as one column",
                          loaded.DataConversionWarning if loaded is not None else UserWarning, stacklevel=2)
            y = y.ravel()
        if y.ndim != 1 or y.shape[0] != n:
            raise ValueError(f"y must hold one value per row of X ({n}), got shape {y.shape}")
        c = np.ones(n) if sample_weight is None else np.asarray(sample_weight, dtype=np.float64).ravel()
        if c.shape[0] != n:
            raise ValueError(f"sample_weight has {c.shape[0]} values for {n} rows")
        if SPEC["task"] == "margin":
            if y.dtype.kind == "f" and not np.all(np.isfinite(y)):
                raise ValueError("y holds NaN or infinity")
            if y.dtype.kind == "f" and np.any(y != np.round(y)):
                raise ValueError("Unknown label type: continuous target; this model separates two classes")
            table = SPEC["table"]
            if table is not None and table["label_map"]:
                # the spec says which value is +1: classes_ is [the -1 value, the +1 value], so that
                # classes_[1] is still the class a positive score predicts
                target, self.classes_ = _mapped_target(y, table["label_map"], table["target"])
            else:
                self.classes_, labels = np.unique(y, return_inverse=True)
                if len(self.classes_) != 2:
                    count = len(self.classes_)
                    raise ValueError(f"Only binary classification is supported: this model separates two classes; "
                                     f"y holds {count} class"
                                     f"{'' if count == 1 else 'es'} ({', '.join(map(str, self.classes_[:5]))})")
                target = np.where(labels == 1, 1.0, -1.0)  # classes_[1] is the positive class
            if table is not None:
                for label, weight in table["class_weights"]:
                    c = np.where(target == label, c * weight, c)
        else:
            try:
                target = y.astype(np.float64)
            except (TypeError, ValueError) as err:
                raise ValueError(f"y must be numeric for this regression spec: {err}") from None
        if not np.all(np.isfinite(target)):
            raise ValueError("y holds NaN or infinity")
        X = self._standardized(X, fitting=True)
        self.input_names_ = self._input_names(names, p)
        out = run_solver(SPEC, X, target, c, self.input_names_, self._tunable_values(), self.tol, self.max_passes,
                         self.allow_nonconvex, None, None, self.use_scipy, getattr(self, "param_tol", 1e-6))
        self.params_ = out["params"]
        score_table = SPEC["score"]
        w_name, b_name = score_table["weights"], score_table["intercept"]
        if w_name is not None:
            self.coef_ = np.asarray(self.params_[w_name], dtype=np.float64)
            self.intercept_ = float(self.params_[b_name]) if b_name is not None else 0.0
        self.objective_ = out["objective"]
        self.certificate_ = out["certificate"]
        self.status_ = out["status"]
        self.method_ = out["method"]
        self.n_iter_ = out["iterations"]
        self.passes_ = out["passes"]
        return self

    def _decision(self, X):
        self._check_fitted()
        X, names = self._matrix(X, reset=False)
        X = self._standardized(X, fitting=False)
        return decision_values(SPEC, self.params_, X, self.input_names_, self._tunable_values())

    def predict(self, X):
        s = self._decision(X)
        if SPEC["task"] == "margin":
            return self.classes_[(s > 0).astype(int)]
        return s

    def score(self, X, y, sample_weight=None):
        """Accuracy for a margin spec, R^2 otherwise (scikit-learn's defaults)."""
        y = np.asarray(y)
        pred = self.predict(X)
        w = np.ones(len(y)) if sample_weight is None else np.asarray(sample_weight, dtype=np.float64)
        if SPEC["task"] == "margin":
            return float(np.sum(w * (pred == y)) / np.sum(w))
        y = y.astype(np.float64)
        mean = np.sum(w * y) / np.sum(w)
        total = np.sum(w * (y - mean) ** 2)
        residual = np.sum(w * (y - pred) ** 2)
        return float(1.0 - residual / total) if total > 0 else (1.0 if residual == 0 else 0.0)


class _FrameColumns:
    """A DataFrame's columns as float arrays, by name, for the spec's derived-input formulas."""

    def __init__(self, frame, data):
        self.frame, self.data = frame, data

    def __getitem__(self, name):
        if name not in self.data:
            if name not in [str(c) for c in self.frame.columns]:
                raise ValueError(f"a derived input of the spec reads column {name!r}, which X does not have")
            self.data[name] = _frame_column(self.frame, name)
        return self.data[name]


def _frame_column(frame, name):
    # columns are matched by their names as text (a frame's labels may be numbers)
    key = next(c for c in frame.columns if str(c) == name)
    try:
        return np.asarray(frame[key], dtype=np.float64)
    except (TypeError, ValueError):
        raise ValueError(f"column {name!r} of X is not numeric") from None


def _scaling_refusal(problems, names):
    """Why `standardize` cannot scale these rows (the problems `standard_scales` found), in objc's words."""
    j, why, top = problems[0]
    name = repr(names[j]) if j < len(names) else f"{j + 1} (counting from 1)"
    more = f" (and {len(problems) - 1} more)" if len(problems) > 1 else ""
    if why == "overflow":
        return (f"input {name}{more} holds values too large to standardize (up to {top:.6g}; their spread "
                "overflows): rescale the column")
    return f"input {name}{more} is constant on these rows: `standardize` would divide by zero; leave it out"


def _map_unscaled(table, state):
    """The names of the onehot indicators, which `standardize` leaves 0/1."""
    out = set()
    for m, st in zip(table.get("maps", ()), state or ()):
        if m["kind"] == "onehot":
            out.update(c + "=" + cat for c in m["columns"] for cat in st["categories"][c])
    return out


def _apply_maps(table, cells_of, numbers_of, data, chosen, state, fail):
    """Append every feature map's inputs to `data` and `chosen` (in place); `state` is the maps'
    fitted state (None: fit it on these rows). Returns the state. The map math is objc's own,
    copied into this module (map_fit, map_outputs)."""
    fitting = state is None
    state = [] if fitting else state
    made = set(chosen)
    for k, m in enumerate(table.get("maps", ())):
        cols = {c: ([map_category_text(v) for v in cells_of(c)] if m["kind"] == "onehot" else numbers_of(c))
                for c in m["columns"]}
        if fitting:
            st = map_fit(m, cols)
            if m["kind"] == "onehot":
                for c in m["columns"]:
                    if len(st["categories"][c]) < 2:
                        fail(f"column {c!r} of `onehot` holds one category only")
            if m["kind"] == "spline":
                # objc's rule (T165): two knots that meet, or one at an end of the column, repeat a basis column
                x, knots = cols[m["columns"][0]], st["knots"]
                if any(b <= a for a, b in zip(knots, knots[1:])) or knots[0] <= np.min(x) or knots[-1] >= np.max(x):
                    fail(f"the knots of `spline` {m['columns'][0]!r} collapse on the training rows (two meet, or one "
                         "sits at an end of the column)")
            state.append(st)
        else:
            st = state[k]
            if m["unseen"] == "fail":
                for c, bad, values in map_unseen_rows(m, st, cols):
                    fail(f"column {c!r} holds categories not seen in training: "
                         + ", ".join(repr(v) for v in values[:5]) + f" (data row {int(bad[0]) + 1} first)")
        for name, value in map_outputs(m, st, cols):
            if not np.all(np.isfinite(value)):  # objc's T161: a map's input must be finite on every row it reads
                fail(f"input {name!r} made by `{m['kind']}` is NaN or infinite on "
                     f"{int(np.count_nonzero(~np.isfinite(value)))} row(s) (it overflows)")
            if name not in made:
                made.add(name)
                data[name] = value
                chosen.append(name)
    return state


def _frame_inputs(frame, table, state=None):
    """X as the spec's table clause reads it: the named, matched or `all` inputs in its order, then
    each `feature` computed from the columns, then each feature map's inputs (fitted when `state`
    is None); returns (matrix, input names, the maps' state)."""
    by_name = {str(c): c for c in frame.columns}

    def fail(message):
        raise ValueError(f"X: {message}")
    chosen = _select_inputs(table, list(by_name), lambda c: np.asarray(frame[by_name[c]]).dtype.kind in "biuf",
                            fail)
    data = {c: _frame_column(frame, c) for c in chosen}
    n = len(frame)
    for fname, fn in table["features"]:
        with np.errstate(all="ignore"):
            data[fname] = np.broadcast_to(fn(_FrameColumns(frame, data)), (n,)).astype(np.float64)
        chosen.append(fname)

    def cells_of(name):
        if name not in by_name:
            fail(f"a feature map of the spec reads column {name!r}, which X does not have")
        return list(np.asarray(frame[by_name[name]], dtype=object))
    numbers = _FrameColumns(frame, data)
    state = _apply_maps(table, cells_of, lambda c: (cells_of(c), numbers[c])[1], data, chosen, state, fail)
    if not chosen:
        raise ValueError("X holds none of the spec's inputs")
    return np.column_stack([data[c] for c in chosen]), tuple(chosen), state


def _label_matches(cells, value):
    """Cells equal to a label-map value: text against text, numbers against numbers."""
    if isinstance(value, str):
        return np.array([isinstance(c, str) and c == value for c in cells], dtype=bool)
    out = np.zeros(len(cells), dtype=bool)
    for i, c in enumerate(cells):
        if not isinstance(c, (str, bytes, bool, np.bool_)):
            try:
                out[i] = float(c) == float(value)
            except (TypeError, ValueError):
                pass
    return out


def _mapped_target(y, label_map, target_name):
    """+1/-1 per row through the spec's label map, and the classes as [-1 value, +1 value]."""
    cells = y.tolist()
    target = np.full(len(cells), np.nan)
    first = {}
    for value, label in label_map:
        hit = _label_matches(cells, value) & np.isnan(target)
        target[hit] = label
        first.setdefault(label, value)
    unknown = list(dict.fromkeys(c for c, t in zip(cells, target) if np.isnan(t)))
    if unknown:
        listed = ", ".join(repr(v) for v in unknown[:5]) + (", ..." if len(unknown) > 5 else "")
        known = ", ".join(f"{v!r} -> {lab:+g}" for v, lab in label_map)
        raise ValueError(f"y holds {listed}, which the spec's label map for {target_name!r} does not list "
                         f"({known}); pass the target in the values the spec maps")
    if len(set(target.tolist())) != 2:
        raise ValueError("y holds one class only; a margin loss needs both the +1 and the -1 class")
    return target, np.array([first[-1.0], first[1.0]])


class ClassifierBase(EstimatorBase):
    """A margin spec: labels from the sign of the score, which decision_function returns."""

    def decision_function(self, X):
        return self._decision(X)

    @property
    def predict_proba(self):
        """Class probabilities per row, columns in the order of classes_: present only where the spec's
        loss has a probabilistic reading (see `_probability_term`), so hasattr tells, as in scikit-learn."""
        if _probability_term(SPEC, self._tunable_values()) is None:
            raise AttributeError(f"{type(self).__name__} has no predict_proba: the spec's loss has no probabilistic "
                                 "reading (that needs one smooth, classification-calibrated margin loss, such as "
                                 "logistic(y * s))")
        return self._class_probabilities

    def _class_probabilities(self, X):
        s = self._decision(X)
        tunables = self._tunable_values()
        rows = _probability_term(SPEC, tunables)["rows"]
        ones = np.ones_like(s)
        return class_probabilities(rows(s, ones, {}, tunables)[1], rows(s, -ones, {}, tunables)[1])


def _probability_term(spec, tunables):
    """The goal's one per-row term when it is a catalog margin loss of y * s that is smooth and
    classification-calibrated, else None. For a convex loss differentiable at 0, calibrated means a
    negative derivative at margin 0 (Bartlett, Jordan & McAuliffe, JASA 2006), which the term's own
    derivative function tells; objc's estimator reads the same fact from the catalog."""
    rows = [t for t in spec["terms"] if t["kind"] == "rows"]
    if len(rows) != 1 or rows[0].get("role") != "margin" or rows[0].get("loss") is None or not rows[0]["smooth"]:
        return None
    at_zero = rows[0]["rows"](np.zeros(1), np.ones(1), {}, tunables)[1]
    return rows[0] if float(np.asarray(at_zero).ravel()[0]) < 0 else None


def class_probabilities(d_pos, d_neg):
    """[P(y = -1), P(y = +1)] per row from the derivatives in the score s of the per-row loss at
    y = +1 (d_pos) and at y = -1 (d_neg): the probability at which s minimizes the expected loss,
    P(+1) d_pos + P(-1) d_neg = 0 (Zhang, Annals of Statistics 2004). For logistic loss this is
    1 / (1 + exp(-s)). For a smooth, calibrated, nonincreasing margin loss d_neg - d_pos > 0 at every s,
    and computing each column from its own derivative keeps a tiny probability accurate."""
    d_pos = np.asarray(d_pos, dtype=np.float64)
    d_neg = np.asarray(d_neg, dtype=np.float64)
    total = d_neg - d_pos
    return np.column_stack([-d_pos / total, d_neg / total])


class _NotFitted(ValueError, AttributeError):
    pass


# ---------------------------------------------------------------- the command line

class TableError(Exception):
    """Bad input to the command line: printed as one message, exit status 1."""


def _read_csv(path):
    import csv
    try:
        with open(path, newline="", encoding="utf-8-sig") as handle:  # a byte-order mark is no part of a name
            rows = list(csv.reader(handle))
    except OSError as err:
        raise TableError(f"{path}: cannot read the table: {err.strerror or err}") from None
    except UnicodeDecodeError as err:
        raise TableError(f"{path}: not UTF-8 text ({err.reason} at byte {err.start})") from None
    except csv.Error as err:
        raise TableError(f"{path}: not a readable CSV file: {err}") from None
    if not rows:
        raise TableError(f"{path}: the file is empty")
    header = [h.strip() for h in rows[0]]
    if "" in header:
        raise TableError(f"{path}: line 1: column {header.index('') + 1} has no name (a trailing comma makes one)")
    if len(set(header)) != len(header):
        raise TableError(f"{path}: line 1: a column name appears twice")
    # as objc's reader (pandas.read_csv) takes records: a line that is empty or blank is no row, a record of
    # empty cells is a row of missing values, and a short record's last cells are missing
    blank = [len(r) <= 1 and not "".join(r).strip() for r in rows]
    for k, r in enumerate(rows[1:], start=2):
        if not blank[k - 1] and len(r) > len(header):
            raise TableError(f"{path}: line {k}: {len(r)} fields, the header has {len(header)}")
    body = [r + [""] * (len(header) - len(r)) for r, skip in zip(rows[1:], blank[1:]) if not skip]
    # cells as written: " yes" is not the label "yes" (objc reads them so); float() allows the blanks of " 1"
    columns = {name: [r[j] for r in body] for j, name in enumerate(header)}
    return header, columns, len(body)


# A cell is a number exactly where objc's table reader reads one (pandas.read_csv's inference, then
# pandas.to_numeric for a column with text in it, objc/tables.py): ASCII decimal notation with an optional sign
# and exponent, or inf / infinity in any case, ASCII blanks around it allowed; a column whose every cell (but the
# missing ones) is true or false in any case reads as 1 and 0. Python's float() takes more, which pandas reads
# as text: digit underscores, non-ASCII digits, every spelling of nan. Checked against objc's reader cell by cell
# (tests/backends/test_numpy_estimator_src.py).
_NUMBER_CELL = re.compile(r"[ \t\n\r\f\v]*[+-]?(?:(?:[0-9]+\.?[0-9]*|\.[0-9]+)(?:[eE][+-]?[0-9]+)?|(?i:inf(?:inity)?))"
                          r"[ \t\n\r\f\v]*")
_BOOLEAN_CELLS = {"true": 1.0, "false": 0.0}


def _column_numbers(cells):
    """(the cells as float64, missing ones NaN; the 0-based rows whose cells are text): objc's reading."""
    values = np.full(len(cells), np.nan)
    present = [i for i, cell in enumerate(cells) if cell not in _MISSING_CELLS]
    if present and all(cells[i].lower() in _BOOLEAN_CELLS for i in present):
        for i in present:
            values[i] = _BOOLEAN_CELLS[cells[i].lower()]
        return values, []
    text = []
    for i in present:
        if _NUMBER_CELL.fullmatch(cells[i]):
            values[i] = float(cells[i])
        else:
            text.append(i)
    return values, text


def _numeric(path, name, cells):
    values, text = _column_numbers(cells)
    if text:
        raise TableError(f"{path}: data row {text[0] + 1}, column {name!r}: {cells[text[0]]!r} is not a number")
    return values  # an infinite value is treated as a missing one, by the spec's `missing` rule, as objc does


def _select_inputs(table, header, numeric, fail):
    """The spec's input columns among `header`, in the spec's order: named, matched by a pattern, or
    every column `numeric(name)` accepts for `all`, less the target, the row weights and `except`;
    `fail(message)` raises the caller's own error. The one selection rule of the module's command
    line and of its estimator given a DataFrame."""
    import fnmatch
    reserved = {c for c in (table["target"], table["row_weight"]) if c is not None}
    for text in table["excluded"]:
        if text not in header:
            fail(f"excluded column {text!r} is not in the table")
    chosen = []
    for kind, text in table["inputs"]:
        if kind == "column":
            if text not in header:
                fail(f"input column {text!r} is not in the table")
            if text in reserved:
                role = "target" if text == table["target"] else "row-weight column"
                fail(f"{text!r} is the {role}; it cannot also be an input")
            chosen.append(text)
        elif kind == "pattern":
            matched = [c for c in header if fnmatch.fnmatchcase(c, text) and c not in reserved]
            if not matched:
                fail(f"pattern {text!r} matches no column")
            chosen += matched
        else:
            chosen += [c for c in header if c not in reserved and c not in table["excluded"] and numeric(c)]
    return [c for c in dict.fromkeys(chosen) if c not in table["excluded"]]


def _choose_inputs(path, table, header, columns):
    def numbers_only(name):
        # objc's `all`: a numeric column, or one of numbers with a few stray text cells (more finite numbers
        # than text), which is then refused for its text rather than silently left out
        values, text = _column_numbers(columns[name])
        finite = int(np.count_nonzero(np.isfinite(values)))
        return not text or finite > len(text)

    def fail(message):
        raise TableError(f"{path}: {message}")
    chosen = _select_inputs(table, header, numbers_only, fail)
    if not chosen:
        raise TableError(f"{path}: no input column selected")
    return chosen


def _target_values(path, table, columns):
    """(y, missing, unlisted): the target per row (NaN where missing or not in the label map), the rows whose
    cell is missing (or, in a column of numbers, infinite) and the rows whose value the label map does not list.
    As objc reads a target: a column of numbers is matched by value against the map's numbers, a column with
    text in it by text against the map's words (its cells are text, so a number in the map matches none)."""
    name = table["target"]
    if name is None:
        raise TableError("the spec names no target column")
    if name not in columns:
        raise TableError(f"{path}: target column {name!r} is not in the table")
    cells = columns[name]
    if table["label_map"] is None:
        y = _numeric(path, name, cells)
        return y, ~np.isfinite(y), np.zeros(len(cells), dtype=bool)
    values, text = _column_numbers(cells)
    numbers = not text
    missing = ~np.isfinite(values) if numbers else np.array([cell in _MISSING_CELLS for cell in cells], dtype=bool)
    y = np.full(len(cells), np.nan)
    for value, label in table["label_map"]:
        if numbers:
            hit = values == float(value) if not isinstance(value, str) else np.zeros(len(cells), dtype=bool)
        else:
            hit = np.array([isinstance(value, str) and cell == value for cell in cells], dtype=bool)
        y[hit & np.isnan(y) & ~missing] = label
    return y, missing, np.isnan(y) & ~missing


def load_table(path):
    """X, y, row weights and input names from a CSV, by the spec's table clauses; also the
    standardization used (or None)."""
    table = SPEC["table"]
    if table is None:
        raise TableError("the spec has no table clause, so the command line cannot read a table")
    header, columns, n = _read_csv(path)
    if n == 0:
        raise TableError(f"{path}: the table has no data rows")
    inputs = _choose_inputs(path, table, header, columns)
    data = {name: _numeric(path, name, columns[name]) for name in inputs}
    for fname, fn in table["features"]:
        with np.errstate(all="ignore"):
            data[fname] = np.broadcast_to(fn(_LazyNumeric(path, columns, data)), (n,)).astype(np.float64)
        inputs.append(fname)
    if SPEC["needs_target"]:
        y, y_missing, unlisted = _target_values(path, table, columns)
    else:
        y, y_missing, unlisted = np.zeros(n), np.zeros(n, dtype=bool), np.zeros(n, dtype=bool)
    c = np.ones(n)
    if table["row_weight"] is not None:
        if table["row_weight"] not in columns:
            raise TableError(f"{path}: row-weight column {table['row_weight']!r} is not in the table")
        c = _numeric(path, table["row_weight"], columns[table["row_weight"]])
    if table["class_weights"] and SPEC["task"] != "margin":
        raise TableError(f"{path}: class weights need a +1/-1 target; the target {table['target']!r} is real")
    X = np.column_stack([data[name] for name in inputs])
    # the rows objc drops (or refuses under `missing fail`): a missing or infinite cell in a column the spec
    # reads (the inputs, the columns features and maps read, the row weights, the target)
    features = {fname for fname, _fn in table["features"]}
    bad = y_missing | ~np.isfinite(c)
    for name, values in data.items():
        if name not in features:
            bad |= ~np.isfinite(values)
    lazy = _LazyNumeric(path, columns, data)
    for m in table.get("maps") or ():
        for name in m["columns"]:
            if name not in columns:
                raise TableError(f"{path}: column {name!r} of `{m['kind']}` is not in the table")
            if m["kind"] == "onehot":
                bad |= np.array([cell in _MISSING_CELLS for cell in columns[name]], dtype=bool)
            else:
                bad |= ~np.isfinite(lazy[name])
    if np.any(bad) and table["missing"] != "drop":
        first = int(np.flatnonzero(bad)[0]) + 1
        raise TableError(f"{path}: data row {first} has a missing or infinite value (the spec says `missing fail`)")
    # on the rows kept, a feature must be defined and every target value listed (objc computes features and
    # reads labels after the drop, so a dropped row's own values never refuse the table)
    for fname, _fn in table["features"]:
        wrong = np.flatnonzero(~np.isfinite(data[fname]) & ~bad)
        if len(wrong):
            raise TableError(f"{path}: data row {wrong[0] + 1}: feature {fname!r} is NaN or infinite there")
    wrong = np.flatnonzero(unlisted & ~bad)
    if len(wrong):
        cell = columns[table["target"]][wrong[0]]
        raise TableError(f"{path}: data row {wrong[0] + 1}, column {table['target']!r}: {cell!r} is not in the spec's "
                         "label map")
    if np.all(bad):  # objc's T121, before any map is fitted on no row
        raise TableError(f"{path}: no data row is left once the rows with a missing value are dropped")
    map_state = None
    if table.get("maps"):
        # the maps are fitted on the rows kept after missing values, as objc fits them
        keep_rows = np.flatnonzero(~bad)
        kept = {name: v[keep_rows] for name, v in data.items()}
        for name in {c for m in table["maps"] for c in m["columns"] if m["kind"] != "onehot"}:
            kept[name] = lazy[name][keep_rows]

        def fail(message):
            raise TableError(f"{path}: {message}")
        chosen = list(inputs)
        map_state = _apply_maps(table, lambda name: [columns[name][i] for i in keep_rows], lambda name: kept[name],
                                kept, chosen, None, fail)
        inputs = chosen
        X, y, c, bad = np.column_stack([kept[name] for name in inputs]), y[keep_rows], c[keep_rows], bad[keep_rows]
    if np.any(bad):  # only under `missing drop`: `missing fail` refused above
        X, y, c = X[~bad], y[~bad], c[~bad]
    if np.any(c < 0):
        raise TableError(f"{path}: data row {int(np.flatnonzero(c < 0)[0]) + 1}: a negative row weight")
    if len(y) == 0:
        raise TableError(f"{path}: no data row is left once the rows with a missing value are dropped")
    if not np.any(c > 0):
        raise TableError(f"{path}: every row weight is zero: there is nothing to train on")
    if SPEC["task"] == "margin" and SPEC["needs_target"] and len(np.unique(y)) < 2:
        raise TableError(f"{path}: the target column {table['target']!r} holds one class only; a margin loss "
                         "needs rows of both classes")
    for label, weight in table["class_weights"]:
        c = np.where(y == label, c * weight, c)
    if table["holdout"] is not None:
        fraction, seed = table["holdout"]
        k = int(round(fraction * len(y)))
        if k < 1 or k >= len(y):
            raise TableError(f"{path}: holding out {fraction * 100:g}% of {len(y)} rows leaves "
                             f"{'no row to hold out' if k < 1 else 'no row to train on'}")
        order = np.random.default_rng(seed).permutation(len(y))  # the same split as `objc fit`
        keep = np.sort(order[k:])
        X, y, c = X[keep], y[keep], c[keep]
        if SPEC["task"] == "margin" and SPEC["needs_target"] and len(np.unique(y)) < 2:
            raise TableError(f"{path}: the training part of the holdout split holds one class only")
    stats = None
    if table["standardize"]:
        unscaled = _map_unscaled(table, map_state)  # onehot indicators stay 0/1, as objc leaves them
        mean, scale, problems = standard_scales(X, [name in unscaled for name in inputs])
        if problems:
            raise TableError(f"{path}: {_scaling_refusal(problems, list(inputs))}")
        X = (X - mean) / scale
        stats = {"names": list(inputs), "means": mean.tolist(), "scales": scale.tolist()}
    if map_state is not None:
        stats = dict(stats or {}, maps=[{k: (v.tolist() if hasattr(v, "tolist") else v) for k, v in st.items()}
                                        for st in map_state])
    return X, y, c, tuple(inputs), stats


class _LazyNumeric:
    def __init__(self, path, columns, data):
        self.path, self.columns, self.data = path, columns, data

    def __getitem__(self, name):
        if name not in self.data:
            if name not in self.columns:
                raise TableError(f"{self.path}: a derived input reads column {name!r}, which is not in the table")
            self.data[name] = _numeric(self.path, name, self.columns[name])
        return self.data[name]


def _write_json_atomic(path, payload):
    import json
    import os
    import tempfile
    folder = os.path.dirname(os.path.abspath(path))
    handle, temp = tempfile.mkstemp(prefix=".model-", suffix=".json", dir=folder)
    try:
        mask = os.umask(0o022)  # mkstemp makes the file 0600: give it the mode a new file gets from the umask
        os.umask(mask)
        os.fchmod(handle, 0o666 & ~mask)
        with os.fdopen(handle, "w", encoding="utf-8") as out:
            json.dump(payload, out, indent=2, allow_nan=False)
            out.write("\n")
        os.replace(temp, path)
    except BaseException:
        if os.path.exists(temp):
            os.remove(temp)
        raise


def main(argv=None):
    """python module.py TABLE.csv -o model.json [--tol T] [--max-passes N] [--set NAME=VALUE]"""
    import argparse
    parser = argparse.ArgumentParser(description=f"Train the objective of {SPEC['name']!r} on a CSV table and "
                                                 "write the weights as JSON.")
    parser.add_argument("table", help="CSV file with a header row")
    parser.add_argument("-o", "--output", required=True, help="JSON file to write")
    parser.add_argument("--tol", type=float, default=1e-6, help="relative certificate to reach (default 1e-6)")
    parser.add_argument("--param-tol", default="1e-6", metavar="X",
                        help="stop only once the weights are within X of the optimum (certified where the objective is "
                             "strongly convex in all of them); 'off' switches this off (default 1e-6)")
    parser.add_argument("--max-passes", type=int, default=None, help="budget of passes over the data")
    parser.add_argument("--set", action="append", default=[], metavar="NAME=VALUE", help="a tunable's value")
    parser.add_argument("--allow-nonconvex", action="store_true", help="run a local method on a non-convex spec")
    args = parser.parse_args(argv)
    try:
        tunables = {}
        for item in args.set:
            name, sep, value = item.partition("=")
            if not sep:
                raise TableError(f"--set {item!r}: write NAME=VALUE")
            try:
                tunables[name.strip()] = float(value)
            except ValueError:
                raise TableError(f"--set {item!r}: {value!r} is not a number") from None
        param_tol = None if args.param_tol.strip().lower() == "off" else _positive(args.param_tol, "--param-tol")
        X, y, c, names, stats = load_table(args.table)
        maps = stats.pop("maps", None) if stats else None  # the feature maps' state, reported on its own
        stats = stats or None
        out = run_solver(SPEC, X, y, c, names, tunables, args.tol, args.max_passes, args.allow_nonconvex,
                         param_tol=param_tol)
    except (TableError, ValueError) as err:
        print(f"error: {err}", file=sys.stderr)
        return 1
    params = {}
    for name, value in out["params"].items():
        params[name] = dict(zip(names, np.asarray(value).tolist())) if np.ndim(value) else float(value)
    payload = {
        "spec": SPEC["name"], "spec_sha256": SPEC["sha256"], "verdict": SPEC["verdict"], "inputs": list(names),
        "params": params, "objective": out["objective"], "status": out["status"], "method": out["method"],
        "certificate": out["certificate"], "passes": out["passes"], "standardization": stats, "maps": maps,
        "tunables": resolve_tunables(SPEC, tunables),
    }
    try:
        _write_json_atomic(args.output, payload)
    except (OSError, ValueError) as err:
        print(f"error: cannot write {args.output}: {err}", file=sys.stderr)
        return 1
    cert = out["certificate"]
    distance = "no certified distance" if cert["distance"] is None else f"distance to the optimum <= {cert['distance']:.3g}"
    print(f"{out['status']}: objective {out['objective']:.10g}, {cert['kind']} {cert['absolute']:.3g} "
          f"(relative {cert['relative']:.3g}), {distance}, {out['passes']} passes; wrote {args.output}")
    return 0


def _positive(text, option):
    try:
        value = float(text)
    except ValueError:
        raise TableError(f"{option} {text!r}: write a positive number, or off") from None
    if not (math.isfinite(value) and value > 0):
        raise TableError(f"{option} {text!r}: write a positive number, or off")
    return value
