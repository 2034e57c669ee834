"""Grouped labelling: similar regions shown together, one judgment naming what they share, one label per ticked crop.

A group's crops are held by ordinary leases, so every guarantee of single-crop labelling holds for
each crop: at most k labels per region, nobody labels a region twice, another person's live hold
keeps its place. Each ticked crop gets its own label through :func:`labelling.save_label`, with the
group judgment as its provenance, plus what that crop shows besides (its own additions: a group names what its crops
share, a region usually shows more, and the single-crop page would have had all of it); unticked crops are released (their place goes back to the pool)
and get no label from this person. A person is not offered a group they judged before; its
remaining crops reach them one at a time on the single-crop page.
"""

from __future__ import annotations

from collections import Counter
from collections.abc import Mapping
from dataclasses import dataclass
from datetime import datetime, timedelta

from sqlalchemy import Select, and_, delete, exists, func, insert, select, update
from sqlalchemy.orm import Session

from analysis.concepts import MAX_ATTRIBUTES, MAX_ENTITIES, format_label_text, normalise_label
from analysis.grouping import group_regions

from ..errors import ConflictError, ForbiddenError, InvalidRequestError, NotFoundError
from ..models import (
    CampaignRegion,
    GroupLabel,
    GroupLease,
    Label,
    Lease,
    Prediction,
    RegionGroup,
    RegionGroupMember,
    RegionRow,
    WithdrawnLabel,
    utcnow,
)
from .assignment import Task, _unseen
from .labelling import last_label, save_label, skip_region, undo_last, withdraw_label
from .plans import budget_left
from .records import CampaignInfo, Entities

MAX_GROUP_CROPS = 32  # the most crops one group shows (groups are made of 8-16)


@dataclass(frozen=True)
class GroupingSummary:
    groups: int
    regions: int
    smallest: int
    largest: int
    over_share: int  # groups where one predicted class is over the share asked for
    largest_class_share: float


@dataclass(frozen=True)
class GroupTask:
    """A group's crops held for one person (those they may still label), in the group's order."""

    group_id: int
    position: int
    crops: tuple[Task, ...]
    lease_expires: datetime


@dataclass(frozen=True)
class GroupResult:
    stored: bool  # False: this client id was stored before (a retry); nothing changed
    group_id: int
    labelled: tuple[int, ...]  # regions that got this person's label
    returned: tuple[int, ...]  # unticked regions, back in the pool
    lost: tuple[int, ...]  # ticked regions whose places others took after this person's hold ran out


@dataclass(frozen=True)
class Undone:
    """What an undo withdrew: one label, or every label of one group judgment (``group_id`` set)."""

    region_id: int  # the last region labelled
    text: str  # the label's text (a group's: what its crops share) to show again for editing
    group_id: int | None
    regions: tuple[int, ...]  # every region whose label from this person was withdrawn
    additions: tuple[tuple[int, str], ...] = ()  # a group's crops: what each showed besides what the group shares, as text


def has_groups(s: Session, campaign_id: int) -> bool:
    return s.scalar(select(RegionGroup.id).where(RegionGroup.campaign_id == campaign_id).limit(1)) is not None


