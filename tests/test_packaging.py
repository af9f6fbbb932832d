"""The grammar ships inside the wheel and is found there, away from any checkout."""

from __future__ import annotations

import subprocess
import sys
import zipfile
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent


@pytest.fixture(scope="module")
def wheel(tmp_path_factory) -> Path:
    out = tmp_path_factory.mktemp("wheel")
    build_dir = tmp_path_factory.mktemp("src")
    # build from a copy so the checkout gets no build/ or egg-info folders
    subprocess.run(["git", "-C", str(ROOT), "archive", "--format=tar", "-o", str(build_dir / "src.tar"), "HEAD"],
                   check=True)
    subprocess.run(["tar", "-xf", str(build_dir / "src.tar"), "-C", str(build_dir)], check=True)
    for rel in ("grammar", "objc", "pyproject.toml", "README.md"):  # the working tree, not only HEAD
        src = ROOT / rel
        if src.is_dir():
            subprocess.run(["cp", "-r", str(src), str(build_dir)], check=True)
        elif src.exists():
            subprocess.run(["cp", str(src), str(build_dir / rel)], check=True)
    proc = subprocess.run([sys.executable, "-m", "build", "--wheel", "--no-isolation", "-o", str(out), str(build_dir)],
                          capture_output=True, text=True)
    assert proc.returncode == 0, proc.stdout[-2000:] + proc.stderr[-2000:]
    (whl,) = out.glob("*.whl")
    return whl


def test_wheel_carries_the_grammar(wheel: Path) -> None:
    names = zipfile.ZipFile(wheel).namelist()
    assert "objc/grammar/objc.lark" in names


def test_grammar_is_found_from_the_installed_wheel(wheel: Path, tmp_path: Path) -> None:
    site = tmp_path / "site"
    zipfile.ZipFile(wheel).extractall(site)
    code = ("import objc.spec_parser as p, importlib.resources as r;"
            "t = p.grammar_text();"
            "assert t == r.files('objc.grammar').joinpath('objc.lark').read_text();"
            "assert 'objc' in p.__file__ and 'site' in p.__file__, p.__file__;"
            "from objc import check_text;"
            "c = check_text('table t from \"t.csv\"\\n target y2\\n inputs a\\nlearn w over inputs\\n"
            "score s = w . x\\ngoal mean squared(y - s)', 't');"
            "print(c.verdict)")
    proc = subprocess.run([sys.executable, "-I", "-c", f"import sys; sys.path.insert(0, {str(site)!r}); " + code],
                          capture_output=True, text=True, cwd=tmp_path)
    assert proc.returncode == 0, proc.stderr
    assert proc.stdout.strip() == "convex"
