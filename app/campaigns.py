"""Campaigns and the work in them: which region goes to whom (leases), labels, skips, undo, progress.

Every function that writes runs inside a write session (BEGIN IMMEDIATE), so the checks
"fewer than k labels" and "nobody else holds the last slot" and the insert that follows are one
step for SQLite's single writer: concurrent requests cannot both take the last place.
"""

from __future__ import annotations

import random
import statistics
from collections import Counter
from dataclasses import dataclass
from datetime import datetime, timedelta

import pandas as pd
from sqlalchemy import case, delete, func, select, union, update
from sqlalchemy.exc import IntegrityError
from sqlalchemy.orm import Session

from analysis.concepts import Judgment, entity_overlap, format_label_text, normalise_label
from analysis.reliability import METHODS
from analysis.synonyms import Merge, Split, SynonymRules, build_rules

from .errors import ConflictError, InvalidRequestError, NotFoundError
from .models import Campaign, CampaignRegion, ImageRow, Label, Lease, Person, Prediction, RegionRow, SaliencyRun, Skip, SynonymRule, utcnow

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


@dataclass(frozen=True)
class Task:
    """A region leased to one person."""

    region_id: int
    image_id: int
    predicted: str
    confidence: float
    lease_expires: datetime


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
) -> int:
    """A campaign over the regions of ``run_id`` whose image was predicted as one of ``classes`` (all if empty)."""
    name = " ".join(name.split())
    if not 1 <= len(name) <= 80:
        raise InvalidRequestError("a campaign needs a name of 1-80 characters.")
    if s.scalar(select(Campaign.id).where(Campaign.name == name)) is not None:
        raise ConflictError(f"a campaign called {name!r} exists already; choose another name.")
    if s.get(SaliencyRun, run_id) is None:
        raise NotFoundError(f"saliency run {run_id} does not exist.")
    _check_settings(labels_per_region, lease_seconds, check_every, method)
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
    regions = select(RegionRow.id).join(Prediction, Prediction.id == RegionRow.prediction_id).where(Prediction.run_id == run_id)
    if classes:
        regions = regions.where(Prediction.predicted.in_(classes))
    ids = list(s.scalars(regions.order_by(RegionRow.id)))
    if not ids:
        raise InvalidRequestError(f"run {run_id} has no region in the chosen classes; nothing to label.")
    s.execute(CampaignRegion.__table__.insert(), [{"campaign_id": c.id, "region_id": r, "n_labels": 0} for r in ids])
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
    if labels_per_region is not None:
        c.labels_per_region = labels_per_region
    if method is not None:
        c.method = method
    if expectations is not None:
        c.expectations = expectations
    if closed is not None:
        c.closed_at = utcnow() if closed else None


# --- assignment -------------------------------------------------------------------------------


def _seen(campaign_id: int, person_id: int, now: datetime):  # type: ignore[no-untyped-def]
    """Regions this person labelled, skipped or holds a live lease on."""
    return union(
        select(Label.region_id).where(Label.campaign_id == campaign_id, Label.person_id == person_id),
        select(Skip.region_id).where(Skip.campaign_id == campaign_id, Skip.person_id == person_id),
        select(Lease.region_id).where(Lease.campaign_id == campaign_id, Lease.person_id == person_id, Lease.expires_at > now),
    )


def _pick_regular(s: Session, c: CampaignInfo, person_id: int, now: datetime, n: int) -> list[int]:
    """The least-labelled regions this person has not seen, whose places are not all held by others' leases.

    Walks the (campaign, n_labels, region) index in order and stops at ``n``: no sort of the campaign.
    """
    conn = s.connection()  # Core statements on the session's connection: the hot path skips the ORM layer
    held_by_others = (
        select(func.count()).where(Lease.campaign_id == c.id, Lease.region_id == CampaignRegion.region_id, Lease.expires_at > now, Lease.person_id != person_id)
        .scalar_subquery()
    )
    q = (
        select(CampaignRegion.region_id)
        .where(CampaignRegion.campaign_id == c.id, CampaignRegion.n_labels < c.labels_per_region, CampaignRegion.check_answer.is_(None),
               CampaignRegion.example_answer.is_(None),
               CampaignRegion.region_id.not_in(_seen(c.id, person_id, now)), CampaignRegion.n_labels + held_by_others < c.labels_per_region)
        .order_by(CampaignRegion.n_labels, CampaignRegion.region_id)
        .limit(n)
    )
    return list(conn.scalars(q))


