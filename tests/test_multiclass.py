"""Targets with K >= 3 classes through the pipeline: the language, the checker, both backends, fit,
eval, predict and build, against estimators outside objc that minimize the same objective.

Scaling used throughout: objc's `mean L(s, y) + lam * l2sq(W)` over n unweighted rows, times
1 / (2 lam), is `0.5 ||W||_F^2 + C sum_i L_i` with C = 1 / (2 lam n): the form scikit-learn's
LogisticRegression and LinearSVC minimize (scikit-learn user guide, "Logistic regression" and
"Linear SVM / multi-class": neither penalizes the intercept of LogisticRegression; LinearSVC is
compared without an intercept, since it would penalize one).
"""

from __future__ import annotations

import csv
import json
import subprocess
import sys
import warnings
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from scipy.special import logsumexp

from objc import training
from objc.cli import main
from objc.diagnostics import SpecError
from objc.fit_result import objective_terms
from objc.frontend import check_text

ROOT = Path(__file__).resolve().parent.parent
HAVE_NUMPY_SOLVER = (ROOT / "objc" / "backends" / "numpy_multiclass_src.py").is_file()


def _dataset(name: str) -> tuple[np.ndarray, np.ndarray]:
    from sklearn import datasets
    d = {"iris": datasets.load_iris, "wine": datasets.load_wine}[name]()
    return np.asarray(d.data, dtype=float), np.asarray(d.target)


def _table(folder: Path, X: np.ndarray, y: np.ndarray) -> list[str]:
    names = [f"f{j}" for j in range(X.shape[1])]
    frame = pd.DataFrame(X, columns=names)
    frame["kind"] = [f"k{int(v)}" for v in y]
    frame.to_csv(folder / "d.csv", index=False)
    return names


def _spec(names: list[str], goal: str, intercept: bool = True, extra: str = "") -> str:
    return (f'table t from "d.csv"\n  target kind classes k0, k1, k2\n  inputs {", ".join(names)}\n  standardize\n'
            f"{extra}learn W over inputs by classes" + (", b by classes\nscore s = W . x + b\n" if intercept else
                                                       "\nscore s = W . x\n") + f"goal {goal}\n")


def _bound(folder: Path, text: str):
    checked = check_text(text, str(folder / "m.objc"))
    assert checked.accepted, [d.message for d in checked.errors]
    train, _, _ = training.bind_training(checked, folder)
    return checked, train


def _fit(checked, train, backend: str):
    # a relative duality gap of 1e-14: with the l2sq weight 0.01 the objective is 0.02-strongly convex in
    # W, so ||W - W*||^2 <= 2 gap / 0.02 puts W within about 1e-6 of the optimum (the cvxpy backend
    # runs Clarabel at its own tolerances, see cvxpy_problem.SOLVER_OPTIONS)
    return training.run_backend(checked, train, backend, {}, tol=1e-14, param_tol=1e-9)


BACKENDS = ["cvxpy", pytest.param("numpy", marks=pytest.mark.skipif(
    not HAVE_NUMPY_SOLVER, reason="the NumPy multiclass solver is not in the tree yet"))]


# ---------------------------------------------------------------- against scikit-learn

@pytest.mark.parametrize("backend", BACKENDS)
@pytest.mark.parametrize("name", ["iris", "wine"])
def test_softmax_l2_matches_multinomial_logistic_regression(name, backend, tmp_path):
    from sklearn.linear_model import LogisticRegression
    X, y = _dataset(name)
    lam = 0.01
    checked, train = _bound(tmp_path, _spec(_table(tmp_path, X, y), f"mean softmax_ce(s, y) + {lam} * l2sq(W)"))
    result = _fit(checked, train, backend)
    n = train.n_rows
    # scikit-learn's LogisticRegression (lbfgs; multinomial for K >= 3 classes) minimizes
    # 0.5 ||W||^2 + C sum_i CE_i with the intercept free
    sk = LogisticRegression(C=1.0 / (2.0 * lam * n), tol=1e-14, max_iter=100000).fit(train.X, train.y.astype(int))
    W_sk, b_sk = sk.coef_.T, sk.intercept_
    S = train.X @ W_sk + b_sk
    # the objective at scikit-learn's answer, from the textbook formula (log-sum-exp minus the picked score)
    at_sk = np.mean(logsumexp(S, axis=1) - S[np.arange(n), train.y.astype(int)]) + lam * np.sum(W_sk ** 2)
    assert abs(result.objective - at_sk) <= 1e-8 * abs(at_sk)
    assert np.max(np.abs(result.params["W"] - W_sk)) <= 1e-6
    # adding one number to every class's intercept leaves every softmax unchanged: compare b centred
    b = result.params["b"]
    assert np.max(np.abs((b - b.mean()) - (b_sk - b_sk.mean()))) <= 1e-6
    # objc's own evaluation of its typed tree agrees with the textbook formula at the same point
    ours_at_sk, _ = objective_terms(checked, None, train.X, train.y, train.weights, {"W": W_sk, "b": b_sk})
    assert abs(ours_at_sk - at_sk) <= 1e-12 * abs(at_sk)


