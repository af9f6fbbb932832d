"""scikit-learn estimators built from a spec: the spec's tunables are the estimator's parameters.

    from objc import spec_estimator
    model = spec_estimator("spec.objc", lam=0.1)        # or the spec's text
    GridSearchCV(model, {"lam": [0.01, 0.1, 1.0]}).fit(X, y)

`spec_estimator_class(spec)` makes one class per spec (cached by the spec's text) whose `__init__`
names every tunable, so get_params / set_params / clone work as scikit-learn's own estimators do;
instances pickle by the spec's text and their state. Training is `objc fit`'s: X and y become a
DataFrame bound by the spec's table clause (tables.bind_table: inputs by name, `feature` lines,
label map, row and class weights, standardization) and training.run_backend solves it. The spec's
holdout or validation table is not used: the caller's model selection holds rows out.

Needs scikit-learn (the optional test dependency); `import objc` does not import this module.
"""

from __future__ import annotations

import functools
import inspect
import warnings
from dataclasses import replace
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import scipy.sparse
from sklearn.base import BaseEstimator, ClassifierMixin, RegressorMixin
from sklearn.exceptions import ConvergenceWarning, DataConversionWarning
from sklearn.utils.metaestimators import available_if
from sklearn.utils.multiclass import type_of_target
from sklearn.utils.validation import check_is_fitted

from objc import tables, training
from objc.backends.numpy_estimator_src import class_probabilities
from objc.backends.numpy_module import _python_arguments
from objc.catalog import CATALOG, Entry
from objc.checker import CheckedObjective
from objc.diagnostics import Diagnostic, SpecError
from objc.frontend import check_file, check_text
from objc.source_text import NO_SPAN

# the settings every spec's estimator takes besides its tunables (a tunable of the same name is renamed)
OPTIONS = {"backend": "numpy", "tol": 1e-6, "param_tol": 1e-6}


class EstimatorInputError(SpecError, ValueError):
    """A SpecError that is also a ValueError, the type scikit-learn's checks and model selection
    expect for a bad spec, bad data or a bad setting."""


class EstimatorTypeError(EstimatorInputError, TypeError):
    """X holds a value that is no number at all (a dict, ...): also a TypeError, as NumPy's own."""


def _error(code: str, message: str, source_name: str, hint: str = "",
           kind: type[EstimatorInputError] = EstimatorInputError) -> EstimatorInputError:
    return kind((Diagnostic(code, message, NO_SPAN, hint=hint, source_name=source_name),))


def _as_input_error(err: SpecError) -> EstimatorInputError:
    return EstimatorInputError(err.diagnostics, err.source, err.warnings)


# ---------------------------------------------------------------- the spec

def _read_spec(spec: str | Path) -> tuple[str, str]:
    """(text, name) of a spec given as a path (a Path, or a one-line string) or as its text."""
    if isinstance(spec, Path) or (isinstance(spec, str) and "\n" not in spec):
        try:
            return check_file(spec).spec.text, str(spec)
        except SpecError as err:
            raise _as_input_error(err) from None
    if isinstance(spec, str):
        return spec, "<spec>"
    raise _error("E460", f"spec must be a path or the text of a spec, not {type(spec).__name__}", "<spec>")


@functools.lru_cache(maxsize=32)
def _checked(text: str, name: str) -> CheckedObjective:
    """The checked spec, once per process and text (the spec is pure text; checking it has no effects)."""
    try:
        checked = check_text(text, name)
        training.require_trainable(checked)
    except SpecError as err:
        raise _as_input_error(err) from None
    return checked


