"""A saved model keeps its maps' categories and knots in its input names only (docs/language.md,
section 6a): `town=Lyon` is category `Lyon` of column `town`, `(temp-12.5)+^3` knot 12.5 of `temp`.
Binding a table by a saved schema reads them back (tables.map_state_from_names); these tests hold
that reading to the state the fit found when column names are prefixes of one another or hold the
characters the names are built from, and hold the fit to refusing names no reading could tell apart."""

from __future__ import annotations

import json
import subprocess
import sys
import textwrap
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

import objc
from objc import tables, training
from objc.diagnostics import SpecError
from objc.frontend import check_text


def _spec(inputs: str, clauses: str) -> str:
    return (f'table t from "t.csv"\n  target y\n  inputs {inputs}\n{textwrap.indent(clauses, "  ")}\n'
            "learn w over inputs, b\nscore s = w . x + b\ngoal mean squared(y - s) + 0.001 * l2sq(w)\n")


def _fit_save_load(folder: Path, spec_text: str, frame: pd.DataFrame):
    """(the fitted model, the model loaded back from its file, the training rows as fitted, the table
    bound again by the loaded model's schema)."""
    frame.to_csv(folder / "t.csv", index=False)
    (folder / "s.objc").write_text(spec_text)
    fitted = objc.fit_spec(folder / "s.objc")
    fitted.save(folder / "m.json")
    loaded = objc.load_trained(folder / "m.json")
    train, _held, _label = training.bind_training(fitted.checked, folder)
    again = training.bind_for_model(loaded.checked, loaded.document, folder / "t.csv", need_target=False)
    return fitted, loaded, train, again


def _fitted_scores(model, train: tables.BoundData) -> np.ndarray:
    """w . x + b on the very rows the solver saw."""
    return train.X @ np.asarray(model.params["w"]) + float(model.params["b"])


def _two_onehot_columns(n: int = 80) -> pd.DataFrame:
    rng = np.random.default_rng(3)
    frame = pd.DataFrame({"a": rng.choice(["p", "q"], n), "a=b": rng.choice(["cat", "dog"], n),
                          "z": rng.normal(size=n)})
    frame["y"] = 2.0 * (frame["a=b"] == "cat") + 1.0 * (frame["a"] == "p") + 0.1 * rng.normal(size=n)
    return frame


def test_onehot_columns_whose_names_share_a_prefix_reload_as_fitted(tmp_path):
    # `a=b=cat` is category `cat` of column `a=b`; read as category `b=cat` of column `a`, the reloaded
    # model would give `a` two categories no row holds and predict with zeros for the `a=b` indicators
    fitted, loaded, train, again = _fit_save_load(tmp_path, _spec("z", 'onehot a, "a=b"'), _two_onehot_columns())
    assert train.maps[0]["categories"] == {"a": ["p", "q"], "a=b": ["cat", "dog"]}
    assert again.input_names == train.input_names and again.maps == train.maps
    want = _fitted_scores(fitted, train)
    np.testing.assert_allclose(fitted.predict_table(tmp_path / "t.csv"), want, rtol=0, atol=1e-12)
    np.testing.assert_allclose(loaded.predict_table(tmp_path / "t.csv"), want, rtol=0, atol=1e-12)


def test_onehot_clauses_of_their_own_read_the_other_clauses_names_as_theirs_not(tmp_path):
    # the same columns in two clauses: the clause on `a` alone must still leave `a=b=cat` to `a=b`
    fitted, loaded, train, again = _fit_save_load(tmp_path, _spec("z", 'onehot a\nonehot "a=b"'),
                                                  _two_onehot_columns())
    assert again.maps == train.maps
    np.testing.assert_allclose(loaded.predict_table(tmp_path / "t.csv"), _fitted_scores(fitted, train), rtol=0,
                               atol=1e-12)