@pytest.mark.parametrize("backend", BACKENDS)
@pytest.mark.parametrize("name", ["iris", "wine"])
def test_crammer_singer_hinge_matches_linear_svc(name, backend, tmp_path):
    from sklearn.svm import LinearSVC
    X, y = _dataset(name)
    lam = 0.01
    checked, train = _bound(tmp_path, _spec(_table(tmp_path, X, y), f"mean cs_hinge(s, y) + {lam} * l2sq(W)",
                                            intercept=False))
    result = _fit(checked, train, backend)
    n = train.n_rows
    yi = train.y.astype(int)
    # scikit-learn's LinearSVC(multi_class="crammer_singer") minimizes 0.5 ||W||^2 + C sum_i xi_i with
    # xi_i = max_k (w_k x_i + [k != y_i]) - w_{y_i} x_i (Crammer & Singer 2001); no intercept here, as
    # LinearSVC would penalize it. Measured: at tol=1e-10 its weights come within 1e-9 of Clarabel's
    # on both tables, so they are compared with it directly.
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        sv = LinearSVC(multi_class="crammer_singer", fit_intercept=False, C=1.0 / (2.0 * lam * n), tol=1e-10,
                       max_iter=10 ** 7).fit(train.X, yi)
    W_sv = sv.coef_.T
    S = train.X @ W_sv
    other = np.ones_like(S)
    other[np.arange(n), yi] = 0.0
    at_sv = np.mean(np.max(S + other, axis=1) - S[np.arange(n), yi]) + lam * np.sum(W_sv ** 2)
    assert abs(result.objective - at_sv) <= 1e-8 * abs(at_sv)
    assert np.max(np.abs(result.params["W"] - W_sv)) <= 1e-6


@pytest.mark.parametrize("backend", BACKENDS)
def test_weston_watkins_hinge_matches_a_hand_written_cvxpy_problem(backend, tmp_path):
    import cvxpy as cp
    X, y = _dataset("wine")
    names = _table(tmp_path, X, y)
    # the NumPy solver trains the hinges with l2sq alone; the cvxpy backend takes every penalty of W
    c1, cg = (0.01, 0.05) if backend == "cvxpy" else (0.0, 0.0)
    goal = "mean ww_hinge(s, y) + 0.02 * l2sq(W)" + (f" + {c1} * l1(W) + {cg} * inputs_l2(W)" if c1 else "")
    text = _spec(names, goal, extra="  classweight k1 = 2.5\n")
    checked, train = _bound(tmp_path, text)
    result = _fit(checked, train, backend)
    n, p = train.X.shape
    yi = train.y.astype(int)
    c = np.where(yi == 1, 2.5, 1.0)
    # the Weston & Watkins (1999) loss written class by class, outside objc's catalog
    W, b = cp.Variable((p, 3)), cp.Variable(3)
    S = train.X @ W + np.ones((n, 1)) @ cp.reshape(b, (1, 3), order="F")
    total = 0
    for k in range(3):
        for j in range(3):
            rows = np.flatnonzero((yi == j) & (j != k))
            if len(rows):
                total = total + c[rows] @ cp.pos(1 + S[rows, k] - S[rows, j])
    goal = total / np.sum(c) + 0.02 * cp.sum_squares(W) + c1 * cp.sum(cp.abs(W)) + cg * cp.sum(
        cp.hstack([cp.norm(W[j, :], 2) for j in range(p)]))
    problem = cp.Problem(cp.Minimize(goal))
    problem.solve(solver="CLARABEL", tol_gap_abs=1e-12, tol_gap_rel=1e-12, tol_feas=1e-12)
    assert problem.status == "optimal"
    assert abs(result.objective - problem.value) <= 1e-8 * abs(problem.value)
    assert np.max(np.abs(result.params["W"] - W.value)) <= 1e-6
    assert np.array_equal(train.weights, c)  # the class weight reached the rows of class k1


