"""Choosing tunables (objc.selection): folds, cross-validated figures against scikit-learn on its
bundled tables, the one-standard-error rule by hand, grids over two tunables and warm-started paths
against cold fits, and the refit's saved record."""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest
import sklearn.datasets as skd
from sklearn.linear_model import LogisticRegression, Ridge
from sklearn.metrics import log_loss, mean_absolute_error, mean_squared_error, zero_one_loss
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import StandardScaler

from objc import selection, training
from objc.diagnostics import SpecError
from objc.frontend import check_text
from objc.model_io import load_model, save_model


def _table(path: Path, X: np.ndarray, y, names: list[str]) -> list[str]:
    path.write_text(",".join(names + ["t"]) + "\n" + "\n".join(
        ",".join(f"{v:.17g}" for v in row) + f",{t}" for row, t in zip(X, y)) + "\n", encoding="utf-8")
    return names


def _spec(tmp: Path, table: str, inputs: list[str], body: str, target: str = "t") -> object:
    text = (f'table d from "{table}"\n  target {target}\n  inputs {", ".join(inputs)}\n  standardize\n' + body)
    return check_text(text, str(tmp / "s.objc"))


# ---------------------------------------------------------------- folds

def test_folds_partition_the_rows_and_stratify_by_class():
    y = np.where(np.arange(53) % 4 == 0, 1.0, -1.0)  # 14 of +1, 39 of -1
    folds = selection.make_folds(y, 5, seed=11, stratify=True)
    held = [folds.held(f) for f in range(5)]
    # every row in exactly one fold
    assert sorted(np.concatenate(held).tolist()) == list(range(53))
    for f in range(5):
        assert set(folds.kept(f)) | set(held[f]) == set(range(53)) and not set(folds.kept(f)) & set(held[f])
    # each class's count per fold within one of every other fold's, and so the fold sizes
    for c in (1.0, -1.0):
        counts = [int(np.sum(y[h] == c)) for h in held]
        assert max(counts) - min(counts) <= 1, counts
    sizes = [len(h) for h in held]
    assert max(sizes) - min(sizes) <= 1
    # same seed, same folds; another seed, other folds
    assert selection.make_folds(y, 5, seed=11, stratify=True) == folds
    assert selection.make_folds(y, 5, seed=12, stratify=True).assignment != folds.assignment


def test_unstratified_folds_and_their_limits():
    y = np.linspace(0, 1, 10)
    folds = selection.make_folds(y, 3, seed=0)
    assert sorted(len(folds.held(f)) for f in range(3)) == [3, 3, 4] and not folds.stratified
    with pytest.raises(ValueError, match="at least 2"):
        selection.make_folds(y, 1)
    with pytest.raises(ValueError, match="at least 11 training rows"):
        selection.make_folds(y, 11)


# ---------------------------------------------------------------- against scikit-learn

