"""Which region goes to whom: k-way assignment with leases, check items mixed in unannounced.

Every function that writes runs inside a write session. On SQLite (BEGIN IMMEDIATE) the checks
"fewer than k labels" and "nobody else holds the last slot" and the insert that follows are one
step for the single writer: concurrent requests cannot both take the last place. On PostgreSQL
many requests write at once: the regions picked are locked (FOR UPDATE SKIP LOCKED: a region
another request is handing out right now is passed over, not waited for), and once locked they
are checked again in a new statement, which sees every lease committed before the lock was taken.
Whoever leases or labels a region locks its campaign_regions row first, so nothing changes its
places between that check and the commit.
"""

from __future__ import annotations

import random
from collections.abc import Sequence
from dataclasses import dataclass
from datetime import datetime, timedelta

from sqlalchemy import and_, bindparam, delete, exists, func, select, update
from sqlalchemy.orm import Session

from ..db import dialect_insert, is_postgres
from ..models import CampaignRegion, Label, Lease, Prediction, RegionRow, Skip, utcnow
from .plans import budget_left
from .progress import labels_done
from .records import CampaignInfo


@dataclass(frozen=True)
class Task:
    """A region leased to one person."""

    region_id: int
    image_id: int
    predicted: str
    confidence: float
    lease_expires: datetime


def _unseen(campaign_id: int, person_id: int, now: datetime, region):  # type: ignore[no-untyped-def]
    """The region was not labelled or skipped by this person, nor is it leased to them now.

    Three NOT EXISTS probes of the unique (campaign, region, person) indexes per region looked at,
    instead of collecting everything the person has seen: the cost does not grow as they work.
    """
    return and_(
        ~exists().where(Label.campaign_id == campaign_id, Label.region_id == region, Label.person_id == person_id),
        ~exists().where(Skip.campaign_id == campaign_id, Skip.region_id == region, Skip.person_id == person_id),
        ~exists().where(Lease.campaign_id == campaign_id, Lease.region_id == region, Lease.person_id == person_id, Lease.expires_at > now),
    )


def _pick_regular(s: Session, c: CampaignInfo, person_id: int, now: datetime, n: int, exclude: Sequence[int] = ()) -> list[int]:
    """The least-labelled regions this person has not seen, still short of their quota, whose places are not all held by others' leases.

    Walks the (campaign, n_labels, region) index in order and stops at ``n``: no sort of the campaign.
    """
    conn = s.connection()  # Core statements on the session's connection: the hot path skips the ORM layer
    # A region's own quota where it has one (adaptive labelling: 2, more on disagreement; 0 in a class closed early).
    wants = func.coalesce(CampaignRegion.quota, c.labels_per_region)
    held_by_others = (
        select(func.count()).where(Lease.campaign_id == c.id, Lease.region_id == CampaignRegion.region_id, Lease.expires_at > now, Lease.person_id != person_id)
        .scalar_subquery()
    )
    q = (
        select(CampaignRegion.region_id)
        .where(CampaignRegion.campaign_id == c.id, CampaignRegion.n_labels < c.labels_per_region, CampaignRegion.check_answer.is_(None),
               CampaignRegion.example_answer.is_(None), CampaignRegion.n_labels < wants,
               _unseen(c.id, person_id, now, CampaignRegion.region_id), CampaignRegion.n_labels + held_by_others < wants)
        .where(*([CampaignRegion.region_id.not_in(exclude)] if exclude else []))
        .order_by(CampaignRegion.n_labels, CampaignRegion.region_id)
        .limit(n)
        .with_for_update(skip_locked=True, of=CampaignRegion)  # PostgreSQL only; SQLite holds its one write lock already
    )
    return list(conn.scalars(q))


def _still_free(s: Session, c: CampaignInfo, person_id: int, now: datetime, picks: list[int]) -> list[int]:
    """The picks whose places are still free, read in a new statement after their rows were locked (PostgreSQL).

    The statement that locked them saw the database as it was when it began; a lease committed
    between then and the lock is visible only now.
    """
    held_by_others = (
        select(func.count()).where(Lease.campaign_id == c.id, Lease.region_id == CampaignRegion.region_id, Lease.expires_at > now, Lease.person_id != person_id)
        .scalar_subquery()
    )
    wants = func.coalesce(CampaignRegion.quota, c.labels_per_region)
    q = select(CampaignRegion.region_id).where(
        CampaignRegion.campaign_id == c.id, CampaignRegion.region_id.in_(picks), _unseen(c.id, person_id, now, CampaignRegion.region_id),
        CampaignRegion.n_labels + held_by_others < wants,
    )
    free = set(s.connection().scalars(q))
    return [r for r in picks if r in free]


