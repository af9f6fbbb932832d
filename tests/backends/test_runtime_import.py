"""The two shapes of a generated NumPy module (standalone, or `--lean`: importing objc's solver code) and
the source lines a traceback from inside a generated module shows."""

from __future__ import annotations

import json
import os
import subprocess
import sys
import traceback
from pathlib import Path

import pytest

import objc
from objc.backends import numpy_module as nm
from objc.tables import bind_table

ROOT = Path(__file__).resolve().parents[2]
SPEC = ROOT / "specs" / "croissant_huber.objc"
TABLE = ROOT / "specs" / "data" / "croissants.csv"


def _train_with(script: Path, out: Path) -> dict:
    env = dict(os.environ, PYTHONPATH=str(ROOT))  # a lean module needs objc importable; a standalone one does not
    proc = subprocess.run([sys.executable, str(script), str(TABLE), "-o", str(out)], capture_output=True, text=True,
                          timeout=180, env=env)
    assert proc.returncode == 0, proc.stderr
    return json.loads(out.read_text())


def test_lean_and_standalone_modules_train_to_the_same_answer_as_objc(tmp_path):
    checked = objc.check_file(SPEC)
    standalone, lean = nm.emit_module(checked), nm.emit_module(checked, "import")
    assert "from objc" not in standalone and "from objc" in lean
    assert len(lean) < len(standalone) / 2
    (tmp_path / "full.py").write_text(standalone, encoding="utf-8")
    (tmp_path / "lean.py").write_text(lean, encoding="utf-8")
    full_model = _train_with(tmp_path / "full.py", tmp_path / "full.json")
    lean_model = _train_with(tmp_path / "lean.py", tmp_path / "lean.json")
    assert lean_model["objective"] == pytest.approx(full_model["objective"], rel=1e-12)
    # and both equal objc's own fit on its own binding of the table (the reference the module tests use)
    data = bind_table(checked.spec.table, SPEC.parent, checked.task or "residual", source_name=str(SPEC))
    here = nm.fit(checked, data.X, data.y, data.weights, data.input_names)
    assert full_model["objective"] == pytest.approx(here.objective, rel=1e-7)


def test_an_unknown_runtime_shape_is_refused():
    checked = objc.check_text(SPEC.read_text(encoding="utf-8"), str(SPEC))
    with pytest.raises(ValueError):
        nm.emit_module(checked, "somewhere")


def test_a_traceback_from_a_generated_module_shows_its_source_line():
    source = "def broken(x):\n    return x / undefined_name_for_the_test\n"
    namespace = nm.load_module(source, "probe")
    with pytest.raises(NameError):
        try:
            namespace["broken"](1.0)
        except NameError:
            text = traceback.format_exc()
            assert "return x / undefined_name_for_the_test" in text
            raise
