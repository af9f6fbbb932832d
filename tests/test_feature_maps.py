"""Feature maps of the table block (onehot, powers, monomials, pairs, spline, fourier): their values
against scikit-learn's own transformers and against Rahimi & Recht's bound, and one map applied the
same way by objc fit / predict, the cvxpy backend, the generated NumPy module and the estimator."""

from __future__ import annotations

import json
import subprocess
import sys
import textwrap
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from sklearn.datasets import load_diabetes, load_iris
from sklearn.preprocessing import OneHotEncoder, PolynomialFeatures, SplineTransformer

from objc import tables
from objc.diagnostics import SpecError
from objc.frontend import check_text

REPO = Path(__file__).resolve().parent.parent


def _bind(spec_text: str, frame: pd.DataFrame, task: str = "residual", **kw) -> tables.BoundData:
    checked = check_text(spec_text, "maps.objc")
    return tables.bind_table(checked.spec.table, Path("."), task, source_name="maps.objc", frame=frame, **kw)


def _spec(clauses: str, inputs: str = "bmi", target: str = "progress") -> str:
    return (f'table t from "t.csv"\n  target {target}\n  inputs {inputs}\n{textwrap.indent(clauses, "  ")}\n'
            "learn w over inputs, b\nscore s = w . x + b\ngoal mean squared(y - s) + 0.01 * l2sq(w)\n")


@pytest.fixture(scope="module")
def diabetes() -> pd.DataFrame:
    d = load_diabetes(as_frame=True, scaled=False)
    frame = d.data.copy()
    frame["progress"] = d.target
    return frame


def _by_name(data: tables.BoundData, names: list[str]) -> np.ndarray:
    index = {n: j for j, n in enumerate(data.input_names)}
    return np.column_stack([data.X[:, index[n]] for n in names])


# ---------------------------------------------------------------- values against scikit-learn

def test_onehot_equals_scikit_learn_one_hot_encoder(diabetes):
    # source: scikit-learn's OneHotEncoder (sorted categories, one 0/1 column each), on the diabetes
    # table's numeric `sex` codes and on iris species names as text
    iris = load_iris(as_frame=True)
    frame = diabetes.iloc[:150].copy()
    frame["species"] = np.asarray(iris.target_names)[iris.target.to_numpy()]
    data = _bind(_spec("onehot sex, species"), frame)
    encoder = OneHotEncoder(sparse_output=False).fit(frame[["sex", "species"]].astype(str))
    names = [n.replace("sex_", "sex=").replace("species_", "species=") for n in encoder.get_feature_names_out()]
    # objc writes a whole-number category as an integer ("1", not "1.0"): map scikit-learn's names
    names = [n[:-2] if n.startswith("sex=") and n.endswith(".0") else n for n in names]
    np.testing.assert_array_equal(_by_name(data, names), encoder.transform(frame[["sex", "species"]].astype(str)))
    assert data.maps[0]["categories"]["species"] == sorted(iris.target_names)


@pytest.mark.parametrize("clause,kwargs", [("monomials bmi, bp, s1 degree 3", {}),
                                           ("pairs bmi, bp, s1", {"interaction_only": True, "degree": 2})])
def test_monomials_and_pairs_equal_scikit_learn_polynomial_features(diabetes, clause, kwargs):
    # source: scikit-learn's PolynomialFeatures (all monomials up to the degree; interaction_only for
    # the pairwise products), columns matched by name
    data = _bind(_spec(clause), diabetes)
    poly = PolynomialFeatures(include_bias=False, **({"degree": 3} | kwargs)).fit(diabetes[["bmi", "bp", "s1"]])
    names = [n.replace(" ", "*") for n in poly.get_feature_names_out()]
    expected = poly.transform(diabetes[["bmi", "bp", "s1"]])
    if "interaction_only" in kwargs:  # the single columns are not the map's (only bmi is an input here)
        keep = [j for j, n in enumerate(names) if "*" in n]
        names, expected = [names[j] for j in keep], expected[:, keep]
    np.testing.assert_allclose(_by_name(data, names), expected, rtol=1e-12)