@pytest.fixture(scope="module")
def diabetes(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("diabetes")
    d = skd.load_diabetes()
    names = _table(tmp / "d.csv", d.data, [f"{t:.17g}" for t in d.target], [f"x{j}" for j in range(10)])
    checked = _spec(tmp, "d.csv", names, "tune lam = 0.01 within 0.00001 .. 10\nlearn w over inputs, b\n"
                    "score s = w . x + b\ngoal mean squared(y - s) + lam * l2sq(w)\n")
    return tmp, checked, d.data, d.target


def test_ridge_fold_figures_equal_scikit_learn_on_the_same_folds_and_the_one_se_choice(diabetes):
    tmp, checked, X, y = diabetes
    train, held, label = training.bind_training(checked, tmp)
    plan = selection.validation_plan(checked, train, held, label, folds=5, seed=3)
    grid = selection.make_grid(checked, [selection.parse_axis("lam:0.0001..1:6")], data=train)
    outcome = selection.evaluate_grid(checked, plan, grid, {"lam": 0.01})
    assert outcome.metrics == ("mean_losses:squared", "mae", "rmse")
    sk_scores, sk_norms = [], []
    for p in outcome.points:
        scores, norms = [], []
        for f in range(5):
            tr, te = plan.folds.kept(f), plan.folds.held(f)
            # `mean squared(y - s) + lam * l2sq(w)` is (1/2n)||r||^2 + lam ||w||^2; times 2n it is
            # scikit-learn's Ridge objective ||r||^2 + alpha ||w||^2 with alpha = 2 n lam (n: the fold's
            # training rows), the scaler fitted on those rows as objc's per-fold standardization is
            model = make_pipeline(StandardScaler(), Ridge(alpha=2 * len(tr) * p.setting["lam"], tol=1e-12))
            model.fit(X[tr], y[tr])
            pred = model.predict(X[te])
            scores.append(mean_squared_error(y[te], pred) / 2)  # `squared` is r^2 / 2
            norms.append(float(np.linalg.norm(model[-1].coef_)))
            assert p.values["mae"][f] == pytest.approx(mean_absolute_error(y[te], pred), rel=1e-9)
            assert p.values["rmse"][f] == pytest.approx(math.sqrt(mean_squared_error(y[te], pred)), rel=1e-9)
        # the fits are certified to 1e-6 in the parameters; the held-out figures agree far closer
        np.testing.assert_allclose(p.values["mean_losses:squared"], scores, rtol=1e-8)
        sk_scores.append(scores)
        sk_norms.append(np.mean(norms))
    # the one-standard-error rule (Hastie, Tibshirani & Friedman, ESL 2nd ed., section 7.10) by hand
    # from scikit-learn's fold scores: mean over folds, SE = sample sd / sqrt(K), then among the points
    # within one SE of the best the one with the smallest mean weight norm (no L1 term here)
    s = np.array(sk_scores)
    mean, se = s.mean(axis=1), s.std(axis=1, ddof=1) / math.sqrt(5)
    best = int(np.argmin(mean))
    within = [i for i in range(len(mean)) if mean[i] <= mean[best] + se[best]]
    by_hand = min(within, key=lambda i: sk_norms[i])
    choice = selection.choose_point(outcome, "one-se")
    assert choice.best_index == best and choice.index == by_hand and by_hand != best
    assert choice.threshold == pytest.approx(mean[best] + se[best], rel=1e-8)
    assert selection.choose_point(outcome, "best").index == best


def test_logistic_fold_figures_equal_scikit_learn(tmp_path):
    d = skd.load_breast_cancer()
    X, y = d.data[:, :8], np.where(d.target == 1, 1, -1)
    names = _table(tmp_path / "c.csv", X, y, [f"x{j}" for j in range(8)])
    checked = _spec(tmp_path, "c.csv", names, "tune lam = 0.01 within 0.0001 .. 1\nlearn w over inputs, b\n"
                    "score s = w . x + b\ngoal mean logistic(y * s) + lam * l2sq(w)\n",
                    target="t: 1 -> +1, -1 -> -1")
    train, held, label = training.bind_training(checked, tmp_path)
    plan = selection.validation_plan(checked, train, held, label, folds=3, seed=5)
    assert plan.folds.stratified
    grid = selection.make_grid(checked, [selection.parse_axis("lam=0.001,0.03")], data=train)
    outcome = selection.evaluate_grid(checked, plan, grid, {"lam": 0.01})
    assert outcome.metrics == ("zero_one_error", "mean_losses:logistic")
    for p in outcome.points:
        for f in range(3):
            tr, te = plan.folds.kept(f), plan.folds.held(f)
            # mean log(1 + exp(-m)) + lam ||w||^2, divided by 2 n lam, is scikit-learn's
            # 0.5 ||w||^2 + C sum log(1 + exp(-m)) with C = 1 / (2 n lam) (its LogisticRegression docs)
            model = make_pipeline(StandardScaler(), LogisticRegression(C=1 / (2 * len(tr) * p.setting["lam"]),
                                                                       tol=1e-12, max_iter=10000))
            model.fit(X[tr], y[tr])
            assert p.values["zero_one_error"][f] == pytest.approx(zero_one_loss(y[te], model.predict(X[te])),
                                                                  abs=1e-12)
            assert p.values["mean_losses:logistic"][f] == pytest.approx(
                log_loss(y[te], model.predict_proba(X[te])), rel=1e-6)


def test_multiclass_fold_figures_equal_scikit_learn(tmp_path):
    # the wine table as scikit-learn ships it (sklearn.datasets.load_wine: 178 rows, 3 cultivars)
    d = skd.load_wine()
    X, y = d.data[:, :6], d.target
    names = _table(tmp_path / "w.csv", X, [f"c{k}" for k in y], [f"x{j}" for j in range(6)])
    checked = _spec(tmp_path, "w.csv", names, "tune C = 1 within 0.001 .. 1000\nlearn W over inputs by classes, "
                    "b by classes\nscore s = W . x + b\ngoal C * sum softmax_ce(s, y) + 0.5 * l2sq(W)\n",
                    target="t classes c0, c1, c2")
    train, held, label = training.bind_training(checked, tmp_path)
    plan = selection.validation_plan(checked, train, held, label, folds=3, seed=2)
    assert plan.folds.stratified
    for f in range(3):  # stratified: each class's rows are dealt evenly over the folds
        counts = np.bincount(y[plan.folds.held(f)], minlength=3)
        assert all(abs(c - np.sum(y == k) / 3) <= 1 for k, c in enumerate(counts))
    grid = selection.make_grid(checked, [selection.parse_axis("C=0.01,1")], data=train)
    outcome = selection.evaluate_grid(checked, plan, grid, {"C": 1.0})
    assert outcome.metrics == ("zero_one_error", "log_loss")
    for p in outcome.points:
        for f in range(3):
            tr, te = plan.folds.kept(f), plan.folds.held(f)
            # C sum softmax_ce + 0.5 ||W||^2 is scikit-learn's multinomial LogisticRegression objective
            # (unpenalized intercepts) at the same C (its documented objective)
            model = make_pipeline(StandardScaler(), LogisticRegression(C=p.setting["C"], tol=1e-12, max_iter=100000))
            model.fit(X[tr], y[tr])
            assert p.values["zero_one_error"][f] == pytest.approx(zero_one_loss(y[te], model.predict(X[te])),
                                                                  abs=1e-12)
            assert p.values["log_loss"][f] == pytest.approx(log_loss(y[te], model.predict_proba(X[te])), rel=1e-5)


# ---------------------------------------------------------------- grids, warm starts, cold fits

ENET = ("tune lam = 0.1 within 0.0001 .. 10\ntune a = 0.5 within 0 .. 1\nlearn w over inputs, b\n"
        "score s = w . x + b\ngoal mean squared(y - s) + lam * (a * l1(w) + (1 - a) * l2sq(w))\n")


@pytest.fixture(scope="module")
def enet(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("enet")
    d = skd.load_diabetes()
    names = _table(tmp / "d.csv", d.data[:150, :6], [f"{t:.17g}" for t in d.target[:150] / 50],
                   [f"x{j}" for j in range(6)])
    return tmp, _spec(tmp, "d.csv", names, ENET)


def test_two_tunable_grid_points_equal_cold_fits(enet):
    tmp, checked = enet
    train, held, label = training.bind_training(checked, tmp)
    plan = selection.validation_plan(checked, train, held, label)  # one part: the training rows
    grid = selection.make_grid(checked, [selection.parse_axis("lam:0.003..1:4"), selection.parse_axis("a:0..1:3:lin")],
                               data=train)
    assert grid.size == 12 and grid.axes[1].values == (0.0, 0.5, 1.0)
    # the L1 weight lam is the path axis, fitted from large to small
    along, paths = selection.fit_order(checked, grid)
    assert along == 0 and len(paths) == 3 and [grid.settings()[k]["lam"] for k in paths[0]] == sorted(
        grid.axes[0].values, reverse=True)
    outcome = selection.evaluate_grid(checked, plan, grid, {"lam": 0.1, "a": 0.5})
    assert outcome.warm_start.startswith("paths.fit_path")
    for p in outcome.points:
        cold = training.run_backend(checked, train, "numpy", p.setting)
        # both are certified within 1e-6 of the optimum in the parameters, so within 2e-6 of each other
        gap = np.linalg.norm(np.r_[p.params["w"] - cold.params["w"], p.params["b"] - cold.params["b"]])
        assert gap <= 2e-6, (p.setting, gap)
        assert p.objectives[0] == pytest.approx(cold.objective, rel=1e-6)
    # more L1 weight never keeps more inputs, on this path (a = 1: the lasso)
    lasso = [p for p in outcome.points if p.setting["a"] == 1.0]
    assert [p.nonzeros[0] for p in sorted(lasso, key=lambda p: -p.setting["lam"])] == sorted(
        p.nonzeros[0] for p in lasso)


def test_a_cvxpy_grid_builds_one_problem_and_equals_cold_solves(enet, monkeypatch):
    tmp, checked = enet
    from objc.backends import cvxpy_problem
    train, held, label = training.bind_training(checked, tmp)
    plan = selection.validation_plan(checked, train, held, label)
    grid = selection.make_grid(checked, [selection.parse_axis("lam:0.01..1:2"), selection.parse_axis("a:0..1:2:lin")],
                               data=train)
    builds = []
    real_build = cvxpy_problem.build_problem
    monkeypatch.setattr(cvxpy_problem, "build_problem", lambda *a, **k: builds.append(1) or real_build(*a, **k))
    outcome = selection.evaluate_grid(checked, plan, grid, {"lam": 0.1, "a": 0.5},
                                      selection.FitOptions(backend="cvxpy"))
    # two paths over lam (one per value of a) on one part: one parametrized problem serves both
    assert len(builds) == 1
    for p in outcome.points:
        monkeypatch.setattr(cvxpy_problem, "build_problem", real_build)
        cold = training.run_backend(checked, train, "cvxpy", p.setting)  # cvxpy + Clarabel, built afresh
        assert p.objectives[0] == pytest.approx(cold.objective, rel=1e-7)
        assert np.max(np.abs(p.params["w"] - cold.params["w"])) <= 1e-6


def test_l1_grid_starts_where_every_weight_is_zero(enet):
    tmp, checked = enet
    train, _, _ = training.bind_training(checked, tmp)
    axis = selection.resolve_axis(checked, selection.parse_axis("lam::4"), data=train, base={"lam": 0.1, "a": 1.0})
    top, bottom = axis.values[-1], axis.values[0]
    assert bottom == pytest.approx(top * selection.PATH_RATIO) and "L1 path" in axis.origin
    at_top = training.run_backend(checked, train, "numpy", {"lam": top, "a": 1.0})
    below = training.run_backend(checked, train, "numpy", {"lam": top * 0.9, "a": 1.0})
    assert np.all(np.abs(at_top.params["w"]) <= 1e-12) and np.any(np.abs(below.params["w"]) > 1e-6)


def test_grid_text_and_its_mistakes(enet):
    _, checked = enet
    assert selection.parse_axis("lam:0.001..10:12") == selection.AxisText("lam:0.001..10:12", "lam", 0.001, 10.0, 12)
    assert selection.parse_axis("a:0..1:5:lin").spacing == "lin"
    assert selection.parse_axis("a=0,0.5").values == (0.0, 0.5)
    for bad, why in [("lam:1..0.1", "smaller value first"), ("lam:x..1", "not a number"), ("lam:1", "LOW..HIGH"),
                     ("lam:0.1..1:0", "at least 1"), ("lam:0.1..1:3:cubic", "neither lin nor log"),
                     ("3lam", "tunable's name"), ("lam=", "commas"), ("lam:0.1..1:2.5", "whole number")]:
        with pytest.raises(ValueError, match=why):
            selection.parse_axis(bad)
    with pytest.raises(ValueError, match="no tunable 'mu'"):
        selection.resolve_axis(checked, selection.parse_axis("mu"))
    with pytest.raises(ValueError, match="given twice"):
        selection.make_grid(checked, [selection.parse_axis("a"), selection.parse_axis("a:0..1")])
    with pytest.raises(SpecError) as err:
        selection.resolve_axis(checked, selection.parse_axis("a:0..2:3"))
    [d] = err.value.diagnostics
    assert d.code == "E402" and d.span.line == 6  # the `tune a` line
    with pytest.raises(ValueError, match="log grid needs both ends above zero"):
        selection.resolve_axis(checked, selection.parse_axis("a:0..1:3:log"))


def test_choice_rules_by_hand():
    # means 0.30, 0.25, 0.27, 0.40 with standard errors 0.03: best is 1, within 0.28: points 1 and 2
    means, ses = [0.30, 0.25, 0.27, 0.40], [0.03] * 4
    assert selection.choose(means, ses, "best").index == 1
    one_se = selection.choose(means, ses, "one-se", norms=[3.0, 2.0, 1.0, 0.5])
    assert one_se.within == (1, 2) and one_se.index == 2 and one_se.threshold == pytest.approx(0.28)
    # fewest nonzero weights first, before the norm
    assert selection.choose(means, ses, "one-se", nonzeros=[5, 4, 5, 1], norms=[3.0, 2.0, 1.0, 0.5]).index == 1
    with pytest.raises(ValueError, match="--folds"):
        selection.choose(means, [float("nan")] * 4, "one-se")


def test_refit_records_how_it_was_chosen_and_loads(diabetes, tmp_path):
    tmp, checked, _, _ = diabetes
    train, held, label = training.bind_training(checked, tmp)
    plan = selection.validation_plan(checked, train, held, label, folds=3, seed=9)
    grid = selection.make_grid(checked, [selection.parse_axis("lam:0.001..1:3")], data=train)
    outcome = selection.evaluate_grid(checked, plan, grid, {"lam": 0.01})
    choice = selection.choose_point(outcome, "one-se")
    doc, fit = selection.refit_chosen(checked, tmp / "s.objc", train, held, label, outcome, choice)
    saved = load_model(save_model(tmp_path / "m.json", doc, fit.params))
    record = saved.document["selection"]
    assert record["folds"] == 3 and record["seed"] == 9 and record["rule"] == "one-se"
    assert record["chosen"]["setting"]["lam"] == saved.document["tunables"]["lam"]
    assert record["chosen"]["mean"] == pytest.approx(outcome.stats()[0][choice.index])
    assert record["grid"][0]["values"] == list(grid.axes[0].values) and record["fits"] == 9


def test_per_fold_standardization_refuses_a_constant_input(tmp_path):
    X = np.c_[np.arange(12.0), np.r_[np.zeros(11), 1.0]]
    names = _table(tmp_path / "k.csv", X, np.arange(12.0), ["u", "v"])
    checked = _spec(tmp_path, "k.csv", names, "learn w over inputs, b\nscore s = w . x + b\n"
                    "goal mean squared(y - s) + 0.1 * l2sq(w)\n")
    train, held, label = training.bind_training(checked, tmp_path)
    with pytest.raises(SpecError) as err:
        selection.validation_plan(checked, train, held, label, folds=3, seed=0)
    # the one rule of tables.py for a column too constant to scale, naming the fold
    d = err.value.diagnostics[0]
    assert d.code == "T150" and "'v'" in d.message and "fold" in d.message


def test_lasso_fold_figures_equal_scikit_learns_lasso_cv_on_the_same_folds(tmp_path):
    from sklearn.linear_model import LassoCV
    d = skd.load_diabetes()  # Efron, Hastie, Johnstone & Tibshirani 2004: 442 x 10, bundled with scikit-learn
    # columns standardized once, in the table itself (population sd, as StandardScaler): the raw columns'
    # Gram matrix is ill-conditioned enough that a certified 1e-6 takes objc's FISTA tens of seconds
    X, y = (d.data - d.data.mean(axis=0)) / d.data.std(axis=0), d.target
    names = _table(tmp_path / "d.csv", X, [f"{t:.17g}" for t in y], [f"x{j}" for j in range(X.shape[1])])
    # no `standardize` in the spec: LassoCV fits the columns as given
    checked = check_text(f'table d from "d.csv"\n  target t\n  inputs {", ".join(names)}\n'
                         "tune lam = 1 within 0.0001 .. 1000\nlearn w over inputs, b\nscore s = w . x + b\n"
                         "goal mean squared(y - s) + lam * l1(w)\n", str(tmp_path / "s.objc"))
    train, held, label = training.bind_training(checked, tmp_path)
    plan = selection.validation_plan(checked, train, held, label, folds=5, seed=0)
    grid = selection.make_grid(checked, [selection.parse_axis("lam::8")], data=train)
    assert "L1 path" in grid.axes[0].origin
    outcome = selection.evaluate_grid(checked, plan, grid, {})
    assert outcome.warm_start == "paths.fit_path"
    values = [p.setting["lam"] for p in outcome.points]
    # LassoCV minimizes (1 / 2n) ||y - X w - b||^2 + alpha ||w||_1 on each training part (its
    # documentation), objc's goal at lam = alpha; mse_path_ holds each fold's held-out mean squared
    # error, one row per alpha in descending order
    folds = [(plan.folds.kept(f), plan.folds.held(f)) for f in range(5)]
    peer = LassoCV(alphas=values, cv=folds, tol=1e-14, max_iter=100_000).fit(X, y)
    order = np.argsort(-np.asarray(values))
    for i, k in enumerate(order):
        assert peer.alphas_[i] == pytest.approx(values[k], rel=1e-12)
        # `squared` is r^2 / 2; the fits are certified to 1e-6, the figures agree far closer
        np.testing.assert_allclose(2.0 * np.asarray(outcome.points[k].values["mean_losses:squared"]),
                                   peer.mse_path_[i], rtol=1e-7)
        assert all(s == "optimal" for s in outcome.points[k].statuses)
    choice = selection.choose_point(outcome, "best")
    assert outcome.points[choice.index].setting["lam"] == pytest.approx(peer.alpha_, rel=1e-12)
    # the refit on every row runs on the table's sums kept from the folds' (the held parts' sums add up
    # to them): it reads the table no more, and its answer is LassoCV's own refit at alpha_
    assert outcome.refit_cache is not None and outcome.refit_cache["X"] is train.X
    _doc, fit = selection.refit_chosen(checked, tmp_path / "s.objc", train, held, label, outcome, choice)
    assert fit.status == "optimal" and fit.passes == 0
    # objc certifies a distance of 1e-6 to the optimum; LassoCV at tol 1e-14 is far closer to it
    np.testing.assert_allclose(fit.params["w"], peer.coef_, atol=2e-6)
    assert fit.params["b"] == pytest.approx(float(peer.intercept_), abs=2e-6)
