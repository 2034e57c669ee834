"""Storing a person's work on a region: a label (idempotent by client id), a skip, an undo."""

from __future__ import annotations

from datetime import datetime, timedelta

from sqlalchemy import bindparam, delete, func, insert, select, update
from sqlalchemy.exc import IntegrityError
from sqlalchemy.orm import Session

from analysis.concepts import format_label_text

from ..db import upsert_insert
from ..errors import ConflictError, ForbiddenError, NotFoundError
from ..models import CampaignRegion, Label, Lease, Skip, WithdrawnLabel, utcnow
from .plans import budget_left
from .records import CampaignInfo, Entities
from .redundancy import refresh_quota
from .vocabulary import add_words, words_of


def campaign_region(s: Session, campaign_id: int, region_id: int) -> CampaignRegion:
    cr = s.scalar(select(CampaignRegion).where(CampaignRegion.campaign_id == campaign_id, CampaignRegion.region_id == region_id))
    if cr is None:
        raise NotFoundError(f"region {region_id} is not part of campaign {campaign_id}.")
    return cr


def region_visible_to(s: Session, *, person_id: int, campaign_id: int | None, region_id: int) -> bool:
    """Whether an annotator may see a region: handed to them, labelled by them, or an example of a campaign they work in
    (``campaign_id``: the one campaign their invite ties them to, None for any)."""
    queries = [
        select(Lease.id).where(Lease.person_id == person_id, Lease.region_id == region_id),
        select(Label.id).where(Label.person_id == person_id, Label.region_id == region_id),
        select(CampaignRegion.id).where(CampaignRegion.region_id == region_id, CampaignRegion.example_answer.is_not(None)),
    ]
    if campaign_id is not None:
        queries = [queries[0].where(Lease.campaign_id == campaign_id), queries[1].where(Label.campaign_id == campaign_id),
                   queries[2].where(CampaignRegion.campaign_id == campaign_id)]
    return any(s.scalar(q.limit(1)) is not None for q in queries)


def _as_stored(entities: Entities) -> tuple[tuple[str, tuple[str, ...]], ...]:
    return tuple((str(e[0]), tuple(str(a) for a in e[1])) for e in entities)


# The submit path's statements, built once: building and hashing a statement costs more than SQLite's
# answer to it, and a prebuilt one is found in the compiled cache by identity.
_P = bindparam
_BY_CLIENT = select(Label.person_id, Label.region_id, Label.entities, Label.unsure).where(Label.client_id == _P("client_id"))
_WITHDRAWN = select(WithdrawnLabel.id).where(WithdrawnLabel.client_id == _P("client_id"))
# FOR UPDATE: on PostgreSQL the region's row stays locked until commit, so two people cannot both take its last place
# (SQLite's BEGIN IMMEDIATE holds the one write lock already; SQLAlchemy leaves the clause out there).
_REGION_HERE = (select(CampaignRegion.id, CampaignRegion.n_labels, CampaignRegion.check_answer.is_not(None), CampaignRegion.quota)
                .where(CampaignRegion.campaign_id == _P("campaign"), CampaignRegion.region_id == _P("region")).with_for_update())
_LABELLED = select(Label.id).where(Label.campaign_id == _P("campaign"), Label.region_id == _P("region"), Label.person_id == _P("person"))
_MY_LEASE = select(Lease.expires_at).where(Lease.campaign_id == _P("campaign"), Lease.region_id == _P("region"), Lease.person_id == _P("person"))
_HELD_BY_OTHERS = (select(func.count()).select_from(Lease)
                   .where(Lease.campaign_id == _P("campaign"), Lease.region_id == _P("region"), Lease.person_id != _P("person"), Lease.expires_at > _P("now")))
_INSERT_LABEL = insert(Label)
_COUNT_LABEL = update(CampaignRegion).where(CampaignRegion.id == _P("cr_id")).values(n_labels=CampaignRegion.n_labels + 1)
_DROP_MY_LEASE = delete(Lease).where(Lease.campaign_id == _P("campaign"), Lease.region_id == _P("region"), Lease.person_id == _P("person"))