def _tunable_arguments(checked: CheckedObjective) -> dict[str, str]:
    """Estimator argument of each tunable (spec name -> Python name): the generated module's names,
    with `_value` added where a name is one of OPTIONS or `spec`."""
    arguments = _python_arguments(tuple(t.name for t in checked.spec.tunables))
    taken = set(arguments.values()) | set(OPTIONS) | {"spec"}
    for name, argument in arguments.items():
        if argument in OPTIONS or argument == "spec":
            candidate, k = f"{argument}_value", 2
            while candidate in taken:
                candidate, k = f"{argument}_value{k}", k + 1
            taken.add(candidate)
            arguments[name] = candidate
    return arguments


def _probability_loss(checked: CheckedObjective, tunables: dict[str, float]) -> tuple[Entry, dict] | None:
    """The catalog loss whose reading gives class probabilities: the goal's one per-row term, a
    margin loss of y * s that the catalog marks smooth and classification-calibrated; else None."""
    rows = [t for t in checked.terms if t.kind == "rows"]
    if len(rows) != 1 or rows[0].known_loss is None:
        return None
    entry = CATALOG[rows[0].known_loss[0]]
    options = rows[0].body.option_values(tunables)
    if entry.role != "margin" or not entry.calibrated or not entry.smooth(options):
        return None
    return entry, options


# ---------------------------------------------------------------- the estimators

