"""How far a campaign is: per person, per annotator (with check-item scores) and per class."""

from __future__ import annotations

import statistics
from dataclasses import dataclass

from sqlalchemy import bindparam, case, func, select
from sqlalchemy.orm import Session

from analysis.concepts import Judgment, entity_overlap

from ..models import CampaignRegion, Label, Person, Prediction, RegionRow, Skip
from .checks import check_answers
from .judgments import entities_of, region_classes
from .records import CampaignInfo
from .synonym_rules import synonym_rules

_DONE = select(func.count()).select_from(Label).where(Label.campaign_id == bindparam("campaign"), Label.person_id == bindparam("person"))


def person_progress(s: Session, campaign: CampaignInfo, person_id: int) -> tuple[int, int]:
    """(labels this person gave in the campaign, regions in the campaign)."""
    done = s.connection().scalar(_DONE, {"campaign": campaign.id, "person": person_id}) or 0  # on every next task: Core, prebuilt
    return int(done), campaign.n_regions


def skips_version(s: Session, campaign_id: int) -> tuple[int, int | None]:
    """Changes with every skip (skips are only ever added): with store.labels_version, the key of cached progress."""
    n, last = s.execute(select(func.count(Skip.id), func.max(Skip.id)).where(Skip.campaign_id == campaign_id)).one()
    return int(n), last


@dataclass(frozen=True)
class AnnotatorProgress:
    name: str
    labels: int
    skips: int
    unsure: int
    median_seconds: float | None
    check_items: int
    check_score: float | None  # mean entity overlap with the known answers


@dataclass(frozen=True)
class ClassProgress:
    cls: str
    regions: int
    labels: int
    complete: int  # regions with all their labels


def campaign_progress(s: Session, campaign: CampaignInfo) -> tuple[list[AnnotatorProgress], list[ClassProgress]]:
    """Per annotator (labels, skips, time, check-item score) and per predicted class (coverage)."""
    rules, _ = synonym_rules(s, campaign.id)
    answers = check_answers(s, campaign.id)
    classes = region_classes(s, campaign.id)
    per: dict[str, dict[str, list[float]]] = {}
    for name, region, ents, unsure, seconds in s.execute(
        select(Person.name, Label.region_id, Label.entities, Label.unsure, Label.seconds_spent).join(Person, Person.id == Label.person_id)
        .where(Label.campaign_id == campaign.id)
    ):
        p = per.setdefault(name, {"labels": [], "unsure": [], "seconds": [], "checks": []})
        p["labels"].append(1)
        p["unsure"].append(float(bool(unsure)))
        if seconds is not None:
            p["seconds"].append(float(seconds))
        if region in answers:
            given = Judgment(region, name, entities_of(ents))
            p["checks"].append(entity_overlap(answers[region], given, rules=rules, cls=classes.get(region)))
    skips = dict(s.execute(select(Person.name, func.count()).join(Skip, Skip.person_id == Person.id).where(Skip.campaign_id == campaign.id).group_by(Person.name)).all())
    people = sorted(set(per) | set(skips))
    annotators = [
        AnnotatorProgress(
            n, len(per.get(n, {}).get("labels", [])), int(skips.get(n, 0)), int(sum(per.get(n, {}).get("unsure", []))),
            statistics.median(per[n]["seconds"]) if n in per and per[n]["seconds"] else None,
            len(per.get(n, {}).get("checks", [])),
            statistics.fmean(per[n]["checks"]) if n in per and per[n]["checks"] else None,
        )
        for n in people
    ]
    by_class = s.execute(
        select(Prediction.predicted, func.count(), func.sum(CampaignRegion.n_labels),
               func.sum(case((CampaignRegion.n_labels >= campaign.labels_per_region, 1), else_=0)))
        .join(RegionRow, RegionRow.id == CampaignRegion.region_id).join(Prediction, Prediction.id == RegionRow.prediction_id)
        .where(CampaignRegion.campaign_id == campaign.id, CampaignRegion.check_answer.is_(None)).group_by(Prediction.predicted)
    ).all()
    return annotators, [ClassProgress(c, int(n), int(lab or 0), int(done or 0)) for c, n, lab, done in by_class]