# ---------------------------------------------------------------- check

def test_check_states_the_rules_and_the_expanded_objective(tmp_path):
    names = [f"f{j}" for j in range(4)]
    c = check_text(_spec(names, "mean softmax_ce(s, y) + 0.01 * l2sq(W) + 0.1 * inputs_l2(W)"), "m.objc")
    assert c.accepted and c.verdict == "convex" and c.task == "multiclass"
    loss, ridge, group = c.terms
    assert loss.verdict == "convex" and loss.smooth and loss.role == "multiclass"
    assert any("log-sum-exp is convex (Boyd & Vandenberghe 2004, sec. 3.1.5" in x and "sec. 3.2.2" in x
               for x in loss.explanation)
    assert group.verdict == "convex" and not group.smooth
    assert "sum_i c_i (log sum_k exp(s_ik) - s_i,y_i) / sum_i c_i" in c.expanded
    assert "0.01 * [||W||_F^2]" in c.expanded and "0.1 * [sum_j ||W[j, :]||_2]" in c.expanded
    assert "s_i = W^T x_i + b" in c.expanded and "classes in order: k0, k1, k2" in c.expanded
    assert c.intercept == "b" and not c.penalizes_intercept
    hinge = check_text(_spec(names, "mean cs_hinge(s, y) + 0.01 * l2sq(W)"), "m.objc")
    assert hinge.accepted and any("pointwise maximum of affine functions" in x and "sec. 3.2.3" in x
                                  for x in hinge.terms[0].explanation)


BINARY = 'table t from "d.csv"\n  target kind: k0 -> +1, k1 -> -1\n  inputs f0, f1\n'
CLASSES = 'table t from "d.csv"\n  target kind classes k0, k1, k2\n  inputs f0, f1\n'
MATRIX = "learn W over inputs by classes, b by classes\nscore s = W . x + b\n"


@pytest.mark.parametrize("text, code, line, column, words", [
    # a multiclass loss on a +1/-1 target
    (BINARY + "learn w over inputs, b\nscore s = w . x + b\ngoal mean softmax_ce(s, y)\n", "E255", 6, 11,
     ["target has no classes"]),
    # a parameter by classes without classes
    (BINARY + MATRIX + "goal mean logistic(y * s)\n", "E253", 4, 7, ["by classes", "+1 and -1"]),
    # a score with one value per row (no parameter by classes) under a multiclass loss
    (CLASSES + "learn w over inputs, b\nscore s = w . x + b\ngoal mean softmax_ce(s, y)\n", "E255", 6, 22,
     ["one value per row", "learn W over inputs by classes"]),
    # a margin loss on the K scores
    (CLASSES + MATRIX + "goal mean hinge(y * s)\n", "E230", 6, 17, ["K values per row", "softmax_ce(s, y)"]),
    # a margin loss of a one-score model on a target with classes
    (CLASSES + "learn w over inputs, b\nscore s = w . x + b\ngoal mean hinge(y * s)\n", "E306", 6, 6,
     ["3 classes", "softmax_ce(s, y)"]),
    # two classes listed
    ('table t from "d.csv"\n  target kind classes k0, k1\n  inputs f0, f1\n' + MATRIX + "goal mean softmax_ce(s, y)\n",
     "E254", 2, 3, ["three or more", "k0 -> +1, k1 -> -1"]),
    # the L2 norm of the matrix, and group_l2 of it
    (CLASSES + MATRIX + "goal mean softmax_ce(s, y) + l2(W)\n", "E240", 6, 30, ["l2sq(W)", "inputs_l2(W)"]),
    (CLASSES + "  group g = f0, f1\n" + MATRIX + "goal mean softmax_ce(s, y) + group_l2(W)\n", "E240", 7, 30,
     ["inputs_l2(W)"]),
    # the K scores averaged directly
    (CLASSES + MATRIX + "goal mean s\n", "E221", 6, 6, ["K scores per row", "softmax_ce(s, y)"]),
    # a class weight for a label that is not a class
    (CLASSES + "  classweight k7 = 2\n" + MATRIX + "goal mean softmax_ce(s, y)\n", "E212", 4, 15,
     ["k7", "k0, k1, k2"]),
])
def test_refusals_are_located(text, code, line, column, words):
    try:
        checked = check_text(text, "m.objc")
        diags = checked.errors
        assert not checked.accepted
    except SpecError as err:
        diags = err.diagnostics
    found = [d for d in diags if d.code == code]
    assert found, [(d.code, d.message) for d in diags]
    d = found[0]
    assert (d.span.line, d.span.column) == (line, column), (d.span, d.message)
    for w in words:
        assert w in d.message + " " + d.hint, (w, d.message, d.hint)


