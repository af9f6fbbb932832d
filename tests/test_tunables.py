"""One rule for a value given to a tunable, in the same words wherever it is given: `fit` (training),
a sweep axis (selection), the cvxpy backend and its emitted module, the generated NumPy module and the
generated multiclass module. The rule itself is the spec language's (docs/language.md: a value outside
a `tune` line's declared range is refused, since the convexity verdict was proved for that range only);
the expected words are written out here, so a caller that words it its own way fails.
"""

from __future__ import annotations

import importlib.util

import numpy as np
import pytest

import objc
from objc import selection, training
from objc.backends import cvxpy_problem, numpy_module
from objc.diagnostics import SpecError

BINARY = ('table d from "d.csv"\n  target t\n  inputs f0, f1\n'
          "tune C = 1 within 0.1 .. 10\n"
          "learn w over inputs, b\nscore s = w . x + b\n"
          "goal C * mean logistic(y * s) + 0.5 * l2sq(w)\n")
MULTICLASS = ('table d from "d.csv"\n  target kind classes k0, k1, k2\n  inputs f0, f1\n'
              "tune C = 1 within 0.1 .. 10\n"
              "learn W over inputs by classes, b by classes\nscore s = W . x + b\n"
              "goal C * mean softmax_ce(s, y) + 0.5 * l2sq(W)\n")
TUNE_LINE = 4
OUTSIDE = "tunable C = 50 lies outside its declared range 0.1 .. 10"
WHAT_TO_DO = "pick a value inside 0.1 .. 10, or widen the range on the spec's `tune C` line"
UNKNOWN = "the spec has no tunable 'D' (it declares: C)"


def checked_of(text: str):
    checked = objc.check_text(text, "t.objc")
    assert checked.accepted, [d.render() for d in checked.errors]
    return checked


def rows(n: int = 30, classes: int = 2):
    rng = np.random.default_rng(3)  # invented rows: two inputs, labels from a noisy linear rule
    X = rng.normal(size=(n, 2))
    raw = X[:, 0] + 0.5 * rng.normal(size=n)
    if classes == 2:
        return X, np.where(raw > 0, 1.0, -1.0)
    return X, np.digitize(raw, np.quantile(raw, [1 / 3, 2 / 3])).astype(np.int64)


def assert_spec_refusal(err: SpecError, code: str) -> None:
    d = err.diagnostics[0]
    assert (d.code, d.message, d.hint, d.span.line) == (code, OUTSIDE, WHAT_TO_DO, TUNE_LINE), d.render()


def test_fit_refuses_at_the_tune_line():
    checked = checked_of(BINARY)
    with pytest.raises(SpecError) as e:
        training.tunable_values(checked, {"C": 50})
    assert_spec_refusal(e.value, "E402")
    with pytest.raises(ValueError) as u:
        training.tunable_values(checked, {"D": 1})
    assert str(u.value).startswith(UNKNOWN)
    assert training.tunable_values(checked, {"C": 10}) == {"C": 10.0}  # the ends belong to the range


@pytest.mark.parametrize("words", ["C=0.5,50", "C:0.5..50"])
def test_a_sweep_axis_refuses_a_listed_value_or_a_span_end(words):
    checked = checked_of(BINARY)
    with pytest.raises(SpecError) as e:
        selection.resolve_axis(checked, selection.parse_axis(words))
    assert_spec_refusal(e.value, "E402")


def test_the_cvxpy_backend_and_its_emitted_module(tmp_path):
    checked = checked_of(BINARY)
    X, y = rows()
    with pytest.raises(SpecError) as e:
        cvxpy_problem.build_problem(checked, X, y, None, ("f0", "f1"), {"C": 50})
    assert_spec_refusal(e.value, "C401")  # the cvxpy backend's own code for a tunable value (its code table)
    path = tmp_path / "emitted_cvx.py"
    path.write_text(cvxpy_problem.emit_module(checked))
    spec = importlib.util.spec_from_file_location("emitted_cvx", path)
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    with pytest.raises(ValueError) as m:
        module.build(X, y, None, C=50)
    assert str(m.value) == f"{OUTSIDE}: {WHAT_TO_DO}"
    with pytest.raises(ValueError) as u:
        module.build(X, y, None, D=1)
    assert str(u.value).startswith(UNKNOWN)


def test_the_generated_numpy_module():
    ns = numpy_module.load_module(numpy_module.emit_module(checked_of(BINARY)))
    X, y = rows()
    with pytest.raises(ValueError) as m:
        ns["solve"](X, y, input_names=["f0", "f1"], tunables={"C": 50})
    assert str(m.value) == f"{OUTSIDE}: {WHAT_TO_DO}"
    with pytest.raises(ValueError) as u:
        ns["solve"](X, y, input_names=["f0", "f1"], tunables={"D": 1})
    assert str(u.value).startswith(UNKNOWN)


def test_the_generated_multiclass_module():
    ns = numpy_module.load_module(numpy_module.emit_module(checked_of(MULTICLASS)))
    X, y = rows(classes=3)
    with pytest.raises(ValueError) as m:
        ns["solve"](X, y, None, {"C": 50})
    assert str(m.value) == f"{OUTSIDE}: {WHAT_TO_DO}"
    with pytest.raises(ValueError) as u:
        ns["solve"](X, y, None, {"D": 1})
    assert str(u.value).startswith(UNKNOWN)
    assert ns["solve"](X, y, None, {"C": 0.1})["status"] == "optimal"  # an end of the range is inside it
