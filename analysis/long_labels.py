"""Judgments in long form (one row per item, annotator and label), read from CSV or built in code."""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np
import numpy.typing as npt
import pandas as pd

from .errors import InvalidInputError

REQUIRED = ("item", "annotator", "label")


@dataclass(frozen=True)
class LongLabels:
    """Judgments as codes into the name tuples; items without any judgment keep their code."""

    items: tuple[str, ...]
    annotators: tuple[str, ...]
    classes: tuple[str, ...]
    item_codes: npt.NDArray[np.int64]
    annotator_codes: npt.NDArray[np.int64]
    label_codes: npt.NDArray[np.int64]

    def __len__(self) -> int:
        return len(self.item_codes)

    def matrix(self) -> npt.NDArray[np.object_]:
        """Annotators x items array of class names, None where an annotator gave no judgment."""
        m = np.full((len(self.annotators), len(self.items)), None, dtype=object)
        m[self.annotator_codes, self.item_codes] = np.asarray(self.classes, dtype=object)[self.label_codes]
        return m

    def counts(self) -> npt.NDArray[np.int64]:
        """Items x classes table of how many annotators gave each label."""
        k = len(self.classes)
        return np.bincount(self.item_codes * k + self.label_codes, minlength=len(self.items) * k).reshape(len(self.items), k)


def from_frame(frame: pd.DataFrame, *, source: str = "the labels") -> LongLabels:
    """Validate and encode a frame with columns item, annotator, label (blank label = no judgment)."""
    missing = [c for c in REQUIRED if c not in frame.columns]
    if missing:
        raise InvalidInputError(f"{source} lacks the column(s) {missing}; it needs item,annotator,label (one row per judgment). Its columns are {list(frame.columns)}.")
    f = frame[list(REQUIRED)].copy()
    for c in REQUIRED:
        f[c] = f[c].map(lambda v: "" if pd.isna(v) else str(v).strip())
    if (f["item"] == "").any() or (f["annotator"] == "").any():
        rows = (f.index[(f["item"] == "") | (f["annotator"] == "")] + 2).tolist()[:5]
        raise InvalidInputError(f"{source} has rows without an item or annotator (line(s) {rows}); fill them in or delete them.")
    items = tuple(pd.unique(f["item"]))
    judged = f[f["label"] != ""]
    if judged.empty:
        raise InvalidInputError(f"{source} holds no judgments (every label is blank); nothing to measure.")
    dup = judged.duplicated(["item", "annotator"], keep=False)
    if dup.any():
        first = judged[dup].iloc[0]
        lines = (judged.index[dup] + 2).tolist()[:6]
        raise InvalidInputError(
            f"{source} has {int(dup.sum())} rows that judge one item twice by one annotator (first: item {first['item']!r}, "
            f"annotator {first['annotator']!r}; lines {lines}); keep one judgment per item and annotator."
        )
    annotators = tuple(sorted(pd.unique(judged["annotator"])))
    classes = tuple(sorted(pd.unique(judged["label"])))
    item_index = {v: i for i, v in enumerate(items)}
    ann_index = {v: i for i, v in enumerate(annotators)}
    cls_index = {v: i for i, v in enumerate(classes)}
    return LongLabels(
        items,
        annotators,
        classes,
        judged["item"].map(item_index).to_numpy(np.int64),
        judged["annotator"].map(ann_index).to_numpy(np.int64),
        judged["label"].map(cls_index).to_numpy(np.int64),
    )


def read_long_labels(path: Path) -> LongLabels:
    """Read a LABELS.csv with columns item,annotator,label; errors name the file and what to fix."""
    try:
        frame = pd.read_csv(path, dtype=str, keep_default_na=False)
    except FileNotFoundError:
        raise InvalidInputError(f"{path} does not exist.") from None
    except pd.errors.EmptyDataError:
        raise InvalidInputError(f"{path} is empty; it needs a header item,annotator,label and one row per judgment.") from None
    except (OSError, UnicodeDecodeError, pd.errors.ParserError) as exc:
        raise InvalidInputError(f"cannot read {path} as CSV: {exc}") from None
    return from_frame(frame, source=str(path))
