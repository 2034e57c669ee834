"""Queries about saliency runs, images and regions; rows leave as plain data."""

from __future__ import annotations

import hashlib
import itertools
import operator
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import pandas as pd
from sqlalchemy import Select, func, select
from sqlalchemy.orm import Session

from .errors import NotFoundError
from .models import Campaign, CampaignRegion, ImageRow, Label, Prediction, RegionRow, SaliencyRun, SynonymRule, WithdrawnLabel


def plain_rows(s: Session, query: Select[*tuple[Any, ...]]) -> list[tuple[Any, ...]]:
    """``query``'s rows as plain tuples. On SQLite they come straight from the driver: no row objects and no result
    processing, several times faster at tens of thousands of rows. Only for columns the driver gives as they are
    (integers, floats, text, bytes): not dates or JSON; booleans come as 0 or 1."""
    conn = s.connection()
    raw = conn.connection.dbapi_connection if conn.dialect.name == "sqlite" else None
    if raw is None:
        return [tuple(r) for r in conn.execute(query)]
    compiled = query.compile(dialect=conn.dialect)
    params = compiled.params
    cur = raw.cursor()
    try:
        cur.execute(compiled.string, [params[k] for k in compiled.positiontup or ()])
        return list(cur.fetchall())
    finally:
        cur.close()


def latest_run_id(s: Session) -> int | None:
    return s.scalar(select(func.max(SaliencyRun.id)))


@dataclass(frozen=True)
class RegionFiles:
    crop: str  # a stored crop (projects made before crops were cut on demand), else ""
    outline: str  # a stored outline (older projects still), else ""
    saliency_map: str  # the image's map reference (``<file>.npy#<row>``, or one file per image in older projects)
    box: tuple[int, int, int, int]  # x0, y0, x1, y1 in map pixels
    image_path: str


def region_files(s: Session, region_id: int) -> RegionFiles:
    row = s.execute(
        select(RegionRow, Prediction.map_path, ImageRow.path).join(Prediction, Prediction.id == RegionRow.prediction_id)
        .join(ImageRow, ImageRow.id == Prediction.image_id).where(RegionRow.id == region_id)
    ).first()
    if row is None:
        raise NotFoundError(f"region {region_id} does not exist.")
    r, map_path, image_path = row
    return RegionFiles(r.crop_path, r.outline_path, map_path, (r.x0, r.y0, r.x1, r.y1), image_path)


def prediction_frame(s: Session, run_id: int) -> pd.DataFrame:
    """One row per predicted image: image_id, path, label, split, predicted, confidence, regions (ids) and their mass shares.

    Built a column at a time from plain rows (a dict per row cost most of a cold read at 20,000 images)."""
    rows = plain_rows(s,
        select(ImageRow.id, ImageRow.path, ImageRow.label, ImageRow.split, Prediction.predicted, Prediction.confidence, Prediction.id)
        .join(Prediction, Prediction.image_id == ImageRow.id)
        .where(Prediction.run_id == run_id)
        .order_by(ImageRow.id)
    )
    regions: dict[int, list[int]] = {}
    shares: dict[int, list[float]] = {}
    found = plain_rows(s, select(RegionRow.prediction_id, RegionRow.id, RegionRow.mass_share).join(Prediction)
                       .where(Prediction.run_id == run_id).order_by(RegionRow.prediction_id, RegionRow.id))
    for pid, group in itertools.groupby(found, key=operator.itemgetter(0)):  # each prediction's regions in id order
        part = list(group)
        regions[pid] = [r[1] for r in part]
        shares[pid] = [float(r[2]) for r in part]
    ids, paths, labels, splits, predicted, confidence, pids = (list(c) for c in zip(*rows)) if rows else ([] for _ in range(7))
    frame = pd.DataFrame(
        {"image_id": ids, "path": paths, "label": labels, "split": splits, "predicted": predicted, "confidence": confidence,
         "regions": [regions.get(pid, []) for pid in pids], "mass_shares": [shares.get(pid, []) for pid in pids]},
        columns=["image_id", "path", "label", "split", "predicted", "confidence", "regions", "mass_shares"],
        dtype=None if rows else object,  # a run with no predictions: object columns, as before
    )
    return frame.set_index("image_id")


def run_counts(s: Session, run_id: int) -> tuple[int, int]:
    """The run's predicted images and their regions, counted by the database."""
    images = s.scalar(select(func.count(Prediction.id)).where(Prediction.run_id == run_id)) or 0
    regions = s.scalar(select(func.count(RegionRow.id)).join(Prediction, RegionRow.prediction_id == Prediction.id).where(Prediction.run_id == run_id)) or 0
    return int(images), int(regions)


def labels_version(s: Session, campaign_id: int) -> tuple[object, ...]:
    """A key that changes whenever anything a campaign's results depend on changes: a label stored or undone,
    a synonym rule added or removed, a check item set, cleared or given another answer, the method, labels per region.

    Labels are only ever stored or undone (an undone one moves to the withdrawn table): storing adds one to
    the labels' count, undoing takes one away and adds one to the withdrawn count, so the pair never repeats
    (labels + 2 x withdrawn grows with every change). The highest id alone would not do: SQLite hands out a
    deleted highest id again, so an undo and a new label with another answer could give the same pair as
    before. Synonym rules and check answers are few; their content itself goes into the key (hashed).
    """
    n, last = s.execute(select(func.count(Label.id), func.max(Label.id)).where(Label.campaign_id == campaign_id)).one()
    wn, wlast = s.execute(select(func.count(WithdrawnLabel.id), func.max(WithdrawnLabel.id)).where(WithdrawnLabel.campaign_id == campaign_id)).one()
    rules = s.execute(select(SynonymRule.id, SynonymRule.kind, SynonymRule.source, SynonymRule.target, SynonymRule.targets)
                      .where(SynonymRule.campaign_id == campaign_id).order_by(SynonymRule.id)).all()
    checks = s.execute(select(CampaignRegion.region_id, CampaignRegion.check_answer)
                       .where(CampaignRegion.campaign_id == campaign_id, CampaignRegion.check_answer.is_not(None)).order_by(CampaignRegion.region_id)).all()
    c = s.get(Campaign, campaign_id)
    return (campaign_id, n, last, wn, wlast, _digest(rules), _digest(checks), c.method if c else None, c.labels_per_region if c else None)


def _digest(rows: Sequence[Sequence[object]]) -> str:
    """A short fingerprint of some rows' content (their repr: ids, words and JSON values as read)."""
    return hashlib.sha256(repr([tuple(r) for r in rows]).encode()).hexdigest()[:32]
