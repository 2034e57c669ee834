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


def _written_by_csv_module(frame: pd.DataFrame) -> str:
    """The reference: every cell through _cell, written row by row by the standard library's csv writer."""
    buf = io.StringIO()
    writer = csv.writer(buf, lineterminator="\n")
    writer.writerow([spreadsheet_safe(str(c)) for c in frame.columns])
    writer.writerows([_cell(v) for v in row] for row in frame.itertuples(index=False))
    return buf.getvalue()


def test_csv_bytes_equal_the_csv_modules_on_hostile_cells() -> None:
    # Quotes, separators, line breaks (csv quotes "\n" but not a lone "\r" with "\n" line ends), formula starts,
    # missing values of every kind, -0.0 (hashing would merge it with 0.0), mixed objects that compare equal (1, 1.0, True).
    frame = pd.DataFrame({
        "n": [1, 2, 3, 4], "yes": [True, False, True, True], "x": [0.1234567891, np.nan, 1e-9, -0.0],
        "text": ["=1+1", "a, b", None, 'q"uote\nline\rcr'], "x32": np.array([1.5, 2.25, np.inf, -np.inf], dtype=np.float32),
        "list": [[1, 2], [3], [], {"a": 1}], "maybe": pd.Series([1.0, None, 3.0, 4]), "mixed": [1, 1.0, True, "1"], "s": ["a", "a", "", "b,"],
        "Int": pd.array([1, None, 3, 4], dtype="Int64"), "=bad,col": ["x"] * 4, "cat": pd.Categorical(["a", "b", "a", "c,d"]),
        "u8": np.array([1, 2, 255, 0], dtype=np.uint8), "@x": ["-1", "+1", "@a", "\tb"],
    })
    assert to_csv(frame) == _written_by_csv_module(frame)
    for columns in (["text"], ["s"], ["x"], []):  # one column: a lone empty field is written as ""
        assert to_csv(frame[columns]) == _written_by_csv_module(frame[columns]), columns
    assert to_csv(frame.iloc[:0]) == _written_by_csv_module(frame.iloc[:0])
    assert to_csv(frame[["s", "n"]]).splitlines()[3] == ",3"  # an empty field among others is left bare


def test_csv_of_a_concept_table_sized_frame_equals_the_csv_modules() -> None:
    rng = np.random.default_rng(0)
    presence = pd.DataFrame(rng.random((500, 30)) < 0.1, columns=[f"concept: c{i}" for i in range(30)]).astype(int)
    share = pd.DataFrame(np.where(presence.to_numpy(), rng.random((500, 30)), 0.0).round(4), columns=[f"saliency share: c{i}" for i in range(30)])
    meta = pd.DataFrame({"image_id": np.arange(500), "true_class": rng.choice(["can", "bottle", "carton"], 500), "confidence": rng.random(500)})
    frame = pd.concat([meta, presence, share], axis=1)
    assert to_csv(frame) == _written_by_csv_module(frame)


def test_concept_table_csv_is_the_general_writers_bytes() -> None:
    from dataclasses import replace

    from analysis.exports import concept_table_csv
    from analysis.sampling import Design

    from .tables import random_rows, table_from_rows

    # Concept names a spreadsheet or a CSV reader could trip on, beside plain ones; shares of several regions per image.
    table = table_from_rows(random_rows(3, n=400, concepts=("cap", '=tag"x', "rim, steel", "label\nband", "body")))
    assert concept_table_csv(table) == to_csv(table.frame().reset_index()).encode("utf-8")
    sampled = replace(table, design=Design(np.arange(len(table)) % 2, np.array([500.0, 700.0])))  # adds the sampling weight column
    assert concept_table_csv(sampled) == to_csv(sampled.frame().reset_index()).encode("utf-8")
    bare = table_from_rows([("can", "can", 0.9, set()), ("bottle", "can", 0.6, set())])  # no concept at all
    assert concept_table_csv(bare) == to_csv(bare.frame().reset_index()).encode("utf-8")


def test_missing_values_of_pandas_own_dtypes_are_empty_cells_in_both_writers() -> None:
    frame = pd.DataFrame({
        "name": pd.array(["can", pd.NA, "=cmd"], dtype="string"),
        "n": pd.array([1, pd.NA, 3], dtype="Int64"),
        "when": pd.to_datetime(["2026-01-01", None, "2026-01-02"]),
        "mixed": pd.Series([1.5, np.float32("nan"), np.datetime64("NaT")], dtype=object),
    })
    text = to_csv(frame)
    rows = list(csv.reader(io.StringIO(text)))
    assert rows[2] == ["", "", "", ""]  # not "<NA>" / "NaT" / "nan"
    assert rows[3][3] == ""
    assert rows[1][0] == "can" and rows[3][0] == spreadsheet_safe("=cmd")
    assert to_csv(frame[["name"]]).splitlines()[2] == '""'  # one column: the csv module's lone empty field
