"""What a table's text cell means before any column is typed: the one list of missing-value markers.

objc's table reader (`objc.tables`, through pandas) and the CSV reader of every generated NumPy
module read cells by this list, so a table binds the same way in both. It is pandas' default list
(pandas.read_csv, `na_values`), written out so that a generated module does not change with the
pandas version that built it. Cells compare exactly, case included.
"""

MISSING_CELLS: tuple[str, ...] = (
    "", "#N/A", "#N/A N/A", "#NA", "-1.#IND", "-1.#QNAN", "-NaN", "-nan", "1.#IND", "1.#QNAN", "<NA>", "N/A",
    "NA", "NULL", "NaN", "None", "n/a", "nan", "null",
)