def _pick_check(s: Session, c: CampaignInfo, person_id: int, now: datetime, done: int) -> int | None:
    """One unseen check item, unannounced, in about one task of every ``check_every``."""
    conn = s.connection()  # Core statements on the session's connection: the hot path skips the ORM layer
    if c.n_checks == 0 or (done + 1) % c.check_every:
        return None
    q = select(CampaignRegion.region_id).where(
        CampaignRegion.campaign_id == c.id, CampaignRegion.check_answer.is_not(None), CampaignRegion.region_id.not_in(_seen(c.id, person_id, now))
    )
    options = sorted(conn.scalars(q))
    return random.Random(person_id * 1_000_003 + done).choice(options) if options else None


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
    mine = (Lease.campaign_id == campaign.id, Lease.person_id == person_id)
    conn.execute(delete(Lease).where(*mine, Lease.expires_at <= now))
    held = list(conn.scalars(select(Lease.region_id).where(*mine).order_by(Lease.id)))
    if held:
        conn.execute(update(Lease).where(*mine).values(expires_at=expires))
    picks: list[int] = []
    need = want - len(held)
    if need > 0:
        done = conn.scalar(select(func.count()).select_from(Label).where(Label.campaign_id == campaign.id, Label.person_id == person_id)) or 0
        check = _pick_check(s, campaign, person_id, now, done + len(held))
        if check is not None:
            picks.append(check)
        picks += _pick_regular(s, campaign, person_id, now, need - len(picks))
        if picks:
            conn.execute(Lease.__table__.insert(), [
                {"campaign_id": campaign.id, "region_id": r, "person_id": person_id, "created_at": now, "expires_at": expires} for r in picks
            ])
    order = held + picks
    if not order:
        return []
    rows = {
        r[0]: r
        for r in conn.execute(
            select(RegionRow.id, Prediction.image_id, Prediction.predicted, Prediction.confidence)
            .join(Prediction, Prediction.id == RegionRow.prediction_id).where(RegionRow.id.in_(order))
        )
    }
    return [Task(r, rows[r][1], rows[r][2], float(rows[r][3]), expires) for r in order]


def _campaign_region(s: Session, campaign_id: int, region_id: int) -> CampaignRegion:
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
    _campaign_region(s, campaign.id, region_id)
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


# --- reading labels -----------------------------------------------------------------------------


def person_progress(s: Session, campaign: CampaignInfo, person_id: int) -> tuple[int, int]:
    """(labels this person gave in the campaign, regions in the campaign)."""
    done = s.scalar(select(func.count()).where(Label.campaign_id == campaign.id, Label.person_id == person_id)) or 0
    return int(done), campaign.n_regions


def region_classes(s: Session, campaign_id: int) -> dict[int, str]:
    """Predicted class of every region in the campaign."""
    return dict(
        s.execute(
            select(CampaignRegion.region_id, Prediction.predicted)
            .join(RegionRow, RegionRow.id == CampaignRegion.region_id).join(Prediction, Prediction.id == RegionRow.prediction_id)
            .where(CampaignRegion.campaign_id == campaign_id)
        ).all()
    )


def _to_entities(raw: list[list[object]] | None) -> tuple[tuple[str, tuple[str, ...]], ...]:
    return tuple((str(e[0]), tuple(str(a) for a in e[1])) for e in (raw or []))  # type: ignore[union-attr]


