"""objc/plots.py: the convergence curve with a history whose objective is null somewhere (a
non-finite objective is stored as null) and no certificate."""

from __future__ import annotations

import pytest

from objc import plots


def test_a_null_objective_is_left_off_the_curve(tmp_path):
    history = [{"passes": 1, "objective": 3.0}, {"passes": 2, "objective": None}, {"passes": 3, "objective": 2.5},
               {"passes": 4, "objective": 2.25}]
    out = plots.convergence_curve(history, tmp_path / "c.png", "c")
    # a PNG file a person can open: its signature (the PNG specification, sec. 5.2)
    assert out.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


def test_a_history_with_nothing_to_draw_is_refused(tmp_path):
    with pytest.raises(ValueError, match="fewer than two finite objectives"):
        plots.convergence_curve([{"passes": 1, "objective": None}, {"passes": 2, "objective": 1.0}],
                                tmp_path / "c.png", "c")
    assert not (tmp_path / "c.png").exists()