class SpecEstimator(BaseEstimator):
    """A linear model trained on a spec's objective. Made per spec by `spec_estimator_class`; the
    parameters are `spec`, the spec's tunables, `backend` (numpy or cvxpy), `tol` and `param_tol`.

    Fitted attributes: params_ (every learned parameter by name), coef_ and intercept_ (for a score
    w . x + b), input_names_ (the columns of the bound table, derived inputs last), standardization_,
    fit_result_ (status, objective, certificate), n_iter_, n_features_in_, feature_names_in_ (frames)."""

    _spec_text: str = ""
    _spec_name: str = ""
    _arguments: dict[str, str] = {}

    def __reduce__(self):
        # the class is made at run time: rebuild it from the spec's text, then restore the state
        return _restore, (self._spec_text, self._spec_name), self.__getstate__()

    def __sklearn_tags__(self):
        tags = super().__sklearn_tags__()
        tags.input_tags.allow_nan = False
        return tags

    # ---- the spec of this estimator

    def _spec(self) -> tuple[str, str]:
        if self.spec == self._spec_text:
            return self._spec_text, self._spec_name
        return _read_spec(self.spec)

    def _checked_spec(self) -> CheckedObjective:
        text, name = self._spec()
        checked = _checked(text, name)
        if name != self._spec_name or text != self._spec_text:
            own = {t.name for t in _checked(self._spec_text, self._spec_name).spec.tunables}
            other = {t.name for t in checked.spec.tunables}
            if own != other or training.task_of(checked) != self._task:
                raise _error("E461", f"the spec set with set_params has tunables {sorted(other)} and task "
                             f"{training.task_of(checked)!r}; this estimator was made for {sorted(own)} and "
                             f"{self._task!r}", name, hint="make an estimator for that spec: spec_estimator(spec)")
        return checked

    def _tunables(self, checked: CheckedObjective) -> dict[str, float]:
        given = {}
        for name, argument in self._arguments.items():
            value = getattr(self, argument)
            try:
                given[name] = float(value)
            except (TypeError, ValueError):
                raise _error("E462", f"tunable {argument} must be a number, not {value!r}", self._spec_name) from None
        try:
            return training.tunable_values(checked, given)
        except SpecError as err:
            raise _as_input_error(err) from None

    # ---- data

    def _frame(self, X: Any, checked: CheckedObjective, fitting: bool) -> pd.DataFrame:
        """X as a table the spec's clause can bind: a DataFrame as it is (columns by name), an array
        with the columns the spec's inputs name, in their order."""
        name = checked.source.name
        kind = type(self).__name__
        if X is None:
            raise _error("E463", f"{kind} needs X (a 2D array or a DataFrame), got None", name)
        if scipy.sparse.issparse(X):
            raise _error("E463", "X is a sparse matrix; a spec's table is bound dense", name,
                         hint="pass X.toarray() (or a dense DataFrame)")
        if isinstance(X, pd.DataFrame):
            columns = [str(c) for c in X.columns]
            if fitting:
                self.n_features_in_ = X.shape[1]
                if all(isinstance(c, str) for c in X.columns):
                    self.feature_names_in_ = np.asarray(columns, dtype=object)
                elif hasattr(self, "feature_names_in_"):
                    del self.feature_names_in_
                self.array_columns_ = tuple(columns)  # a plain array given later is read as these columns
            frame = X.copy()
            frame.columns = columns
            return frame
        array = np.asarray(X)
        if np.iscomplexobj(array):
            raise _error("E463", "Complex data not supported", name)
        if array.dtype == object:
            try:
                array = array.astype(np.float64)
            except (TypeError, ValueError) as err:
                raise _error("E463", f"X holds a value that is not a number: {err}", name,
                             kind=EstimatorTypeError if isinstance(err, TypeError) else EstimatorInputError) from None
        if array.ndim != 2:
            raise _error("E463", f"Expected 2D array, got {array.ndim}D array instead: X must be rows x inputs. "
                         "Reshape your data: array.reshape(-1, 1) for a single input, array.reshape(1, -1) for a "
                         "single row", name)
        n, p = array.shape
        if n == 0 or p == 0:
            raise _error("E463", f"Found array with {n} sample(s) and {p} feature(s) (shape={array.shape}) while a "
                         "minimum of 1 is required for each", name)
        if fitting:
            columns = self._array_columns(checked, p)
            self.n_features_in_ = p
            if hasattr(self, "feature_names_in_"):
                del self.feature_names_in_
        else:
            if p != self.n_features_in_:
                raise _error("E464", f"X has {p} features, but {kind} is expecting {self.n_features_in_} features "
                             f"as input ({', '.join(self.array_columns_)})", name)
            if hasattr(self, "feature_names_in_"):
                warnings.warn(f"X does not have valid feature names, but {kind} was fitted with feature names",
                              UserWarning, stacklevel=3)
            columns = list(self.array_columns_)
        return pd.DataFrame(array, columns=columns)

    def _array_columns(self, checked: CheckedObjective, p: int) -> list[str]:
        """The names of a plain array's columns at fit: the inputs the spec names, in its order."""
        tb = checked.spec.table
        name = checked.source.name
        named = tb.explicit_inputs()
        if tb.maps:  # a map reads columns by name (a onehot column may hold text)
            raise _error("E464", "the spec maps named columns (" + ", ".join(sorted({c for m in tb.maps
                         for c in m.columns})) + "): X must be a DataFrame holding the table's columns", name)
        if named is not None:
            plain = [c for c in named if c not in {f.name for f in tb.features}]
            if p != len(plain):
                raise _error("E464", f"X has {p} columns, but the spec's inputs are {len(plain)}: "
                             f"{', '.join(plain)}", name,
                             hint="pass those columns in that order, or a DataFrame holding them by name")
            self.array_columns_ = tuple(plain)
        elif all(i.kind == "all" for i in tb.inputs) and not tb.features:
            self.array_columns_ = tuple(f"x{j}" for j in range(p))  # `inputs all`: every column, as given
        else:
            raise _error("E464", "the spec picks its inputs by a pattern or derives them from named columns: "
                         "X must be a DataFrame holding the table's columns", name)
        return list(self.array_columns_)

    def _encoded_target(self, y: Any, n: int, checked: CheckedObjective) -> np.ndarray:
        """y as the table's target column: raw values where the spec maps labels, +1/-1 by
        scikit-learn's convention (classes_[1] is +1) where it does not, reals for a residual loss."""
        name = checked.source.name
        if y is None:
            raise _error("E465", f"{type(self).__name__} requires y to be passed, but the target y is None", name)
        y = np.asarray(y)
        if y.ndim == 2 and y.shape[1] == 1:
            warnings.warn("A column-vector y was passed when a 1d array was expected; it is read as one column",
                          DataConversionWarning, stacklevel=3)
            y = y.ravel()
        if y.ndim != 1 or y.shape[0] != n:
            raise _error("E465", f"y must hold one value per row of X ({n}), got shape {y.shape}", name)
        if self._task == "multiclass":
            return self._class_target(y, checked)
        if self._task != "margin":
            try:
                return y.astype(np.float64)
            except (TypeError, ValueError) as err:
                raise _error("E465", f"y must be numeric for a residual loss: {err}", name) from None
        label_map = checked.spec.table.label_map
        if label_map is not None and label_map.pairs:
            first: dict[float, Any] = {}
            for value, label in label_map.pairs:
                first.setdefault(float(label), value)
            classes = [first.get(-1.0), first.get(1.0)]
            if y.dtype.kind in "biuf" and all(isinstance(c, float) and float(y.dtype.type(c)) == c for c in classes):
                self.classes_ = np.asarray(classes, dtype=y.dtype)  # the labels as y writes them
            else:
                self.classes_ = np.asarray(classes, dtype=object)
            return y.astype(object) if y.dtype.kind not in "biuf" else y
        kind = type_of_target(y, input_name="y")
        if kind not in ("binary", "multiclass"):
            raise _error("E465", f"Unknown label type: {kind}; this spec separates two classes", name)
        self.classes_ = np.unique(y)
        if len(self.classes_) != 2:
            count = len(self.classes_)
            raise _error("E465", f"Only binary classification is supported. This spec separates two classes; y "
                         f"holds {count} class"
                         f"{'' if count == 1 else 'es'} ({', '.join(map(str, self.classes_[:5]))})", name)
        return np.where(y == self.classes_[1], 1.0, -1.0)

    def _bind(self, frame: pd.DataFrame, checked: CheckedObjective, fitting: bool) -> tables.BoundData:
        """The frame bound as `objc fit` binds a table (at fit, under the spec's `missing` rule); for
        a prediction every row must be complete, since a dropped row would have no prediction."""
        tb = checked.spec.table
        try:
            if fitting:
                return tables.bind_table(tb, Path("."), self._task, source_name=checked.source.name, frame=frame)
            tb = replace(tb, row_weight=None, row_weight_span=None, class_weights=(), missing="fail")
            return tables.bind_table(tb, Path("."), self._task, source_name=checked.source.name, frame=frame,
                                     standardization=self.standardization_, input_names=self.input_names_,
                                     need_target=False, both_classes=False)
        except SpecError as err:
            if not fitting:  # the spec's `missing drop` does not apply to rows to predict
                err = SpecError(tuple(replace(d, hint="fill or remove those rows before predicting")
                                      if d.code == "T120" else d for d in err.diagnostics), err.source)
            raise _as_input_error(err) from None

    # ---- scikit-learn's methods

    def fit(self, X: Any, y: Any = None, sample_weight: Any = None) -> SpecEstimator:
        """Bind X and y by the spec's table clause and train its objective at this estimator's tunables."""
        checked = self._checked_spec()
        tunables = self._tunables(checked)
        frame = self._frame(X, checked, fitting=True)
        target = self._encoded_target(y, len(frame), checked)
        frame[checked.spec.table.target] = target
        data = self._bind(frame, checked, fitting=True)
        for note in data.warnings:  # dropped rows, columns `inputs all` passed over
            warnings.warn(note.render(), UserWarning, stacklevel=2)
        if sample_weight is not None:
            c = np.asarray(sample_weight, dtype=np.float64).ravel()
            if c.shape[0] != len(frame) or not np.all(np.isfinite(c)) or np.any(c < 0):
                raise _error("E466", f"sample_weight must hold {len(frame)} finite values (one per row of X), "
                             "zero or more", checked.source.name)
            c = c[data.rows - 1]  # the rows the spec's `missing drop` kept
            if not np.any(c * data.weights > 0):
                raise _error("E466", "every row weight is zero", checked.source.name)
            data = replace(data, weights=data.weights * c)
        try:
            result = training.run_backend(checked, data, self.backend, tunables, tol=self.tol,
                                          param_tol=self.param_tol)
        except SpecError as err:
            raise _as_input_error(err) from None
        if result.status in training.BUDGET_STATUSES:
            warnings.warn(f"training stopped on its pass budget without reaching its certificate "
                          f"(status '{result.status}')", ConvergenceWarning, stacklevel=2)
        self.fitted_spec_ = (checked.spec.text, checked.source.name)
        self.tunables_ = tunables
        self.input_names_ = data.input_names
        self.standardization_ = data.standardization
        self.params_ = dict(result.params)
        self.fit_result_ = result
        self.n_iter_ = result.iterations
        form = training.form_for(checked, data.input_names)
        if checked.task == "multiclass":  # scikit-learn's layout: one row of coef_ per class
            W_name, b_name = form.weights_name, form.intercept_name
            self.coef_ = np.asarray(self.params_[W_name], dtype=np.float64).T
            self.intercept_ = (np.asarray(self.params_[b_name], dtype=np.float64) if b_name
                               else np.zeros(len(self.classes_)))
        elif form.standard:
            self.coef_ = np.asarray(self.params_[form.weights_name], dtype=np.float64)
            self.intercept_ = float(self.params_[form.intercept_name]) if form.intercept_name else 0.0
        return self

    def _scores(self, X: Any) -> np.ndarray:
        check_is_fitted(self, "params_")
        checked = _checked(*self.fitted_spec_)
        data = self._bind(self._frame(X, checked, fitting=False), checked, fitting=False)
        return training.scores(training.form_for(checked, self.input_names_), self.params_, data.X)


