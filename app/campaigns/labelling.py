"""Storing a person's work on a region: a label (idempotent by client id), a skip, an undo."""

from __future__ import annotations

from datetime import datetime, timedelta

from sqlalchemy import delete, func, select, update
from sqlalchemy.exc import IntegrityError
from sqlalchemy.orm import Session

from analysis.concepts import format_label_text

from ..errors import ConflictError, NotFoundError
from ..models import CampaignRegion, Label, Lease, Skip, utcnow
from .records import CampaignInfo, Entities


def campaign_region(s: Session, campaign_id: int, region_id: int) -> CampaignRegion:
    cr = s.scalar(select(CampaignRegion).where(CampaignRegion.campaign_id == campaign_id, CampaignRegion.region_id == region_id))
    if cr is None:
        raise NotFoundError(f"region {region_id} is not part of campaign {campaign_id}.")
    return cr


def save_label(
    s: Session, *, campaign: CampaignInfo, region_id: int, person_id: int, entities: Entities, unsure: bool, client_id: str,
    seconds_spent: float | None, now: datetime | None = None,
) -> bool:
    """Store one label; False when this ``client_id`` was stored before (a retry), storing nothing.

    Raises ConflictError when the person labelled the region already, or when its k places are
    taken (by labels, or by other people's live leases while this person holds none).
    """
    conn = s.connection()  # Core statements on the session's connection: the hot path skips the ORM layer
    now = now or utcnow()
    found = conn.execute(select(Label.person_id, Label.region_id).where(Label.client_id == client_id)).first()
    if found is not None:
        if tuple(found) != (person_id, region_id):
            raise ConflictError("this submission id was used for another label; reload the page to get a fresh form.")
        return False
    if campaign.closed_at is not None:
        raise ConflictError(f"campaign {campaign.name!r} is closed; labels are no longer taken.")
    here = (CampaignRegion.campaign_id == campaign.id, CampaignRegion.region_id == region_id)
    cr = conn.execute(select(CampaignRegion.id, CampaignRegion.n_labels, CampaignRegion.check_answer.is_not(None)).where(*here)).first()
    if cr is None:
        raise NotFoundError(f"region {region_id} is not part of campaign {campaign.id}.")
    cr_id, n_labels, is_check = cr
    if conn.scalar(select(Label.id).where(Label.campaign_id == campaign.id, Label.region_id == region_id, Label.person_id == person_id)) is not None:
        raise ConflictError(f"you have labelled region {region_id} already; undo your last label to change it.")
    lease_here = (Lease.campaign_id == campaign.id, Lease.region_id == region_id)
    mine = conn.scalar(select(Lease.expires_at).where(*lease_here, Lease.person_id == person_id))
    if not is_check:
        k = campaign.labels_per_region
        if n_labels >= k:
            raise ConflictError(f"region {region_id} has its {k} labels already; your next region is ready.")
        if mine is None or mine <= now:
            held = conn.scalar(select(func.count()).select_from(Lease).where(*lease_here, Lease.person_id != person_id, Lease.expires_at > now)) or 0
            if n_labels + held >= k:
                raise ConflictError(f"your hold on region {region_id} ran out and other annotators have its last places; your next region is ready.")
    try:
        conn.execute(Label.__table__.insert().values(
            client_id=client_id, campaign_id=campaign.id, region_id=region_id, person_id=person_id, entities=[[e, a] for e, a in entities],
            unsure=unsure, submitted_at=now, seconds_spent=seconds_spent,
        ))
    except IntegrityError:
        raise ConflictError(f"region {region_id} was labelled twice at once; reload the page.") from None
    conn.execute(update(CampaignRegion).where(CampaignRegion.id == cr_id).values(n_labels=CampaignRegion.n_labels + 1))
    if mine is not None:
        conn.execute(delete(Lease).where(*lease_here, Lease.person_id == person_id))
    return True


def skip_region(s: Session, *, campaign: CampaignInfo, region_id: int, person_id: int) -> None:
    """Pass over a region: it is not offered to this person again, and its place goes back to the pool."""
    campaign_region(s, campaign.id, region_id)
    if s.scalar(select(Skip.id).where(Skip.campaign_id == campaign.id, Skip.region_id == region_id, Skip.person_id == person_id)) is None:
        s.add(Skip(campaign_id=campaign.id, region_id=region_id, person_id=person_id))
    s.execute(delete(Lease).where(Lease.campaign_id == campaign.id, Lease.region_id == region_id, Lease.person_id == person_id))


def undo_last(s: Session, *, campaign: CampaignInfo, person_id: int, now: datetime | None = None) -> tuple[int, str] | None:
    """Withdraw the person's latest label in the campaign; returns (region, its text) to show again, or None.

    The region is leased back to the person, so it is theirs to label again.
    """
    now = now or utcnow()
    last = s.scalar(select(Label).where(Label.campaign_id == campaign.id, Label.person_id == person_id).order_by(Label.id.desc()).limit(1))
    if last is None:
        return None
    text = format_label_text([(str(e[0]), [str(a) for a in e[1]]) for e in last.entities])  # type: ignore[index, union-attr]
    region_id = last.region_id
    s.delete(last)
    s.execute(update(CampaignRegion).where(CampaignRegion.campaign_id == campaign.id, CampaignRegion.region_id == region_id)
              .values(n_labels=CampaignRegion.n_labels - 1))
    s.execute(delete(Lease).where(Lease.campaign_id == campaign.id, Lease.region_id == region_id, Lease.person_id == person_id))
    # Lease it back first in line: the undone region is what the person sees next.
    held = list(s.scalars(select(Lease).where(Lease.campaign_id == campaign.id, Lease.person_id == person_id)))
    for lease in held:
        s.delete(lease)
    s.flush()
    expires = now + timedelta(seconds=campaign.lease_seconds)
    s.add(Lease(campaign_id=campaign.id, region_id=region_id, person_id=person_id, created_at=now, expires_at=expires))
    s.flush()
    return region_id, text
