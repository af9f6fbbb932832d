"""The command line as a practitioner meets it: exit codes, located messages, no tracebacks,
nothing half-written."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from objc.cli import main

HEADER = """table t from "{path}"
  target late: yes -> +1, no -> -1
  inputs a, b, c
learn w over inputs, b
score s = w . x + b
"""
GOOD_GOAL = "goal mean logistic(y * s) + 0.05 * l2sq(w)\n"


def _write_table(path: Path, rows: list[dict]) -> Path:
    cols = list(rows[0])
    lines = [",".join(cols)] + [",".join(str(r[c]) for c in cols) for r in rows]
    path.write_text("\n".join(lines) + "\n")
    return path


def _good_rows(n: int = 40, seed: int = 0) -> list[dict]:
    rng = np.random.default_rng(seed)
    out = []
    for _ in range(n):
        a, b, c = rng.normal(size=3)
        out.append({"a": round(a, 4), "b": round(b, 4), "c": round(c, 4),
                    "late": "yes" if a + 0.5 * b + 0.3 * rng.normal() > 0 else "no", "prio": 1})
    return out


def _spec(tmp_path: Path, body: str = GOOD_GOAL, table: str = "t.csv", header: str = HEADER) -> Path:
    p = tmp_path / "m.objc"
    p.write_text(header.format(path=table) + body)
    return p


def run(argv, capsys):
    code = main([str(a) for a in argv])
    out, err = capsys.readouterr()
    return code, out, err


# ---------------------------------------------------------------- check

def test_check_convex_spec_exits_zero(tmp_path, capsys):
    code, out, _ = run(["check", _spec(tmp_path)], capsys)
    assert code == 0
    assert "CONVEX" in out and "intercept b: not penalized" in out


def test_check_refused_spec_exits_one_with_location(tmp_path, capsys):
    spec = _spec(tmp_path, "goal mean hinge(y * s) + l1(w) - 0.1 * l2sq(w)\n")
    code, out, _ = run(["check", spec], capsys)
    assert code == 1
    assert f"{spec}:6:" in out and "E312" in out


def test_check_json_is_one_document(tmp_path, capsys):
    code, out, _ = run(["check", _spec(tmp_path), "--json"], capsys)
    doc = json.loads(out)
    assert code == 0 and doc["verdict"] == "convex" and doc["ok"] is True
    assert [t["index"] for t in doc["terms"]] == [1, 2]


def test_check_syntax_error_json(tmp_path, capsys):
    spec = _spec(tmp_path, "goal mean hinge(y * s) +\n")
    code, out, _ = run(["check", spec, "--json"], capsys)
    doc = json.loads(out)
    assert code == 1 and doc["ok"] is False
    assert doc["errors"][0]["line"] >= 1 and doc["errors"][0]["column"] >= 1


def test_usage_errors_exit_two(tmp_path, capsys):
    assert run([], capsys)[0] == 2
    assert run(["check"], capsys)[0] == 2
    assert run(["fit", _spec(tmp_path), "--backend", "nope"], capsys)[0] == 2
    assert run(["frobnicate"], capsys)[0] == 2


def test_missing_spec_file(tmp_path, capsys):
    code, _, err = run(["check", tmp_path / "nowhere.objc"], capsys)
    assert code == 1 and "not found" in err and "nowhere.objc" in err


def test_non_convex_accepted_only_with_flag(tmp_path, capsys):
    spec = _spec(tmp_path, "goal mean min(1, max(0, 1 - y * s)) + l2sq(w)\n")
    assert run(["check", spec], capsys)[0] == 1
    assert run(["check", spec, "--local-ok"], capsys)[0] == 0
    zero_one = _spec(tmp_path, "goal mean zero_one(y * s) + l2sq(w)\n")
    assert run(["check", zero_one, "--local-ok"], capsys)[0] == 1  # not subdifferentiable: never trainable


def test_check_runs_without_importing_cvxpy(tmp_path):
    # start-up matters for `check`; cvxpy is only loaded by the backends that need it
    code = ("import sys; from objc.cli import main; rc = main(['check', sys.argv[1]]); "
            "assert 'cvxpy' not in sys.modules, 'cvxpy was imported'; sys.exit(rc)")
    proc = subprocess.run([sys.executable, "-c", code, str(_spec(tmp_path))], capture_output=True, text=True)
    assert proc.returncode == 0, proc.stderr


# ---------------------------------------------------------------- bad input corpus for fit

def _broken_cases():
    """(name, table rows or file text, spec body change, words the message must hold)."""
    good = _good_rows()
    cases = []
    rows = [dict(r) for r in good]
    rows[3]["b"] = "n/a"
    cases.append(("non-numeric input", rows, None, ["b", "t.csv"]))
    rows = [dict(r) for r in good]
    rows[5]["a"] = "nan"
    cases.append(("NaN input", rows, None, ["a", "6"]))
    rows = [dict(r) for r in good]
    rows[2]["c"] = "inf"
    cases.append(("infinite input", rows, None, ["c", "3"]))
    rows = [{k: v for k, v in r.items() if k != "c"} for r in good]
    cases.append(("missing input column", rows, None, ["'c'", "t.csv"]))
    rows = [{k: v for k, v in r.items() if k != "late"} for r in good]
    cases.append(("missing target column", rows, None, ["late", "t.csv"]))
    rows = [dict(r) for r in good]
    rows[7]["late"] = "maybe"
    cases.append(("label outside the map", rows, None, ["maybe", "8"]))
    rows = [dict(r, late="yes") for r in good]
    cases.append(("one class only", rows, None, ["late", "one"]))
    rows = [dict(r) for r in good]
    rows[4]["prio"] = -2
    cases.append(("negative row weight", rows, "rowweight", ["prio", "5"]))
    rows = [dict(r) for r in good]
    rows[1]["prio"] = "nan"
    cases.append(("NaN row weight", rows, "rowweight", ["prio", "2"]))
    rows = [dict(r, c=1.5) for r in good]
    cases.append(("constant column under standardize", rows, "standardize", ["c", "constant"]))
    cases.append(("empty table", "a,b,c,late,prio\n", None, ["t.csv"]))
    cases.append(("missing table file", None, None, ["t.csv"]))
    cases.append(("header only, garbage body", "a,b,c,late,prio\n1,2\n\"unterminated", None, ["t.csv"]))
    rows = [dict(r) for r in good]
    cases.append(("missing row-weight column", [{k: v for k, v in r.items() if k != "prio"} for r in rows],
                  "rowweight", ["prio"]))
    cases.append(("numbers where labels are strings", [dict(r, late=1 if r["late"] == "yes" else 0) for r in good],
                  None, ["late"]))
    cases.append(("holdout leaving nothing", good[:2], "holdout", ["holding out", "t.csv"]))
    return cases


@pytest.mark.parametrize("name,rows,extra,words", _broken_cases(), ids=[c[0] for c in _broken_cases()])
def test_broken_tables_fail_cleanly(tmp_path, capsys, name, rows, extra, words):
    header = HEADER
    if extra == "rowweight":
        header += "  rowweight prio\n"
    elif extra == "standardize":
        header += "  standardize\n"
    elif extra == "holdout":
        header += "  holdout 10% seed 1\n"
    spec = _spec(tmp_path, header=header)
    if isinstance(rows, list):
        _write_table(tmp_path / "t.csv", rows)
    elif isinstance(rows, str):
        (tmp_path / "t.csv").write_text(rows)
    out_model = tmp_path / "out" / "m.json"
    code, out, err = run(["fit", spec, "-o", out_model], capsys)
    assert code == 1, (name, out, err)
    assert "Traceback" not in err + out
    assert "internal error" not in err
    for w in words:
        assert w in err, (name, w, err)
    assert not out_model.exists() and not out_model.with_suffix(".npz").exists()


def test_broken_spec_fails_before_reading_data(tmp_path, capsys):
    spec = _spec(tmp_path, "goal mean hinge(y * s) + tikhonov(w)\n")
    code, _, err = run(["fit", spec, "-o", tmp_path / "m.json"], capsys)
    assert code == 1 and "did you mean" not in err or "tikhonov" in err
    assert f"{spec}:6:" in err
    assert not (tmp_path / "m.json").exists()


def test_set_outside_declared_range(tmp_path, capsys):
    _write_table(tmp_path / "t.csv", _good_rows())
    spec = _spec(tmp_path, "tune C = 1 within 0.1 .. 10\ngoal C * mean logistic(y * s) + 0.5 * l2sq(w)\n")
    code, _, err = run(["fit", spec, "--set", "C=50", "-o", tmp_path / "m.json"], capsys)
    assert code == 1 and "outside its declared range" in err
    code, _, err = run(["fit", spec, "--set", "D=5", "-o", tmp_path / "m.json"], capsys)
    assert code == 2 and "no tunable 'D'" in err


def test_eval_missing_model(tmp_path, capsys):
    code, _, err = run(["eval", tmp_path / "none.json"], capsys)
    assert code == 1 and "none.json" in err


# ---------------------------------------------------------------- sweep and plot

SWEEP_SPEC = """table t from "t.csv"
  target late: yes -> +1, no -> -1
  inputs a, b, c
  holdout 25% seed 3