def test_the_generated_module_predicts_as_objc_for_onehot_columns_sharing_a_prefix(tmp_path):
    # the module fits its maps on the rows itself; objc's saved model reads them back from the names:
    # the two must agree, from a fresh process
    _two_onehot_columns().to_csv(tmp_path / "t.csv", index=False)
    (tmp_path / "s.objc").write_text(_spec("z", 'onehot a, "a=b"'))
    for args in (("fit", "s.objc", "-o", "m.json"), ("predict", "m.json", "t.csv", "-o", "p.csv"),
                 ("build", "s.objc", "-o", "prefix_model.py")):
        run = subprocess.run([sys.executable, "-m", "objc", *args], cwd=tmp_path, capture_output=True, text=True,
                             timeout=300)
        assert run.returncode == 0, run.stderr
    script = textwrap.dedent("""
        import json
        import pandas as pd
        import prefix_model
        train = pd.read_csv("t.csv")
        model = prefix_model.Model().fit(train.drop(columns="y"), train["y"])
        print(json.dumps([float(v) for v in model.predict(train.drop(columns="y"))]))
    """)
    fresh = subprocess.run([sys.executable, "-c", script], cwd=tmp_path, capture_output=True, text=True, timeout=300)
    assert fresh.returncode == 0, fresh.stderr
    objc_pred = pd.read_csv(tmp_path / "p.csv")["prediction"].to_numpy()
    np.testing.assert_allclose(np.asarray(json.loads(fresh.stdout)), objc_pred, rtol=1e-9, atol=1e-9)


def test_splines_on_columns_sharing_a_prefix_reload_exactly_their_own_knots(tmp_path):
    # `(x--2.0)+` is knot 2.0 of column `x-`, `(x-+2.0)+` knot -2.0 of it: neither is a knot of `x`
    rng = np.random.default_rng(5)
    n = 120
    frame = pd.DataFrame({"x": rng.uniform(0, 10, n), "x-": rng.uniform(-5, 5, n)})
    frame["y"] = np.maximum(frame["x"] - 4, 0) - np.abs(frame["x-"]) + 0.1 * rng.normal(size=n)
    spec_text = _spec("x", 'spline x degree 2 knots 50%\nspline "x-" degree 2 knots 25%, 75%')
    fitted, loaded, train, again = _fit_save_load(tmp_path, spec_text, frame)
    knots = [m["knots"] for m in train.maps]
    assert len(knots[0]) == 1 and knots[1][0] < 0 < knots[1][1]  # both signs of `x-`'s knots are written
    assert again.input_names == train.input_names and again.maps == train.maps
    assert [[float(k).hex() for k in m["knots"]] for m in again.maps] == [[k.hex() for k in ks] for ks in knots]
    np.testing.assert_allclose(loaded.predict_table(tmp_path / "t.csv"), _fitted_scores(fitted, train), rtol=0,
                               atol=1e-12)


def _bind(spec_text: str, frame: pd.DataFrame, **kw) -> tables.BoundData:
    checked = check_text(spec_text, "s.objc")
    return tables.bind_table(checked.spec.table, Path("."), "residual", source_name="s.objc", frame=frame, **kw)


def _refusal(spec_text: str, frame: pd.DataFrame):
    with pytest.raises(SpecError) as err:
        _bind(spec_text, frame)
    return err.value.diagnostics[0]


def test_a_product_of_a_column_holding_the_separator_is_no_category():
    # `a=b` and `a=b^2` are the powers of column `a=b`, not categories `b` and `b^2` of column `a`
    rng = np.random.default_rng(7)
    frame = pd.DataFrame({"a": rng.choice(["p", "q"], 40), "a=b": rng.normal(size=40), "y": rng.normal(size=40)})
    spec_text = _spec('"a=b"', 'onehot a\npowers "a=b" degree 2')
    fit = _bind(spec_text, frame)
    again = _bind(spec_text, frame, input_names=fit.input_names)
    assert again.maps == fit.maps and np.array_equal(again.X, fit.X)


def test_a_category_whose_name_reads_as_another_columns_is_refused_at_fit():
    # category `b=cat` of `a` and category `cat` of `a=b` are both named `a=b=cat`: no saved model could
    # tell them apart, and one of the two indicators would be lost
    rng = np.random.default_rng(9)
    frame = pd.DataFrame({"a": rng.choice(["p", "b=cat"], 40), "a=b": rng.choice(["cat", "dog"], 40),
                          "z": rng.normal(size=40), "y": rng.normal(size=40)})
    d = _refusal(_spec("z", 'onehot a, "a=b"'), frame)
    assert d.code == "T166" and "'a=b=cat'" in d.message and "'b=cat'" in d.message
    assert d.span.line == 4  # the onehot clause


def test_an_input_column_that_reads_as_a_category_is_refused_at_fit():
    # a saved model would read input `a=x` as a category `x` of `a` (no row holds it) and then refuse
    # its own schema; the fit says so first
    rng = np.random.default_rng(9)
    frame = pd.DataFrame({"a": rng.choice(["p", "q"], 40), "a=x": rng.normal(size=40), "y": rng.normal(size=40)})
    d = _refusal(_spec('"a=x"', "onehot a"), frame)
    assert d.code == "T166" and "'a=x'" in d.message


