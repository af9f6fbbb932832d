"""Reading a spec: bytes that are not UTF-8 text get a located message like every other error.

UTF-8 is the text encoding of RFC 3629: 0xff never occurs in it, and 0xe9 (Latin-1 'é') starts a
three-byte sequence, so followed by an ASCII letter it is invalid. Python's own decoder is the judge
of what is valid; the tests check where objc says the fault is against the bytes themselves.
"""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import pytest

from objc import SpecError, check_file, check_text

ROOT = Path(__file__).resolve().parent.parent
GOOD = ('table days from "data/croissants.csv"\n  target sold\n  inputs promo, rain_mm\n'
        'learn w over inputs, b\nscore s = w . x + b\ngoal mean squared(y - s) + 0.1 * l2sq(w)\n')


def _write(tmp_path: Path, data: bytes) -> Path:
    p = tmp_path / "spec.objc"
    p.write_bytes(data)
    return p


def _located(data: bytes, offset: int) -> tuple[int, int]:
    """Line and column (from 1, counted in characters) of the byte at `offset`, from the bytes."""
    before = data[:offset].decode("utf-8")
    return before.count("\n") + 1, len(before.split("\n")[-1]) + 1


@pytest.mark.parametrize("data, offset, shown", [
    (GOOD.replace("rain_mm", "rain_\xffmm").encode("utf-8").replace("\xff".encode("utf-8"), b"\xff"),
     GOOD.index("rain_") + 5, "0xff"),
    # Latin-1 text saved as is: 'é' is the single byte 0xe9
    (GOOD.replace("# ", "").encode("utf-8").replace(b"learn w", b"# caf\xe9 crowd\nlearn w"),
     GOOD.encode("utf-8").index(b"learn w") + 5, "0xe9"),
    # after a valid multi-byte character the column still counts characters
    ("# Lösung\n".encode("utf-8") + b"\xff" + GOOD.encode("utf-8"), len("# Lösung\n".encode("utf-8")), "0xff"),
], ids=["0xff inside a name", "latin-1 in a comment", "after a valid two-byte character"])
def test_bytes_that_are_not_utf8_are_located(tmp_path: Path, data: bytes, offset: int, shown: str) -> None:
    with pytest.raises(UnicodeDecodeError):
        data.decode("utf-8")  # the judge: Python's decoder refuses these bytes
    with pytest.raises(SpecError) as info:
        check_file(_write(tmp_path, data))
    (d,) = info.value.diagnostics
    assert d.code == "E002"
    assert (d.span.line, d.span.column) == _located(data, offset)
    assert shown in d.message and f"line {d.span.line}, column {d.span.column}" in d.message
    assert "UTF-8" in d.hint
    rendered = info.value.render()
    assert f"spec.objc:{d.span.line}:{d.span.column}" in rendered and "^" in rendered


def test_valid_utf8_is_read_as_before(tmp_path: Path) -> None:
    spec = tmp_path / "spec.objc"
    spec.write_bytes(("# Lösung für Bäcker (invented)\n" + GOOD).encode("utf-8"))
    assert check_file(spec).accepted


def test_a_lone_surrogate_in_text_is_located() -> None:
    # text from a JSON document may hold "\udcff", which no UTF-8 encoder accepts
    with pytest.raises(UnicodeEncodeError):
        "\udcff".encode("utf-8")
    text = GOOD.replace("rain_mm", "rain\udcff")
    with pytest.raises(SpecError) as info:
        check_text(text, "from-a-model.objc")
    (d,) = info.value.diagnostics
    assert d.code == "E002" and (d.span.line, d.span.column) == (3, len("  inputs promo, rain") + 1)
    assert "U+DCFF" in d.message


@pytest.mark.parametrize("command", [["check"], ["check", "--json"], ["build", "-o", "out.py"], ["fit"]])
def test_the_command_line_exits_with_a_message_not_a_traceback(tmp_path: Path, command: list[str]) -> None:
    spec = _write(tmp_path, b"table days from \"data/croissants.csv\"\n  target so\xffld\n")
    run = subprocess.run([sys.executable, "-m", "objc", command[0], str(spec), *command[1:]],
                         capture_output=True, text=True, cwd=tmp_path, timeout=120)
    assert run.returncode == 1
    out = run.stdout + run.stderr
    assert "Traceback" not in out and "internal error" not in out
    assert "E002" in out and "0xff" in out
    if "--json" not in command:
        assert "spec.objc:2:12" in run.stderr
