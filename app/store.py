"""Every query the app makes, as functions taking a Session; rows leave as plain data."""

from __future__ import annotations

from dataclasses import dataclass

import pandas as pd
from sqlalchemy import func, select
from sqlalchemy.exc import IntegrityError
from sqlalchemy.orm import Session

from analysis.concept_votes import estimate_concepts, presence_votes
from analysis.concepts import Judgment, concept_table
from analysis.reliability import Method
from analysis.rules import RuleTable, mine_rules

from .errors import ConflictError, NotFoundError
from .models import Annotation, Annotator, ImageRow, Prediction, RegionRow, SaliencyRun


@dataclass(frozen=True)
class RegionTask:
    region_id: int
    image_id: int
    predicted: str
    confidence: float
    labels_so_far: int


def latest_run_id(s: Session) -> int | None:
    return s.scalar(select(func.max(SaliencyRun.id)))


def annotator_id(s: Session, name: str) -> int:
    """Id of the annotator called ``name``, created on first use."""
    found = s.scalar(select(Annotator.id).where(Annotator.name == name))
    if found is not None:
        return found
    row = Annotator(name=name)
    s.add(row)
    s.flush()
    return row.id


def next_region(s: Session, *, annotator: int, run_id: int, per_region: int) -> RegionTask | None:
    """The least-labelled region of the run that this annotator has not labelled and that has fewer than ``per_region`` labels."""
    counts = select(Annotation.region_id, func.count().label("n")).group_by(Annotation.region_id).subquery()
    mine = select(Annotation.region_id).where(Annotation.annotator_id == annotator)
    n = func.coalesce(counts.c.n, 0)
    row = s.execute(
        select(RegionRow.id, Prediction.image_id, Prediction.predicted, Prediction.confidence, n)
        .join(Prediction, RegionRow.prediction_id == Prediction.id)
        .outerjoin(counts, counts.c.region_id == RegionRow.id)
        .where(Prediction.run_id == run_id, RegionRow.id.not_in(mine), n < per_region)
        .order_by(n, RegionRow.id)
        .limit(1)
    ).first()
    return None if row is None else RegionTask(row[0], row[1], row[2], float(row[3]), int(row[4]))


def region_progress(s: Session, *, annotator: int, run_id: int) -> tuple[int, int]:
    """(regions this annotator has labelled, regions in the run)."""
    total = s.scalar(select(func.count(RegionRow.id)).join(Prediction).where(Prediction.run_id == run_id)) or 0
    mine = s.scalar(select(func.count(Annotation.id)).where(Annotation.annotator_id == annotator)) or 0
    return int(mine), int(total)


def region_files(s: Session, region_id: int) -> tuple[str, str]:
    row = s.get(RegionRow, region_id)
    if row is None:
        raise NotFoundError(f"region {region_id} does not exist.")
    return row.crop_path, row.outline_path


def save_annotation(s: Session, *, region_id: int, annotator: int, entities: list[tuple[str, list[str]]], client_id: str, seconds_spent: float | None) -> bool:
    """Store one label; returns False when this client_id was stored before (a retry), storing nothing."""
    if s.scalar(select(Annotation.id).where(Annotation.client_id == client_id)) is not None:
        return False
    if s.get(RegionRow, region_id) is None:
        raise NotFoundError(f"region {region_id} does not exist.")
    if s.scalar(select(Annotation.id).where(Annotation.region_id == region_id, Annotation.annotator_id == annotator)) is not None:
        raise ConflictError(f"you have already labelled region {region_id}.")
    s.add(Annotation(client_id=client_id, region_id=region_id, annotator_id=annotator, entities=[[e, a] for e, a in entities], seconds_spent=seconds_spent))
    try:
        s.flush()
    except IntegrityError:
        raise ConflictError(f"region {region_id} was labelled twice at once; reload the page.") from None
    return True


def judgments(s: Session, run_id: int) -> list[Judgment]:
    rows = s.execute(
        select(Annotation.region_id, Annotator.name, Annotation.entities)
        .join(Annotator, Annotation.annotator_id == Annotator.id)
        .join(RegionRow, Annotation.region_id == RegionRow.id)
        .join(Prediction, RegionRow.prediction_id == Prediction.id)
        .where(Prediction.run_id == run_id)
    )
    return [Judgment(r, a, tuple((str(e[0]), tuple(str(x) for x in e[1])) for e in ents)) for r, a, ents in rows]


def prediction_frame(s: Session, run_id: int) -> pd.DataFrame:
    """One row per predicted image: image_id, path, label, split, predicted, confidence, regions (list of ids)."""
    rows = s.execute(
        select(ImageRow.id, ImageRow.path, ImageRow.label, ImageRow.split, Prediction.predicted, Prediction.confidence, Prediction.id)
        .join(Prediction, Prediction.image_id == ImageRow.id)
        .where(Prediction.run_id == run_id)
        .order_by(ImageRow.id)
    ).all()
    regions: dict[int, list[int]] = {}
    for rid, pid in s.execute(select(RegionRow.id, RegionRow.prediction_id).join(Prediction).where(Prediction.run_id == run_id)):
        regions.setdefault(pid, []).append(rid)
    frame = pd.DataFrame(
        [{"image_id": r[0], "path": r[1], "label": r[2], "split": r[3], "predicted": r[4], "confidence": r[5], "regions": regions.get(r[6], [])} for r in rows],
        columns=["image_id", "path", "label", "split", "predicted", "confidence", "regions"],
    )
    return frame.set_index("image_id")


@dataclass(frozen=True)
class Results:
    concepts: pd.DataFrame  # per image: true_class, predicted_class, confidence, split, then 'concept: <name>' booleans
    rules: RuleTable
    n_labelled_regions: int


def compute_results(s: Session, run_id: int, *, min_support: float = 0.02, max_len: int = 2, method: Method = "majority") -> Results:
    """Concepts per region (majority or Dawid-Skene), the image-by-concept table and per-predicted-class rules."""
    preds = prediction_frame(s, run_id)
    found = judgments(s, run_id)
    if not found:
        raise NotFoundError("no labels yet; label some regions first.")
    region_class = {r: cls for cls, rs in zip(preds["predicted"], preds["regions"]) for r in rs}
    region_concepts = estimate_concepts(presence_votes(found, region_class=region_class), method=method).region_concepts()
    labelled = set(region_concepts)
    # Only images whose regions all have labels count; an image with no region has no concept.
    complete = preds[preds["regions"].map(lambda rs: all(r in labelled for r in rs))]
    if complete.empty:
        raise NotFoundError("no image has all its regions labelled yet; label some regions first.")
    table = concept_table({int(i): list(r) for i, r in complete["regions"].items()}, region_concepts)
    rules = mine_rules(table, complete["predicted"], min_support=min_support, max_len=max_len)
    meta = complete[["label", "predicted", "confidence", "split"]].rename(columns={"label": "true_class", "predicted": "predicted_class"})
    return Results(concepts=meta.join(table.add_prefix("concept: ")), rules=rules, n_labelled_regions=len(labelled))