def save_label(
    s: Session, *, campaign: CampaignInfo, region_id: int, person_id: int, entities: Entities, unsure: bool, client_id: str,
    seconds_spent: float | None, now: datetime | None = None, require_lease: bool = False, group_label_id: int | None = None,
) -> bool:
    """Store one label; False when this ``client_id`` was stored before (a retry), storing nothing.

    ``group_label_id``: the group judgment this label is part of (its provenance), None for a single crop.

    Raises ConflictError when the person labelled the region already, or when its k places are
    taken (by labels, or by other people's live leases while this person holds none).
    """
    conn = s.connection()  # Core statements on the session's connection: the hot path skips the ORM layer
    now = now or utcnow()
    found = conn.execute(_BY_CLIENT, {"client_id": client_id}).first()
    if found is not None:
        if (found.person_id, found.region_id) != (person_id, region_id):
            raise ConflictError("this submission id was used for another label; reload the page to get a fresh form.")
        stored = _as_stored(found.entities or [])
        if stored != _as_stored(entities) or bool(found.unsure) != unsure:
            text = format_label_text([(e, list(a)) for e, a in stored]) or "nothing recognisable"
            raise ConflictError(f"this submission was stored already with other content: region {region_id}: {text!r}"
                                f"{' (not sure)' if found.unsure else ''}. To change it, undo it and label again.")
        return False  # the same submit again (a retry): stored once
    if conn.scalar(_WITHDRAWN, {"client_id": client_id}) is not None:
        raise ConflictError("this submission was undone, and a submission id stays used; reload the page to label the region again.")
    if campaign.closed_at is not None:
        raise ConflictError(f"campaign {campaign.name!r} is closed; labels are no longer taken.")
    here = {"campaign": campaign.id, "region": region_id, "person": person_id}
    cr = conn.execute(_REGION_HERE, here).first()
    if cr is None:
        raise NotFoundError(f"region {region_id} is not part of campaign {campaign.id}.")
    cr_id, n_labels, is_check, quota = cr
    if conn.scalar(_LABELLED, here) is not None:
        raise ConflictError(f"you have labelled region {region_id} already; undo your last label to change it.")
    mine = conn.scalar(_MY_LEASE, here)
    if require_lease and mine is None:
        # An annotator labels what was handed to them; an ended hold still counts while its place is free (below).
        raise ForbiddenError(f"region {region_id} was not handed to you in campaign {campaign.name!r}; label the region your page shows.")
    if not is_check:
        k = campaign.labels_per_region if quota is None else quota
        if k == 0:
            raise ConflictError(f"region {region_id} belongs to a class closed early in campaign {campaign.name!r}; your next region is ready.")
        if n_labels >= k:
            raise ConflictError(f"region {region_id} has its {k} labels already; your next region is ready.")
        if mine is None or mine <= now:
            held = conn.scalar(_HELD_BY_OTHERS, {**here, "now": now}) or 0
            if n_labels + held >= k:
                raise ConflictError(f"your hold on region {region_id} ran out and other annotators have its last places; your next region is ready.")
            # Without a live hold the label is a new judgment: a campaign with a budget takes it only while judgments are left.
            if budget_left(s, campaign_id=campaign.id, person_id=person_id, now=now) == 0:
                raise ConflictError(f"campaign {campaign.name!r} has spent its judgment budget; labels are taken only for regions "
                                    "handed to you before it ran out. Nothing else is left to label here.")
    try:
        conn.execute(_INSERT_LABEL, {
            "client_id": client_id, "campaign_id": campaign.id, "region_id": region_id, "person_id": person_id,
            "entities": [[e, a] for e, a in entities], "unsure": unsure, "submitted_at": now, "seconds_spent": seconds_spent,
            "group_label_id": group_label_id,
        })
    except IntegrityError:
        raise ConflictError(f"region {region_id} was labelled twice at once; reload the page.") from None
    conn.execute(_COUNT_LABEL, {"cr_id": cr_id})
    add_words(s, campaign.id, words_of(entities))
    if mine is not None:
        conn.execute(_DROP_MY_LEASE, here)
    if quota is not None and not is_check:  # an adaptive campaign: the first labels may ask for more
        refresh_quota(s, campaign_id=campaign.id, region_id=region_id)
    return True


def skip_region(s: Session, *, campaign: CampaignInfo, region_id: int, person_id: int) -> None:
    """Pass over a region: it is not offered to this person again, and its place goes back to the pool."""
    campaign_region(s, campaign.id, region_id)
    # A second skip of the same region (two tabs, a retried request) stores nothing, on either database.
    s.execute(upsert_insert(s, Skip).values(campaign_id=campaign.id, region_id=region_id, person_id=person_id, created_at=utcnow())
              .on_conflict_do_nothing(index_elements=["campaign_id", "region_id", "person_id"]))
    s.execute(delete(Lease).where(Lease.campaign_id == campaign.id, Lease.region_id == region_id, Lease.person_id == person_id))


def last_label(s: Session, *, campaign_id: int, person_id: int) -> Label | None:
    """The person's latest label in the campaign (what an undo withdraws), or None."""
    return s.scalar(select(Label).where(Label.campaign_id == campaign_id, Label.person_id == person_id).order_by(Label.id.desc()).limit(1))


def withdraw_label(s: Session, *, campaign: CampaignInfo, label: Label, now: datetime) -> None:
    """Take back one stored label: its place is free again, its words uncounted, its client id stays spent."""
    region_id, person_id = label.region_id, label.person_id
    # The region's row first, as save_label locks it: then the word counts, in the same order as there (no deadlock).
    s.execute(update(CampaignRegion).where(CampaignRegion.campaign_id == campaign.id, CampaignRegion.region_id == region_id)
              .values(n_labels=CampaignRegion.n_labels - 1))
    s.add(WithdrawnLabel(client_id=label.client_id, campaign_id=label.campaign_id, region_id=region_id, person_id=person_id,
                         entities=label.entities, withdrawn_at=now))
    add_words(s, campaign.id, words_of(label.entities), sign=-1)
    s.delete(label)
    s.execute(delete(Lease).where(Lease.campaign_id == campaign.id, Lease.region_id == region_id, Lease.person_id == person_id))
    refresh_quota(s, campaign_id=campaign.id, region_id=region_id)


def undo_last(s: Session, *, campaign: CampaignInfo, person_id: int, now: datetime | None = None) -> tuple[int, str] | None:
    """Withdraw the person's latest label in the campaign; returns (region, its text) to show again, or None.

    The region is leased back to the person, so it is theirs to label again.
    """
    now = now or utcnow()
    last = last_label(s, campaign_id=campaign.id, person_id=person_id)
    if last is None:
        return None
    text = format_label_text([(str(e[0]), [str(a) for a in e[1]]) for e in last.entities])
    region_id = last.region_id
    withdraw_label(s, campaign=campaign, label=last, now=now)
    # Lease it back first in line: the undone region is what the person sees next.
    held = list(s.scalars(select(Lease).where(Lease.campaign_id == campaign.id, Lease.person_id == person_id)))
    for lease in held:
        s.delete(lease)
    s.flush()
    expires = now + timedelta(seconds=campaign.lease_seconds)
    s.add(Lease(campaign_id=campaign.id, region_id=region_id, person_id=person_id, created_at=now, expires_at=expires))
    s.flush()
    return region_id, text