def make_groups(s: Session, *, campaign: CampaignInfo, region_ids: list[int], vectors: object, size: int = 12, max_class_share: float = 0.5,
                seed: int = 0) -> GroupingSummary:
    """Group the campaign's regions (not its check items or examples) on their embeddings and store the groups.

    ``region_ids`` and ``vectors`` (n x d) are the run's embeddings (:func:`app.embeddings.load_embeddings`).
    A campaign is grouped once; a campaign whose groups were judged keeps them.
    """
    import numpy as np

    if not 8 <= size <= 16:
        raise InvalidRequestError(f"groups hold 8-16 crops; got {size}.")
    if not 0.2 <= max_class_share <= 1:
        raise InvalidRequestError(f"the most one predicted class may be of a group must be 0.2-1; got {max_class_share}.")
    if has_groups(s, campaign.id):
        raise ConflictError(f"campaign {campaign.name!r} has its groups already.")
    rows = s.execute(
        select(CampaignRegion.region_id, Prediction.predicted, Prediction.image_id)
        .join(RegionRow, RegionRow.id == CampaignRegion.region_id).join(Prediction, Prediction.id == RegionRow.prediction_id)
        .where(CampaignRegion.campaign_id == campaign.id, CampaignRegion.check_answer.is_(None), CampaignRegion.example_answer.is_(None))
        .order_by(CampaignRegion.region_id)
    ).all()
    if not rows:
        raise InvalidRequestError(f"campaign {campaign.name!r} has no region to group.")
    where = {int(r): k for k, r in enumerate(np.asarray(region_ids).tolist())}
    missing = [r for r, _, _ in rows if r not in where]
    if missing:
        raise NotFoundError(f"{len(missing)} regions of campaign {campaign.name!r} have no embedding (e.g. region {missing[0]}); "
                            f"run `heedmap embed` for run {campaign.run_id} again.")
    x = np.asarray(vectors)[[where[r] for r, _, _ in rows]]
    grouping = group_regions(x, [p for _, p, _ in rows], [i for _, _, i in rows], size=size, max_class_share=max_class_share, seed=seed)
    shares = []
    for position, members in enumerate(grouping.groups):
        group = RegionGroup(campaign_id=campaign.id, position=position)
        s.add(group)
        s.flush()
        gid = group.id
        s.execute(insert(RegionGroupMember), [{"campaign_id": campaign.id, "group_id": gid, "region_id": rows[i][0]} for i in members])
        shares.append(max(Counter(rows[i][1] for i in members).values()) / len(members))
    sizes = [len(g) for g in grouping.groups]
    return GroupingSummary(len(sizes), len(rows), min(sizes), max(sizes), grouping.over_share, max(shares))


def _group_task(s: Session, group_id: int, person_id: int, campaign_id: int, expires: datetime) -> GroupTask | None:
    rows = s.execute(
        select(Lease.region_id, Prediction.image_id, Prediction.predicted, Prediction.confidence, RegionGroup.position)
        .join(RegionGroupMember, and_(RegionGroupMember.campaign_id == Lease.campaign_id, RegionGroupMember.region_id == Lease.region_id))
        .join(RegionGroup, RegionGroup.id == RegionGroupMember.group_id)
        .join(RegionRow, RegionRow.id == Lease.region_id).join(Prediction, Prediction.id == RegionRow.prediction_id)
        .where(Lease.campaign_id == campaign_id, Lease.person_id == person_id, RegionGroupMember.group_id == group_id)
        .order_by(RegionGroupMember.id)
    ).all()
    if not rows:
        return None
    return GroupTask(group_id, int(rows[0][4]), tuple(Task(r, i, p, float(c), expires) for r, i, p, c, _ in rows), expires)


def held_group(s: Session, *, campaign: CampaignInfo, person_id: int, now: datetime | None = None) -> GroupTask | None:
    """The group held for the person now, if any; reads only (a page shown on GET takes nothing)."""
    now = now or utcnow()
    if campaign.closed_at is not None:
        return None
    held = s.execute(select(GroupLease.group_id, GroupLease.expires_at).where(
        GroupLease.campaign_id == campaign.id, GroupLease.person_id == person_id, GroupLease.expires_at > now)).first()
    if held is None:
        return None
    return _group_task(s, held[0], person_id, campaign.id, held[1])


def _open_place(c: CampaignInfo, person_id: int, now: datetime, region=None):  # type: ignore[no-untyped-def]
    """The campaign region (``CampaignRegion`` joined on ``region``) still wants a label this person may give now: short of its own
    quota (adaptive labelling; 0 in a class closed early), its places not all held by others, not seen by this person, not a check item."""
    wants = func.coalesce(CampaignRegion.quota, c.labels_per_region)
    held_by_others = (
        select(func.count()).where(Lease.campaign_id == c.id, Lease.region_id == CampaignRegion.region_id, Lease.expires_at > now, Lease.person_id != person_id)
        .scalar_subquery()
    )
    return and_(
        CampaignRegion.campaign_id == c.id, *([] if region is None else [CampaignRegion.region_id == region]), CampaignRegion.n_labels < c.labels_per_region,
        CampaignRegion.n_labels < wants, CampaignRegion.check_answer.is_(None), CampaignRegion.example_answer.is_(None),
        _unseen(c.id, person_id, now, CampaignRegion.region_id), CampaignRegion.n_labels + held_by_others < wants,
    )