def _has_probability(estimator: SpecEstimator) -> bool:
    try:
        if hasattr(estimator, "fitted_spec_"):
            checked, tunables = _checked(*estimator.fitted_spec_), estimator.tunables_
        else:
            checked = estimator._checked_spec()
            tunables = estimator._tunables(checked)
    except SpecError:
        return False
    if checked.task == "multiclass":  # softmax_ce's scores are the classes' log-odds
        return training.trains_softmax(checked)
    return _probability_loss(checked, tunables) is not None


class SpecClassifier(ClassifierMixin, SpecEstimator):
    """A spec with a margin loss: labels from the sign of the score, in the table's own values
    (classes_ is [the value the label map sends to -1, the one it sends to +1])."""

    _task = "margin"

    def __sklearn_tags__(self):
        tags = super().__sklearn_tags__()
        tags.classifier_tags.multi_class = False
        return tags

    def decision_function(self, X: Any) -> np.ndarray:
        """The score s of each row; s > 0 predicts classes_[1]."""
        return self._scores(X)

    def predict(self, X: Any) -> np.ndarray:
        positive = self._scores(X) > 0
        return self.classes_[positive.astype(int)]

    @available_if(_has_probability)
    def predict_proba(self, X: Any) -> np.ndarray:
        """[P(classes_[0]), P(classes_[1])] per row, from the loss's reading (for logistic loss
        P(classes_[1]) = 1 / (1 + exp(-s))). Present where the goal's one per-row term is a smooth,
        classification-calibrated margin loss; class weights are not undone."""
        s = self._scores(X)
        entry, options = _probability_loss(_checked(*self.fitted_spec_), self.tunables_)
        return class_probabilities(entry.derivative(s, **options), -entry.derivative(-s, **options))


