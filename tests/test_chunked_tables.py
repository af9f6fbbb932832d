"""Tables read in chunks (objc/chunked_tables.py): the same binding, the same fit, bounded blocks.

Each spec of specs/ that the chunked engine takes is trained twice, from its table in memory and from the
same rows as a Parquet dataset of three files with small row groups read through a small memory budget
(many chunks while binding, many blocks in every pass), and the two fits must agree; one case is also
checked against scikit-learn's LogisticRegression on its bundled breast-cancer table (Wolberg, Street &
Mangasarian 1995, UCI), through a .npy.
"""

from __future__ import annotations

import gc
import json
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from objc import chunked_tables, tables, training
from objc.cli import main
from objc.diagnostics import SpecError
from objc.frontend import check_file, check_text

SPECS = Path(__file__).resolve().parent.parent / "specs"
BUDGET = 24_000  # bytes: blocks of a hundred rows of the breast-cancer table
PARAM_ATOL = 2e-6  # each fit is certified within 1e-6 of the optimum (param_tol), so two are within 2e-6


def _chunk_ready(path: Path) -> bool:
    text = path.read_text()
    words = ("holdout", "validate", "classes", "onehot", "spline", "fourier", "powers", "monomials", "pairs")
    return not any(w in text for w in words)


CASES = sorted(p.name for p in SPECS.glob("*.objc") if _chunk_ready(p))


def as_parquet_dataset(csv: Path, folder: Path, files: int = 3, row_group: int = 17) -> Path:
    """The CSV's rows as a folder of `files` Parquet files with row groups of `row_group` rows."""
    frame = pd.read_csv(csv)
    folder.mkdir()
    for k, part in enumerate(np.array_split(np.arange(len(frame)), files)):
        frame.iloc[part].to_parquet(folder / f"part{k}.parquet", row_group_size=row_group)
    return folder


def _flat(params: dict) -> np.ndarray:
    return np.concatenate([np.atleast_1d(np.asarray(v, dtype=float)).ravel() for _, v in sorted(params.items())])


def test_cases_cover_the_usual_goals():
    assert len(CASES) >= 20, CASES


