"""A campaign's plan: which images a budget buys (a stratified sample), and how it is read back for the estimates."""

from __future__ import annotations

import math
from dataclasses import dataclass
from datetime import datetime

from sqlalchemy import and_, func, insert, select
from sqlalchemy.orm import Session

from analysis.errors import InvalidInputError
from analysis.sampling import Stratum, allocate, draw_sample, regions_per_class_for_budget, stratum_kinds

from ..errors import InvalidRequestError
from ..models import CampaignPlan, CampaignRegion, CampaignSample, CampaignStratum, ImageRow, Lease, Prediction, RegionRow

# Share of regions assumed to need the extra labels in an adaptive campaign when sizing a sample for a budget;
# the admin page shows the judgments actually spent.
ASSUMED_DISAGREEMENT = 0.5
MAX_BUDGET = 10_000_000
SETTLE_WINDOW = 60  # judgments a class's top rules must hold still by default


@dataclass(frozen=True)
class PlanInfo:
    """What the admin chose: a budget or regions per class, the threshold of a confident prediction, adaptive labels."""

    sampled: bool
    budget: int | None
    regions_per_class: int | None
    confident_at: float
    seed: int
    adaptive: bool
    base_labels: int
    settle_window: int
    closed_classes: tuple[str, ...]


@dataclass(frozen=True)
class StratumInfo:
    name: str
    cls: str
    kind: str
    images: int
    regions: int
    drawn: int


def plan_of(s: Session, campaign_id: int) -> PlanInfo | None:
    """The campaign's plan, or None for a campaign that labels every region k times."""
    p = s.get(CampaignPlan, campaign_id)
    if p is None:
        return None
    return PlanInfo(bool(p.sampled), p.budget, p.regions_per_class, float(p.confident_at), int(p.seed), bool(p.adaptive), int(p.base_labels),
                    int(p.settle_window), tuple(p.closed_classes or ()))


def strata_of(s: Session, campaign_id: int) -> list[StratumInfo]:
    rows = s.scalars(select(CampaignStratum).where(CampaignStratum.campaign_id == campaign_id).order_by(CampaignStratum.cls, CampaignStratum.kind))
    return [StratumInfo(r.name, r.cls, r.kind, r.images, r.regions, r.drawn) for r in rows]


def sample_of(s: Session, campaign_id: int) -> tuple[dict[int, str], dict[str, int]] | None:
    """A sampled campaign's design: each drawn image's stratum, and each stratum's images in the run; None if not sampled."""
    p = s.get(CampaignPlan, campaign_id)
    if p is None or not p.sampled:
        return None
    population = dict(s.execute(select(CampaignStratum.name, CampaignStratum.images).where(CampaignStratum.campaign_id == campaign_id)).all())
    drawn = dict(s.execute(select(CampaignSample.image_id, CampaignStratum.name).join(CampaignStratum, CampaignStratum.id == CampaignSample.stratum_id)
                           .where(CampaignSample.campaign_id == campaign_id)).all())
    return drawn, population


_REGULAR = (CampaignRegion.check_answer.is_(None), CampaignRegion.example_answer.is_(None))


def judgments_given(s: Session, campaign_id: int) -> int:
    """Labels given to the campaign's regions to label (check items and examples are not part of a budget)."""
    return int(s.scalar(select(func.coalesce(func.sum(CampaignRegion.n_labels), 0)).where(CampaignRegion.campaign_id == campaign_id, *_REGULAR)) or 0)


def budget_left(s: Session, *, campaign_id: int, person_id: int, now: datetime) -> int | None:
    """Judgments a campaign with a budget may still hand out to ``person_id``: the budget less the labels given and the
    places other people hold now (their live leases); None for a campaign without a budget.

    A place handed out within the budget stays honoured: the person holding it can save their label.
    """
    budget = s.scalar(select(CampaignPlan.budget).where(CampaignPlan.campaign_id == campaign_id))
    if budget is None:
        return None
    # On PostgreSQL the plan's row stays locked until commit, so two requests cannot both hand out the last judgment
    # (SQLite's BEGIN IMMEDIATE holds the one write lock already; SQLAlchemy leaves the clause out there).
    s.execute(select(CampaignPlan.campaign_id).where(CampaignPlan.campaign_id == campaign_id).with_for_update())
    held = s.scalar(select(func.count()).select_from(Lease)
                    .join(CampaignRegion, and_(CampaignRegion.campaign_id == Lease.campaign_id, CampaignRegion.region_id == Lease.region_id))
                    .where(Lease.campaign_id == campaign_id, Lease.person_id != person_id, Lease.expires_at > now, *_REGULAR)) or 0
    return max(0, int(budget) - judgments_given(s, campaign_id) - int(held))


