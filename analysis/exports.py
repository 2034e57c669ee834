"""Exports of rule tables and concept tables: CSV (formula-safe), JSON and Parquet (with pyarrow)."""

from __future__ import annotations

import io
import json
import math
from typing import Any

import numpy as np
import pandas as pd

from .concept_table import ConceptTable
from .errors import InvalidInputError
from .rules import RuleTable, csv_column_cells, csv_field, spreadsheet_safe, to_csv

FORMATS = ("csv", "json", "parquet")


def _plain(v: Any) -> Any:
    """JSON has no NaN or infinity: they become null (conviction is infinite where confidence is 1)."""
    if isinstance(v, float) and (math.isnan(v) or math.isinf(v)):
        return None
    if hasattr(v, "item"):
        return _plain(v.item())
    return v


def frame_records(frame: pd.DataFrame) -> list[dict[str, Any]]:
    return [{str(k): _plain(v) for k, v in row.items()} for row in frame.to_dict("records")]


def rules_document(rules: RuleTable, **about: Any) -> dict[str, Any]:
    """The rule table and how it was mined, as one JSON-ready document."""
    return {
        **{k: _plain(v) for k, v in about.items()},
        "n_images": rules.n_images, "min_support": rules.min_support, "min_count": rules.min_count, "max_len": rules.max_len,
        "n_tested": rules.n_tested, "pruned": rules.pruned, "rules": frame_records(rules.rules),
    }


def concept_table_csv(table: ConceptTable) -> bytes:
    """``to_csv(table.frame().reset_index())`` as UTF-8, written from the table's arrays.

    A concept table is wide and nearly all zeros (20,000 images by ~280 concepts: 11 million cells, under 2% set).
    Every row starts as the all-zero cells and only the set ones are filled in, so the work goes with the images and
    the concepts they show, not with every cell; the meta columns go through :func:`to_csv`'s own column writer.
    """
    presence = table.presence.to_numpy(dtype=bool)
    share = table.share.round(4).to_numpy(dtype=np.float64)
    k = presence.shape[1]
    if k == 0 or not np.isfinite(share).all() or (np.signbit(share) & (share == 0)).any():
        return to_csv(table.frame().reset_index()).encode("utf-8")  # the general writer for what the fast one does not cover
    meta = table.frame_meta().reset_index()
    names = [*map(str, meta.columns), *(f"concept: {c}" for c in table.presence.columns), *(f"saliency share: {c}" for c in table.share.columns)]
    lines = [",".join(csv_field(spreadsheet_safe(c)) for c in names)]
    meta_lines = list(map(",".join, zip(*(csv_column_cells(meta.iloc[:, i]) for i in range(meta.shape[1])))))
    p_rows, p_cols = np.nonzero(presence)
    s_rows, s_cols = np.nonzero(share)
    codes, distinct = pd.factorize(share[s_rows, s_cols])
    texts = np.array([f"{v:.6g}" for v in np.asarray(distinct).tolist()], dtype=object)
    rows = np.concatenate([p_rows, s_rows])
    order = np.argsort(rows, kind="stable")
    at = np.concatenate([p_cols, s_cols + k])[order].tolist()
    text = np.concatenate([np.full(len(p_rows), "1", dtype=object), texts[codes]])[order].tolist()
    bounds = np.searchsorted(rows[order], np.arange(len(meta) + 1)).tolist()
    zeros = ["0"] * (2 * k)
    for i, head in enumerate(meta_lines):
        cells = zeros.copy()
        for j in range(bounds[i], bounds[i + 1]):
            cells[at[j]] = text[j]
        lines.append(head + "," + ",".join(cells))
    return ("\n".join(lines) + "\n").encode("utf-8")


def export_frame(frame: pd.DataFrame, fmt: str, *, about: dict[str, Any] | None = None) -> bytes:
    """A table as CSV, JSON (records plus ``about``) or Parquet bytes."""
    if fmt == "csv":
        return to_csv(frame).encode("utf-8")
    if fmt == "json":
        return json.dumps({**(about or {}), "rows": frame_records(frame)}, indent=1).encode("utf-8")
    if fmt == "parquet":
        try:
            import pyarrow  # noqa: F401
        except ImportError:
            raise InvalidInputError("Parquet export needs pyarrow: pip install 'heedmap[parquet]', or choose csv or json.") from None
        buf = io.BytesIO()
        frame.reset_index(drop=True).to_parquet(buf, index=False)
        return buf.getvalue()
    raise InvalidInputError(f"export format must be one of {', '.join(FORMATS)}; got {fmt!r}.")
