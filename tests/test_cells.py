"""objc.cells: the one list of text cells that mean a missing value.

References: the default missing-value list of pandas.read_csv (pandas documentation, `read_csv`,
parameter `na_values`: "By default the following values are interpreted as NaN: '', '#N/A',
'#N/A N/A', '#NA', '-1.#IND', '-1.#QNAN', '-NaN', '-nan', '1.#IND', '1.#QNAN', '<NA>', 'N/A',
'NA', 'NULL', 'NaN', 'None', 'n/a', 'nan', 'null'."), and pandas.read_csv itself on a table holding
each marker and near misses of them.
"""

from __future__ import annotations

import re
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

import objc
from objc.backends import numpy_estimator_src as estimator_src
from objc.backends import numpy_module as nm
from objc.cells import MISSING_CELLS
from objc.source_text import Span
from objc.tables import read_table

PANDAS_DOCUMENTED = ("", "#N/A", "#N/A N/A", "#NA", "-1.#IND", "-1.#QNAN", "-NaN", "-nan", "1.#IND", "1.#QNAN", "<NA>",
                     "N/A", "NA", "NULL", "NaN", "None", "n/a", "nan", "null")
# cells a person may take for missing that are not on the list: other cases, blanks around a marker,
# infinities (which the `missing` rule treats apart, as values that are not finite)
NEAR_MISSES = (" NA", "NA ", "Na", "na", "nA", "NONE", "none", "Null", "NULL ", "NAN", "-NAN", "+nan", "#n/a", "N/a",
               "<na>", "inf", "-inf", "Inf", "nul", "-", "?")


def _is_number(text: str) -> bool:
    try:
        float(text)
    except ValueError:
        return False
    return True


def _csv(path: Path, cells) -> Path:
    # a key column keeps an empty cell from making an empty line (which a CSV reader skips)
    path.write_text("k,v\n" + "".join(f"{i},{cell}\n" for i, cell in enumerate(cells)), encoding="utf-8")
    return path


def test_the_list_is_pandas_documented_default():
    assert len(set(MISSING_CELLS)) == len(MISSING_CELLS) and all(isinstance(c, str) for c in MISSING_CELLS)
    assert set(MISSING_CELLS) == set(PANDAS_DOCUMENTED)


def test_pandas_reads_each_marker_as_missing_and_no_near_miss(tmp_path):
    frame = pd.read_csv(_csv(tmp_path / "t.csv", MISSING_CELLS + NEAR_MISSES), dtype=str)
    missing = dict(zip(MISSING_CELLS + NEAR_MISSES, frame["v"].isna()))
    assert all(missing[c] for c in MISSING_CELLS)
    assert not any(missing[c] for c in NEAR_MISSES)
    assert not set(NEAR_MISSES) & set(MISSING_CELLS)


def test_the_language_reference_lists_the_same_cells():
    # docs/language.md, the `missing` row of section 3: "... one of `#N/A #N/A N/A ...` (exactly; ...)"
    docs = (Path(__file__).resolve().parents[1] / "docs" / "language.md").read_text(encoding="utf-8")
    (listed,) = re.findall(r"empty or one of `([^`]*)`", docs)
    # the list is space-separated, and two markers hold a space themselves
    expected = " ".join(c for c in MISSING_CELLS if c)
    assert sorted(listed.split(" ")) == sorted(expected.split(" "))
    assert "" in MISSING_CELLS  # the empty cell, which the text names in words


def test_objcs_table_reader_reads_exactly_the_markers_as_missing(tmp_path):
    numbers = [f"{v:.3f}" for v in np.linspace(-2.0, 2.0, 5)]
    cells = list(MISSING_CELLS) + numbers
    table = read_table(_csv(tmp_path / "t.csv", cells), span=Span(1, 1, 1, 2), source_name="t.objc")
    values = np.asarray(table["v"], dtype=float)
    np.testing.assert_array_equal(np.isnan(values), [True] * len(MISSING_CELLS) + [False] * len(numbers))
    np.testing.assert_array_equal(values[len(MISSING_CELLS):], [float(v) for v in numbers])
    # near misses that are no numbers stay text, as written
    words = [c for c in NEAR_MISSES if not _is_number(c)]
    assert len(words) >= 15
    text = read_table(_csv(tmp_path / "u.csv", words), span=Span(1, 1, 1, 2), source_name="t.objc")
    assert not pd.isna(text["v"]).any()


def test_the_generated_modules_cell_reader_agrees(tmp_path):
    got = estimator_src._numeric("t.csv", "v", list(MISSING_CELLS))
    assert np.isnan(got).all()
    for cell in ("Na", "none", "#n/a", "<na>"):
        with pytest.raises(estimator_src.TableError, match="is not a number"):
            estimator_src._numeric("t.csv", "v", ["1.5", cell])


def test_a_generated_module_carries_its_own_copy_of_the_list():
    # so that the module binds a table the same way whatever pandas (if any) it later runs beside
    text = ('table t from "t.csv"\n  target y\n  inputs a\nlearn w over inputs, b\nscore s = w . x + b\n'
            'goal mean squared(y - s) + 0.1 * l2sq(w)\n')
    ns = nm.load_module(nm.emit_module(objc.check_text(text, "m.objc")))
    assert ns["_MISSING_CELLS"] == MISSING_CELLS