def test_score_other_than_w_x_plus_b_is_refused():
    c = check_text(CLASSES + "learn W over inputs by classes, b by classes\nscore s = W . x + 2 * b\n"
                   "goal mean softmax_ce(s, y)\n", "m.objc")
    assert [d.code for d in c.errors] == ["E307"] and c.errors[0].span.line == 5


def test_label_outside_the_classes_names_the_rows(tmp_path):
    X, y = _dataset("iris")
    _table(tmp_path, X[:20], np.r_[y[:17], [5, 5, 1]])
    checked = check_text(_spec([f"f{j}" for j in range(4)], "mean softmax_ce(s, y)"), str(tmp_path / "m.objc"))
    with pytest.raises(SpecError) as info:
        training.bind_training(checked, tmp_path)
    d = info.value.diagnostics[0]
    assert d.code == "T135" and "k5" in d.message and "rows 18, 19" in d.message and "k0, k1, k2" in d.message
    assert d.span.line == 2


# ---------------------------------------------------------------- the commands

def _cli(argv, capsys) -> tuple[int, str]:
    code = main([str(a) for a in argv])
    out, _err = capsys.readouterr()
    return code, out


@pytest.mark.parametrize("backend", BACKENDS)
def test_fit_eval_predict_end_to_end(backend, tmp_path, capsys):
    from sklearn.metrics import confusion_matrix, log_loss, precision_recall_fscore_support
    X, y = _dataset("iris")
    names = _table(tmp_path, X, y)
    spec = tmp_path / "m.objc"
    spec.write_text(_spec(names, "mean softmax_ce(s, y) + 0.01 * l2sq(W)"))
    code, out = _cli(["check", spec, "--json"], capsys)
    assert code == 0 and json.loads(out)["task"] == "multiclass"
    model = tmp_path / "m.model.json"
    code, out = _cli(["fit", spec, "--backend", backend, "-o", model, "--json"], capsys)
    assert code == 0, out
    fitted = json.loads(out)
    assert np.shape(fitted["params"]["W"]) == (4, 3) and np.shape(fitted["params"]["b"]) == (3,)
    code, out = _cli(["eval", model, "--json"], capsys)
    assert code == 0
    m = json.loads(out)["metrics"]
    # the scores from the saved parameters, by the textbook softmax
    saved = training.load_trained(model)
    assert saved.document["schema"]["classes"] == ["k0", "k1", "k2"]
    checked, train = _bound(tmp_path, spec.read_text())
    S = train.X @ saved.params["W"] + saved.params["b"]
    P = np.exp(S - logsumexp(S, axis=1, keepdims=True))
    truth, called = train.y.astype(int), np.argmax(S, axis=1)
    # scikit-learn's metrics (sklearn.metrics) on the same labels
    assert m["class_confusion"] == confusion_matrix(truth, called, labels=[0, 1, 2]).tolist()
    precision, recall, _f, support = precision_recall_fscore_support(truth, called, labels=[0, 1, 2],
                                                                     zero_division=0)
    assert np.allclose([c["precision"] for c in m["per_class"]], precision, rtol=0, atol=1e-15)
    assert np.allclose([c["recall"] for c in m["per_class"]], recall, rtol=0, atol=1e-15)
    assert [c["rows"] for c in m["per_class"]] == support.tolist()
    assert m["zero_one_error"] == pytest.approx(np.mean(truth != called), abs=1e-15)
    assert m["log_loss"] == pytest.approx(log_loss(truth, P, labels=[0, 1, 2]), rel=1e-10)
    out_csv = tmp_path / "p.csv"
    code, _ = _cli(["predict", model, tmp_path / "d.csv", "-o", out_csv], capsys)
    assert code == 0
    with open(out_csv, newline="") as f:
        rows = list(csv.DictReader(f))
    assert [r["label"] for r in rows] == [f"k{k}" for k in called]
    chances = np.array([[float(r[f"chance:k{k}"]) for k in range(3)] for r in rows])
    assert np.allclose(chances, P, rtol=0, atol=1e-12)
    assert list(saved.predict(X)) == [f"k{k}" for k in called]
    code, out = _cli(["eval", model], capsys)
    assert code == 0 and "rows: true class, columns: predicted class" in out and "log loss" in out