class SpecMulticlassClassifier(ClassifierMixin, SpecEstimator):
    """A spec whose target has K >= 3 classes (`target ... classes a, b, c`): K scores per row, the label
    of the highest (classes_ is the classes clause, in its order, as the table writes the labels)."""

    _task = "multiclass"

    def _class_target(self, y: np.ndarray, checked: CheckedObjective) -> np.ndarray:
        """y as the table's target column; every label must be one of the spec's classes (bind_table
        says which rows are not)."""
        classes = list(checked.spec.table.classes)
        numeric = y.dtype.kind in "biuf" and all(not isinstance(c, str) for c in classes)
        self.classes_ = np.asarray(classes, dtype=y.dtype if numeric else object)
        return y if numeric else np.asarray([str(v) for v in y], dtype=object)

    def decision_function(self, X: Any) -> np.ndarray:
        """The K scores of each row (rows x K, columns in the order of classes_)."""
        return self._scores(X)

    def predict(self, X: Any) -> np.ndarray:
        """The class of the highest score (ties go to the class listed first)."""
        return self.classes_[np.argmax(self._scores(X), axis=1)]

    @available_if(_has_probability)
    def predict_proba(self, X: Any) -> np.ndarray:
        """The softmax of the K scores (a softmax_ce goal: its scores are the classes' log-odds)."""
        from objc.catalog import _k_mc_probabilities
        return _k_mc_probabilities(self._scores(X))