def judgments(s: Session, campaign_id: int) -> list[Judgment]:
    rows = s.execute(
        select(Label.region_id, Person.name, Label.entities, Label.unsure).join(Person, Person.id == Label.person_id)
        .where(Label.campaign_id == campaign_id).order_by(Label.id)
    )
    return [Judgment(r, name, _to_entities(ents), bool(unsure)) for r, name, ents, unsure in rows]


def check_answers(s: Session, campaign_id: int) -> dict[int, Judgment]:
    """Known answers of the campaign's check items, as judgments by "check"."""
    rows = s.execute(select(CampaignRegion.region_id, CampaignRegion.check_answer).where(CampaignRegion.campaign_id == campaign_id, CampaignRegion.check_answer.is_not(None)))
    return {r: Judgment(r, "check", _to_entities(a)) for r, a in rows}


def set_check_answer(s: Session, *, campaign_id: int, region_id: int, entities: Entities | None) -> None:
    """Make a region a check item with this known answer ([] = nothing recognisable), or a normal one again (None)."""
    cr = _campaign_region(s, campaign_id, region_id)
    if entities is not None and cr.example_answer is not None:
        raise ConflictError(f"region {region_id} is an example shown with the instructions; it cannot be a check item too.")
    cr.check_answer = None if entities is None else [[e, a] for e, a in entities]
    s.flush()
    c = s.get(Campaign, campaign_id)
    if c is not None:
        c.n_checks = s.scalar(select(func.count(CampaignRegion.check_answer)).where(CampaignRegion.campaign_id == campaign_id)) or 0


def set_example(s: Session, *, campaign_id: int, region_id: int, entities: Entities | None) -> None:
    """Show a region with the instructions as an example with this answer, or stop showing it (None).

    An example is never handed out as a task; a region cannot be an example and a check item at once.
    """
    cr = _campaign_region(s, campaign_id, region_id)
    if entities is not None and cr.check_answer is not None:
        raise ConflictError(f"region {region_id} is a check item; an example is shown to everyone, so make it a normal region first.")
    if entities is not None and cr.n_labels:
        raise ConflictError(f"region {region_id} has labels already; choose an unlabelled region as an example.")
    cr.example_answer = None if entities is None else [[e, a] for e, a in entities]


def examples(s: Session, campaign_id: int) -> list[tuple[int, str]]:
    """(region id, answer text) of the campaign's examples."""
    rows = s.execute(select(CampaignRegion.region_id, CampaignRegion.example_answer).where(
        CampaignRegion.campaign_id == campaign_id, CampaignRegion.example_answer.is_not(None)).order_by(CampaignRegion.region_id))
    return [(r, format_label_text([(e, list(a)) for e, a in _to_entities(ans)]) or "nothing recognisable") for r, ans in rows]


def synonym_rules(s: Session, campaign_id: int) -> tuple[SynonymRules, list[tuple[str, str]]]:
    """The campaign's validated synonym rules and the suggestion pairs the analyst rejected."""
    merges, splits, rejected = [], [], []
    for r in s.scalars(select(SynonymRule).where(SynonymRule.campaign_id == campaign_id).order_by(SynonymRule.id)):
        if r.kind in ("merge", "merge-attribute"):
            merges.append(Merge(r.source, r.target, "attribute" if r.kind == "merge-attribute" else "entity"))
        elif r.kind == "split":
            splits.append(Split(r.source, tuple(sorted(r.targets.items()))))
        else:
            rejected.append((r.source, r.target))
    return build_rules(merges, splits), rejected


def add_synonym_rule(s: Session, *, campaign_id: int, kind: str, source: str, target: str = "", targets: dict[str, str] | None = None, by: str = "") -> int:
    """Add a merge, attribute merge, split or rejection; the whole rule set is checked before it is kept."""
    if kind not in ("merge", "merge-attribute", "split", "reject"):
        raise InvalidRequestError(f"unknown rule kind {kind!r}.")
    source, target = normalise_label(source), normalise_label(target)
    targets = {str(k): normalise_label(v) for k, v in (targets or {}).items() if normalise_label(v)}
    if not source:
        raise InvalidRequestError("give the label the rule applies to.")
    if kind != "split" and not target:
        raise InvalidRequestError("give the label to merge it into.")
    row = SynonymRule(campaign_id=campaign_id, kind=kind, source=source, target=target, targets=targets, created_by=by)
    s.add(row)
    s.flush()
    try:
        synonym_rules(s, campaign_id)
    except Exception as exc:
        raise InvalidRequestError(str(exc)) from None
    return row.id