@pytest.mark.parametrize("name", CASES)
def test_fit_from_chunks_equals_fit_in_memory(tmp_path, name):
    spec = SPECS / name
    checked = check_file(spec)
    tb = checked.spec.table
    dataset = as_parquet_dataset(spec.parent / tb.path, tmp_path / "rows")
    mem, _, _ = training.bind_training(checked, spec.parent)
    n, p = mem.X.shape
    budget = max(8 * p * (n // 5), 64 * (p + 4))  # about five blocks a pass; a few rows a chunk while binding
    chunks, _, _ = training.bind_training(checked, spec.parent, dataset, engine="chunks", budget=budget)
    assert isinstance(chunks.X, chunked_tables.ChunkedRows)
    assert chunks.X.block_rows < chunks.n_rows  # more than one block a pass
    assert chunks.input_names == mem.input_names
    np.testing.assert_array_equal(chunks.y, mem.y)
    np.testing.assert_array_equal(chunks.weights, mem.weights)
    np.testing.assert_array_equal(chunks.rows, mem.rows)
    np.testing.assert_allclose(chunks.X[:], mem.X, rtol=0, atol=1e-12)
    if mem.standardization is not None:
        np.testing.assert_allclose(chunks.standardization.scales, mem.standardization.scales, rtol=1e-12)
    allow = checked.verdict != "convex"
    a = training.run_backend(checked, mem, "numpy", allow_nonconvex=allow)
    b = training.run_backend(checked, chunks, "numpy", allow_nonconvex=allow)
    assert b.status == a.status
    # each objective is within its certificate (an absolute gap) of the optimum, so the two are within both
    slack = sum(abs(r.certificate.absolute or 0.0) for r in (a, b)) + 1e-12 * max(1.0, abs(a.objective))
    assert abs(b.objective - a.objective) <= slack
    if a.certificate.distance is not None:  # strongly convex: one optimum, each fit certified near it
        assert b.certificate.distance is not None
        assert np.max(np.abs(_flat(b.params) - _flat(a.params))) <= a.certificate.distance + b.certificate.distance


def test_npy_through_chunks_matches_scikit_learn(tmp_path):
    # LogisticRegression (scikit-learn 1.9 documentation) minimizes C sum_i log(1 + exp(-y_i f_i)) + ||w||^2 / 2;
    # objc's  mean logistic(y * s) + lam l2sq(w)  is that divided by C n with C = 1 / (2 n lam)
    from sklearn.datasets import load_breast_cancer
    from sklearn.linear_model import LogisticRegression
    X, y01 = load_breast_cancer(return_X_y=True)
    y = np.where(y01 == 1, 1.0, -1.0)
    np.save(tmp_path / "cancer.npy", np.column_stack([X, y]))
    lam = 0.01
    spec = tmp_path / "cancer.objc"
    spec.write_text(f'table t from "cancer.npy"\n  target c30\n  inputs all\n  standardize\n'
                    f"learn w over inputs, b\nscore s = w . x + b\ngoal mean logistic(y * s) + {lam} * l2sq(w)\n")
    checked = check_file(spec)
    data, _, _ = training.bind_training(checked, tmp_path, engine="chunks", budget=BUDGET)
    fit = training.run_backend(checked, data, "numpy")
    Z = (X - X.mean(axis=0)) / X.std(axis=0)  # ddof 0, as StandardScaler
    # newton-cg at tol 1e-14 reaches the optimum to about 1e-11 on this table (tests/test_reference_fits.py)
    est = LogisticRegression(C=1 / (2 * len(y) * lam), solver="newton-cg", tol=1e-14, max_iter=10000).fit(Z, y)
    assert np.max(np.abs(np.asarray(fit.params["w"]) - est.coef_[0])) <= 1e-6
    assert abs(float(fit.params["b"]) - float(est.intercept_[0])) <= 1e-6


# ---------------------------------------------------------------- the matrix

@pytest.fixture()
def matrix(tmp_path):
    rng = np.random.default_rng(3)
    A = rng.normal(size=(101, 7))
    path = tmp_path / "rows.f64"
    A.tofile(path)
    return A, chunked_tables.ChunkedRows(path, 101, 7, budget=8 * 7 * 10)  # blocks of 10 rows


def products_match(A: np.ndarray, X) -> None:
    """Every product and sum a solver asks of a table read in blocks (`X`), against the array `A` itself."""
    n, p = A.shape
    rng = np.random.default_rng(4)
    w, u, U, c = rng.normal(size=p), rng.normal(size=n), rng.normal(size=(n, 3)), rng.normal(size=p)
    np.testing.assert_allclose(X @ w, A @ w, rtol=1e-13)
    np.testing.assert_allclose(X.T @ u, A.T @ u, rtol=1e-13)
    np.testing.assert_allclose(X.T @ U, A.T @ U, rtol=1e-13)
    np.testing.assert_allclose(X.T @ X, A.T @ A, rtol=1e-13)
    np.testing.assert_allclose(X.weighted_square_sums(np.abs(u)), np.einsum("ij,ij,i->j", A, A, np.abs(u)),
                               rtol=1e-13)
    assert X.squared_norm() == pytest.approx(float(np.sum(A * A)), rel=1e-13)
    sq, acc = X.centred_rows(c, np.abs(u))
    np.testing.assert_allclose(sq, np.sum((A - c) ** 2, axis=1), rtol=1e-13)
    np.testing.assert_allclose(acc, A.T @ np.abs(u), rtol=1e-13)
    sample = np.asarray([0, 1, 2, n // 2, n // 2 + 1, n - 1])
    root = np.abs(u[sample])
    M, h, sq_s = X.sampled_gram(sample, root, c)
    S = (A[sample] - c) * root[:, None]
    np.testing.assert_allclose(M, S.T @ S, rtol=1e-12)
    np.testing.assert_allclose(h, S.T @ root, rtol=1e-12)
    np.testing.assert_allclose(sq_s, np.sum((A[sample] - c) ** 2, axis=1), rtol=1e-13)


def test_chunked_products_match_the_array(matrix):
    products_match(*matrix)


def test_chunked_rows_read_as_the_array(matrix):
    A, X = matrix
    scattered = np.asarray([100, 3, 3, 57, 12, 13, 14, 0, -1])
    np.testing.assert_array_equal(X[scattered], A[scattered])
    many = np.arange(0, 101, 2)  # more runs than the gather reads one by one: whole blocks
    np.testing.assert_array_equal(X[many], A[many])
    np.testing.assert_array_equal(X[5:38], A[5:38])
    np.testing.assert_array_equal(X[90:200], A[90:200])
    np.testing.assert_array_equal(X[:, 4], A[:, 4])
    np.testing.assert_array_equal(X[:, [1, 5]], A[:, [1, 5]])
    np.testing.assert_array_equal(X[A[:, 0] > 0], A[A[:, 0] > 0])
    with pytest.raises(IndexError):
        X[np.asarray([101])]


def test_a_chunked_table_never_becomes_an_array(matrix):
    _A, X = matrix
    with pytest.raises(TypeError, match="never into"):
        np.asarray(X)


# ---------------------------------------------------------------- bad input

LOGIT = ('table t from "rows"\n  target label: yes -> +1, no -> -1\n  inputs a, b\n{extra}'
         "learn w over inputs, b0\nscore s = w . x + b0\ngoal mean logistic(y * s) + 0.1 * l2sq(w)\n")


def _rows_dataset(tmp_path: Path, frames: list[pd.DataFrame], name: str = "rows") -> Path:
    folder = tmp_path / name
    folder.mkdir()
    for k, f in enumerate(frames):
        f.to_parquet(folder / f"part{k}.parquet", row_group_size=5)
    return folder


def _frame(n: int, seed: int) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    return pd.DataFrame({"a": rng.normal(size=n), "b": rng.normal(size=n),
                         "label": np.where(rng.normal(size=n) > 0, "yes", "no")})


def _bind(tmp_path: Path, extra: str = "", budget: int = 4_000):
    spec = tmp_path / "s.objc"
    spec.write_text(LOGIT.format(extra=extra))
    checked = check_file(spec)
    return checked, training.bind_training(checked, tmp_path, engine="chunks", budget=budget)[0]


def _code_of(fn) -> tuple[str, str]:
    with pytest.raises(SpecError) as info:
        fn()
    d = info.value.diagnostics[0]
    return d.code, d.message


def test_a_problem_in_a_later_chunk_names_its_row_in_the_whole_table(tmp_path):
    second = _frame(40, 2)
    second.loc[33, "a"] = np.nan
    _rows_dataset(tmp_path, [_frame(60, 1), second])
    code, message = _code_of(lambda: _bind(tmp_path))
    assert code == "T120" and "row 94" in message  # 60 rows of the first file, then row 34 of the second


def test_an_unmapped_label_in_a_later_file_names_its_row(tmp_path):
    second = _frame(40, 2)
    second.loc[7, "label"] = "maybe"
    _rows_dataset(tmp_path, [_frame(60, 1), second])
    code, message = _code_of(lambda: _bind(tmp_path))
    assert code == "T130" and "row 68" in message and "'maybe'" in message


def test_dropped_rows_are_counted_over_the_whole_table(tmp_path):
    first, second = _frame(60, 1), _frame(40, 2)
    first.loc[[2, 50], "b"] = np.nan
    second.loc[39, "a"] = np.nan
    _rows_dataset(tmp_path, [first, second])
    _checked, data = _bind(tmp_path, extra="  missing drop\n")
    assert data.n_rows == 97 and data.dropped == 3
    warning = [w for w in data.warnings if w.code == "T191"]
    assert len(warning) == 1 and "dropped 3 of 100 rows" in warning[0].message
    assert "rows 3, 51, 100" in warning[0].message
    assert 3 not in data.rows and 100 not in data.rows and 99 in data.rows


def test_whole_table_checks_see_every_chunk(tmp_path):
    # every row of the first file has weight 0, the second's do not: no T141 (each chunk alone would say it)
    first, second = _frame(30, 1).assign(c=0.0), _frame(30, 2).assign(c=1.0)
    _rows_dataset(tmp_path, [first, second])
    _checked, data = _bind(tmp_path, extra="  rowweight c\n")
    assert data.weights[:30].sum() == 0 and data.weights[30:].sum() == 30
    folder = tmp_path / "zero"
    folder.mkdir()
    (tmp_path / "rows").rename(tmp_path / "old")
    _rows_dataset(tmp_path, [first, second.assign(c=0.0)])
    assert _code_of(lambda: _bind(tmp_path, extra="  rowweight c\n"))[0] == "T141"


def test_one_class_over_the_whole_table_is_refused(tmp_path):
    _rows_dataset(tmp_path, [_frame(30, 1).assign(label="yes"), _frame(30, 2).assign(label="yes")])
    assert _code_of(lambda: _bind(tmp_path))[0] == "T132"


def test_files_with_other_columns_are_refused(tmp_path):
    _rows_dataset(tmp_path, [_frame(30, 1), _frame(30, 2).rename(columns={"b": "bb"})])
    code, message = _code_of(lambda: _bind(tmp_path))
    assert code == "T102" and "part1.parquet" in message


def test_a_constant_input_is_found_by_the_streaming_statistics(tmp_path):
    _rows_dataset(tmp_path, [_frame(30, 1).assign(b=2.5), _frame(30, 2).assign(b=2.5)])
    code, message = _code_of(lambda: _bind(tmp_path, extra="  standardize\n"))
    assert code == "T150" and "'b'" in message and "2.5" in message


@pytest.mark.parametrize("extra,code", [("  holdout 20% seed 1\n", "T181"), ("  onehot label\n", "T181")])
def test_what_needs_every_row_at_once_is_refused(tmp_path, extra, code):
    _rows_dataset(tmp_path, [_frame(30, 1)])
    assert _code_of(lambda: _bind(tmp_path, extra=extra))[0] == code


def test_sources_the_engine_does_not_read(tmp_path):
    _frame(10, 1).to_csv(tmp_path / "rows.csv", index=False)
    spec = tmp_path / "s.objc"
    spec.write_text(LOGIT.format(extra="").replace('"rows"', '"rows.csv"'))
    checked = check_file(spec)
    assert _code_of(lambda: training.bind_training(checked, tmp_path, engine="chunks"))[0] == "T180"
    assert _code_of(lambda: training.bind_training(checked, tmp_path, tmp_path / "none.parquet",
                                                   engine="chunks"))[0] == "T100"
    _rows_dataset(tmp_path, [_frame(10, 1)])
    assert _code_of(lambda: _bind(tmp_path, budget=50))[0] == "T182"


def test_classes_and_the_cvxpy_backend_are_refused(tmp_path):
    _rows_dataset(tmp_path, [_frame(30, 1)])
    checked, data = _bind(tmp_path)
    assert _code_of(lambda: training.run_backend(checked, data, "cvxpy"))[0] == "E409"
    spec = tmp_path / "k.objc"
    spec.write_text('table t from "rows"\n  target label classes yes, no, maybe\n  inputs a, b\n'
                    "learn W over inputs by classes\nscore s = W . x\ngoal mean softmax_ce(s, y) + 0.1 * l2sq(W)\n")
    multi = check_file(spec)
    assert _code_of(lambda: training.bind_training(multi, tmp_path, engine="chunks"))[0] == "E409"


def test_scratch_files_go_with_the_data_and_after_an_error(tmp_path):
    _rows_dataset(tmp_path, [_frame(30, 1)])
    scratch = tmp_path / "scratch"
    scratch.mkdir()
    spec = tmp_path / "s.objc"
    spec.write_text(LOGIT.format(extra=""))
    checked = check_file(spec)
    data = chunked_tables.bind_in_chunks(checked.spec.table, tmp_path, "margin", scratch_dir=scratch, budget=4_000)
    assert len(list(scratch.iterdir())) == 1
    del data
    gc.collect()
    assert not list(scratch.iterdir())
    broken = _frame(30, 2)
    broken.loc[4, "a"] = np.inf
    (tmp_path / "rows" / "part1.parquet").unlink(missing_ok=True)
    broken.to_parquet(tmp_path / "rows" / "part1.parquet")
    with pytest.raises(SpecError):
        chunked_tables.bind_in_chunks(checked.spec.table, tmp_path, "margin", scratch_dir=scratch, budget=4_000)
    assert not list(scratch.iterdir())


# ---------------------------------------------------------------- the command line

def test_cli_fit_from_chunks_saves_the_model_a_fit_in_memory_saves(tmp_path, capsys):
    _rows_dataset(tmp_path, [_frame(60, 1), _frame(40, 2)])
    spec = tmp_path / "s.objc"
    spec.write_text(LOGIT.format(extra="  standardize\n"))
    assert main(["fit", str(spec), "--engine", "chunks", "--memory", "4k", "-o", str(tmp_path / "c.json"),
                 "--json"]) == 0
    chunked = json.loads(capsys.readouterr().out)
    pd.concat([_frame(60, 1), _frame(40, 2)]).to_parquet(tmp_path / "whole.parquet")
    assert main(["fit", str(spec), "--data", str(tmp_path / "whole.parquet"), "-o", str(tmp_path / "m.json"),
                 "--json"]) == 0
    whole = json.loads(capsys.readouterr().out)
    assert chunked["ok"] and chunked["status"] == whole["status"] == "optimal"
    assert np.max(np.abs(np.asarray(chunked["params"]["w"]) - np.asarray(whole["params"]["w"]))) <= PARAM_ATOL
    assert chunked["training_metrics"]["zero_one_error"] == whole["training_metrics"]["zero_one_error"]
    a, b = (json.loads((tmp_path / f).read_text()) for f in ("c.json", "m.json"))
    assert a["schema"]["inputs"] == b["schema"]["inputs"]
    np.testing.assert_allclose(a["schema"]["standardization"]["means"], b["schema"]["standardization"]["means"],
                               rtol=1e-12)
    assert main(["predict", str(tmp_path / "c.json"), str(tmp_path / "whole.parquet"), "-o",
                 str(tmp_path / "p.csv")]) == 0


def test_cli_memory_without_chunks_is_a_usage_error(tmp_path, capsys):
    spec = tmp_path / "s.objc"
    spec.write_text(LOGIT.format(extra=""))
    assert main(["fit", str(spec), "--memory", "1G"]) == 2
    assert "--engine chunks" in capsys.readouterr().err
    assert main(["fit", str(spec), "--engine", "chunks", "--memory", "lots"]) == 2


def test_budget_sizes():
    assert chunked_tables.parse_budget("256M") == 256 << 20
    assert chunked_tables.parse_budget("1g") == 1 << 30
    assert chunked_tables.parse_budget("512kB") == 512 << 10
    assert chunked_tables.parse_budget("1000") == 1000
    for bad in ("0", "-1M", "inf", "lots"):
        with pytest.raises(ValueError):
            chunked_tables.parse_budget(bad)


def test_in_memory_tables_are_what_they_were(tmp_path):
    # bind_table's chunk arguments default to the whole-table behaviour
    text = LOGIT.format(extra="").replace('"rows"', '"rows.csv"')
    _frame(20, 1).to_csv(tmp_path / "rows.csv", index=False)
    checked = check_text(text, source_name="s.objc")
    data = tables.bind_table(checked.spec.table, tmp_path, "margin")
    assert data.rows[0] == 1 and data.n_rows == 20


def test_cli_eval_and_predict_read_a_table_in_chunks(tmp_path, capsys):
    _rows_dataset(tmp_path, [_frame(60, 1), _frame(40, 2)])
    spec = tmp_path / "s.objc"
    spec.write_text(LOGIT.format(extra="  standardize\n"))
    model = tmp_path / "m.json"
    assert main(["fit", str(spec), "-o", str(model)]) == 0
    capsys.readouterr()
    evals = []
    for engine in ("memory", "chunks"):
        extra = ["--engine", "chunks", "--memory", "4k"] if engine == "chunks" else []
        assert main(["predict", str(model), str(tmp_path / "rows"), "-o", str(tmp_path / f"{engine}.csv")]
                    + extra) == 0
        capsys.readouterr()
        assert main(["eval", str(model), str(tmp_path / "rows"), "--json"] + extra) == 0
        evals.append(json.loads(capsys.readouterr().out))
    mem, chunked = (e["metrics"] for e in evals)
    assert mem["confusion"] == chunked["confusion"] and mem["zero_one_error"] == chunked["zero_one_error"]
    for name, value in mem["mean_losses"].items():  # the scores' sums in another order: rounding apart
        assert chunked["mean_losses"][name] == pytest.approx(value, rel=1e-12)
    a, b = (pd.read_csv(tmp_path / f"{e}.csv") for e in ("memory", "chunks"))
    assert list(a.columns) == ["row", "score", "label"] and list(a["row"]) == list(range(1, 101))
    np.testing.assert_array_equal(a["label"], b["label"])
    np.testing.assert_allclose(a["score"], b["score"], rtol=0, atol=1e-12)
    assert main(["eval", str(model), "--engine", "chunks"]) == 2  # chunks read the table named


def test_only_the_columns_the_spec_reads_are_read(tmp_path):
    names = ["a", "b", "junk", "label", "wide1", "wide2", "c"]

    def read(extra: str, inputs: str = "a, b") -> list[str]:
        text = LOGIT.format(extra=extra).replace("  inputs a, b\n", f"  inputs {inputs}\n")
        return chunked_tables._columns_read(check_text(text, source_name="s.objc").spec.table, names, None, True)
    assert read("") == ["a", "b", "label"]  # in the table's order
    assert read("  rowweight c\n") == ["a", "b", "label", "c"]
    assert read("", inputs='like "wide*"') == ["label", "wide1", "wide2"]
    assert read("  feature ab = a * junk\n") == ["a", "b", "junk", "label"]
    assert read("", inputs="all except junk") == names  # `all` reads every column
    assert read("", inputs="a, nothere") == names  # a missing name: every column, for the in-memory message
    # the fit from the columns read equals the fit from the table with its other columns
    frames = [_frame(60, 1).assign(junk="text", wide1=0.0), _frame(40, 2).assign(junk="more", wide1=1.0)]
    _rows_dataset(tmp_path, frames)
    checked, data = _bind(tmp_path)
    assert data.input_names == ("a", "b") and data.n_rows == 100
