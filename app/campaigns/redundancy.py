"""How many labels each region wants: two people, a third only where they disagree; none once its class is closed.

A region's ``quota`` (campaign_regions) is what assignment and labelling compare its label count
with; NULL means the campaign's labels_per_region. In an adaptive campaign every region starts at
the plan's base (2); when its first two usable labels name different entities (after
normalisation and the campaign's synonym rules), or one of them is marked not sure, it wants the
campaign's labels_per_region. The quota is refreshed in the same transaction as the label stored
or undone, and for the whole campaign when a synonym rule or the labels per region change.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

from sqlalchemy import case, delete, func, select, update
from sqlalchemy.orm import Session

from analysis.concepts import Judgment, judgment_families
from analysis.synonyms import SynonymRules

from ..errors import InvalidRequestError, NotFoundError
from ..models import Campaign, CampaignPlan, CampaignRegion, Label, Lease, Person, Prediction, RegionRow
from .judgments import entities_of
from .plans import SETTLE_WINDOW
from .synonym_rules import synonym_rules


def first_disagree(labels: Sequence[Judgment], *, base: int, rules: SynonymRules | None, cls: str | None) -> bool:
    """Whether the first ``base`` labels of a region disagree: a different set of entities named, or one not sure."""
    first = list(labels[:base])
    if len(first) < base:
        return False
    if any(j.unsure for j in first):
        return True
    named = [frozenset(judgment_families(j, rules=rules, cls=cls).values()) for j in first]
    return len(set(named)) > 1


def wanted(n_labels: int, disagree: bool, *, base: int, most: int) -> int:
    """Labels a region of an adaptive campaign wants: the base, or ``most`` once its first ``base`` disagree."""
    return most if n_labels >= base and disagree else base


def _plan(s: Session, campaign_id: int) -> CampaignPlan | None:
    return s.get(CampaignPlan, campaign_id)


def _region_quota(s: Session, plan: CampaignPlan, campaign: Campaign, region_id: int, cls: str, rules: SynonymRules | None) -> int | None:
    if cls in (plan.closed_classes or []):
        return 0
    if not plan.adaptive:
        return None
    rows = s.execute(select(Label.entities, Label.unsure, Person.name).join(Person, Person.id == Label.person_id)
                     .where(Label.campaign_id == campaign.id, Label.region_id == region_id).order_by(Label.id)).all()
    labels = [Judgment(region_id, name, entities_of(ents), bool(unsure)) for ents, unsure, name in rows]
    return wanted(len(labels), first_disagree(labels, base=plan.base_labels, rules=rules, cls=cls), base=plan.base_labels,
                  most=campaign.labels_per_region)


def refresh_quota(s: Session, *, campaign_id: int, region_id: int) -> None:
    """Set one region's quota from its labels now (after a label stored or undone in a campaign with a plan)."""
    plan = _plan(s, campaign_id)
    campaign = s.get(Campaign, campaign_id)
    if plan is None or campaign is None:
        return
    cls = s.scalar(select(Prediction.predicted).join(RegionRow, RegionRow.prediction_id == Prediction.id).where(RegionRow.id == region_id)) or ""
    rules = synonym_rules(s, campaign_id)[0] if plan.adaptive else None
    quota = _region_quota(s, plan, campaign, region_id, cls, rules)
    s.execute(update(CampaignRegion).where(CampaignRegion.campaign_id == campaign_id, CampaignRegion.region_id == region_id).values(quota=quota))