def _pick_check(s: Session, c: CampaignInfo, person_id: int, now: datetime, done: int) -> int | None:
    """One unseen check item, unannounced, in about one task of every ``check_every``."""
    conn = s.connection()  # Core statements on the session's connection: the hot path skips the ORM layer
    if c.n_checks == 0 or (done + 1) % c.check_every:
        return None
    q = select(CampaignRegion.region_id).where(
        CampaignRegion.campaign_id == c.id, CampaignRegion.check_answer.is_not(None), _unseen(c.id, person_id, now, CampaignRegion.region_id)
    )
    options = sorted(conn.scalars(q))
    return random.Random(person_id * 1_000_003 + done).choice(options) if options else None


def _pick_free(s: Session, c: CampaignInfo, person_id: int, now: datetime, n: int) -> list[int]:
    """Up to ``n`` regular regions for the person, locked and checked again on PostgreSQL."""
    if n <= 0:
        return []
    if not is_postgres(s.connection()):
        return _pick_regular(s, c, person_id, now, n)
    picks: list[int] = []
    for _ in range(3):  # a region that filled up while we locked it is not picked again: the next statement sees it full
        found = _pick_regular(s, c, person_id, now, n - len(picks), exclude=picks)
        if not found:
            break
        picks += _still_free(s, c, person_id, now, found)
        if len(picks) >= n:
            break
    return picks


# The next-task path's statements, built once (building and hashing a statement costs more than running it).
_P = bindparam
_MINE = (Lease.campaign_id == _P("campaign"), Lease.person_id == _P("person"))
_DROP_ENDED = delete(Lease).where(*_MINE, Lease.expires_at <= _P("now"))
_HELD = select(Lease.region_id).where(*_MINE).order_by(Lease.id)
_RENEW = update(Lease).where(*_MINE).values(expires_at=_P("expires"))
# DO NOTHING on a lease this person got from a request of theirs running at the same moment (two tabs); one per dialect.
_TAKE = {name: dialect_insert(name, Lease).on_conflict_do_nothing(index_elements=["campaign_id", "region_id", "person_id"])
         for name in ("sqlite", "postgresql")}
_TASK_ROWS = (select(RegionRow.id, Prediction.image_id, Prediction.predicted, Prediction.confidence)
              .join(Prediction, Prediction.id == RegionRow.prediction_id).where(RegionRow.id.in_(_P("regions", expanding=True))))


def lease_tasks(s: Session, *, campaign: CampaignInfo, person_id: int, now: datetime | None = None, want: int = 2) -> list[Task]:
    """The person's current task first, then the one after (for preloading); leases what is needed.

    Leases already held come back first (a reload shows the same crop) and are renewed; new ones
    go to the least-covered regions this person has not seen. An empty list means no work is left.
    """
    conn = s.connection()  # Core statements on the session's connection: the hot path skips the ORM layer
    now = now or utcnow()
    if campaign.closed_at is not None:
        return []
    expires = now + timedelta(seconds=campaign.lease_seconds)
    mine = {"campaign": campaign.id, "person": person_id}
    conn.execute(_DROP_ENDED, {**mine, "now": now})
    held = list(conn.scalars(_HELD, mine))
    if held:
        conn.execute(_RENEW, {**mine, "expires": expires})
    picks: list[int] = []
    need = want - len(held)
    if need > 0:
        left = budget_left(s, campaign_id=campaign.id, person_id=person_id, now=now)  # None: the campaign has no judgment budget
        if left is not None:
            need = min(need, left - len(held))  # places this person holds already count against it
    if need > 0:
        # How many labels the person gave decides when a check item comes; only asked when there are check items.
        check = _pick_check(s, campaign, person_id, now, labels_done(s, campaign.id, person_id) + len(held)) if campaign.n_checks else None
        if check is not None:
            picks.append(check)
        picks += _pick_free(s, campaign, person_id, now, need - len(picks))
        if picks:
            conn.execute(_TAKE[conn.dialect.name], [
                {"campaign_id": campaign.id, "region_id": r, "person_id": person_id, "created_at": now, "expires_at": expires} for r in picks
            ])
    order = held + picks
    if not order:
        return []
    rows = {r[0]: r for r in conn.execute(_TASK_ROWS, {"regions": order})}
    return [Task(r, rows[r][1], rows[r][2], float(rows[r][3]), expires) for r in order]


def held_tasks(s: Session, *, campaign: CampaignInfo, person_id: int, now: datetime | None = None) -> list[Task]:
    """The regions leased to the person now, oldest first; reads only (a page shown on GET takes no lease)."""
    now = now or utcnow()
    if campaign.closed_at is not None:
        return []
    rows = s.execute(
        select(Lease.region_id, Prediction.image_id, Prediction.predicted, Prediction.confidence, Lease.expires_at)
        .join(RegionRow, RegionRow.id == Lease.region_id).join(Prediction, Prediction.id == RegionRow.prediction_id)
        .where(Lease.campaign_id == campaign.id, Lease.person_id == person_id, Lease.expires_at > now).order_by(Lease.id)
    ).all()
    return [Task(r, i, p, float(c), e) for r, i, p, c, e in rows]