@pytest.mark.skipif(not HAVE_NUMPY_SOLVER, reason="the NumPy multiclass solver is not in the tree yet")
def test_build_predicts_the_same_from_a_fresh_process(tmp_path, capsys):
    X, y = _dataset("iris")
    names = _table(tmp_path, X, y)
    spec = tmp_path / "m.objc"
    spec.write_text(_spec(names, "mean softmax_ce(s, y) + 0.01 * l2sq(W)"))
    module = tmp_path / "iris_model.py"
    code, _ = _cli(["build", spec, "-o", module], capsys)
    assert code == 0
    checked, train = _bound(tmp_path, spec.read_text())
    reference = _fit(checked, train, "cvxpy")
    script = (f"import sys, json, numpy as np\nsys.path.insert(0, {str(tmp_path)!r})\nimport iris_model as m\n"
              f"import pandas as pd\nX = pd.read_csv({str(tmp_path / 'd.csv')!r})[{names!r}].to_numpy(float)\n"
              "y = pd.read_csv(" + repr(str(tmp_path / "d.csv")) + ")['kind'].to_numpy(object)\n"
              "model = m.fit(X, y, tol=1e-14)\nprint(json.dumps({'labels': [str(v) for v in m.predict(model, X)], "
              "'W': np.asarray(model['W']).tolist()}))\n")
    run = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True, timeout=300, cwd=tmp_path)
    assert run.returncode == 0, run.stderr
    got = json.loads(run.stdout)
    S = train.X @ reference.params["W"] + reference.params["b"]
    assert got["labels"] == [f"k{k}" for k in np.argmax(S, axis=1)]
    assert np.max(np.abs(np.array(got["W"]) - reference.params["W"])) <= 1e-6


def test_the_example_spec_trains_on_its_demo_table(tmp_path, capsys):
    spec = ROOT / "specs" / "loaf_kinds.objc"
    code, out = _cli(["fit", spec, "--backend", "cvxpy", "-o", tmp_path / "loaf.json", "--json"], capsys)
    assert code == 0, out
    doc = json.loads(out)
    # the demo loaves overlap but are mostly told apart (their centres differ by several spreads)
    assert doc["holdout_metrics"]["zero_one_error"] < 0.25
    assert len(doc["holdout_metrics"]["class_confusion"]) == 3


