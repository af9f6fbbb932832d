"""Text from a spec or a table never becomes code in a generated module.

Spec names, quoted column names, label values, the table path and comments hold Python code (a
canary that creates a file when run), quotes, triple quotes, backslashes, newlines (through string
escapes), dunder names and Unicode look-alikes. Both backends' modules are built from such specs,
by `objc build` and by `emit_module`, imported in a fresh process and trained on a small table; the
canary file must never appear, and the trained weights must match the in-process backend's (so the
hostile names were carried as data all the way through).
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from objc.cli import main
from objc.frontend import check_text

ROOT = Path(__file__).resolve().parents[2]
CANARY = "CANARY"
PAYLOAD = f"__import__('pathlib').Path('{CANARY}').touch()"


def _spec_string(text: str) -> str:
    """`text` as a spec string literal (Python-style escapes)."""
    return '"' + text.encode("unicode_escape").decode("ascii").replace('"', '\\"') + '"'


# column names: code, quotes of every kind, backslashes, a newline, a dunder, Cyrillic look-alikes
COLUMNS = [
    PAYLOAD,
    f'"""; {PAYLOAD}; """',
    f"'''; {PAYLOAD}; '''",
    f"a\\b\\'); {PAYLOAD}#",
    f"two\nlines\n{PAYLOAD}",
    "__class__",
    "\u0440\u0430y",  # Cyrillic 'р' and 'а' before a Latin 'y': looks like "pay"
]
LABEL_POS = f"x'); {PAYLOAD} #"
LABEL_NEG = f'"""\n{PAYLOAD}\n"""'
TARGET = f"t\"{PAYLOAD}"
TABLE_FILE = "data'); __import__('os')#.csv"


def _spec() -> str:
    inputs = ", ".join(_spec_string(c) for c in COLUMNS)
    return (
        f"# {PAYLOAD} \"\"\" ''' \\ \n"
        f"table __builtins__ from {_spec_string(TABLE_FILE)}\n"
        f"  target {_spec_string(TARGET)}: {_spec_string(LABEL_POS)} -> +1, {_spec_string(LABEL_NEG)} -> -1\n"
        f"  inputs {inputs}\n"
        f"  feature __import__ = log1p(abs(__class__))  # {PAYLOAD}\n"
        "tune __class__x = 0.5 within 0.01 .. 10\n"
        "learn w over inputs, __init__\n"
        "score s = w . x + __init__\n"
        "loss __call__(m) = max(0, 1 - m)^2\n"
        "goal __class__x * mean __call__(y * s) + 0.5 * l2sq(w)\n"
        f"keep w[{_spec_string(COLUMNS[1])}] >= -5\n"
    )


def _table(folder: Path) -> pd.DataFrame:
    rng = np.random.default_rng(5)
    n = 40
    X = rng.normal(size=(n, len(COLUMNS)))
    frame = pd.DataFrame(X, columns=COLUMNS)
    frame[TARGET] = np.where(X[:, 0] - X[:, 2] + 0.3 * rng.normal(size=n) > 0, LABEL_POS, LABEL_NEG)
    frame.to_csv(folder / TABLE_FILE, index=False)
    return frame


def _no_canary(*folders: Path) -> None:
    for f in folders:
        assert not (f / CANARY).exists(), f"the canary ran in {f}"


@pytest.fixture
def hostile(tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)  # a canary run in this process would land here
    (tmp_path / "s.objc").write_text(_spec(), encoding="utf-8")
    frame = _table(tmp_path)
    checked = check_text(_spec(), "s.objc")
    assert checked.accepted, [d.render() for d in checked.errors]
    yield tmp_path, frame, checked
    _no_canary(tmp_path, ROOT)


def _run_in_fresh_process(folder: Path, script: str) -> dict:
    env = dict(os.environ, PYTHONPATH="", OMP_NUM_THREADS="1")
    proc = subprocess.run([sys.executable, "-c", script], cwd=folder, env=env, capture_output=True, text=True,
                          timeout=300)
    assert proc.returncode == 0, proc.stderr
    return json.loads(proc.stdout.strip().splitlines()[-1])


def test_the_spec_reads_every_hostile_name_as_data(hostile):
    folder, frame, checked = hostile
    table = checked.spec.table
    assert table.target == TARGET and table.path == TABLE_FILE
    assert [i.text for i in table.inputs] == COLUMNS
    assert [v for v, _ in table.label_map.pairs] == [LABEL_POS, LABEL_NEG]


@pytest.mark.parametrize("backend", ["numpy", "cvxpy"])
def test_built_module_runs_without_the_canary(hostile, backend, capsys):
    folder, frame, checked = hostile
    out = folder / f"mod_{backend}.py"
    assert main(["build", "s.objc", "--backend", backend, "-o", str(out)]) == 0
    capsys.readouterr()
    source = out.read_text(encoding="utf-8")
    compile(source, str(out), "exec")
    # the payload is in the module only inside string literals and comments: Python's own tokenizer
    # (the tokenize module) finds the name __import__ nowhere as code, and the spec's dunder names
    # (__builtins__, __class__x, __call__, __init__) are not bound as Python names either
    import io
    import tokenize
    names = {tok.string for tok in tokenize.generate_tokens(io.StringIO(source).readline)
             if tok.type == tokenize.NAME}
    assert PAYLOAD in source  # it is there, as text
    assert not names & {"__import__", "__builtins__", "__class__x", "__call__"}, names & {"__import__"}
    # the same objective trained in this process by objc itself (the numpy backend): the reference
    from objc import training
    train, _, _ = training.bind_training(checked, folder)
    ref = training.run_backend(checked, train, "numpy", training.tunable_values(checked), tol=1e-10)
    np.save(folder / "X.npy", np.asarray(train.X))  # the bound inputs, the derived feature last
    np.save(folder / "y.npy", np.asarray(train.y))
    if backend == "numpy":
        # the estimator reads the table's own columns (it derives the feature itself)
        script = (
            "import json, importlib.util, numpy as np, pandas as pd\n"
            f"spec = importlib.util.spec_from_file_location('m', {str(out)!r})\n"
            "m = importlib.util.module_from_spec(spec); spec.loader.exec_module(m)\n"
            f"frame = pd.read_csv({TABLE_FILE!r})\n"
            f"model = m.Model().fit(frame.drop(columns=[{TARGET!r}]), frame[{TARGET!r}])\n"
            "print(json.dumps({'w': list(map(float, model.coef_))}))\n"
        )
    else:
        script = (
            "import json, importlib.util, numpy as np\n"
            f"spec = importlib.util.spec_from_file_location('m', {str(out)!r})\n"
            "m = importlib.util.module_from_spec(spec); spec.loader.exec_module(m)\n"
            "X, y = np.load('X.npy'), np.load('y.npy')\n"
            "r = m.solve(X, y)\n"
            "print(json.dumps({'w': list(map(float, np.ravel(r['params']['w'])))}))\n"
        )
    got = _run_in_fresh_process(folder, script)
    _no_canary(folder)
    np.testing.assert_allclose(got["w"], ref.params["w"], rtol=1e-4, atol=1e-5)


@pytest.mark.parametrize("backend", ["numpy", "cvxpy"])
def test_emit_module_loaded_in_process(hostile, backend):
    folder, frame, checked = hostile
    if backend == "numpy":
        from objc.backends.numpy_module import emit_module, load_module
        ns = load_module(emit_module(checked))
        assert ns["SPEC_TEXT"] == checked.spec.text  # the spec verbatim, as data
    else:
        from objc.backends.cvxpy_problem import emit_module
        ns = {"__name__": "objc_cvxpy_generated"}
        exec(compile(emit_module(checked), "<cvxpy module>", "exec"), ns)  # noqa: S102 - the point of the test
    _no_canary(folder)


def test_fit_and_predict_through_the_command_line(hostile, capsys):
    folder, frame, checked = hostile
    assert main(["fit", "s.objc", "-o", "m.json", "--json"]) == 0
    doc = json.loads(capsys.readouterr().out)
    assert doc["inputs"] == COLUMNS + ["__import__"]
    assert main(["predict", "m.json", TABLE_FILE, "-o", "scores.csv"]) == 0
    capsys.readouterr()
    scores = pd.read_csv(folder / "scores.csv")
    assert len(scores) == len(frame)
    _no_canary(folder)


def test_generated_module_as_a_script_reads_hostile_columns(hostile, capsys):
    folder, frame, checked = hostile
    out = folder / "mod.py"
    assert main(["build", "s.objc", "-o", str(out)]) == 0
    capsys.readouterr()
    env = dict(os.environ, PYTHONPATH="", OMP_NUM_THREADS="1")
    proc = subprocess.run([sys.executable, str(out), TABLE_FILE, "-o", "script_model.json"], cwd=folder, env=env,
                          capture_output=True, text=True, timeout=300)
    assert proc.returncode == 0, proc.stderr
    assert (folder / "script_model.json").exists()
    _no_canary(folder)


# Python keywords and builtins, and names the generated modules themselves define (found by reading
# both modules' source): as spec names they must neither break the module nor rebind its own names
CLASHING = ["lambda", "class", "None", "True", "import", "print", "np", "math", "sys", "SPEC", "run_solver",
            "float", "self", "X", "exec", "_k_hinge", "term_0", "values", "cp", "tunables", "Model", "solve"]


@pytest.mark.parametrize("name", CLASHING)
def test_spec_names_that_clash_with_python_or_the_module(tmp_path, name):
    from objc.backends import cvxpy_problem, numpy_module
    rng = np.random.default_rng(0)
    frame = pd.DataFrame({"a": rng.normal(size=30), "b": rng.normal(size=30)})
    frame["t"] = 2 * frame["a"] - frame["b"] + 0.1 * rng.normal(size=30)
    spec = (f'table t from "kw.csv"\n  target t\n  inputs a, b\ntune {name} = 0.05 within 0.01 .. 10\n'
            f"learn w over inputs, c\nscore s = w . x + c\ngoal mean (y - s)^2 + {name} * l2sq(w)\n")
    checked = check_text(spec, "k.objc")
    X, y = frame[["a", "b"]].to_numpy(), frame["t"].to_numpy()
    # ridge in closed form (Hoerl & Kennard 1970): w = (Xc'Xc / n + lam I)^-1 Xc'yc / n on centred data
    Xc, yc = X - X.mean(axis=0), y - y.mean()
    want = np.linalg.solve(Xc.T @ Xc / len(y) + 0.05 * np.eye(2), Xc.T @ yc / len(y))
    for emit in (numpy_module.emit_module, cvxpy_problem.emit_module):
        ns = {"__name__": "objc_generated"}
        exec(compile(emit(checked), "<generated>", "exec"), ns)  # noqa: S102 - the point of the test
        out = ns["solve"](X, y)
        np.testing.assert_allclose(np.ravel(out["params"]["w"]), want, rtol=1e-4, atol=1e-6)