def test_powers_make_only_the_powers(diabetes):
    # a hand computation: x, x^2, x^3 of each column and no cross products
    data = _bind(_spec("powers bmi, bp degree 3"), diabetes)
    assert data.input_names == ("bmi", "bp", "bmi^2", "bp^2", "bmi^3", "bp^3")
    np.testing.assert_allclose(_by_name(data, ["bp^3"])[:, 0], diabetes["bp"].to_numpy() ** 3, rtol=1e-14)


def test_spline_is_the_truncated_power_basis_and_spans_scikit_learns_b_splines(diabetes):
    data = _bind(_spec("spline bmi degree 3 knots 25%, 50%, 75%", inputs="bp"), diabetes)
    x = diabetes["bmi"].to_numpy()
    knots = np.quantile(x, [0.25, 0.5, 0.75])  # numpy's default (linear) quantile of the training rows
    assert data.maps[0]["knots"] == knots.tolist()
    # a hand computation of the truncated-power basis: x, x^2, x^3, (x - k)_+^3 per knot
    hand = np.column_stack([x, x ** 2, x ** 3] + [np.maximum(x - k, 0) ** 3 for k in knots])
    ours = data.X[:, 1:]
    np.testing.assert_allclose(ours, hand, rtol=1e-12)
    # source: scikit-learn's SplineTransformer with the same knots (ends at the column's range): the
    # B-spline basis spans the same functions as 1 and the truncated powers (de Boor, A Practical
    # Guide to Splines, ch. IX), so each B-spline is a least-squares combination of ours with no residual
    bs = SplineTransformer(degree=3, knots=np.r_[x.min(), knots, x.max()][:, None]).fit_transform(x[:, None])
    basis = np.column_stack([np.ones(len(x)), ours])
    basis = basis / np.abs(basis).max(axis=0)
    coef, *_ = np.linalg.lstsq(basis, bs, rcond=None)
    assert np.max(np.abs(basis @ coef - bs)) < 1e-8
    assert bs.shape[1] == basis.shape[1]


# ---------------------------------------------------------------- random Fourier features

def _rff_error(count: int, seed: int, points: np.ndarray, bandwidth: float) -> np.ndarray:
    frame = pd.DataFrame(points, columns=["a", "b", "c"]).assign(t=0.0)
    data = _bind(_spec(f"fourier kern = a, b, c count {count} bandwidth {bandwidth} seed {seed}", inputs="a",
                       target="t"), frame)
    z = data.X[:, 1:]
    exact = np.exp(-((points[:, None, :] - points[None, :, :]) ** 2).sum(-1) / (2 * bandwidth ** 2))
    return np.abs(z @ z.T - exact)[np.triu_indices(len(points), 1)]


def test_random_fourier_features_approach_the_gaussian_kernel_like_one_over_sqrt_count():
    # source: Rahimi & Recht, "Random features for large-scale kernel machines" (NIPS 2007), section 3:
    # z(x)^T z(x') is the mean of `count` independent terms 2 cos(w.x + b) cos(w.x' + b), each in
    # [-2, 2], whose expectation is exp(-||x - x'||^2 / (2 bandwidth^2)); their Claim 1 bounds the
    # error by Hoeffding's inequality, which gives |error| < 2 sqrt(2 ln(2/delta) / count) for one
    # pair with probability 1 - delta (here delta = 1e-6 per pair)
    points = np.random.default_rng(3).normal(size=(40, 3))
    counts = [50, 200, 800, 3200]
    errors = {d: np.mean([_rff_error(d, seed, points, 1.5).mean() for seed in range(4)]) for d in counts}
    for d in counts:
        assert _rff_error(d, 0, points, 1.5).max() < 2 * np.sqrt(2 * np.log(2 / 1e-6) / d)
    # the error shrinks like 1/sqrt(count): 64 times the count gives about 1/8 of the error; the
    # factor 2 either way allows for the spread of a mean over 4 seeds (common practice, no source)
    ratio = errors[3200] / errors[50]
    assert 1 / 16 < ratio < 1 / 4, errors
    for a, b in zip(counts, counts[1:]):
        assert errors[b] < errors[a]


