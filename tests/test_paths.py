"""Regularization paths: where an L1 path starts, warm-started paths against cold fits, safe screening.

References outside objc: scikit-learn's documented largest useful Lasso alpha (the lasso_path /
LassoCV docs and sklearn.linear_model._coordinate_descent._alpha_grid: alpha_max = max_j |X_j^T y| /
(n * l1_ratio) on centred data), sklearn.svm.l1_min_c (the smallest C of an L1 logistic model with a
nonzero weight), scikit-learn's Lasso and LogisticRegression(l1) fits, and cvxpy + Clarabel.

Tables are bundled with scikit-learn: diabetes (Efron, Hastie, Johnstone & Tibshirani 2004, Least
Angle Regression), 442 x 10, and Wisconsin Diagnostic Breast Cancer (Street, Wolberg & Mangasarian
1993, UCI), 569 x 30; both standardized here (population standard deviation, as StandardScaler).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from sklearn import datasets
from sklearn.linear_model import Lasso
from sklearn.svm import l1_min_c

from objc import paths, training
from objc.frontend import check_text

# a weight this small counts as zero in a cvxpy answer: Clarabel is an interior-point method and stops
# near, not on, a face (measured here: 1.3e-8 on the diabetes Lasso); common practice, no source
ZERO = 1e-6


def _standardized(X: np.ndarray) -> np.ndarray:
    return (X - X.mean(axis=0)) / X.std(axis=0)


@pytest.fixture(scope="module")
def folder(tmp_path_factory) -> Path:
    root = tmp_path_factory.mktemp("paths")
    d = datasets.load_diabetes()
    diabetes = pd.DataFrame(_standardized(d.data), columns=[f"d{j}" for j in range(d.data.shape[1])])
    diabetes["prog"] = d.target
    diabetes.to_csv(root / "diabetes.csv", index=False)
    d = datasets.load_breast_cancer()
    cancer = pd.DataFrame(_standardized(d.data), columns=[f"c{j:02d}" for j in range(d.data.shape[1])])
    cancer["diagnosis"] = np.where(d.target == 1, "benign", "malignant")
    cancer.to_csv(root / "cancer.csv", index=False)
    return root


def _diabetes_spec(goal: str, intercept: bool = True, tune: str = "tune lam = 1 within 0 .. 100000") -> str:
    return ('table t from "diabetes.csv"\n  target prog\n  inputs ' + ", ".join(f"d{j}" for j in range(10)) +
            f"\n{tune}\nlearn w over inputs{', b' if intercept else ''}\nscore s = w . x{' + b' if intercept else ''}\n"
            f"goal {goal}\n")


def _cancer_spec(goal: str, intercept: bool = True, tune: str = "tune lam = 1 within 0 .. 100000") -> str:
    return ('table t from "cancer.csv"\n  target diagnosis: benign -> +1, malignant -> -1\n  inputs '
            + ", ".join(f"c{j:02d}" for j in range(30)) +
            f"\n{tune}\nlearn w over inputs{', b' if intercept else ''}\nscore s = w . x{' + b' if intercept else ''}\n"
            f"goal {goal}\n")


def _bound(folder: Path, text: str, name: str = "spec.objc"):
    checked = check_text(text, str(folder / name))
    assert checked.accepted, checked.errors
    data, _held, _ = training.bind_training(checked, folder)
    return checked, data


LASSO = "mean squared(y - s) + lam * l1(w)"
L1_LOGISTIC_SUM = "sum logistic(y * s) + lam * l1(w)"
L1_LOGISTIC_MEAN = "mean logistic(y * s) + lam * l1(w)"


# ---------------------------------------------------------------- where the path starts

def test_lasso_start_is_scikit_learns_alpha_max(folder):
    checked, data = _bound(folder, _diabetes_spec(LASSO))
    start = paths.path_start(checked, data, {}, "lam")
    X, y = data.X, data.y
    # scikit-learn's lasso_path docs / _alpha_grid: alpha_max = max |X_c^T y_c| / n for the objective
    # (1/2n)||y - Xw - b||^2 + alpha ||w||_1, which is objc's `mean squared(y - s) + lam * l1(w)`
    # (squared(r) = r^2 / 2), so lam = alpha
    Xc = X - X.mean(axis=0)
    alpha_max = float(np.max(np.abs(Xc.T @ (y - y.mean()))) / len(y))
    assert start == pytest.approx(alpha_max, rel=1e-10)
    # and scikit-learn's own Lasso agrees: every weight zero just above it, some nonzero just below
    assert not np.any(Lasso(alpha=1.0001 * alpha_max, tol=1e-12).fit(X, y).coef_)
    assert np.any(Lasso(alpha=0.99 * alpha_max, tol=1e-12).fit(X, y).coef_)


def test_elastic_net_start_divides_by_the_l1_share(folder):
    # scikit-learn's _alpha_grid with l1_ratio: alpha_max = max |X_c^T y_c| / (n * l1_ratio), for
    # (1/2n)||r||^2 + alpha l1_ratio ||w||_1 + alpha (1 - l1_ratio) / 2 ||w||^2; objc's goal below is that
    # objective with l1_ratio = 0.3 (the ridge part's gradient is zero at w = 0, so it does not move the start)
    checked, data = _bound(folder, _diabetes_spec("mean squared(y - s) + lam * (0.3 * l1(w) + 0.35 * l2sq(w))"))
    start = paths.path_start(checked, data, {}, "lam")
    Xc = data.X - data.X.mean(axis=0)
    alpha_max = float(np.max(np.abs(Xc.T @ (data.y - data.y.mean()))) / (len(data.y) * 0.3))
    assert start == pytest.approx(alpha_max, rel=1e-10)


def test_l1_logistic_start_is_the_inverse_of_l1_min_c(folder):
    checked, data = _bound(folder, _cancer_spec(L1_LOGISTIC_SUM, intercept=False))
    start = paths.path_start(checked, data, {}, "lam")
    # sklearn.svm.l1_min_c: the smallest C of C sum_i log(1 + exp(-y_i w.x_i)) + ||w||_1 with a nonzero
    # weight; dividing that objective by C gives objc's goal with lam = 1 / C
    assert start == pytest.approx(1.0 / l1_min_c(data.X, data.y, loss="log", fit_intercept=False), rel=1e-10)


@pytest.mark.parametrize("backend", ["numpy", "cvxpy"])
@pytest.mark.parametrize("case", ["lasso", "logistic"])
def test_all_zero_just_above_the_start_and_not_just_below(folder, backend, case):
    text = _diabetes_spec(LASSO) if case == "lasso" else _cancer_spec(L1_LOGISTIC_MEAN)
    checked, data = _bound(folder, text)
    start = paths.path_start(checked, data, {}, "lam")
    above, below = paths.fit_path(checked, data, {}, "lam", [1.0001 * start, 0.99 * start], backend=backend)
    assert above.status == "optimal" and below.status == "optimal"
    assert np.max(np.abs(above.params["w"])) <= (0.0 if backend == "numpy" else ZERO)
    assert np.max(np.abs(below.params["w"])) > 1e3 * ZERO


def test_no_start_where_the_tunable_weighs_no_l1_term(folder):
    checked, data = _bound(folder, _cancer_spec("C * mean logistic(y * s) + l2sq(w)",
                                                tune="tune C = 1 within 0.001 .. 1000"))
    assert paths.path_start(checked, data, {}, "C") is None
    checked, data = _bound(folder, _cancer_spec("mean logistic(y * s) + lam * l2sq(w) + 0.1 * l1(w)"))
    assert paths.path_start(checked, data, {}, "lam") is None


# ---------------------------------------------------------------- warm-started, screened paths

def _grid(start: float, points: int = 12) -> list[float]:
    return [float(v) for v in start * np.geomspace(1.0, 0.01, points)]


def test_the_sphere_test_on_the_lasso_screens_only_zero_weights(folder):
    # fit_path does not screen a squared loss (its Gram path touches no data per iteration), so the
    # rule itself is run here, from the previous point's answer, as a path would
    from objc.backends import numpy_module
    checked, data = _bound(folder, _diabetes_spec(LASSO))
    values = _grid(paths.path_start(checked, data, {}, "lam"))
    assert "Gram" in paths.screening_rule(checked, data, {}, "lam")
    ns = numpy_module._compiled(checked)
    previous = np.zeros(11)
    screened = 0
    for v in values:
        mask, gap = ns["gap_safe_screen"](ns["SPEC"], data.X, data.y, data.weights, data.input_names, {"lam": v},
                                          previous, (1.0,), np.arange(10))
        cold = training.run_backend(checked, data, "numpy", {"lam": v})
        reference = training.run_backend(checked, data, "cvxpy", {"lam": v})
        assert np.all(cold.params["w"][mask] == 0.0)
        assert np.all(np.abs(reference.params["w"][mask]) <= ZERO)  # cvxpy + Clarabel
        screened += int(mask.sum())
        previous = np.append(cold.params["w"], cold.params["b"])
    assert screened > 0


@pytest.mark.parametrize("case", ["lasso", "logistic"])
def test_screened_path_equals_unscreened_and_cold_fits(folder, case):
    text = _diabetes_spec(LASSO) if case == "lasso" else _cancer_spec(L1_LOGISTIC_MEAN)
    checked, data = _bound(folder, text)
    values = _grid(paths.path_start(checked, data, {}, "lam"))
    screened = paths.fit_path(checked, data, {}, "lam", values)
    plain = paths.fit_path(checked, data, {}, "lam", values, screen=False)
    screened_any = 0
    for v, a, b in zip(values, screened, plain):
        cold = training.run_backend(checked, data, "numpy", {"lam": v})
        assert a.status == b.status == cold.status == "optimal"
        # each certified to the default relative gap 1e-6 on the FULL problem
        assert a.certificate.kind == "duality gap" and a.certificate.relative <= 1e-6
        scale = max(1.0, abs(cold.objective))
        assert abs(a.objective - cold.objective) <= 1e-6 * scale and abs(b.objective - cold.objective) <= 1e-6 * scale
        # objc's default parameter tolerance is 1e-6 (certified where the goal is strongly convex; an
        # L1 goal has no such bound, so the figure is the solver's estimate): 1e-5 leaves room for it
        assert np.max(np.abs(a.params["w"] - cold.params["w"])) <= 1e-5
        assert np.max(np.abs(b.params["w"] - cold.params["w"])) <= 1e-5
        if case == "logistic":
            assert a.extra["screening"]["rule"].startswith("Gap Safe")
        screened_any += len(a.extra["screening"]["screened"])
        for name in a.extra["screening"]["screened"]:
            assert cold.params["w"][data.input_names.index(name)] == 0.0
    assert screened_any > 0 or case == "lasso"


def test_a_screened_weight_is_zero_in_the_cvxpy_reference(folder):
    checked, data = _bound(folder, _cancer_spec(L1_LOGISTIC_MEAN))
    start = paths.path_start(checked, data, {}, "lam")
    values = [start, 0.7 * start]
    numpy_path = paths.fit_path(checked, data, {}, "lam", values)
    reference = paths.fit_path(checked, data, {}, "lam", values, backend="cvxpy")
    checked_weights = 0
    for a, ref in zip(numpy_path, reference):
        for name in a.extra["screening"]["screened"]:
            assert abs(ref.params["w"][data.input_names.index(name)]) <= ZERO  # cvxpy + Clarabel
            checked_weights += 1
        assert reference[0].extra["screening"]["rule"] is None  # the cvxpy backend never screens
    assert checked_weights > 0


def test_no_screening_where_the_rule_does_not_apply(folder):
    # hinge is not smooth: the dual is not strongly concave, the sphere has no radius
    checked, data = _bound(folder, _cancer_spec("mean hinge(y * s) + lam * l1(w)"))
    rule = paths.screening_rule(checked, data, {}, "lam")
    assert isinstance(rule, str) and "hinge" in rule
    [result] = paths.fit_path(checked, data, {}, "lam", [0.01])
    assert result.extra["screening"]["rule"] is None and result.extra["screening"]["note"] == rule
    # a bound on a weight ties it: that weight is never screened, the others still may be
    checked, data = _bound(folder, _cancer_spec(L1_LOGISTIC_MEAN) + "keep w[c00] >= 0\n")
    rule = paths.screening_rule(checked, data, {}, "lam")
    assert not isinstance(rule, str) and 0 not in rule.candidates and len(rule.candidates) == 29


def test_progress_reports_every_point(folder):
    checked, data = _bound(folder, _diabetes_spec(LASSO))
    seen = []
    paths.fit_path(checked, data, {}, "lam", [10.0, 1.0, 0.1], progress=lambda k, n, r: seen.append((k, n, r.status)))
    assert seen == [(1, 3, "optimal"), (2, 3, "optimal"), (3, 3, "optimal")]


def test_weight_path_plot_is_a_png(folder, tmp_path):
    from objc import plots
    checked, data = _bound(folder, _diabetes_spec(LASSO))
    values = _grid(paths.path_start(checked, data, {}, "lam"), 8)
    results = paths.fit_path(checked, data, {}, "lam", values)
    out = plots.weight_path(values, [r.params["w"] for r in results], data.input_names, "lam", values[4],
                            tmp_path / "path.png")
    # the PNG signature (PNG specification, ISO/IEC 15948, section 5.2)
    assert out.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    with pytest.raises(ValueError):
        plots.weight_path(values, [r.params["w"][:3] for r in results], data.input_names, "lam", None,
                          tmp_path / "bad.png")


# ---------------------------------------------------------------- the Gram path's cache

def test_gram_path_equals_cold_fits_and_scikit_learns_lasso_path(folder):
    from sklearn.linear_model import lasso_path
    checked, data = _bound(folder, _diabetes_spec(LASSO))
    values = _grid(paths.path_start(checked, data, {}, "lam"), 12)
    path = paths.fit_path(checked, data, {}, "lam", values)
    # scikit-learn's lasso_path minimizes (1 / 2n) ||y - X w||^2 + alpha ||w||_1 on data it expects
    # centred (its documentation); objc's `mean squared(r)` is the mean of r^2 / 2 and its free
    # intercept is what the centring removes, so lam = alpha. tol 1e-14 leaves it far below 1e-6.
    Xc, yc = data.X - data.X.mean(axis=0), data.y - data.y.mean()
    _alphas, coefs, _gaps = lasso_path(Xc, yc, alphas=values, tol=1e-14, max_iter=100_000)
    cold = None
    for k, (v, r) in enumerate(zip(values, path)):
        cold = training.run_backend(checked, data, "numpy", {"lam": v})
        assert r.status == cold.status == "optimal" and "Gram matrix" in r.method
        # the certificate is still checked at every point: the relative duality gap within 1e-6
        assert r.certificate.kind == "duality gap" and r.certificate.relative <= 1e-6
        assert r.extra["history"], "the path's fits keep their convergence history (run_backend)"
        # both certified within a relative gap of 1e-6 of the optimum: within 2e-6 of each other
        assert abs(r.objective - cold.objective) <= 2e-6 * abs(cold.objective)
        # objc's default parameter tolerance is 1e-6 (the L1 goal has no proved bound: an estimate), so
        # 1e-5 leaves room for it
        np.testing.assert_allclose(r.params["w"], cold.params["w"], atol=1e-5)
        np.testing.assert_allclose(r.params["w"], coefs[:, k], atol=1e-5)
        # the objective and term values come from the Gram sums (no pass over the table): the goal's
        # definition evaluated row by row gives the same numbers
        resid = data.y - data.X @ r.params["w"] - r.params["b"]
        rows, l1 = 0.5 * float(np.mean(resid ** 2)), v * float(np.sum(np.abs(r.params["w"])))
        assert r.objective == pytest.approx(rows + l1, rel=1e-10)
        assert r.term_values == pytest.approx((rows, l1), rel=1e-10, abs=1e-12)
    # the path's cache forms the Gram matrix once: all twelve points together read the table no more
    # often than one cold fit does
    assert sum(r.passes for r in path) <= cold.passes


def test_a_path_cache_checks_new_rows_and_never_serves_another_targets_gram(folder):
    from sklearn.linear_model import Lasso
    from objc.backends import numpy_module
    checked, data = _bound(folder, _diabetes_spec(LASSO))
    prepared = {"X": data.X}
    numpy_module.fit(checked, data.X, data.y, data.weights, data.input_names, {"lam": 1.0}, prepared=prepared)
    shifted = 2.0 * data.y + 3.0  # another target on the same table, the same cache
    again = numpy_module.fit(checked, data.X, shifted, data.weights, data.input_names, {"lam": 1.0},
                             prepared=prepared)
    # scikit-learn's Lasso minimizes (1 / 2n) ||y - X w - b||^2 + alpha ||w||_1 (its documentation):
    # objc's goal at lam = alpha
    peer = Lasso(alpha=1.0, tol=1e-14, max_iter=100_000).fit(data.X, shifted)
    assert again.status == "optimal"
    np.testing.assert_allclose(again.params["w"], peer.coef_, atol=1e-5)
    assert again.params["b"] == pytest.approx(float(peer.intercept_), abs=1e-5)
    bad = np.array(data.y, copy=True)
    bad[3] = np.nan
    with pytest.raises(ValueError, match="NaN"):  # a cached table does not skip the check of new rows
        numpy_module.fit(checked, data.X, bad, data.weights, data.input_names, {"lam": 1.0}, prepared=prepared)


def test_paths_sharing_a_cache_equal_cold_fits_and_form_the_gram_matrix_once(folder):
    # two paths over lam on the same rows, at two ridge weights: the second finds the Gram matrix in the
    # cache, but its least eigenvalue (the distance bound's modulus) moves with the ridge weight
    checked, data = _bound(folder, _diabetes_spec("mean squared(y - s) + lam * l1(w) + mu * l2sq(w)",
                                                  tune="tune lam = 1 within 0 .. 100000\ntune mu = 0.1 within 0 .. 10"))
    values = _grid(paths.path_start(checked, data, {"mu": 0.1}, "lam"), 5)
    cache: dict = {}
    first = paths.fit_path(checked, data, {"mu": 0.1}, "lam", values, cache=cache)
    second = paths.fit_path(checked, data, {"mu": 1.0}, "lam", values, cache=cache)
    assert sum(r.passes for r in second) == 0  # nothing read from the table again
    assert "threads capped" not in cache  # the path's thread cap ended with it
    for mu, path in ((0.1, first), (1.0, second)):
        for v, r in zip(values, path):
            cold = training.run_backend(checked, data, "numpy", {"lam": v, "mu": mu})
            assert r.status == cold.status == "optimal"
            # the same certified modulus (the least eigenvalue of the exact Hessian) as a fit that formed
            # everything itself, so the same proved distance bound
            assert r.certificate.curvature == pytest.approx(cold.certificate.curvature, rel=1e-12)
            assert r.certificate.distance is not None and r.certificate.distance <= 1e-6
            np.testing.assert_allclose(r.params["w"], cold.params["w"], atol=2e-6)


def test_fold_caches_give_each_fold_its_own_sums_and_the_same_path(folder):
    from sklearn.linear_model import lasso_path
    checked, data = _bound(folder, _diabetes_spec(LASSO))
    order = np.random.default_rng(0).permutation(data.n_rows)
    held_rows = np.array_split(order, 5)
    parts = []
    for k in range(5):
        tr = np.sort(np.concatenate(held_rows[:k] + held_rows[k + 1:]))
        parts.append((_rows(data, tr),
                      _rows(data, np.sort(held_rows[k]))))
    caches, whole = paths.fold_caches(checked, parts, {"lam": 1.0}, data)
    assert whole is not None and all("uncentred sums" in c for c in caches)
    values = _grid(paths.path_start(checked, parts[0][0], {}, "lam"), 6)
    for (train, _held), cache in zip(parts, caches):
        sums = cache["uncentred sums"]
        # the table's sums less the held rows' are the fold's own, as NumPy forms them from its rows
        np.testing.assert_allclose(sums["G"], train.X.T @ train.X, rtol=1e-12, atol=1e-9)
        np.testing.assert_allclose(sums["Xy"], train.X.T @ train.y, rtol=1e-12, atol=1e-9)
        np.testing.assert_allclose(sums["X1"], train.X.sum(axis=0), rtol=1e-12, atol=1e-9)
        path = paths.fit_path(checked, train, {}, "lam", values, cache=cache)
        assert sum(r.passes for r in path) == 0  # the fold's Gram matrix came from the sums
        # scikit-learn's lasso_path on the centred fold (its documented objective (1 / 2n) ||y - X w||^2 +
        # alpha ||w||_1, lam = alpha as in the test above); tol 1e-14 leaves it far below 1e-6
        Xc, yc = train.X - train.X.mean(axis=0), train.y - train.y.mean()
        _alphas, coefs, _gaps = lasso_path(Xc, yc, alphas=values, tol=1e-14, max_iter=100_000)
        for k, r in enumerate(path):
            assert r.status == "optimal" and r.certificate.relative <= 1e-6
            np.testing.assert_allclose(r.params["w"], coefs[:, k], atol=1e-5)
    refit = training.run_backend(checked, data, "numpy", {"lam": values[3]}, prepared=whole)
    cold = training.run_backend(checked, data, "numpy", {"lam": values[3]})
    assert refit.passes == 0 and refit.status == cold.status == "optimal"
    np.testing.assert_allclose(refit.params["w"], cold.params["w"], atol=2e-6)


def test_fold_caches_stay_empty_where_the_fits_do_not_go_the_gram_way(folder):
    checked, data = _bound(folder, _cancer_spec("mean logistic(y * s) + lam * l2sq(w)"))
    rows = np.arange(data.n_rows)
    parts = [(_rows(data, rows[rows % 2 != k]), _rows(data, rows[rows % 2 == k])) for k in range(2)]
    caches, whole = paths.fold_caches(checked, parts, {"lam": 1.0}, data)
    assert whole is None and all(not c for c in caches)


def _rows(data, idx):
    from objc import tables
    return tables.take_rows(data, idx)


def test_a_logistic_path_reusing_its_hessian_sample_keeps_every_distance_bound(tmp_path):
    # Optical recognition of handwritten digits (Alpaydin & Kaynak 1998, UCI), 1797 x 64, bundled with
    # scikit-learn; its 61 nonconstant pixels standardized, the target "the digit is odd". Stacked four times
    # (7188 rows) so that the distance certificate reads a sample of the rows (2k < n), which a path forms
    # once and reuses while the rows' curvature stays within 0.8 of it (said in the certificate's note).
    # Reference: scikit-learn's LogisticRegression(lbfgs), whose C sum_i log(1 + e^-y_i s_i) + ||w||^2 / 2
    # is n C times objc's goal at lam = 1 / (2 C n).
    from sklearn.linear_model import LogisticRegression
    d = datasets.load_digits()
    pixels = d.data[:, d.data.std(axis=0) > 0]
    X, digit = np.tile(_standardized(pixels), (4, 1)), np.tile(d.target, 4)
    frame = pd.DataFrame(X, columns=[f"p{j:02d}" for j in range(X.shape[1])])
    frame["digit"] = np.where(digit % 2 == 1, "odd", "even")
    frame.to_csv(tmp_path / "digits.csv", index=False)
    text = ('table t from "digits.csv"\n  target digit: odd -> +1, even -> -1\n  inputs all\n'
            "tune lam = 1 within 0 .. 100000\nlearn w over inputs, b\nscore s = w . x + b\n"
            "goal mean logistic(y * s) + lam * l2sq(w)\n")
    checked, data = _bound(tmp_path, text)
    # far apart the rows' curvature moves too much for a reuse; two points 1 % apart keep it
    values = [1e-2, 0.99e-2, 1e-3, 0.99e-3, 1e-4]
    path = paths.fit_path(checked, data, {}, "lam", values)
    notes = [r.certificate.distance_note for r in path]
    assert any("of the 7188 rows (a lower bound, formed at an earlier point of the path)" in note
               for note in notes), notes
    (n, p), y01 = data.X.shape, (data.y > 0).astype(int)
    A = np.hstack([data.X, np.ones((n, 1))])
    for lam, r in zip(values, path):
        ref = LogisticRegression(C=1.0 / (2.0 * lam * n), tol=1e-12, max_iter=100_000).fit(data.X, y01)
        # lbfgs stops on its relative decrease (ftol 64 eps): 2e-6 from the optimum on these pixels (measured), so
        # its answer is finished by Newton's method on the textbook gradient and Hessian of the same goal
        # (Hastie, Tibshirani & Friedman 2009, The Elements of Statistical Learning, sec. 4.4.1)
        theta = np.append(ref.coef_.ravel(), ref.intercept_[0])
        for _ in range(6):
            sig = 1.0 / (1.0 + np.exp(data.y * (A @ theta)))
            grad = -(A.T @ (data.y * sig)) / n
            grad[:-1] += 2.0 * lam * theta[:-1]
            H = (A.T * (sig * (1.0 - sig))) @ A / n
            H[np.arange(p), np.arange(p)] += 2.0 * lam
            theta = theta - np.linalg.solve(H, grad)
        assert np.linalg.norm(grad) <= 1e-12
        assert r.status == "optimal" and r.certificate.distance is not None, r.certificate
        error = float(np.linalg.norm(np.append(r.params["w"], r.params["b"]) - theta))
        assert error <= r.certificate.distance, (lam, error, r.certificate.distance)
        assert r.certificate.distance <= 1e-6
