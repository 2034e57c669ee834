"""Check items (regions with a known answer, given unannounced) and examples shown with the instructions."""

from __future__ import annotations

from sqlalchemy import func, select
from sqlalchemy.orm import Session

from analysis.concepts import Judgment, format_label_text

from ..errors import ConflictError
from ..models import Campaign, CampaignRegion
from .judgments import entities_of
from .labelling import campaign_region
from .records import Entities


def check_answers(s: Session, campaign_id: int) -> dict[int, Judgment]:
    """Known answers of the campaign's check items, as judgments by "check"."""
    rows = s.execute(select(CampaignRegion.region_id, CampaignRegion.check_answer).where(CampaignRegion.campaign_id == campaign_id, CampaignRegion.check_answer.is_not(None)))
    return {r: Judgment(r, "check", entities_of(a)) for r, a in rows}


def set_check_answer(s: Session, *, campaign_id: int, region_id: int, entities: Entities | None) -> None:
    """Make a region a check item with this known answer ([] = nothing recognisable), or a normal one again (None)."""
    cr = campaign_region(s, campaign_id, region_id)
    if entities is not None and cr.example_answer is not None:
        raise ConflictError(f"region {region_id} is an example shown with the instructions; it cannot be a check item too.")
    cr.check_answer = None if entities is None else [(e, list(a)) for e, a in entities]
    s.flush()
    c = s.get(Campaign, campaign_id)
    if c is not None:
        c.n_checks = s.scalar(select(func.count(CampaignRegion.check_answer)).where(CampaignRegion.campaign_id == campaign_id)) or 0


def set_example(s: Session, *, campaign_id: int, region_id: int, entities: Entities | None) -> None:
    """Show a region with the instructions as an example with this answer, or stop showing it (None).

    An example is never handed out as a task; a region cannot be an example and a check item at once.
    """
    cr = campaign_region(s, campaign_id, region_id)
    if entities is not None and cr.check_answer is not None:
        raise ConflictError(f"region {region_id} is a check item; an example is shown to everyone, so make it a normal region first.")
    if entities is not None and cr.n_labels:
        raise ConflictError(f"region {region_id} has labels already; choose an unlabelled region as an example.")
    cr.example_answer = None if entities is None else [(e, list(a)) for e, a in entities]


def examples(s: Session, campaign_id: int) -> list[tuple[int, str]]:
    """(region id, answer text) of the campaign's examples."""
    rows = s.execute(select(CampaignRegion.region_id, CampaignRegion.example_answer).where(
        CampaignRegion.campaign_id == campaign_id, CampaignRegion.example_answer.is_not(None)).order_by(CampaignRegion.region_id))
    return [(r, format_label_text([(e, list(a)) for e, a in entities_of(ans)]) or "nothing recognisable") for r, ans in rows]