def test_fourier_draws_are_reproducible_from_the_seed_and_stored():
    frame = pd.DataFrame({"a": np.linspace(0, 1, 30), "b": np.linspace(1, 3, 30), "t": 0.0})
    one = _bind(_spec("fourier kern = a, b count 25 bandwidth 0.7 seed 11", inputs="a", target="t"), frame)
    two = _bind(_spec("fourier kern = a, b count 25 bandwidth 0.7 seed 11", inputs="a", target="t"), frame)
    other = _bind(_spec("fourier kern = a, b count 25 bandwidth 0.7 seed 12", inputs="a", target="t"), frame)
    np.testing.assert_array_equal(one.X, two.X)
    assert not np.allclose(one.X, other.X)
    W, b = np.asarray(one.maps[0]["W"]), np.asarray(one.maps[0]["b"])
    rng = np.random.default_rng(11)  # the stated draw: W ~ N(0, 1/bandwidth^2), then b ~ U[0, 2 pi]
    np.testing.assert_array_equal(W, rng.normal(0.0, 1 / 0.7, size=(25, 2)))
    np.testing.assert_array_equal(b, rng.uniform(0.0, 2 * np.pi, size=25))
    assert one.input_names[1:] == tuple(f"kern_{j}" for j in range(1, 26))


def test_a_saved_model_rebuilds_fourier_features_from_its_stored_draws(tmp_path):
    # the model keeps the draws themselves: predict must use them, not the seed (NumPy does not promise
    # the same random stream in every version), and refuse draws of the wrong shape
    from objc import training
    _stalls(tmp_path, " unseen zeros")
    assert _objc("fit", "s.objc", "-o", "m.json", cwd=tmp_path).returncode == 0
    doc = json.loads((tmp_path / "m.json").read_text())
    draws = doc["schema"]["fourier_draws"]["warm"]
    assert np.shape(draws["W"]) == (12, 2) and np.shape(draws["b"]) == (12,)
    checked = check_text(doc["spec"]["text"], "s.objc")
    draws["W"] = (2.0 * np.asarray(draws["W"])).tolist()  # as if another NumPy had drawn other numbers
    data = training.bind_for_model(checked, doc, tmp_path / "new.csv", need_target=False)
    raw = pd.read_csv(tmp_path / "new.csv")[["temp", "rain"]].to_numpy()
    want = np.sqrt(2.0 / 12) * np.cos(raw @ np.asarray(draws["W"]).T + np.asarray(draws["b"]))
    std = doc["schema"]["standardization"]
    cols = [doc["schema"]["inputs"].index(f"warm_{j}") for j in range(1, 13)]
    got = data.X[:, cols] * np.asarray(std["scales"])[cols] + np.asarray(std["means"])[cols]
    np.testing.assert_allclose(got, want, rtol=1e-10, atol=1e-12)
    draws["b"] = draws["b"][:5]
    with pytest.raises(SpecError) as err:
        training.bind_for_model(checked, doc, tmp_path / "new.csv", need_target=False)
    assert err.value.diagnostics[0].code == "T167"


# ---------------------------------------------------------------- one map, every path

_SCENARIO = """\
# invented: how many crates a market stall sells, by town, temperature and rain
table stalls from "stalls.csv"
  target crates
  inputs temp, rain
  onehot town{unseen}
  powers temp degree 2
  pairs temp, rain
  spline temp degree 3 knots 25%, 50%, 75%
  fourier warm = temp, rain count 12 bandwidth 4 seed 5
  standardize
learn w over inputs, b
score s = w . x + b
goal mean squared(y - s) + 0.01 * l2sq(w) + 0.01 * l2(w[warm])
"""


