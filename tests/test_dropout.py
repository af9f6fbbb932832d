"""The dropout penalty `dropridge(w, p)`: its fit against scikit-learn's Ridge on rescaled columns, its
value against a Monte Carlo average of the dropped-out squared loss, what check says it equals, its
refusals, and the generated module fitting it from a fresh process."""

from __future__ import annotations

import json
import subprocess
import sys
import textwrap
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from sklearn.datasets import load_diabetes
from sklearn.linear_model import Ridge

from objc.diagnostics import SpecError
from objc.frontend import check_text

INPUTS = ["bmi", "bp", "s5", "sex"]
P = 0.3


def _spec(goal: str, extra: str = "") -> str:
    return textwrap.dedent(f"""\
        table clinic from "clinic.csv"
          target progress
          inputs {", ".join(INPUTS)}
          rowweight visits
        {extra}learn w over inputs, b
        score s = w . x + b
        goal {goal}
        """)


@pytest.fixture(scope="module")
def clinic(tmp_path_factory) -> Path:
    # the diabetes table bundled with scikit-learn (Efron, Hastie, Johnstone & Tibshirani 2004), on its
    # raw scale so the inputs' second moments differ; the row weight is a function of the table's own age
    d = load_diabetes(as_frame=True, scaled=False)
    frame = d.data[INPUTS].copy()
    frame["visits"] = 1.0 + (d.data["age"] > 50).astype(float)
    frame["progress"] = d.target
    folder = tmp_path_factory.mktemp("clinic")
    frame.to_csv(folder / "clinic.csv", index=False)
    (folder / "drop.objc").write_text(_spec(f"mean squared(y - s) + dropridge(w, {P})"))
    return folder


def _objc(*args: str, cwd: Path) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "objc", *args], cwd=cwd, capture_output=True, text=True, timeout=300)


def _fit(folder: Path, backend: str) -> dict:
    run = _objc("fit", "drop.objc", "--backend", backend, "--json", "-o", f"{backend}.json", cwd=folder)
    assert run.returncode == 0, run.stderr
    return json.loads(run.stdout)


@pytest.mark.parametrize("backend", ["numpy", "cvxpy"])
def test_the_fit_equals_ridge_on_columns_scaled_by_their_root_second_moment(clinic, backend):
    # reference: scikit-learn's Ridge (cholesky, exact) minimizes sum_i c_i (y_i - x'_i z - b)^2 + alpha ||z||^2.
    # Ours, times 2 sum c: sum_i c_i r_i^2 + 2 f sum c sum_j m2_j w_j^2 with f = p / (2 (1 - p)) and
    # m2_j = sum_i c_i x_ij^2 / sum c; with z_j = sqrt(m2_j) w_j and x'_ij = x_ij / sqrt(m2_j) that is
    # Ridge at alpha = 2 f sum c (the intercept unpenalized in both)
    frame = pd.read_csv(clinic / "clinic.csv")
    X, y, c = frame[INPUTS].to_numpy(), frame["progress"].to_numpy(), frame["visits"].to_numpy()
    m2 = c @ X ** 2 / c.sum()
    f = P / (2 * (1 - P))
    ridge = Ridge(alpha=2 * f * c.sum(), solver="cholesky").fit(X / np.sqrt(m2), y, sample_weight=c)
    w_ref, b_ref = ridge.coef_ / np.sqrt(m2), ridge.intercept_
    out = _fit(clinic, backend)
    np.testing.assert_allclose(out["params"]["w"], w_ref, rtol=1e-6, atol=1e-6)
    assert abs(out["params"]["b"] - b_ref) <= 1e-6 * max(1.0, abs(b_ref))
    r = y - X @ w_ref - b_ref
    objective = c @ r ** 2 / (2 * c.sum()) + f * np.sum(m2 * w_ref ** 2)
    assert abs(out["objective"] - objective) <= 1e-9 * objective


