"""A run's predictions as one frame (``store.prediction_frame``), kept in a file beside the database so that a restarted
server does not read and assemble them again (about a quarter of a second at 20,000 images, on every cold page).

A cache, never a source of truth, like :mod:`.label_snapshot`: used only when the database's predictions and regions of the
run still add up to what the file holds (counts and sums of their ids, the images', the run's key and creation time) and the
file is consistent in itself; anything else is ignored and the frame is read from the database. Predictions and regions are
only ever added to a run, never changed. Numpy arrays only, no pickled objects.
"""

from __future__ import annotations

import logging
from pathlib import Path
from typing import Any

import numpy as np
import numpy.typing as npt
import pandas as pd
from sqlalchemy import func, select
from sqlalchemy.orm import Session

from ..models import Prediction, RegionRow, SaliencyRun
from .label_snapshot import write_whole

log = logging.getLogger("heedmap")

FORMAT = "heedmap predictions snapshot 1"
_TEXT = ("path", "label", "split", "predicted")


def _name(run_id: int) -> str:
    return f"predictions-{int(run_id)}.npz"


def run_sums(s: Session, run_id: int) -> tuple[object, ...]:
    """What the file must match: the run's key and creation time; its predictions' count and sum of image ids (one
    prediction per image of a run); its regions' count and sum of ids."""
    run = s.get(SaliencyRun, run_id)
    if run is None:
        return ()
    preds = s.execute(select(func.count(Prediction.id), func.coalesce(func.sum(Prediction.image_id), 0))
                      .where(Prediction.run_id == run_id)).one()
    regions = s.execute(select(func.count(RegionRow.id), func.coalesce(func.sum(RegionRow.id), 0)).join(Prediction, RegionRow.prediction_id == Prediction.id)
                        .where(Prediction.run_id == run_id)).one()
    return (str(run.config_key), run.created_at.isoformat() if run.created_at else "", *(int(v) for v in (*preds, *regions)))


def _frame_sums(frame: pd.DataFrame, region_ids: npt.NDArray[np.int64]) -> tuple[int, ...]:
    return (len(frame), int(frame.index.to_numpy(dtype=np.int64).sum()), len(region_ids), int(region_ids.sum()))


def write(folder: Path, run_id: int, frame: pd.DataFrame, sums: tuple[object, ...]) -> bool:
    """Keep ``frame`` for run ``run_id``, as of the database's ``sums`` (:func:`run_sums`)."""
    regions = frame["regions"].tolist()
    sizes = np.fromiter((len(r) for r in regions), dtype=np.int64, count=len(regions))
    region_ids = np.fromiter((r for rs in regions for r in rs), dtype=np.int64, count=int(sizes.sum()))
    if tuple(sums[2:]) != _frame_sums(frame, region_ids):  # the frame was read before a change: not kept
        return False
    arrays: dict[str, Any] = {"sums": np.array(json_sums(sums), dtype=np.str_), "image_id": frame.index.to_numpy(dtype=np.int64),
              "confidence": frame["confidence"].to_numpy(dtype=np.float64),
              "sizes": sizes, "region_ids": region_ids,
              "shares": np.fromiter((m for ms in frame["mass_shares"].tolist() for m in ms), dtype=np.float64, count=int(sizes.sum()))}
    for c in _TEXT:
        arrays[c] = np.array(frame[c].astype(str).tolist(), dtype=np.str_)
    return write_whole(folder, _name(run_id), lambda fh: np.savez(fh, format=np.array(FORMAT), **arrays))


def json_sums(sums: tuple[object, ...]) -> list[str]:
    return [str(v) for v in sums]


def read(folder: Path, run_id: int, sums: tuple[object, ...]) -> pd.DataFrame | None:
    """The run's prediction frame from its file, if whole and matching ``sums`` (:func:`run_sums`); else None."""
    path = folder / _name(run_id)
    try:
        if not sums or not path.is_file():
            return None
        with open(path, "rb") as fh, np.load(fh, allow_pickle=False) as z:  # our handle: closed when the file is torn too
            if str(z["format"]) != FORMAT or z["sums"].tolist() != json_sums(sums):
                return None
            a = {k: z[k] for k in ("image_id", "confidence", "sizes", "region_ids", "shares", *_TEXT)}
    except Exception as exc:  # noqa: BLE001 - a cache: whatever is wrong with the file, the frame is read from the database
        log.info("ignored the kept predictions of run %s (%s); reading them from the database", run_id, exc)
        return None
    n = len(a["image_id"])
    if any(len(a[k]) != n for k in ("confidence", "sizes", *_TEXT)) or a["sizes"].min(initial=0) < 0:
        return None
    if int(a["sizes"].sum()) != len(a["region_ids"]) or len(a["shares"]) != len(a["region_ids"]):
        return None
    if a["image_id"].dtype.kind != "i" or a["region_ids"].dtype.kind != "i" or np.any(np.diff(a["image_id"]) <= 0):
        return None
    ends = np.cumsum(a["sizes"])
    starts = (ends - a["sizes"]).tolist()
    ids, shares = a["region_ids"].tolist(), a["shares"].tolist()
    frame = pd.DataFrame(
        {"image_id": a["image_id"].tolist(), **{c: a[c].tolist() for c in ("path", "label", "split", "predicted")},
         "confidence": a["confidence"].tolist(),
         "regions": [ids[b:e] for b, e in zip(starts, ends.tolist())], "mass_shares": [shares[b:e] for b, e in zip(starts, ends.tolist())]},
        columns=["image_id", "path", "label", "split", "predicted", "confidence", "regions", "mass_shares"],
    ).set_index("image_id")
    if _frame_sums(frame, a["region_ids"].astype(np.int64)) != tuple(sums[2:]):
        return None
    return frame