def first_open_group(c: CampaignInfo, person_id: int, now: datetime) -> Select[int]:
    """The statement that finds the group to hand out next (:func:`_pick_group`); a test reads its query plan."""
    judged = exists().where(GroupLabel.campaign_id == c.id, GroupLabel.group_id == RegionGroupMember.group_id, GroupLabel.person_id == person_id)
    return (
        select(RegionGroupMember.group_id).select_from(CampaignRegion)
        .join(RegionGroupMember, and_(RegionGroupMember.campaign_id == CampaignRegion.campaign_id, RegionGroupMember.region_id == CampaignRegion.region_id))
        .where(_open_place(c, person_id, now), ~judged)
        .order_by(CampaignRegion.n_labels, CampaignRegion.region_id).limit(1)
    )


def _pick_group(s: Session, c: CampaignInfo, person_id: int, now: datetime) -> tuple[int, list[int]] | None:
    """The group of the least-labelled region this person may label now, in a group they have not judged; and that group's open crops.

    The first statement walks the (campaign, n_labels, region) index in order and stops at the first
    region that qualifies, as the single-crop page does: nothing groups or sorts the campaign, so the
    cost does not grow with the campaign. On PostgreSQL the crops are locked (SKIP LOCKED: a crop
    another request is handing out right now is passed over).
    """
    first = s.execute(first_open_group(c, person_id, now)).first()
    if first is None:
        return None
    crops = list(s.scalars(
        select(RegionGroupMember.region_id).join(CampaignRegion, _open_place(c, person_id, now, RegionGroupMember.region_id))
        .where(RegionGroupMember.group_id == first[0]).order_by(RegionGroupMember.id).limit(MAX_GROUP_CROPS)
        .with_for_update(skip_locked=True, of=CampaignRegion)
    ))
    return (first[0], crops) if crops else None


def lease_group(s: Session, *, campaign: CampaignInfo, person_id: int, now: datetime | None = None) -> GroupTask | None:
    """The person's current group (renewed), or the next one: its crops this person may label are leased to them.

    Regions the person held on the single-crop page are released first (their places go back to the
    pool). None when no group has a crop left for this person.
    """
    now = now or utcnow()
    if campaign.closed_at is not None:
        return None
    expires = now + timedelta(seconds=campaign.lease_seconds)
    mine = (Lease.campaign_id == campaign.id, Lease.person_id == person_id)
    s.execute(delete(Lease).where(*mine, Lease.expires_at <= now))
    current = s.scalar(select(GroupLease.group_id).where(GroupLease.campaign_id == campaign.id, GroupLease.person_id == person_id,
                                                        GroupLease.expires_at > now))
    if current is not None:
        task = _group_task(s, current, person_id, campaign.id, expires)
        if task is not None:
            s.execute(update(Lease).where(*mine).values(expires_at=expires))
            s.execute(update(GroupLease).where(GroupLease.campaign_id == campaign.id, GroupLease.person_id == person_id).values(expires_at=expires))
            return task
    s.execute(delete(GroupLease).where(GroupLease.campaign_id == campaign.id, GroupLease.person_id == person_id))
    s.execute(delete(Lease).where(*mine))
    picked = _pick_group(s, campaign, person_id, now)
    if picked is None:
        return None
    group_id, crops = picked
    left = budget_left(s, campaign_id=campaign.id, person_id=person_id, now=now)  # a campaign with a judgment budget hands out no more
    if left is not None:
        crops = crops[:left]
        if not crops:
            return None
    s.execute(insert(Lease), [{"campaign_id": campaign.id, "region_id": r, "person_id": person_id, "created_at": now, "expires_at": expires}
                              for r in crops])
    s.execute(insert(GroupLease).values(campaign_id=campaign.id, person_id=person_id, group_id=group_id, expires_at=expires))
    return _group_task(s, group_id, person_id, campaign.id, expires)