def test_cross_validated_sweep_of_a_class_target(tmp_path, capsys):
    from sklearn.linear_model import LogisticRegression
    X, y = _dataset("iris")
    names = _table(tmp_path, X, y)
    spec = tmp_path / "m.objc"
    spec.write_text(_spec(names, "mean softmax_ce(s, y) + lam * l2sq(W)").replace(
        "learn W", "tune lam = 0.01 within 0.0001 .. 10\nlearn W"))
    argv = ["sweep", spec, "lam=0.001,0.1", "--folds", "3", "--json", "--save-best", tmp_path / "best.json",
            "--plot", tmp_path / "cv.png", "--plot-weights", tmp_path / "w.png"]
    code, out = _cli(argv, capsys)
    assert code == 0, out
    doc = json.loads(out)
    assert doc["metrics"][:2] == ["zero_one_error", "log_loss"]
    assert all((tmp_path / f).stat().st_size > 0 for f in ("cv.png", "w.png", "best.json"))
    # the refit at the chosen value is the fit of the whole table: mean softmax_ce + lam ||W||^2 is
    # scikit-learn's multinomial LogisticRegression at C = 1 / (2 n lam) (its documented objective)
    lam = doc["chosen"]["value"]
    Xs = (X - X.mean(axis=0)) / X.std(axis=0)  # the spec standardizes (population standard deviation)
    ref = LogisticRegression(C=1 / (2 * len(y) * lam), tol=1e-12, max_iter=100000).fit(Xs, y)
    saved = json.loads((tmp_path / "best.json").read_text())
    arrays = np.load(tmp_path / "best.npz")
    W = arrays[[k for k in arrays.files if k.endswith("W")][0]]
    np.testing.assert_allclose(W, ref.coef_.T, atol=1e-5)
    assert saved["fit"]["certificate"]["relative"] <= 1e-6


# ---------------------------------------------------------------- the catalog entries on K scores
# (tests/test_catalog.py checks the entries of one real argument; these are the same properties on a
# row's K scores: convexity, sign, the cvxpy construction, the derivative kernels)

MC_LOSSES = ["softmax_ce", "cs_hinge", "ww_hinge"]


def _scores(seed: int, n: int = 200, k: int = 4) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    return rng.normal(scale=3.0, size=(n, k)), rng.integers(0, k, size=n).astype(float)


@pytest.mark.parametrize("name", MC_LOSSES)
def test_multiclass_losses_are_the_textbook_formulas(name):
    from objc.catalog import CATALOG
    S, y = _scores(1)
    yi = y.astype(int)
    picked = S[np.arange(len(y)), yi]
    want = {"softmax_ce": logsumexp(S, axis=1) - picked,  # scipy's logsumexp
            "cs_hinge": np.max(S + (np.arange(S.shape[1]) != yi[:, None]), axis=1) - picked,
            "ww_hinge": np.sum(np.where(np.arange(S.shape[1]) != yi[:, None], np.maximum(0, 1 + S - picked[:, None]),
                                        0.0), axis=1)}[name]
    got = CATALOG[name].value(S, y)
    assert np.allclose(got, want, rtol=0, atol=1e-12) and np.all(got >= 0)  # declared sign: nonnegative


@pytest.mark.parametrize("name", MC_LOSSES)
def test_multiclass_losses_are_convex_in_the_scores(name):
    from objc.catalog import CATALOG
    A, y = _scores(2)
    B, _ = _scores(3)
    f = CATALOG[name].value
    # midpoint convexity row by row, to rounding (common practice tolerance, no source)
    assert np.all(f((A + B) / 2, y) <= (f(A, y) + f(B, y)) / 2 + 1e-12)


@pytest.mark.parametrize("name", MC_LOSSES)
def test_multiclass_cvxpy_constructions_agree_with_the_kernels(name):
    import cvxpy as cp
    from objc.catalog import CATALOG
    S, y = _scores(4, n=30)
    V = cp.Variable(S.shape)
    V.value = S
    expr = CATALOG[name].cvxpy(cp, V, y)
    assert expr.is_convex()
    assert np.allclose(expr.value, CATALOG[name].value(S, y), rtol=0, atol=1e-12)


@pytest.mark.parametrize("name", MC_LOSSES)
def test_multiclass_derivatives_are_subgradients(name):
    from objc.catalog import CATALOG
    entry = CATALOG[name]
    A, y = _scores(5)
    B, _ = _scores(6)
    G = entry.value_and_derivative(A, y)[1] if entry.derivative is None else entry.derivative(A, y)
    # f(B) >= f(A) + <g, B - A> row by row (the subgradient inequality)
    assert np.all(entry.value(B, y) >= entry.value(A, y) + np.sum(G * (B - A), axis=1) - 1e-10)
    if entry.derivative is None:  # smooth: the gradient is also the limit of difference quotients
        h, D = 1e-6, np.zeros_like(A)
        for k in range(A.shape[1]):
            E = np.zeros_like(A)
            E[:, k] = h
            D[:, k] = (entry.value(A + E, y) - entry.value(A - E, y)) / (2 * h)
        assert np.allclose(G, D, rtol=0, atol=1e-7)
        assert np.allclose(entry.value_and_derivative(A, y)[0], entry.value(A, y), rtol=0, atol=1e-12)