# ---------------------------------------------------------------- names built from the separators

_PIECES = ["a", "b", "=", "-", "+", "(", ")", "^2", "*", "1.5"]


def _name(rng: np.random.Generator, low: int = 1, high: int = 4) -> str:
    return "".join(rng.choice(_PIECES, rng.integers(low, high + 1)))


def _random_case(rng: np.random.Generator):
    """A table whose columns and categories are made of the characters the input names are built from,
    most columns extending another's name, and a spec putting them under onehot, spline and powers."""
    n = 60
    names: list[str] = []
    while len(names) < 5:
        # a name extending an earlier one by a piece (`a` then `a=b`, `x` then `x-`) or a name of its own
        base = names[int(rng.integers(len(names)))] if names and rng.random() < 0.7 else ""
        c = base + _name(rng, 1, 2)
        if c not in names and c not in ("y", "z"):
            names.append(c)
    order = rng.permutation(5)
    cat_cols, spline_cols, power_col = [names[j] for j in order[:2]], [names[j] for j in order[2:4]], names[order[4]]
    frame = pd.DataFrame({c: rng.choice([_name(rng, 1, 3) for _ in range(3)], n) for c in cat_cols})
    for c in spline_cols:
        frame[c] = rng.uniform(-3, 3, n)
    frame[power_col] = rng.normal(size=n)
    frame["z"] = rng.normal(size=n)
    frame["y"] = rng.normal(size=n)
    q = {c: json.dumps(c) for c in names}
    together = rng.random() < 0.5
    clauses = [f"onehot {q[cat_cols[0]]}, {q[cat_cols[1]]}"] if together else [f"onehot {q[c]}" for c in cat_cols]
    clauses += [f"spline {q[spline_cols[0]]} degree 2 knots 30%, 70%", f"spline {q[spline_cols[1]]} degree 2 knots 50%",
                f"powers {q[power_col]} degree 2"]
    return _spec("z", "\n".join(clauses)), frame, cat_cols


def test_every_fit_reloads_its_own_state_or_is_refused():
    # the rule at stake: a fit whose names a saved model could misread is refused (T166), every other
    # one binds again by its names to the very state and inputs it found
    rng = np.random.default_rng(2024)
    reloaded = 0
    for _ in range(150):
        spec_text, frame, cat_cols = _random_case(rng)
        try:
            check_text(spec_text, "s.objc")
        except SpecError:
            continue  # a name the spec language itself refuses
        if any(frame[c].nunique() < 2 for c in cat_cols):
            continue  # one category only is T163, not the matter here
        try:
            fit = _bind(spec_text, frame)
        except SpecError as err:
            assert {d.code for d in err.diagnostics} <= {"T165", "T166"}, spec_text
            continue
        again = _bind(spec_text, frame, input_names=fit.input_names)
        assert again.maps == fit.maps, spec_text
        assert again.input_names == fit.input_names and np.array_equal(again.X, fit.X), spec_text
        reloaded += 1
    assert reloaded >= 100  # two in three at least: the rule refuses collisions, not odd names


def test_the_one_knot_name_two_columns_can_share_is_refused_at_fit():
    # map_knot_name writes knot -0.0 of `x` and knot 0.0 of `x-` both as `(x--0.0)+`; np.quantile keeps
    # the sign of a zero it lands on
    frame = pd.DataFrame({"x": [-2.0, -1.0, -0.0, 1.0, 2.0] * 4, "x-": [-1.5, -0.5, 0.5, 1.5, 2.5] * 4,
                          "y": np.arange(20.0)})
    d = _refusal(_spec("x", 'spline x degree 1 knots 50%\nspline "x-" degree 1 knots 50%'), frame)
    assert d.code == "T166" and "'(x--0.0)+'" in d.message and "knot 0.0 of column 'x-'" in d.message


def test_a_product_named_as_a_column_is_refused_whichever_clause_comes_first():
    # `x^2` is both column `x^2` (the first power `powers "x^2"` makes) and the square of `x`; a saved
    # schema binds the column, so the square cannot be an input of that name
    rng = np.random.default_rng(4)
    frame = pd.DataFrame({"x": rng.normal(size=30), "x^2": rng.normal(size=30), "y": rng.normal(size=30)})
    for clauses in ('powers "x^2" degree 2\npowers x degree 2', 'powers x degree 2\npowers "x^2" degree 2'):
        d = _refusal(_spec("x", clauses), frame)
        assert d.code == "T166" and "'x^2'" in d.message, clauses
