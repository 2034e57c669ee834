"""CSV written column by column holds the same cells as the cell-by-cell definition, read back by the csv module."""

from __future__ import annotations

import csv
import io

import numpy as np
import pandas as pd

from analysis.rules import _cell, spreadsheet_safe, to_csv


def test_columns_written_as_each_cell_would_be() -> None:
    frame = pd.DataFrame({
        "n": [1, 2, 3], "yes": [True, False, True], "x": [0.1234567891, np.nan, 1e-9], "text": ["=1+1", "a, b", None],
        "x32": np.array([1.5, 2.25, np.inf], dtype=np.float32), "list": [[1, 2], [3], []], "maybe": pd.Series([1.0, None, 3.0]),
    })
    expected = [[spreadsheet_safe(str(c)) for c in frame.columns]] + [[_cell(v) for v in row] for row in frame.itertuples(index=False)]
    got = list(csv.reader(io.StringIO(to_csv(frame))))
    assert got == [[str(v) for v in row] for row in expected]
    assert got[1][:4] == ["1", "True", "0.123457", "'=1+1"] and got[2][2] == "" and got[3][4] == "inf"
