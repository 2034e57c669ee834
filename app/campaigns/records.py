"""A campaign's own record: create, read, change and list campaigns."""

from __future__ import annotations

from dataclasses import dataclass
from datetime import datetime

from sqlalchemy import insert, select
from sqlalchemy.orm import Session

from analysis.reliability import METHODS

from ..errors import ConflictError, InvalidRequestError, NotFoundError
from ..models import (
    Campaign,
    CampaignPlan,
    CampaignRegion,
    Prediction,
    RegionRow,
    SaliencyRun,
    utcnow,
)
from .plans import SETTLE_WINDOW, check_plan_options, draw_regions
from .redundancy import refresh_quotas

Entities = list[tuple[str, list[str]]]


@dataclass(frozen=True)
class CampaignInfo:
    id: int
    name: str
    run_id: int
    classes: tuple[str, ...]
    labels_per_region: int
    instructions: str
    lease_seconds: int
    check_every: int
    method: str
    expectations: str
    created_at: datetime
    closed_at: datetime | None
    n_regions: int
    n_checks: int


def _info(s: Session, c: Campaign) -> CampaignInfo:
    return CampaignInfo(
        c.id, c.name, c.run_id, tuple(c.classes or ()), c.labels_per_region, c.instructions, c.lease_seconds, c.check_every,
        c.method, c.expectations, c.created_at, c.closed_at, c.n_regions, c.n_checks,
    )


def get_campaign(s: Session, campaign_id: int) -> CampaignInfo:
    c = s.get(Campaign, campaign_id)
    if c is None:
        raise NotFoundError(f"campaign {campaign_id} does not exist.")
    return _info(s, c)


def list_campaigns(s: Session) -> list[CampaignInfo]:
    return [_info(s, c) for c in s.scalars(select(Campaign).order_by(Campaign.id))]


def run_classes(s: Session, run_id: int) -> list[str]:
    """Predicted classes that occur in a run, sorted."""
    return sorted(s.scalars(select(Prediction.predicted).where(Prediction.run_id == run_id).distinct()))


def _check_settings(labels_per_region: int, lease_seconds: int, check_every: int, method: str) -> None:
    if not 1 <= labels_per_region <= 50:
        raise InvalidRequestError(f"labels per region must be 1-50; got {labels_per_region}.")
    if not 30 <= lease_seconds <= 86_400:
        raise InvalidRequestError(f"a lease must last 30 seconds to a day; got {lease_seconds} seconds.")
    if not 2 <= check_every <= 1000:
        raise InvalidRequestError(f"check items can come one in every 2 to 1000 tasks; got {check_every}.")
    if method not in METHODS:
        raise InvalidRequestError(f"the aggregation method must be one of {', '.join(METHODS)}; got {method!r}.")


def create_campaign(
    s: Session,
    *,
    name: str,
    run_id: int,
    classes: list[str] | None = None,
    labels_per_region: int = 3,
    instructions: str = "",
    lease_seconds: int = 600,
    check_every: int = 10,
    method: str = "majority",
    budget: int | None = None,
    regions_per_class: int | None = None,
    adaptive: bool = False,
    confident_at: float = 0.8,
    seed: int = 0,
    settle_window: int = SETTLE_WINDOW,
) -> int:
    """A campaign over the regions of ``run_id`` whose image was predicted as one of ``classes`` (all if empty).

    With a judgment ``budget`` or ``regions_per_class``, a stratified sample of the images is labelled
    instead of all (see campaigns.plans); with ``adaptive``, each region gets 2 labels and up to
    ``labels_per_region`` only where the first two disagree (see campaigns.redundancy).
    """
    name = " ".join(name.split())
    if not 1 <= len(name) <= 80:
        raise InvalidRequestError("a campaign needs a name of 1-80 characters.")
    if s.scalar(select(Campaign.id).where(Campaign.name == name)) is not None:
        raise ConflictError(f"a campaign called {name!r} exists already; choose another name.")
    if s.get(SaliencyRun, run_id) is None:
        raise NotFoundError(f"saliency run {run_id} does not exist.")
    _check_settings(labels_per_region, lease_seconds, check_every, method)
    check_plan_options(budget=budget, regions_per_class=regions_per_class, labels_per_region=labels_per_region, adaptive=adaptive,
                       confident_at=confident_at, settle_window=settle_window)
    available = run_classes(s, run_id)
    classes = sorted(set(classes or []))
    unknown = [c for c in classes if c not in available]
    if unknown:
        raise InvalidRequestError(f"no image of run {run_id} was predicted as {unknown}; the classes there are {available}.")
    if len(instructions) > 20_000:
        raise InvalidRequestError("instructions are limited to 20,000 characters.")
    c = Campaign(name=name, run_id=run_id, classes=classes, labels_per_region=labels_per_region, instructions=instructions,
                 lease_seconds=lease_seconds, check_every=check_every, method=method)
    s.add(c)
    s.flush()
    sampled = budget is not None or regions_per_class is not None
    if sampled or adaptive or settle_window != SETTLE_WINDOW:
        s.add(CampaignPlan(campaign_id=c.id, sampled=sampled, budget=budget, regions_per_class=regions_per_class, confident_at=confident_at, seed=seed,
                           adaptive=adaptive, base_labels=2, settle_window=settle_window, closed_classes=[]))
    if sampled:
        ids = draw_regions(s, campaign_id=c.id, run_id=run_id, classes=classes, budget=budget, regions_per_class=regions_per_class,
                           labels_per_region=labels_per_region, adaptive=adaptive, confident_at=confident_at, seed=seed)
    else:
        regions = select(RegionRow.id).join(Prediction, Prediction.id == RegionRow.prediction_id).where(Prediction.run_id == run_id)
        if classes:
            regions = regions.where(Prediction.predicted.in_(classes))
        ids = list(s.scalars(regions.order_by(RegionRow.id)))
    if not ids:
        raise InvalidRequestError(f"run {run_id} has no region in the chosen classes; nothing to label.")
    quota = 2 if adaptive else None
    s.execute(insert(CampaignRegion), [{"campaign_id": c.id, "region_id": r, "n_labels": 0, "quota": quota} for r in ids])
    c.n_regions = len(ids)
    return c.id


def update_campaign(s: Session, campaign_id: int, *, instructions: str | None = None, labels_per_region: int | None = None,
                    method: str | None = None, expectations: str | None = None, closed: bool | None = None) -> None:
    c = s.get(Campaign, campaign_id)
    if c is None:
        raise NotFoundError(f"campaign {campaign_id} does not exist.")
    # Compare with None, not truth: 0 and "" are values to refuse, not "unchanged".
    _check_settings(c.labels_per_region if labels_per_region is None else labels_per_region, c.lease_seconds, c.check_every,
                    c.method if method is None else method)
    if instructions is not None and len(instructions) > 20_000:
        raise InvalidRequestError("instructions are limited to 20,000 characters.")
    if instructions is not None:
        c.instructions = instructions
    if labels_per_region is not None and labels_per_region != c.labels_per_region:
        plan = s.get(CampaignPlan, campaign_id)
        if plan is not None and plan.adaptive and labels_per_region < 3:
            raise InvalidRequestError(f"an adaptive campaign asks 2 people and more on disagreement: labels per region must be 3 or more; got {labels_per_region}.")
        c.labels_per_region = labels_per_region
        if plan is not None:
            s.flush()
            refresh_quotas(s, campaign_id)
    if method is not None:
        c.method = method
    if expectations is not None:
        c.expectations = expectations
    if closed is not None:
        c.closed_at = utcnow() if closed else None