def test_the_penalty_is_the_monte_carlo_average_of_the_dropped_out_squared_loss(clinic):
    # the defining identity (Wager, Wang & Liang 2013, sec. 2): drop each input of each row with
    # probability p, scale the kept ones by 1 / (1 - p), and average the loss over 1e5 such draws. The
    # tolerance is 4 standard errors of that average (and the error itself is checked to be small, so
    # the comparison is a sharp one: the penalty is about a sixth of the objective here)
    out = _fit(clinic, "numpy")
    frame = pd.read_csv(clinic / "clinic.csv")
    X, y, c = frame[INPUTS].to_numpy(), frame["progress"].to_numpy(), frame["visits"].to_numpy()
    w, b = np.asarray(out["params"]["w"]), out["params"]["b"]
    rng = np.random.default_rng(20261203)
    draws, chunk, values = 100_000, 2_000, []
    for _ in range(draws // chunk):
        kept = rng.random((chunk,) + X.shape) >= P
        scores = np.einsum("kij,j->ki", kept * X, w) / (1 - P) + b
        values.append((((y - scores) ** 2) @ c) / (2 * c.sum()))
    values = np.concatenate(values)
    mean, error = values.mean(), values.std(ddof=1) / np.sqrt(draws)
    penalty = out["terms"][1]["value"] if isinstance(out["terms"][1], dict) else out["terms"][1]
    assert error < 0.01 * penalty
    assert abs(mean - out["objective"]) < 4 * error


def test_check_says_what_the_penalty_equals_and_when_it_is_exact():
    text = check_text(_spec(f"mean squared(y - s) + dropridge(w, {P})"), "d.objc").expanded
    assert "dropridge(w, 0.3) = 0.214286 * sum_j m2_j w_j^2" in text
    assert "(1 / sum_i c_i) * sum_i c_i * x_ij^2" in text and "exactly" in text
    text = check_text(_spec("sum squared(y - s) + 2 * dropridge(w, 0.5)"), "d.objc").expanded
    assert "m2_j = sum_i c_i * x_ij^2" in text
    logistic = _spec("mean logistic(y * s) + dropridge(w, 0.2)").replace("target progress", "target late: 1 -> +1, 0 -> -1")
    text = check_text(logistic, "d.objc").expanded
    assert "quadratic approximation" in text and "exactly" not in text


@pytest.mark.parametrize("goal,extra,code", [
    ("mean squared(y - s) + sum absolute(y - s) + dropridge(w, 0.3)", "", "E270"),
    ("l2sq(w) + dropridge(w, 0.3)", "", "E270"),
    ("mean squared(y - s) + dropridge(w, 1)", "", "E239"),
    ("mean squared(y - s) + dropridge(w, q)", "tune q = 0.3 within 0.1 .. 1\n", "E239"),
    ("mean squared(y - s) + dropridge(b, 0.3)", "", "E240"),
])
def test_refusals_name_the_rule_and_the_place(goal, extra, code):
    with pytest.raises(SpecError) as err:
        check_text(_spec(goal, extra), "d.objc")
    codes = [d.code for d in err.value.diagnostics]
    assert code in codes, codes
    assert all(d.span.line >= 1 for d in err.value.diagnostics)


def test_a_keep_constraint_cannot_use_it():
    with pytest.raises(SpecError) as err:
        check_text(_spec("mean squared(y - s)") + "keep dropridge(w, 0.3) <= 1\n", "d.objc")
    assert [d.code for d in err.value.diagnostics] == ["E271"]


def test_a_tunable_drop_probability_and_the_generated_module(clinic):
    (clinic / "tuned.objc").write_text(_spec("mean squared(y - s) + dropridge(w, q)",
                                             "tune q = 0.2 within 0.05 .. 0.9\n"))
    fits = {}
    for backend in ("numpy", "cvxpy"):
        run = _objc("fit", "tuned.objc", "--set", f"q={P}", "--backend", backend, "--json", "-o", f"t_{backend}.json",
                    cwd=clinic)
        assert run.returncode == 0, run.stderr
        fits[backend] = json.loads(run.stdout)
    np.testing.assert_allclose(fits["numpy"]["params"]["w"], fits["cvxpy"]["params"]["w"], rtol=1e-6, atol=1e-6)
    assert fits["numpy"]["objective"] == pytest.approx(_fit(clinic, "numpy")["objective"], rel=1e-9)
    assert _objc("build", "tuned.objc", "-o", "clinic_model.py", cwd=clinic).returncode == 0
    script = textwrap.dedent(f"""
        import json
        import pandas as pd
        import clinic_model
        t = pd.read_csv("clinic.csv")
        # the estimator takes the row weights as scikit-learn's sample_weight
        m = clinic_model.Model(q={P}).fit(t.drop(columns="progress"), t["progress"], sample_weight=t["visits"])
        print(json.dumps([float(v) for v in m.predict(t)]))
    """)
    fresh = subprocess.run([sys.executable, "-c", script], cwd=clinic, capture_output=True, text=True, timeout=300)
    assert fresh.returncode == 0, fresh.stderr
    frame = pd.read_csv(clinic / "clinic.csv")
    ours = frame[INPUTS].to_numpy() @ np.asarray(fits["numpy"]["params"]["w"]) + fits["numpy"]["params"]["b"]
    np.testing.assert_allclose(json.loads(fresh.stdout), ours, rtol=1e-6, atol=1e-6)


def test_the_emitted_cvxpy_module_solves_the_same_problem(clinic):
    # the cvxpy module `objc build --backend cvxpy` writes, run in a fresh process, against objc's own fit
    assert _objc("build", "drop.objc", "--backend", "cvxpy", "-o", "clinic_cvx.py", cwd=clinic).returncode == 0
    script = textwrap.dedent(f"""
        import json
        import pandas as pd
        import clinic_cvx
        t = pd.read_csv("clinic.csv")
        out = clinic_cvx.solve(t[{INPUTS!r}].to_numpy(), t["progress"].to_numpy(), weights=t["visits"].to_numpy())
        print(json.dumps([float(v) for v in out["params"]["w"]]))
    """)
    fresh = subprocess.run([sys.executable, "-c", script], cwd=clinic, capture_output=True, text=True, timeout=300)
    assert fresh.returncode == 0, fresh.stderr
    np.testing.assert_allclose(json.loads(fresh.stdout), _fit(clinic, "cvxpy")["params"]["w"], rtol=1e-6, atol=1e-6)


def test_on_three_classes_both_backends_reach_the_same_optimum(tmp_path):
    # the iris table bundled with scikit-learn (Fisher 1936), unstandardized so the inputs' second
    # moments differ; softmax cross-entropy + dropridge(W) + l2sq(W): the NumPy backend solves the
    # weighted ridge by scaling the inputs, the cvxpy backend (Clarabel) writes it directly
    from sklearn.datasets import load_iris
    iris = load_iris(as_frame=True)
    frame = iris.data.set_axis(["sl", "sw", "pl", "pw"], axis=1)
    frame["kind"] = np.asarray(iris.target_names)[iris.target.to_numpy()]
    frame.to_csv(tmp_path / "iris.csv", index=False)
    (tmp_path / "k.objc").write_text(textwrap.dedent("""\
        table flowers from "iris.csv"
          target kind classes setosa, versicolor, virginica
          inputs sl, sw, pl, pw
        learn W over inputs by classes, b by classes
        score s = W . x + b
        goal mean softmax_ce(s, y) + 0.01 * l2sq(W) + dropridge(W, 0.25)
        """))
    fits = {}
    for backend, extra in (("numpy", ["--tol", "1e-13"]), ("cvxpy", [])):
        run = _objc("fit", "k.objc", "--backend", backend, *extra, "--json", "-o", f"{backend}.json", cwd=tmp_path)
        assert run.returncode == 0, run.stderr
        fits[backend] = json.loads(run.stdout)
    assert abs(fits["numpy"]["objective"] - fits["cvxpy"]["objective"]) <= 1e-8 * fits["cvxpy"]["objective"]
    W = {b: np.load(tmp_path / f"{b}.npz")["W"] for b in fits}
    # within 1e-6 (measured 2.6e-8 on 2026-12-03: the two solvers' own accuracy)
    np.testing.assert_allclose(W["numpy"], W["cvxpy"], atol=1e-6)
    X = frame[["sl", "sw", "pl", "pw"]].to_numpy()
    m2 = (X ** 2).mean(axis=0)
    penalty = 0.25 / (2 * 0.75) * np.sum(m2[:, None] * W["numpy"] ** 2)
    assert fits["numpy"]["terms"][2]["value"] == pytest.approx(penalty, rel=1e-9)
