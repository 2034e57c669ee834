"""Queries about saliency runs, images and regions; rows leave as plain data."""

from __future__ import annotations

from dataclasses import dataclass

import pandas as pd
from sqlalchemy import func, select
from sqlalchemy.orm import Session

from analysis.concept_votes import estimate_concepts, presence_votes
from analysis.concept_table import ConceptTable, build_concept_table
from analysis.concepts import judgment_concepts
from analysis.reliability import Method

from . import campaigns
from .campaigns import CampaignInfo
from .errors import NotFoundError
from .models import Campaign, CampaignRegion, ImageRow, Label, Prediction, RegionRow, SaliencyRun, SynonymRule


def latest_run_id(s: Session) -> int | None:
    return s.scalar(select(func.max(SaliencyRun.id)))


@dataclass(frozen=True)
class RegionFiles:
    crop: str
    outline: str
    saliency_map: str  # the image's map (.npy), model-input pixels
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
    """One row per predicted image: image_id, path, label, split, predicted, confidence, regions (ids) and their mass shares."""
    rows = s.execute(
        select(ImageRow.id, ImageRow.path, ImageRow.label, ImageRow.split, Prediction.predicted, Prediction.confidence, Prediction.id)
        .join(Prediction, Prediction.image_id == ImageRow.id)
        .where(Prediction.run_id == run_id)
        .order_by(ImageRow.id)
    ).all()
    regions: dict[int, list[int]] = {}
    shares: dict[int, list[float]] = {}
    for rid, pid, share in s.execute(select(RegionRow.id, RegionRow.prediction_id, RegionRow.mass_share).join(Prediction).where(Prediction.run_id == run_id).order_by(RegionRow.id)):
        regions.setdefault(pid, []).append(rid)
        shares.setdefault(pid, []).append(float(share))
    frame = pd.DataFrame(
        [{"image_id": r[0], "path": r[1], "label": r[2], "split": r[3], "predicted": r[4], "confidence": r[5],
          "regions": regions.get(r[6], []), "mass_shares": shares.get(r[6], [])} for r in rows],
        columns=["image_id", "path", "label", "split", "predicted", "confidence", "regions", "mass_shares"],
    )
    return frame.set_index("image_id")


@dataclass(frozen=True)
class Results:
    """What a campaign's labels add up to: the concept table (with how it was made)."""

    campaign: CampaignInfo
    table: ConceptTable
    n_labelled_regions: int
    model_sha256: str = ""  # of the run's model: interventions are kept per model version

    @property
    def method(self) -> str:
        return self.table.method


def labels_version(s: Session, campaign_id: int) -> tuple[object, ...]:
    """Changes whenever anything the results depend on changes (labels, synonym rules, check items, method)."""
    n, last = s.execute(select(func.count(Label.id), func.max(Label.id)).where(Label.campaign_id == campaign_id)).one()
    rn, rlast = s.execute(select(func.count(SynonymRule.id), func.max(SynonymRule.id)).where(SynonymRule.campaign_id == campaign_id)).one()
    c = s.get(Campaign, campaign_id)
    checks = s.scalar(select(func.count(CampaignRegion.check_answer)).where(CampaignRegion.campaign_id == campaign_id))
    return (campaign_id, n, last, rn, rlast, checks, c.method if c else None, c.labels_per_region if c else None)


def compute_results(s: Session, campaign: CampaignInfo, *, method: Method | None = None, threshold: float = 0.5) -> Results:
    """Concepts per region (the campaign's aggregation method) and the image-by-concept table.

    Images of the campaign's classes count once all their campaign regions have labels (an image
    with no region counts with no concept).
    """
    found = campaigns.judgments(s, campaign.id)
    if not found:
        raise NotFoundError(f"campaign {campaign.name!r} has no labels yet; label some regions first.")
    method = method or campaign.method  # type: ignore[assignment]
    preds = prediction_frame(s, campaign.run_id)
    rules, _ = campaigns.synonym_rules(s, campaign.id)
    region_class = campaigns.region_classes(s, campaign.id)
    known = {r: judgment_concepts(j, rules=rules, cls=region_class.get(r)) for r, j in campaigns.check_answers(s, campaign.id).items()}
    votes = presence_votes(found, rules=rules, region_class=region_class, known=known)
    region_concepts = estimate_concepts(votes, method=method, threshold=threshold).region_concepts()  # type: ignore[arg-type]
    labelled = set(region_concepts)
    if campaign.classes:
        preds = preds[preds["predicted"].isin(campaign.classes)].copy()
    mass = {r: m for rs, ms in zip(preds["regions"], preds["mass_shares"]) for r, m in zip(rs, ms)}
    preds["regions"] = preds["regions"].map(lambda rs: [r for r in rs if r in region_class])
    complete = preds[preds["regions"].map(lambda rs: all(r in labelled for r in rs))]
    if complete.empty:
        raise NotFoundError("no image has all its regions labelled yet; label some more regions first.")
    meta = complete[["label", "predicted", "confidence", "split"]].rename(columns={"label": "true_class", "predicted": "predicted_class"})
    table = build_concept_table(meta, {int(i): list(r) for i, r in complete["regions"].items()}, mass, region_concepts, method=str(method), threshold=threshold)
    run = s.get(SaliencyRun, campaign.run_id)
    return Results(campaign, table, len(labelled), str((run.provenance or {}).get("model_sha256", "")) if run else "")
