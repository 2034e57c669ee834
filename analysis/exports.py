"""Exports of rule tables and concept tables: CSV (formula-safe), JSON and Parquet (with pyarrow)."""

from __future__ import annotations

import io
import json
import math
from typing import Any

import pandas as pd

from .errors import InvalidInputError
from .rules import RuleTable, to_csv

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