def _stalls(folder: Path, unseen: str = "") -> Path:
    rng = np.random.default_rng(8)
    n = 160
    frame = pd.DataFrame({"temp": rng.normal(16, 6, n).round(1), "rain": rng.exponential(2, n).round(1),
                          "town": rng.choice(["Lyon", "Brest", "Nantes"], n)})
    frame["crates"] = (0.4 * frame.temp + np.sin(frame.temp / 4) * 3 + 2.0 * (frame.town == "Lyon")
                       - 0.3 * frame.rain + rng.normal(0, 0.5, n)).round(3)
    frame.to_csv(folder / "stalls.csv", index=False)
    pd.DataFrame({"temp": [9.5, 21.0, 15.0], "rain": [0.0, 3.5, 1.0], "town": ["Brest", "Paris", "Lyon"]}).to_csv(
        folder / "new.csv", index=False)
    (folder / "s.objc").write_text(_SCENARIO.format(unseen=unseen))
    return folder / "s.objc"


def _objc(*args: str, cwd: Path) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "objc", *args], cwd=cwd, capture_output=True, text=True, timeout=300)


def test_both_backends_agree_and_the_generated_module_predicts_as_objc(tmp_path):
    _stalls(tmp_path, " unseen zeros")
    for backend in ("numpy", "cvxpy"):
        run = _objc("fit", "s.objc", "--backend", backend, "-o", f"{backend}.json", cwd=tmp_path)
        assert run.returncode == 0, run.stderr
        run = _objc("predict", f"{backend}.json", "new.csv", "-o", f"{backend}.csv", cwd=tmp_path)
        assert run.returncode == 0, run.stderr
    numpy_pred = pd.read_csv(tmp_path / "numpy.csv")["prediction"].to_numpy()
    cvxpy_pred = pd.read_csv(tmp_path / "cvxpy.csv")["prediction"].to_numpy()
    np.testing.assert_allclose(numpy_pred, cvxpy_pred, rtol=1e-6, atol=1e-6)  # cvxpy's solver tolerance
    doc = json.loads((tmp_path / "numpy.json").read_text())
    assert "town=Brest" in doc["schema"]["inputs"] and "warm_12" in doc["schema"]["inputs"]
    # `unseen zeros`: the Paris row's indicators are all zero
    run = _objc("build", "s.objc", "-o", "stall_model.py", cwd=tmp_path)
    assert run.returncode == 0, run.stderr
    script = textwrap.dedent("""
        import json, sys
        import pandas as pd
        import stall_model
        train = pd.read_csv("stalls.csv")
        model = stall_model.Model().fit(train.drop(columns="crates"), train["crates"])
        print(json.dumps([float(v) for v in model.predict(pd.read_csv("new.csv"))]))
    """)
    fresh = subprocess.run([sys.executable, "-c", script], cwd=tmp_path, capture_output=True, text=True, timeout=300)
    assert fresh.returncode == 0, fresh.stderr
    # the same rows, the same maps, the same solver: the same numbers
    np.testing.assert_array_equal(np.asarray(json.loads(fresh.stdout)), numpy_pred)
    run = subprocess.run([sys.executable, "stall_model.py", "stalls.csv", "-o", "trained.json"], cwd=tmp_path,
                         capture_output=True, text=True, timeout=300)
    assert run.returncode == 0, run.stderr
    trained = json.loads((tmp_path / "trained.json").read_text())
    assert trained["inputs"] == doc["schema"]["inputs"] and trained["maps"][0]["categories"]["town"] == ["Brest", "Lyon", "Nantes"]
    assert trained["standardization"]["names"] == trained["inputs"]
    np.testing.assert_allclose([trained["params"]["w"][n] for n in trained["inputs"]],
                               np.load(tmp_path / "numpy.npz")["w"], rtol=1e-9, atol=1e-12)


