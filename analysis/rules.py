"""Per-class concept rules "concept set => class" from the image-by-concept table, through mlxtend."""

from __future__ import annotations

import csv
import io
from dataclasses import dataclass

import numpy as np
import pandas as pd
from mlxtend.frequent_patterns import association_rules, fpgrowth

from .errors import InvalidInputError

RULE_COLUMNS = ["class", "concepts", "support", "confidence", "lift", "n_images", "class_images", "concept_images", "rank"]
_CLASS_PREFIX = "class = "


@dataclass(frozen=True)
class RuleTable:
    """Rules as a DataFrame (RULE_COLUMNS), best first within each class, and how they were mined."""

    rules: pd.DataFrame
    n_images: int
    min_support: float
    max_len: int


def mine_rules(table: pd.DataFrame, classes: pd.Series, *, min_support: float = 0.02, max_len: int = 2, min_lift: float = 1.0) -> RuleTable:
    """Mine rules ``concept set => class`` with support, confidence, lift and image counts.

    Parameters
    ----------
    table
        Boolean image-by-concept table (rows images, columns concepts).
    classes
        Class of each image (same index as ``table``), e.g. the predicted class.
    min_support
        Fraction of all images that must hold both the concept set and the class.
    max_len
        Most concepts in one rule's set.
    min_lift
        Rules at or below this lift are dropped (1 = no association).

    Rules within a class are ranked by number of images, then confidence, then lift.
    """
    if not 0 < min_support <= 1:
        raise InvalidInputError(f"min_support must be in (0, 1]; got {min_support}. Give a fraction of images, e.g. 0.05.")
    if max_len < 1:
        raise InvalidInputError(f"max_len must be at least 1; got {max_len}.")
    if len(table) == 0:
        raise InvalidInputError("the concept table has no rows; label some regions first.")
    if not table.index.equals(classes.index):
        raise InvalidInputError("classes must have the same index as the concept table (one class per image).")
    bad = [c for c in table.columns if str(c).startswith(_CLASS_PREFIX)]
    if bad:
        raise InvalidInputError(f"concept names may not start with {_CLASS_PREFIX!r}: {bad[:3]}.")
    onehot = pd.get_dummies(classes.astype(str), prefix="", prefix_sep="").add_prefix(_CLASS_PREFIX)
    data = pd.concat([table.astype(bool), onehot.astype(bool)], axis=1)
    itemsets = fpgrowth(data, min_support=min_support, use_colnames=True, max_len=max_len + 1)
    empty = pd.DataFrame(columns=RULE_COLUMNS)
    if itemsets.empty:
        return RuleTable(empty, len(table), min_support, max_len)
    # mlxtend also computes metrics we do not report (conviction, certainty) and divides by
    # zero in them when a class or concept holds for every image; those values are dropped.
    with np.errstate(divide="ignore", invalid="ignore"):
        rules = association_rules(itemsets, num_itemsets=len(data), metric="confidence", min_threshold=0.0)
    n = len(data)
    keep = rules[
        rules["consequents"].map(lambda s: len(s) == 1 and next(iter(s)).startswith(_CLASS_PREFIX))
        & rules["antecedents"].map(lambda s: not any(str(i).startswith(_CLASS_PREFIX) for i in s))
    ]
    if keep.empty:
        return RuleTable(empty, n, min_support, max_len)
    out = pd.DataFrame(
        {
            "class": keep["consequents"].map(lambda s: next(iter(s))[len(_CLASS_PREFIX):]),
            "concepts": keep["antecedents"].map(lambda s: " & ".join(sorted(map(str, s)))),
            "support": keep["support"].astype(float),
            "confidence": keep["confidence"].astype(float),
            "lift": keep["lift"].astype(float),
            "n_images": (keep["support"] * n).round().astype(int),
            "class_images": (keep["consequent support"] * n).round().astype(int),
            "concept_images": (keep["antecedent support"] * n).round().astype(int),
        }
    )
    out = out[out["lift"] > min_lift]
    out = out.sort_values(["class", "n_images", "confidence", "lift", "concepts"], ascending=[True, False, False, False, True])
    out["rank"] = out.groupby("class").cumcount() + 1
    return RuleTable(out.reset_index(drop=True)[RULE_COLUMNS], n, min_support, max_len)


_FORMULA_START = ("=", "+", "-", "@", "\t", "\r")


def spreadsheet_safe(value: object) -> object:
    """Prefix text a spreadsheet would run as a formula with a quote (OWASP CSV-injection advice)."""
    if isinstance(value, str) and value.startswith(_FORMULA_START):
        return "'" + value
    return value


def _cell(v: object) -> object:
    if isinstance(v, str):
        return spreadsheet_safe(v)
    if v is None or (isinstance(v, float) and np.isnan(v)):
        return ""
    if isinstance(v, (float, np.floating)):
        return f"{v:.6g}"
    return v


def to_csv(frame: pd.DataFrame) -> str:
    """CSV text of a table with formula-like text cells escaped."""
    buf = io.StringIO()
    writer = csv.writer(buf, lineterminator="\n")
    writer.writerow([spreadsheet_safe(str(c)) for c in frame.columns])
    for row in frame.itertuples(index=False):
        writer.writerow([_cell(v) for v in row])
    return buf.getvalue()