def _shown(s: Session, campaign_id: int, group_id: int, person_id: int) -> list[int]:
    """Crops of the group leased to the person (live or run out): what their page showed."""
    return list(s.scalars(
        select(Lease.region_id).join(RegionGroupMember, and_(RegionGroupMember.campaign_id == Lease.campaign_id, RegionGroupMember.region_id == Lease.region_id))
        .where(Lease.campaign_id == campaign_id, Lease.person_id == person_id, RegionGroupMember.group_id == group_id).order_by(RegionGroupMember.id)
    ))


def crop_entities(shared: Entities, extra: Entities) -> Entities:
    """A ticked crop's label: what the group shares, then what this crop shows besides.

    An addition naming a shared entity (after normalisation) adds its attributes to it, so "cap" shared
    and "cap: red" added for one crop give that crop "cap: red".
    """
    out: list[tuple[str, list[str]]] = [(e, list(a)) for e, a in shared]
    where = {normalise_label(e): i for i, (e, _) in enumerate(out)}
    for e, attrs in extra:
        key = normalise_label(e)
        if key not in where:
            where[key] = len(out)
            out.append((e, []))
        have = {normalise_label(a) for a in out[where[key]][1]}
        for a in attrs:
            if normalise_label(a) not in have:
                have.add(normalise_label(a))
                out[where[key]][1].append(a)
    return out


def crop_additions(shared: Entities, label: Entities) -> Entities:
    """What a crop's label holds beyond what its group shares (the inverse of :func:`crop_entities`)."""
    have = {normalise_label(e): {normalise_label(a) for a in attrs} for e, attrs in shared}
    out: list[tuple[str, list[str]]] = []
    for e, attrs in label:
        key = normalise_label(e)
        if key not in have:
            out.append((e, list(attrs)))
        else:
            extra = [a for a in attrs if normalise_label(a) not in have[key]]
            if extra:
                out.append((e, extra))
    return out


def _stored(entities: object) -> list[tuple[str, list[str]]]:
    return [(str(e[0]), [str(a) for a in e[1]]) for e in entities or []]  # type: ignore[attr-defined]


def _per_crop_entities(shared: Entities, ticked: list[int], extras: Mapping[int, Entities]) -> dict[int, Entities]:
    """Each ticked crop's label; additions for a crop that is not ticked, or a label over the limits, are refused."""
    stray = sorted(set(extras) - set(ticked))
    if stray:
        raise InvalidRequestError(f"region {stray[0]} has things added of its own but is not ticked; tick it, or clear what you added to it.")
    if extras and not shared:
        raise InvalidRequestError("a group marked nothing recognisable cannot name things for one region; name what the group shares, "
                                  "or leave that region's additions empty.")
    out = {r: crop_entities(shared, extras.get(r, [])) for r in ticked}
    for r, e in out.items():
        if len(e) > MAX_ENTITIES or any(len(a) > MAX_ATTRIBUTES for _, a in e):
            raise InvalidRequestError(f"region {r} would get more than {MAX_ENTITIES} things or {MAX_ATTRIBUTES} attributes of one thing "
                                      "with what the group shares; name fewer for it.")
    return out


