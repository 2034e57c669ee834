"""How far a campaign is: per person, per annotator (with check-item scores) and per class."""

from __future__ import annotations

import statistics
import threading
from dataclasses import dataclass

from sqlalchemy import bindparam, case, func, select
from sqlalchemy.orm import Session

from analysis.concepts import Judgment, entity_overlap

from ..models import CampaignRegion, Label, Person, Prediction, RegionRow, Skip, WithdrawnLabel
from .checks import check_answers
from .judgments import entities_of
from .records import CampaignInfo
from .synonym_rules import synonym_rules

_P = bindparam
_PERSON_LABELS = (Label.campaign_id == _P("campaign"), Label.person_id == _P("person"))
_PERSON_LAST = select(func.max(Label.id)).where(*_PERSON_LABELS)
_PERSON_SINCE = select(func.count()).select_from(Label).where(*_PERSON_LABELS, Label.id > _P("since"))
_PERSON_ALL = select(func.count()).select_from(Label).where(*_PERSON_LABELS)
_LAST_WITHDRAWN = select(func.max(WithdrawnLabel.id))


@dataclass(frozen=True)
class _Counted:
    last_label: int
    last_withdrawn: int | None
    n: int


_counted: dict[tuple[str, int, int], _Counted] = {}
_counted_lock = threading.Lock()


def labels_done(s: Session, campaign_id: int, person_id: int) -> int:
    """How many labels the person has in the campaign, at a cost that does not grow with that number.

    Counting a person's labels walks all of them in the (campaign, person) index; asked on every task,
    that grows as they work. This process keeps the last count with the person's highest label id and
    the project's highest withdrawn-label id, both one index probe to read again. Labels are only
    stored or undone: a new label raises the person's highest id (only the labels above the old one are
    counted); an undo adds a withdrawn row (counted afresh). Each process checks against the database,
    so several workers agree.
    """
    conn = s.connection()
    who = {"campaign": campaign_id, "person": person_id}
    last = conn.scalar(_PERSON_LAST, who)
    if last is None:
        return 0
    withdrawn = conn.scalar(_LAST_WITHDRAWN)
    key = (str(conn.engine.url), campaign_id, person_id)
    seen = _counted.get(key)
    if seen is not None and seen.last_withdrawn == withdrawn and seen.last_label <= last:
        n = seen.n + (int(conn.scalar(_PERSON_SINCE, {**who, "since": seen.last_label}) or 0) if last > seen.last_label else 0)
    else:
        n = int(conn.scalar(_PERSON_ALL, who) or 0)
    with _counted_lock:
        if len(_counted) > 100_000:
            _counted.clear()
        _counted[key] = _Counted(int(last), withdrawn, n)
    return n


def person_progress(s: Session, campaign: CampaignInfo, person_id: int) -> tuple[int, int]:
    """(labels this person gave in the campaign, regions in the campaign)."""
    return labels_done(s, campaign.id, person_id), campaign.n_regions


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


def _median_seconds(s: Session, campaign_id: int) -> dict[str, float]:
    """Each person's median seconds per label, in the database (the middle one or two of their ranked times, averaged)."""
    ranked = (select(Label.person_id, Label.seconds_spent.label("v"),
                     func.row_number().over(partition_by=Label.person_id, order_by=Label.seconds_spent).label("k"),
                     func.count().over(partition_by=Label.person_id).label("n"))
              .where(Label.campaign_id == campaign_id, Label.seconds_spent.is_not(None)).subquery())
    middle = (2 * ranked.c.k >= ranked.c.n) & (2 * ranked.c.k <= ranked.c.n + 2)  # k = (n+1)//2 or (n+2)//2
    return {name: float(v) for name, v in s.execute(select(Person.name, func.avg(ranked.c.v)).join(Person, Person.id == ranked.c.person_id)
                                                     .where(middle).group_by(Person.name))}


def campaign_progress(s: Session, campaign: CampaignInfo) -> tuple[list[AnnotatorProgress], list[ClassProgress]]:
    """Per annotator (labels, skips, time, check-item score) and per predicted class (coverage), counted in the database."""
    answers = check_answers(s, campaign.id)
    # Grouped by person id along the (campaign, person) index, then named: grouping by the joined name sorts every label.
    by_person = s.execute(select(Label.person_id, func.count(), func.sum(case((Label.unsure, 1), else_=0)))
                          .where(Label.campaign_id == campaign.id).group_by(Label.person_id)).all()
    name_of = dict(s.execute(select(Person.id, Person.name).where(Person.id.in_([p for p, _, _ in by_person]))).all()) if by_person else {}
    counts = {name_of[p]: (int(n), int(unsure or 0)) for p, n, unsure in by_person}
    median = _median_seconds(s, campaign.id)
    checks: dict[str, list[float]] = {}
    if answers:  # the stored answers are decoded only for labels of check items
        rules, _ = synonym_rules(s, campaign.id)
        classes = dict(s.execute(select(RegionRow.id, Prediction.predicted).join(Prediction, Prediction.id == RegionRow.prediction_id)
                                 .where(RegionRow.id.in_(list(answers)))).all())
        for name, region, ents in s.execute(select(Person.name, Label.region_id, Label.entities).join(Person, Person.id == Label.person_id)
                                            .where(Label.campaign_id == campaign.id, Label.region_id.in_(list(answers)))):
            given = Judgment(region, name, entities_of(ents))
            checks.setdefault(name, []).append(entity_overlap(answers[region], given, rules=rules, cls=classes.get(region)))
    skips = dict(s.execute(select(Person.name, func.count()).join(Skip, Skip.person_id == Person.id).where(Skip.campaign_id == campaign.id).group_by(Person.name)).all())
    people = sorted(set(counts) | set(skips))
    annotators = [
        AnnotatorProgress(
            n, counts.get(n, (0, 0))[0], int(skips.get(n, 0)), counts.get(n, (0, 0))[1],
            median.get(n),
            len(checks.get(n, [])),
            statistics.fmean(checks[n]) if checks.get(n) else None,
        )
        for n in people
    ]
    by_class = s.execute(
        select(Prediction.predicted, func.count(), func.sum(CampaignRegion.n_labels),
               func.sum(case((CampaignRegion.n_labels >= func.coalesce(CampaignRegion.quota, campaign.labels_per_region), 1), else_=0)))
        .join(RegionRow, RegionRow.id == CampaignRegion.region_id).join(Prediction, Prediction.id == RegionRow.prediction_id)
        .where(CampaignRegion.campaign_id == campaign.id, CampaignRegion.check_answer.is_(None)).group_by(Prediction.predicted)
    ).all()
    return annotators, [ClassProgress(c, int(n), int(lab or 0), int(done or 0)) for c, n, lab, done in by_class]