def refresh_quotas(s: Session, campaign_id: int, *, classes: Sequence[str] | None = None) -> None:
    """Set every region's quota (of ``classes`` only, when given) from the labels, rules and closed classes now."""
    plan = _plan(s, campaign_id)
    campaign = s.get(Campaign, campaign_id)
    if campaign is None:
        return
    q = (select(CampaignRegion.region_id, Prediction.predicted).join(RegionRow, RegionRow.id == CampaignRegion.region_id)
         .join(Prediction, Prediction.id == RegionRow.prediction_id).where(CampaignRegion.campaign_id == campaign_id))
    if classes is not None:
        q = q.where(Prediction.predicted.in_(list(classes)))
    regions = s.execute(q).all()
    if plan is None:
        s.execute(update(CampaignRegion).where(CampaignRegion.campaign_id == campaign_id).values(quota=None))
        return
    rules = synonym_rules(s, campaign_id)[0] if plan.adaptive else None
    by_region: dict[int, list[Judgment]] = {}
    for region, ents, unsure, name in s.execute(select(Label.region_id, Label.entities, Label.unsure, Person.name).join(Person, Person.id == Label.person_id)
                                                .where(Label.campaign_id == campaign_id).order_by(Label.id)):
        by_region.setdefault(region, []).append(Judgment(region, name, entities_of(ents), bool(unsure)))
    closed = set(plan.closed_classes or [])
    values: dict[int | None, list[int]] = {}
    for region, cls in regions:
        if cls in closed:
            quota: int | None = 0
        elif plan.adaptive:
            labels = by_region.get(region, [])
            quota = wanted(len(labels), first_disagree(labels, base=plan.base_labels, rules=rules, cls=cls), base=plan.base_labels,
                           most=campaign.labels_per_region)
        else:
            quota = None
        values.setdefault(quota, []).append(region)
    for quota, ids in values.items():
        for start in range(0, len(ids), 500):
            s.execute(update(CampaignRegion).where(CampaignRegion.campaign_id == campaign_id, CampaignRegion.region_id.in_(ids[start:start + 500]))
                      .values(quota=quota))


def close_class(s: Session, *, campaign_id: int, cls: str, closed: bool = True) -> None:
    """Close a predicted class early (its regions leave the queue, held ones are let go) or open it again."""
    campaign = s.get(Campaign, campaign_id)
    if campaign is None:
        raise NotFoundError(f"campaign {campaign_id} does not exist.")
    present = set(s.scalars(select(Prediction.predicted).join(RegionRow, RegionRow.prediction_id == Prediction.id)
                            .join(CampaignRegion, CampaignRegion.region_id == RegionRow.id).where(CampaignRegion.campaign_id == campaign_id).distinct()))
    if cls not in present:
        raise InvalidRequestError(f"campaign {campaign.name!r} has no region of class {cls!r}; its classes are {sorted(present)}.")
    plan = _plan(s, campaign_id)
    if plan is None:
        plan = CampaignPlan(campaign_id=campaign_id, sampled=False, adaptive=False, base_labels=2, settle_window=SETTLE_WINDOW, confident_at=0.8, seed=0,
                            closed_classes=[])
        s.add(plan)
    now = set(plan.closed_classes or [])
    plan.closed_classes = sorted(now | {cls}) if closed else sorted(now - {cls})
    s.flush()
    refresh_quotas(s, campaign_id, classes=[cls])
    if closed:
        ids = select(RegionRow.id).join(Prediction, Prediction.id == RegionRow.prediction_id).where(Prediction.predicted == cls)
        s.execute(delete(Lease).where(Lease.campaign_id == campaign_id, Lease.region_id.in_(ids)))


@dataclass(frozen=True)
class RedundancyCounts:
    """An adaptive campaign's extra labels: regions that got their extra people, those still waiting for them."""

    base: int
    most: int
    decided: int  # regions with their first ``base`` labels
    extra_wanted: int  # of those, regions whose first labels disagree
    extra_done: int  # ... and that have all their labels
    extra_waiting: int  # ... still waiting for the extra labels


def redundancy_counts(s: Session, campaign_id: int) -> RedundancyCounts | None:
    """How the adaptive rule has played out so far; None when the campaign is not adaptive."""
    plan = _plan(s, campaign_id)
    campaign = s.get(Campaign, campaign_id)
    if plan is None or campaign is None or not plan.adaptive:
        return None
    k, base = campaign.labels_per_region, plan.base_labels
    extra = CampaignRegion.quota > base
    row = s.execute(
        select(func.sum(case((CampaignRegion.n_labels >= base, 1), else_=0)), func.sum(case((extra, 1), else_=0)),
               func.sum(case((extra & (CampaignRegion.n_labels >= CampaignRegion.quota), 1), else_=0)),
               func.sum(case((extra & (CampaignRegion.n_labels < CampaignRegion.quota), 1), else_=0)))
        .where(CampaignRegion.campaign_id == campaign_id, CampaignRegion.check_answer.is_(None), CampaignRegion.example_answer.is_(None))
    ).one()
    return RedundancyCounts(base, k, *(int(v or 0) for v in row))