tune lam = 0.1 within 0.001 .. 10
learn w over inputs, b
score s = w . x + b
goal mean logistic(y * s) + lam * l2sq(w)
"""


def test_sweep_ranks_by_held_out_rows_and_matches_single_fits(tmp_path, capsys):
    _write_table(tmp_path / "t.csv", _good_rows(120, seed=4))
    spec = tmp_path / "sw.objc"
    spec.write_text(SWEEP_SPEC)
    code, out, _ = run(["sweep", spec, "lam", "--span", "0.001..1", "--steps", "4", "--backend", "cvxpy",
                        "--json", "--plot", tmp_path / "sweep.png", "--save-best", tmp_path / "best.json"], capsys)
    assert code == 0
    doc = json.loads(out)
    values = [p["value"] for p in doc["points"]]
    np.testing.assert_allclose(values, np.geomspace(0.001, 1, 4))
    held = [p["held"] for p in doc["points"]]
    assert doc["best"]["held"] == min(held) and doc["best"]["value"] == values[held.index(min(held))]
    # each point of the warm-started sweep is the same optimum as a fresh fit at that value
    for p in doc["points"][1:3]:
        code, out, _ = run(["fit", spec, "--backend", "cvxpy", "--set", f"lam={p['value']!r}", "-o",
                            tmp_path / "one.json", "--json"], capsys)
        assert json.loads(out)["objective"] == pytest.approx(p["objective"], rel=1e-6)
    assert (tmp_path / "sweep.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    best = json.loads((tmp_path / "best.json").read_text())
    assert best["tunables"]["lam"] == doc["best"]["value"]
    # the sweep's JSON can be drawn again later
    (tmp_path / "sweep.json").write_text(json.dumps(doc))
    assert run(["plot", "sweep", tmp_path / "sweep.json", "-o", tmp_path / "again.png"], capsys)[0] == 0


def test_sweep_span_outside_declared_range(tmp_path, capsys):
    _write_table(tmp_path / "t.csv", _good_rows(60))
    spec = tmp_path / "sw.objc"
    spec.write_text(SWEEP_SPEC)
    code, _, err = run(["sweep", spec, "lam", "--span", "0.0001..1"], capsys)
    assert code == 1 and "declared range" in err
    assert run(["sweep", spec, "mu"], capsys)[0] == 2
    assert run(["sweep", spec, "lam", "--span", "oops"], capsys)[0] == 2
    # regression: a reversed span was called out of the declared range
    code, _, err = run(["sweep", spec, "lam", "--span", "1..0.01"], capsys)
    assert code == 2 and "declared range" not in err and "smaller value first" in err


def _sweep_folder(tmp_path: Path, rows: int = 90, spec: str = SWEEP_SPEC) -> Path:
    _write_table(tmp_path / "t.csv", _good_rows(rows, seed=4))
    path = tmp_path / "sw.objc"
    path.write_text(spec)
    return path


def test_sweep_cross_validates_with_a_seed_a_rule_and_a_saved_choice(tmp_path, capsys):
    from objc.model_io import load_model
    spec = _sweep_folder(tmp_path)
    argv = ["sweep", spec, "lam:0.001..1:4", "--folds", "3", "--seed", "5", "--choose", "one-se", "--json"]
    code, out, err = run(argv + ["--plot", tmp_path / "cv.png", "--save-best", tmp_path / "best.json"], capsys)
    assert code == 0, err
    doc = json.loads(out)  # one document
    assert doc["validation"]["folds"] == 3 and doc["validation"]["seed"] == 5 and doc["validation"]["stratified"]
    assert doc["fits"] == 12 and doc["rule"]["name"] == "one-se" and "7.10" in doc["rule"]["text"]
    for p in doc["points"]:
        parts = p["metrics"][doc["metric"]]["parts"]
        # the spread over the folds: sample standard deviation, and it over sqrt(K) (ESL section 7.10)
        assert len(parts) == 3 and p["mean"] == pytest.approx(np.mean(parts))
        assert p["se"] == pytest.approx(np.std(parts, ddof=1) / np.sqrt(3))
        assert set(p["metrics"]) == {"zero_one_error", "mean_losses:logistic"}
    means = [p["mean"] for p in doc["points"]]
    best = int(np.argmin(means))
    assert doc["best"]["index"] == best
    assert doc["chosen"]["index"] in doc["rule"]["within"] and means[doc["chosen"]["index"]] <= means[best] + \
        doc["points"][best]["se"] + 1e-12
    assert (tmp_path / "cv.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    model = load_model(tmp_path / "best.json")  # loads: its checksum covers the selection record
    record = model.document["selection"]
    assert record["folds"] == 3 and record["seed"] == 5 and record["rule"] == "one-se"
    assert model.document["tunables"]["lam"] == doc["chosen"]["value"] == doc["refit"]["setting"]["lam"]
    assert doc["refit"]["rows"] == 68  # the 90 rows less the spec's 25% holdout
    # the same seed gives the same folds and choice; another seed other folds
    again = json.loads(run(argv, capsys)[1])
    assert again["chosen"] == doc["chosen"] and [p["metrics"] for p in again["points"]] == \
        [p["metrics"] for p in doc["points"]]
    other = json.loads(run(argv[:-5] + ["--seed", "6", "--json"], capsys)[1])
    assert [p["metrics"] for p in other["points"]] != [p["metrics"] for p in doc["points"]]
    # the document redraws
    (tmp_path / "sweep.json").write_text(out)
    assert run(["plot", "sweep", tmp_path / "sweep.json", "-o", tmp_path / "again.png"], capsys)[0] == 0
    assert (tmp_path / "again.png").read_bytes()[:4] == b"\x89PNG"


TWO_SPEC = SWEEP_SPEC.replace("tune lam", "tune C = 1 within 0.1 .. 10\ntune lam").replace(
    "goal mean logistic", "goal C * mean logistic")


def test_sweep_over_two_tunables_in_the_grid_syntax(tmp_path, capsys):
    spec = _sweep_folder(tmp_path, spec=TWO_SPEC)
    code, out, err = run(["sweep", spec, "lam:0.01..1:2", "C=0.5,2", "--folds", "2", "--plot", tmp_path / "two.png"],
                         capsys)
    assert code == 0, err
    assert "lam x C: 2 x 2 = 4 settings, 8 fits" in out and "<- chosen" in out and "2 folds of the 68" in out
    assert "refit" in out and (tmp_path / "two.png").read_bytes()[:4] == b"\x89PNG"
    code, out, _ = run(["sweep", spec, "lam:0.01..1:2", "C=0.5,2", "--json"], capsys)
    doc = json.loads(out)
    assert [p["setting"] for p in doc["points"]] == [{"lam": 0.01, "C": 0.5}, {"lam": 0.01, "C": 2.0},
                                                     {"lam": 1.0, "C": 0.5}, {"lam": 1.0, "C": 2.0}]
    assert doc["validation"]["kind"] == "holdout" and doc["refit"] is None


@pytest.mark.parametrize("words, code, said", [
    (["lam", "--folds", "1"], 2, "at least 2 folds"),
    (["lam", "--folds", "500"], 2, "at least 500 training rows"),
    (["lam:0.1"], 2, "LOW..HIGH"),
    (["lam:0.1..1:x"], 2, "not a whole number"),
    (["lam:0.0001..1:3"], 1, "sw.objc:5:1: error [E402]"),  # a spec-range error, located at `tune`, as fit --set
    (["lam=0.5,20"], 1, "[E402] tunable lam = 20 lies outside its declared range"),
    (["mu"], 2, "no tunable 'mu'"),
    (["lam", "lam:0.1..1"], 2, "given twice"),
    (["lam", "--choose", "one-se"], 2, "--folds"),
    (["lam", "--seed", "3"], 2, "--folds"),
    (["lam:0.01..1", "--span", "0.1..1"], 2, "own span"),
])
def test_sweep_mistakes_are_located_and_write_nothing(tmp_path, capsys, words, code, said):
    spec = _sweep_folder(tmp_path, rows=60)
    got, _, err = run(["sweep", spec] + words + ["--save-best", tmp_path / "b.json"], capsys)
    assert got == code and said in err and "Traceback" not in err, err
    assert not (tmp_path / "b.json").exists()


def test_progress_only_on_a_terminal_and_never_with_json(tmp_path, capsys, monkeypatch):
    import objc.cli as cli
    spec = _sweep_folder(tmp_path, rows=60)
    # stderr is not a terminal here (captured): no bar
    code, _, err = run(["sweep", spec, "lam:0.01..1:2", "--folds", "2"], capsys)
    assert code == 0 and err == ""
    monkeypatch.setattr(cli, "PROGRESS_DELAY", 0.0)
    monkeypatch.setattr(cli, "PROGRESS_INTERVAL", 0.0)  # every update drawn, so the test sees them
    monkeypatch.setattr(sys.stderr, "isatty", lambda: True)
    code, _, err = run(["sweep", spec, "lam:0.01..1:2", "--folds", "2"], capsys)
    assert code == 0 and "sweeping" in err and "fold 2/2" in err and "setting" in err and "certificate" in err
    monkeypatch.setattr(sys.stderr, "isatty", lambda: True)
    code, _, err = run(["fit", spec, "-o", tmp_path / "m.json"], capsys)
    assert code == 0 and "training" in err and "objective" in err
    monkeypatch.setattr(sys.stderr, "isatty", lambda: True)
    code, out, err = run(["sweep", spec, "lam:0.01..1:2", "--folds", "2", "--json"], capsys)
    assert code == 0 and err == "" and json.loads(out)["ok"]


def test_sweep_plots_the_weight_path_of_one_tunable(tmp_path, capsys):
    from objc import plots
    if not hasattr(plots, "weight_path"):
        pytest.skip("plots.weight_path (the regularization-path plot) is not in this tree")
    spec = _sweep_folder(tmp_path, rows=60)
    code, out, err = run(["sweep", spec, "lam:0.01..1:3", "--folds", "2", "--plot-weights", tmp_path / "w.png",
                          "--json"], capsys)
    assert code == 0, err
    doc = json.loads(out)
    assert (tmp_path / "w.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n" and str(tmp_path / "w.png") in doc["written"]
    # the weights drawn are the fold-averaged ones, one per input
    assert all(len(p["mean_weights"]) == 3 for p in doc["points"])
    code, _, err = run(["sweep", _sweep_folder(tmp_path, 60, TWO_SPEC), "lam", "C", "--plot-weights",
                        tmp_path / "x.png"], capsys)
    assert code == 2 and "one-tunable" in err and not (tmp_path / "x.png").exists()


def test_plot_losses_writes_a_png(tmp_path, capsys):
    spec = _spec(tmp_path, "loss blend(m) = 0.5 * max(0, 1 - m)^2 + 0.5 * log(1 + exp(-m))\n"
                           "goal mean blend(y * s) + 0.8 * mean hinge(y * s) + 0.01 * l2sq(w)\n")
    code, out, _ = run(["plot", "losses", spec, "-o", tmp_path / "l.png", "--json"], capsys)
    assert code == 0 and json.loads(out)["output"].endswith("l.png")
    assert (tmp_path / "l.png").read_bytes()[:4] == b"\x89PNG"


def test_plot_sweep_rejects_other_json(tmp_path, capsys):
    (tmp_path / "x.json").write_text("{}")
    code, _, err = run(["plot", "sweep", tmp_path / "x.json", "-o", tmp_path / "x.png"], capsys)
    assert code == 1 and "P602" in err and not (tmp_path / "x.png").exists()


def test_numpy_fit_records_convergence_for_plotting(tmp_path, capsys):
    _write_table(tmp_path / "t.csv", _good_rows(80))
    spec = _spec(tmp_path)
    assert run(["fit", spec, "-o", tmp_path / "m.json", "--json"], capsys)[0] == 0
    history = json.loads((tmp_path / "m.json").read_text())["fit"]["history"]
    assert len(history) >= 2 and history[-1]["passes"] >= history[0]["passes"]
    assert run(["plot", "convergence", tmp_path / "m.json", "-o", tmp_path / "c.png"], capsys)[0] == 0
    assert (tmp_path / "c.png").read_bytes()[:4] == b"\x89PNG"


def test_check_with_data_reads_the_table(tmp_path, capsys):
    rows = _good_rows()
    rows[3]["late"] = "perhaps"
    _write_table(tmp_path / "t.csv", rows)
    spec = _spec(tmp_path)
    assert run(["check", spec], capsys)[0] == 0  # the spec alone is fine
    code, out, _ = run(["check", spec, "--with-data"], capsys)
    assert code == 1 and "T130" in out and "perhaps" in out
    _write_table(tmp_path / "t.csv", _good_rows())
    code, out, _ = run(["check", spec, "--with-data", "--json"], capsys)
    doc = json.loads(out)
    assert code == 0 and doc["data"]["rows"] == 40 and doc["data"]["inputs"] == ["a", "b", "c"]


def test_eval_table_errors_are_located_in_the_spec_not_on_the_table_name(tmp_path, capsys):
    # regression: eval/predict on another table drew the spec's line:col after the CSV's name
    _write_table(tmp_path / "t.csv", _good_rows())
    spec = _spec(tmp_path)
    assert run(["fit", spec, "-o", tmp_path / "m.json"], capsys)[0] == 0
    rows = _good_rows(10, seed=3)
    rows[1]["b"] = "x"
    other = _write_table(tmp_path / "other.csv", rows)
    for command in (["eval", tmp_path / "m.json", other], ["predict", tmp_path / "m.json", other, "-o",
                                                           tmp_path / "p.csv"]):
        code, _, err = run(command, capsys)
        location = err.split(" error ")[0]
        assert code == 1 and location.endswith("m.objc:3:3:") and "other.csv" in err.split(" error ")[1]
    assert not (tmp_path / "p.csv").exists()


def test_usage_errors_under_json_print_one_json_document(capsys):
    # regression: argparse's own errors printed text only, even with --json
    for argv in (["fit", "--json"], ["check", "x.objc", "--no-such-option", "--json"]):
        code, out, _ = run(argv, capsys)
        doc = json.loads(out)
        assert code == 2 and doc["ok"] is False and doc["usage_error"] and doc["command"] == argv[0]
    code, out, err = run(["fit"], capsys)
    assert code == 2 and out == "" and "usage: objc fit" in err


# ---------------------------------------------------------------- the parameter tolerance

def _logistic_newton(X, y, lam):
    """mean logistic(y (Xw + b)) + lam ||w||^2 by Newton's method on the exact objective (Boyd &
    Vandenberghe 2004, Convex Optimization, sec. 9.5), to a gradient at rounding."""
    n, p = X.shape
    A = np.column_stack([X, np.ones(n)])
    beta = np.r_[np.full(p, 2.0 * lam), 0.0]
    theta = np.zeros(p + 1)
    for _ in range(100):
        sig = 1.0 / (1.0 + np.exp(y * (A @ theta)))
        grad = A.T @ (-y * sig) / n + beta * theta
        H = (A * (sig * (1.0 - sig) / n)[:, None]).T @ A + np.diag(beta)
        step = np.linalg.solve(H, grad)
        theta -= step
        if np.linalg.norm(step) <= 1e-15:
            break
    return theta


def test_fit_reports_a_certified_distance_and_param_tol_off(tmp_path, capsys):
    rows = _good_rows(60)
    _write_table(tmp_path / "t.csv", rows)
    spec = _spec(tmp_path)
    code, out, _ = run(["fit", spec, "-o", tmp_path / "m.json"], capsys)
    assert code == 0 and "distance  ||params - optimum|| <=" in out and ", certified (asked: 1e-06)" in out
    code, out, _ = run(["fit", spec, "-o", tmp_path / "m.json", "--json"], capsys)
    doc = json.loads(out)
    cert = doc["certificate"]
    assert cert["distance"] is not None and cert["distance"] <= 1e-6 and cert["param_tolerance"] == 1e-6
    assert cert["curvature"] > 0 and cert["distance_note"].startswith("certified")
    X = np.array([[r["a"], r["b"], r["c"]] for r in rows])
    y = np.array([1.0 if r["late"] == "yes" else -1.0 for r in rows])
    exact = _logistic_newton(X, y, 0.05)
    ours = np.r_[[doc["params"]["w"][j] for j in range(3)], doc["params"]["b"]]
    assert np.linalg.norm(ours - exact) <= cert["distance"]
    saved = json.loads((tmp_path / "m.json").read_text())
    assert saved["fit"]["certificate"]["distance"] == cert["distance"]
    code, out, _ = run(["fit", spec, "-o", tmp_path / "m.json", "--json", "--param-tol", "off"], capsys)
    assert code == 0 and json.loads(out)["certificate"]["param_tolerance"] is None


@pytest.mark.parametrize("value", ["0", "-1e-6", "tiny", "inf"])
def test_bad_param_tol_is_a_usage_error(tmp_path, capsys, value):
    _write_table(tmp_path / "t.csv", _good_rows())
    code, _, err = run(["fit", _spec(tmp_path), f"--param-tol={value}"], capsys)
    assert code == 2 and "--param-tol" in err and "off" in err and "Traceback" not in err
    code, _, err = run(["sweep", _spec(tmp_path, "tune lam = 0.05 within 0.01 .. 1\ngoal mean logistic(y * s) + "
                                            "lam * l2sq(w)\n"), "lam", f"--param-tol={value}"], capsys)
    assert code == 2 and "--param-tol" in err


def test_weights_bound_is_the_same_in_the_report_the_json_and_the_saved_model(tmp_path, capsys):
    # hinge + ridge on w with a free intercept: only the weights have a certified bound. Reference:
    # cvxpy + Clarabel at 1e-12 on the same objective (hinge as pos(1 - y s))
    import cvxpy as cp
    rows = _good_rows(60)
    _write_table(tmp_path / "t.csv", rows)
    spec = _spec(tmp_path, "goal mean hinge(y * s) + 0.05 * l2sq(w)\n")
    code, out, _ = run(["fit", spec, "-o", tmp_path / "m.json"], capsys)
    assert code == 0 and "certified for the weights (asked: 1e-06); no bound for the intercept" in out, out
    code, out, _ = run(["fit", spec, "-o", tmp_path / "m.json", "--json"], capsys)
    cert = json.loads(out)["certificate"]
    saved = json.loads((tmp_path / "m.json").read_text())["fit"]["certificate"]
    assert cert["distance"] is None and cert["weights_distance"] is not None and cert["weights_distance"] <= 1e-6
    assert saved["weights_distance"] == cert["weights_distance"]
    X = np.array([[r["a"], r["b"], r["c"]] for r in rows])
    y = np.array([1.0 if r["late"] == "yes" else -1.0 for r in rows])
    w, b = cp.Variable(3), cp.Variable()
    cp.Problem(cp.Minimize(cp.sum(cp.pos(1 - cp.multiply(y, X @ w + b))) / len(y) + 0.05 * cp.sum_squares(w))).solve(
        solver=cp.CLARABEL, tol_gap_abs=1e-12, tol_gap_rel=1e-12, tol_feas=1e-12)
    ours = np.array([json.loads(out)["params"]["w"][j] for j in range(3)])
    assert np.linalg.norm(ours - w.value) <= cert["weights_distance"] + 1e-9


def test_a_spec_the_numpy_backend_cannot_train_is_said_at_check_and_refused_at_fit(tmp_path, capsys):
    # regression: `keep w[a] * 2 + w[b] <= 1` checked convex and then failed in fit with
    # "internal error (NotSupported...)"; check now warns (W321) and fit/build refuse with E403 at the line
    _write_table(tmp_path / "t.csv", _good_rows())
    spec = _spec(tmp_path, "keep w[a] * 2 + w[b] <= 1\n" + GOOD_GOAL)
    code, out, _ = run(["check", spec, "--json"], capsys)
    doc = json.loads(out)
    assert code == 0 and ("W321", 6) in [(w["code"], w["line"]) for w in doc["warnings"]]
    for argv in (["fit", spec, "-o", tmp_path / "m.json"], ["build", spec, "--backend", "numpy", "-o",
                                                            tmp_path / "m.py"]):
        code, _, err = run(argv, capsys)
        assert code == 1 and "E403" in err and "m.objc:6:1" in err and "internal error" not in err
    assert not [p for p in tmp_path.glob("m.*") if p.suffix != ".objc"]
    # the cvxpy backend trains it, and the constraint holds (cvxpy's own solution)
    code, out, _ = run(["fit", spec, "--backend", "cvxpy", "-o", tmp_path / "m.json", "--json"], capsys)
    w = json.loads(out)["params"]["w"]
    assert code == 0 and 2 * w[0] + w[1] <= 1 + 1e-7