def test_inputs_l2_is_the_sum_of_row_norms_and_convex():
    import cvxpy as cp
    from objc.catalog import CATALOG
    rng = np.random.default_rng(7)
    A, B = rng.normal(size=(5, 3)), rng.normal(size=(5, 3))
    f = CATALOG["inputs_l2"].value
    assert f(A) == pytest.approx(sum(np.linalg.norm(A[j]) for j in range(5)), rel=1e-14)
    assert f((A + B) / 2) <= (f(A) + f(B)) / 2 + 1e-12
    W = cp.Variable((5, 3))
    W.value = A
    assert CATALOG["inputs_l2"].cvxpy(cp, W).value == pytest.approx(f(A), rel=1e-12)


def test_cvxpy_build_solves_the_same_problem_in_a_fresh_process(tmp_path, capsys):
    X, y = _dataset("iris")
    names = _table(tmp_path, X, y)
    spec = tmp_path / "m.objc"
    spec.write_text(_spec(names, "mean cs_hinge(s, y) + 0.01 * l2sq(W) + 0.02 * inputs_l2(W)"))
    code, _ = _cli(["build", spec, "--backend", "cvxpy", "-o", tmp_path / "cv_model.py"], capsys)
    assert code == 0
    checked, train = _bound(tmp_path, spec.read_text())
    reference = _fit(checked, train, "cvxpy")
    np.save(tmp_path / "X.npy", train.X)
    np.save(tmp_path / "y.npy", train.y)
    script = (f"import sys, json, numpy as np\nsys.path.insert(0, {str(tmp_path)!r})\nimport cv_model as m\n"
              f"r = m.solve(np.load({str(tmp_path / 'X.npy')!r}), np.load({str(tmp_path / 'y.npy')!r}))\n"
              "print(json.dumps({'objective': float(r['objective']), 'W': np.asarray(r['params']['W']).tolist()}))\n")
    run = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True, timeout=300, cwd=tmp_path)
    assert run.returncode == 0, run.stderr
    got = json.loads(run.stdout)
    assert got["objective"] == pytest.approx(reference.objective, rel=1e-9)
    assert np.max(np.abs(np.array(got["W"]) - reference.params["W"])) <= 1e-7


@pytest.mark.skipif(not HAVE_NUMPY_SOLVER, reason="the NumPy multiclass solver is not in the tree yet")
@pytest.mark.parametrize("aggregate", ["mean", "sum", "perrow"])
def test_aggregates_class_weights_and_tunables_agree_across_backends(aggregate):
    # the per-row factors the NumPy solver gets (coefficient x c_i / sum c, / n or / 1) against cvxpy +
    # Clarabel building the same goal from the typed tree
    text = (ROOT / "specs" / "loaf_kinds.objc").read_text().replace("  holdout 20% seed 3\n",
                                                                      "  classweight spelt = 2, wheat = 0.5\n")
    text = text.replace("learn W", "tune lam = 0.01 within 0.001 .. 1\nlearn W").replace(
        "goal mean softmax_ce(s, y) + 0.01 * l2sq(W)", f"goal 0.5 * {aggregate} softmax_ce(s, y) + lam * l2sq(W)")
    checked = check_text(text, str(ROOT / "specs" / "loaf_weighted.objc"))
    train, _, _ = training.bind_training(checked, ROOT / "specs")
    ours = training.run_backend(checked, train, "numpy", {"lam": 0.05}, tol=1e-13)
    ref = training.run_backend(checked, train, "cvxpy", {"lam": 0.05})
    assert ours.objective == pytest.approx(ref.objective, rel=1e-10)
    assert np.max(np.abs(ours.params["W"] - ref.params["W"])) <= 1e-5
    assert set(np.unique(train.weights)) == {0.5, 1.0, 2.0}