def save_group_label(
    s: Session, *, campaign: CampaignInfo, person_id: int, group_id: int, ticked: list[int], entities: Entities, unsure: bool, client_id: str,
    seconds_spent: float | None, now: datetime | None = None, extras: Mapping[int, Entities] | None = None,
) -> GroupResult:
    """Store one person's judgment of a group: the label of every ticked crop, with the group as its provenance.

    ``entities`` is what the ticked crops share; ``extras`` maps a ticked crop to what it shows besides, and
    that crop's label is both (:func:`crop_entities`). A retry with the same ``client_id`` and content
    stores nothing and answers as before; other content under a used id is a ConflictError. Every
    ticked crop must be one handed to the person in this group. Unticked crops shown to them are
    released and get no label from them.
    """
    now = now or utcnow()
    ticked = list(dict.fromkeys(ticked))
    extras = {r: e for r, e in (extras or {}).items() if e}
    stored_entities: list[list[object]] = [[e, list(a)] for e, a in entities]
    per_crop = _per_crop_entities(entities, ticked, extras)
    if not ticked:
        raise InvalidRequestError("tick at least one crop that shows what you named, or skip the group.")
    if len(ticked) > MAX_GROUP_CROPS:
        raise InvalidRequestError(f"a group holds at most {MAX_GROUP_CROPS} crops; {len(ticked)} were ticked.")
    found = s.scalar(select(GroupLabel).where(GroupLabel.client_id == client_id))
    if found is not None:
        if (found.person_id, found.group_id, found.campaign_id) != (person_id, group_id, campaign.id):
            raise ConflictError("this submission id was used for another group; reload the page to get a fresh form.")
        before: list[list[object]] = [[str(e[0]), [str(a) for a in e[1]]] for e in found.entities or []]
        labelled_as = {r: _stored(e) for r, e in s.execute(select(Label.region_id, Label.entities).where(Label.group_label_id == found.id))}
        if (before != stored_entities or sorted(found.ticked) != sorted(ticked) or bool(found.unsure) != unsure
                or any(per_crop[r] != e for r, e in labelled_as.items())):
            raise ConflictError("this group judgment was stored already with other content; reload the page to see your next group.")
        got = tuple(sorted(labelled_as))
        return GroupResult(False, group_id, got, tuple(found.unticked), tuple(r for r in found.ticked if r not in got))
    if s.scalar(select(WithdrawnLabel.id).where(WithdrawnLabel.client_id.startswith(f"{client_id}/", autoescape=True)).limit(1)) is not None:
        raise ConflictError("this group judgment was undone, and a submission id stays used; reload the page to judge the group again.")
    if campaign.closed_at is not None:
        raise ConflictError(f"campaign {campaign.name!r} is closed; labels are no longer taken.")
    if s.scalar(select(RegionGroup.id).where(RegionGroup.id == group_id, RegionGroup.campaign_id == campaign.id)) is None:
        raise NotFoundError(f"group {group_id} is not part of campaign {campaign.id}.")
    if s.scalar(select(GroupLabel.id).where(GroupLabel.campaign_id == campaign.id, GroupLabel.group_id == group_id,
                                            GroupLabel.person_id == person_id)) is not None:
        raise ConflictError(f"you judged group {group_id} already; your next group is ready.")
    shown = _shown(s, campaign.id, group_id, person_id)
    foreign = [r for r in ticked if r not in shown]
    if foreign:
        raise ForbiddenError(f"region {foreign[0]} was not handed to you in group {group_id}; label the crops your page shows.")
    unticked = [r for r in shown if r not in ticked]
    gl = GroupLabel(client_id=client_id, campaign_id=campaign.id, group_id=group_id, person_id=person_id, entities=stored_entities, unsure=unsure,
                    ticked=ticked, unticked=unticked, submitted_at=now, seconds_spent=seconds_spent)
    s.add(gl)
    s.flush()
    labelled: list[int] = []
    lost: list[int] = []
    crop_seconds = None if seconds_spent is None else seconds_spent / len(ticked)
    for region_id in ticked:
        try:
            save_label(s, campaign=campaign, region_id=region_id, person_id=person_id, entities=per_crop[region_id], unsure=unsure,
                       client_id=f"{client_id}/{region_id}", seconds_spent=crop_seconds, now=now, require_lease=True, group_label_id=gl.id)
            labelled.append(region_id)
        except ConflictError:
            lost.append(region_id)  # its places went to others after this person's hold ran out
    s.execute(delete(Lease).where(Lease.campaign_id == campaign.id, Lease.person_id == person_id, Lease.region_id.in_(shown)))
    s.execute(delete(GroupLease).where(GroupLease.campaign_id == campaign.id, GroupLease.person_id == person_id))
    return GroupResult(True, group_id, tuple(labelled), tuple(unticked), tuple(lost))


def skip_group(s: Session, *, campaign: CampaignInfo, person_id: int, group_id: int) -> int:
    """Pass over the group held for the person: each of its crops is skipped (not offered to them again); returns how many."""
    shown = _shown(s, campaign.id, group_id, person_id)
    for region_id in shown:
        skip_region(s, campaign=campaign, region_id=region_id, person_id=person_id)
    s.execute(delete(GroupLease).where(GroupLease.campaign_id == campaign.id, GroupLease.person_id == person_id))
    return len(shown)