@dataclass(frozen=True)
class RuleRow:
    id: int
    kind: str
    source: str
    target: str
    targets: dict[str, str]
    created_by: str
    created_at: datetime


def synonym_rule_rows(s: Session, campaign_id: int) -> list[RuleRow]:
    """The campaign's rules as stored, newest first (for the editor)."""
    rows = s.scalars(select(SynonymRule).where(SynonymRule.campaign_id == campaign_id).order_by(SynonymRule.id.desc()))
    return [RuleRow(r.id, r.kind, r.source, r.target, dict(r.targets or {}), r.created_by, r.created_at) for r in rows]


def delete_synonym_rule(s: Session, *, campaign_id: int, rule_id: int) -> None:
    row = s.get(SynonymRule, rule_id)
    if row is None or row.campaign_id != campaign_id:
        raise NotFoundError(f"rule {rule_id} does not exist in campaign {campaign_id}.")
    s.delete(row)


def label_counts(s: Session, campaign_id: int, rules: SynonymRules | None = None) -> tuple[Counter[str], Counter[str]]:
    """How often each normalised entity and attribute was used in the campaign (through the rules)."""
    rules = rules or SynonymRules()
    entities: Counter[str] = Counter()
    attributes: Counter[str] = Counter()
    for (raw,) in s.execute(select(Label.entities).where(Label.campaign_id == campaign_id)):
        for e in raw or []:
            name = rules.entity(normalise_label(str(e[0])))  # type: ignore[index]
            if name:
                entities[name] += 1
            for a in e[1]:  # type: ignore[index, union-attr]
                attr = rules.attribute(normalise_label(str(a)))
                if attr:
                    attributes[attr] += 1
    return entities, attributes


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
            given = Judgment(region, name, _to_entities(ents))
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


def raw_labels(s: Session, campaign_id: int) -> pd.DataFrame:
    """Every label as long rows: one per entity named (a row with an empty entity for nothing recognisable)."""
    rows = s.execute(
        select(Label.id, Label.region_id, Prediction.image_id, ImageRow.path, Prediction.predicted, Person.name, Label.entities,
               Label.unsure, Label.submitted_at, Label.seconds_spent, CampaignRegion.check_answer)
        .join(Person, Person.id == Label.person_id).join(RegionRow, RegionRow.id == Label.region_id)
        .join(Prediction, Prediction.id == RegionRow.prediction_id).join(ImageRow, ImageRow.id == Prediction.image_id)
        .join(CampaignRegion, (CampaignRegion.region_id == Label.region_id) & (CampaignRegion.campaign_id == Label.campaign_id))
        .where(Label.campaign_id == campaign_id).order_by(Label.id)
    ).all()
    out = []
    for label_id, region, image, path, predicted, name, ents, unsure, at, secs, answer in rows:
        base = {"label_id": label_id, "region": region, "image": image, "image_path": path, "predicted": predicted, "annotator": name}
        tail = {"unsure": int(bool(unsure)), "check_item": int(answer is not None), "submitted_at": at.isoformat(sep=" ", timespec="seconds"), "seconds_spent": secs}
        for e, attrs in _to_entities(ents) or (("", ()),):
            out.append({**base, "entity": e, "attributes": ", ".join(attrs), **tail})
    columns = ["label_id", "region", "image", "image_path", "predicted", "annotator", "entity", "attributes", "unsure", "check_item", "submitted_at", "seconds_spent"]
    return pd.DataFrame(out, columns=columns)