def check_plan_options(*, budget: int | None, regions_per_class: int | None, labels_per_region: int, adaptive: bool, confident_at: float,
                       settle_window: int) -> None:
    """Refuse options that cannot make a plan, saying what to give instead."""
    if budget is not None and regions_per_class is not None:
        raise InvalidRequestError("give a judgment budget or regions per class, not both.")
    if budget is not None and not 1 <= budget <= MAX_BUDGET:
        raise InvalidRequestError(f"the judgment budget must be 1-{MAX_BUDGET:,} judgments; got {budget}.")
    if regions_per_class is not None and not 1 <= regions_per_class <= MAX_BUDGET:
        raise InvalidRequestError(f"regions per class must be 1-{MAX_BUDGET:,}; got {regions_per_class}.")
    if not (math.isfinite(confident_at) and 0 < confident_at < 1):
        raise InvalidRequestError(f"a confident prediction's threshold must be between 0 and 1, e.g. 0.8; got {confident_at}.")
    if adaptive and labels_per_region < 3:
        raise InvalidRequestError(f"adaptive labelling asks 2 people and a third on disagreement: set labels per region to 3 or more; got {labels_per_region}.")
    if not 5 <= settle_window <= 100_000:
        raise InvalidRequestError(f"the settling window must be 5-100,000 judgments; got {settle_window}.")


def expected_judgments_per_region(labels_per_region: int, *, adaptive: bool, base_labels: int = 2) -> float:
    """Judgments a region is expected to take: k, or for adaptive labelling the base plus the extra on an assumed share of regions."""
    if not adaptive:
        return float(labels_per_region)
    return base_labels + ASSUMED_DISAGREEMENT * (labels_per_region - base_labels)


def draw_regions(s: Session, *, campaign_id: int, run_id: int, classes: list[str], budget: int | None, regions_per_class: int | None,
                 labels_per_region: int, adaptive: bool, confident_at: float, seed: int) -> list[int]:
    """Draw the campaign's stratified sample of images, store its strata and inclusion probabilities; the drawn images' regions."""
    q = (select(Prediction.image_id, Prediction.predicted, Prediction.confidence, ImageRow.label, func.count(RegionRow.id))
         .join(ImageRow, ImageRow.id == Prediction.image_id).outerjoin(RegionRow, RegionRow.prediction_id == Prediction.id)
         .where(Prediction.run_id == run_id).group_by(Prediction.id, ImageRow.id).order_by(Prediction.image_id))
    if classes:
        q = q.where(Prediction.predicted.in_(classes))
    rows = s.execute(q).all()
    if not rows:
        raise InvalidRequestError(f"run {run_id} has no image in the chosen classes; nothing to sample.")
    try:
        kinds = stratum_kinds([r[1] for r in rows], [r[3] or "" for r in rows], [float(r[2]) for r in rows], confident_at=confident_at)
    except InvalidInputError as exc:
        raise InvalidRequestError(str(exc)) from None
    members: dict[tuple[str, str], list[int]] = {}
    regions: dict[tuple[str, str], int] = {}
    for (image, cls, _, _, n_regions), kind in zip(rows, kinds):
        members.setdefault((cls, kind), []).append(int(image))
        regions[(cls, kind)] = regions.get((cls, kind), 0) + int(n_regions)
    strata = [Stratum(cls, kind, len(ids), regions[(cls, kind)]) for (cls, kind), ids in sorted(members.items())]  # type: ignore[arg-type]
    n_classes = len({st.cls for st in strata})
    if regions_per_class is None:
        if budget is None:
            raise InvalidRequestError("a sampled campaign needs a judgment budget or regions per class.")
        regions_per_class = regions_per_class_for_budget(
            budget, classes=n_classes, judgments_per_region=expected_judgments_per_region(labels_per_region, adaptive=adaptive))
    sizes = allocate(strata, regions_per_class=regions_per_class)
    drawn = draw_sample({st.name: members[(st.cls, st.kind)] for st in strata}, sizes, seed=seed)
    ids: dict[str, int] = {}
    for st in strata:
        row = CampaignStratum(campaign_id=campaign_id, name=st.name, cls=st.cls, kind=st.kind, images=st.images, regions=st.regions, drawn=sizes[st.name])
        s.add(row)
        s.flush()
        ids[st.name] = row.id
    s.execute(insert(CampaignSample), [
        {"campaign_id": campaign_id, "image_id": image, "stratum_id": ids[name], "inclusion_probability": pi} for image, (name, pi) in sorted(drawn.items())
    ])
    picked = sorted(drawn)
    out: list[int] = []
    for start in range(0, len(picked), 500):  # bounded IN lists
        out += list(s.scalars(select(RegionRow.id).join(Prediction, Prediction.id == RegionRow.prediction_id)
                              .where(Prediction.run_id == run_id, Prediction.image_id.in_(picked[start:start + 500]))))
    return sorted(out)