def test_an_unseen_category_is_an_error_naming_column_value_and_row(tmp_path):
    _stalls(tmp_path)
    assert _objc("fit", "s.objc", "-o", "m.json", cwd=tmp_path).returncode == 0
    run = _objc("predict", "m.json", "new.csv", "-o", "p.csv", cwd=tmp_path)
    assert run.returncode != 0 and "Traceback" not in run.stderr
    assert "T164" in run.stderr and "'town'" in run.stderr and "'Paris'" in run.stderr and "row 2" in run.stderr
    assert not (tmp_path / "p.csv").exists()
    assert _objc("build", "s.objc", "-o", "stall_model.py", cwd=tmp_path).returncode == 0
    script = ("import pandas as pd, stall_model\nt = pd.read_csv('stalls.csv')\n"
              "m = stall_model.Model().fit(t.drop(columns='crates'), t['crates'])\n"
              "try:\n    m.predict(pd.read_csv('new.csv'))\nexcept ValueError as e:\n    print(e)\n")
    fresh = subprocess.run([sys.executable, "-c", script], cwd=tmp_path, capture_output=True, text=True, timeout=300)
    assert "'town'" in fresh.stdout and "'Paris'" in fresh.stdout


def test_the_scikit_learn_estimator_applies_the_maps_fitted_at_fit(tmp_path):
    import objc
    _stalls(tmp_path)
    train = pd.read_csv(tmp_path / "stalls.csv")
    est = objc.spec_estimator(str(tmp_path / "s.objc")).fit(train.drop(columns="crates"), train["crates"])
    assert _objc("fit", "s.objc", "-o", "m.json", cwd=tmp_path).returncode == 0
    ours = est.predict(train.drop(columns="crates"))
    assert _objc("predict", "m.json", "stalls.csv", "-o", "p.csv", cwd=tmp_path).returncode == 0
    np.testing.assert_allclose(ours, pd.read_csv(tmp_path / "p.csv")["prediction"], rtol=1e-9, atol=1e-9)


def test_standardize_leaves_onehot_indicators_as_zero_and_one(tmp_path):
    _stalls(tmp_path)
    checked = check_text((tmp_path / "s.objc").read_text(), "s.objc")
    data = tables.bind_table(checked.spec.table, tmp_path, "residual")
    j = data.input_names.index("town=Lyon")
    assert set(np.unique(data.X[:, j])) == {0.0, 1.0}
    k = data.input_names.index("temp^2")
    assert abs(data.X[:, k].mean()) < 1e-12 and abs(data.X[:, k].std() - 1) < 1e-12


# ---------------------------------------------------------------- bad input

@pytest.mark.parametrize("clause,code,words", [
    ("powers bmi degree 0", "E252", "degree"),
    ("monomials bmi degree 2.5", "E252", "whole number"),
    ("fourier k = bmi count 0 bandwidth 1 seed 1", "E252", "count"),
    ("fourier k = bmi count 5 bandwidth 0 seed 1", "E252", "bandwidth"),
    ("fourier k = bmi count 5 bandwidth 1", "E251", "seed"),
    ("spline bmi degree 3 knots 0%, 50%", "E252", "strictly between"),
    ("spline bmi degree 3", "E251", "knots"),
    ("pairs bmi", "E252", "two columns"),
    ("onehot sex unseen skip", "E252", "unseen"),
    ("powers bmi depth 2", "E251", "no setting"),
])
def test_bad_settings_are_located(clause, code, words):
    with pytest.raises(SpecError) as err:
        check_text(_spec(clause), "maps.objc")
    text = str(err.value)
    assert code in text and words in text and "maps.objc:4:" in text


def test_bad_data_under_a_map_is_located(diabetes):
    frame = diabetes.assign(one="same", word="x")
    cases = [("onehot one", "T163"), ("powers word degree 2", "T112"), ("spline sex degree 3 knots 10%, 20%", "T165"),
             ("onehot missing_col", "T110")]
    for clause, code in cases:
        with pytest.raises(SpecError) as err:
            _bind(_spec(clause), frame)
        assert code in str(err.value) and "maps.objc:4:3" in str(err.value), clause