def undo_last_submission(s: Session, *, campaign: CampaignInfo, person_id: int, now: datetime | None = None) -> Undone | None:
    """Withdraw the person's last submission in the campaign: a single label, or a whole group judgment.

    A group judgment is one submission, so undoing it withdraws the label of every crop it gave, and
    the group is handed back to the person (its crops whose places are still free to them), to judge
    again. None when the person has no label in the campaign.
    """
    now = now or utcnow()
    last = last_label(s, campaign_id=campaign.id, person_id=person_id)
    if last is None:
        return None
    if last.group_label_id is None:
        single = undo_last(s, campaign=campaign, person_id=person_id, now=now)
        return None if single is None else Undone(single[0], single[1], None, (single[0],))
    gl = s.get(GroupLabel, last.group_label_id)
    if gl is None:  # the foreign key makes this impossible; kept so a damaged row never becomes a 500
        single = undo_last(s, campaign=campaign, person_id=person_id, now=now)
        return None if single is None else Undone(single[0], single[1], None, (single[0],))
    labels = list(s.scalars(select(Label).where(Label.group_label_id == gl.id).order_by(Label.region_id)))
    additions = tuple((label.region_id, format_label_text(extra)) for label in labels
                      if (extra := crop_additions(_stored(gl.entities), _stored(label.entities))))
    for label in labels:
        withdraw_label(s, campaign=campaign, label=label, now=now)
    text = format_label_text(_stored(gl.entities))
    shown = [int(r) for r in [*gl.ticked, *gl.unticked]]
    group_id = gl.group_id
    s.delete(gl)
    s.flush()
    # The group comes back to the person: their other holds go, its crops still open to them are theirs again.
    s.execute(delete(Lease).where(Lease.campaign_id == campaign.id, Lease.person_id == person_id))
    s.execute(delete(GroupLease).where(GroupLease.campaign_id == campaign.id, GroupLease.person_id == person_id))
    crops = list(s.scalars(
        select(RegionGroupMember.region_id).join(CampaignRegion, _open_place(campaign, person_id, now, RegionGroupMember.region_id))
        .where(RegionGroupMember.group_id == group_id, RegionGroupMember.region_id.in_(shown)).order_by(RegionGroupMember.id)
    ))
    expires = now + timedelta(seconds=campaign.lease_seconds)
    if crops:
        s.execute(insert(Lease), [{"campaign_id": campaign.id, "region_id": r, "person_id": person_id, "created_at": now, "expires_at": expires}
                                  for r in crops])
        s.execute(insert(GroupLease).values(campaign_id=campaign.id, person_id=person_id, group_id=group_id, expires_at=expires))
    return Undone(last.region_id if labels else shown[0], text, group_id, tuple(label.region_id for label in labels), additions)


@dataclass(frozen=True)
class GroupCounts:
    """How a grouped campaign is being labelled, for the admin page."""

    groups: int
    smallest: int
    largest: int
    judgments: int  # group judgments stored (one per person and group)
    people: int  # people who judged at least one group
    labels_from_groups: int  # crop labels those judgments gave
    unticked: int  # crops shown in a group and left unticked (back in the pool for someone else)
    labels_single: int  # labels given one crop at a time in the same campaign


def group_counts(s: Session, campaign_id: int) -> GroupCounts | None:
    """The campaign's groups and their judgments; None when it is not grouped."""
    sizes = s.execute(select(func.count()).select_from(RegionGroupMember).where(RegionGroupMember.campaign_id == campaign_id)
                      .group_by(RegionGroupMember.group_id)).scalars().all()
    if not sizes:
        return None
    judged = s.execute(select(func.count(), func.count(func.distinct(GroupLabel.person_id))).where(GroupLabel.campaign_id == campaign_id)).one()
    unticked = sum(len(u or []) for u in s.scalars(select(GroupLabel.unticked).where(GroupLabel.campaign_id == campaign_id)))
    from_groups = s.scalar(select(func.count()).select_from(Label).where(Label.campaign_id == campaign_id, Label.group_label_id.is_not(None))) or 0
    single = s.scalar(select(func.count()).select_from(Label).where(Label.campaign_id == campaign_id, Label.group_label_id.is_(None))) or 0
    return GroupCounts(len(sizes), min(sizes), max(sizes), int(judged[0]), int(judged[1]), int(from_groups), unticked, int(single))