class SpecRegressor(RegressorMixin, SpecEstimator):
    """A spec with a residual loss: the prediction is the score."""

    _task = "residual"

    def predict(self, X: Any) -> np.ndarray:
        return self._scores(X)


# ---------------------------------------------------------------- making them

@functools.lru_cache(maxsize=32)
def _estimator_class(text: str, name: str) -> type[SpecEstimator]:
    checked = _checked(text, name)
    if checked.spec.table is None:
        raise _error("E401", "the spec binds no table, so there is nothing to read X and y by", name,
                     hint='add: table NAME from "file.csv" with its target and inputs')
    task = training.task_of(checked)
    base = {"margin": SpecClassifier, "multiclass": SpecMulticlassClassifier}.get(task, SpecRegressor)
    arguments = _tunable_arguments(checked)
    defaults = {"spec": text, **{arguments[t.name]: float(t.default) for t in checked.spec.tunables}, **OPTIONS}
    signature = inspect.Signature([inspect.Parameter("self", inspect.Parameter.POSITIONAL_OR_KEYWORD)] + [
        inspect.Parameter(k, inspect.Parameter.KEYWORD_ONLY, default=v) for k, v in defaults.items()])

    def __init__(self, **params):
        # scikit-learn reads the parameters from this signature; __init__ only stores them
        bound = signature.bind(self, **params)
        bound.apply_defaults()
        for key, value in list(bound.arguments.items())[1:]:
            setattr(self, key, value)
    __init__.__signature__ = signature
    kind = base.__name__
    # a qualified name no module attribute has: pickling goes through __reduce__, never by reference
    return type(kind, (base,), {"__init__": __init__, "__module__": __name__,
                                "__qualname__": f"spec_estimator_class.<locals>.{kind}",
                                "__doc__": f"{base.__doc__}\n\nMade from the spec {name!r}; tunables: "
                                           f"{', '.join(arguments.values()) or 'none'}.",
                                "_spec_text": text, "_spec_name": name, "_arguments": arguments})


def spec_estimator_class(spec: str | Path) -> type[SpecEstimator]:
    """The estimator class of a spec (a path, or the spec's text): a SpecClassifier for a margin loss,
    a SpecRegressor for a residual one, with the tunables as keyword parameters. The same text gives
    the same class in one process. Raises EstimatorInputError for a spec that cannot be trained."""
    return _estimator_class(*_read_spec(spec))


def spec_estimator(spec: str | Path, **params: Any) -> SpecEstimator:
    """An estimator of the spec with these parameters (tunables by name, backend, tol, param_tol)."""
    return spec_estimator_class(spec)(**params)


def _restore(text: str, name: str) -> SpecEstimator:
    cls = _estimator_class(text, name)
    return cls.__new__(cls)
