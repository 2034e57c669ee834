"""Assignment invariants: k distinct people per region, no repeats, leases that expire, check items, undo."""

from __future__ import annotations

import threading
import uuid
from collections import Counter
from datetime import timedelta

import pytest
from sqlalchemy import select

from app import campaigns
from app.db import write_session
from app.errors import ConflictError
from app.models import CampaignRegion, Label, utcnow
from app.people import ensure_person

pytestmark = pytest.mark.both_databases


def _campaign(factory, k: int = 2, **kw: object) -> campaigns.CampaignInfo:  # type: ignore[no-untyped-def]
    with write_session(factory) as s:
        cid = campaigns.create_campaign(s, name=f"c{k}{sorted(kw)}", run_id=1, labels_per_region=k, **kw)  # type: ignore[arg-type]
        return campaigns.get_campaign(s, cid)


def _person(factory, name: str) -> int:  # type: ignore[no-untyped-def]
    with write_session(factory) as s:
        return ensure_person(s, name, "annotator")


def _work(factory, c: campaigns.CampaignInfo, pid: int, *, now=None, limit: int = 10_000) -> list[int]:  # type: ignore[no-untyped-def]
    """Label until nothing is left for this person; returns the regions labelled, in order.

    As the app does it: one request hands out the next region, the next one stores its label.
    """
    done = []
    while len(done) < limit:
        with write_session(factory) as s:
            tasks = campaigns.lease_tasks(s, campaign=c, person_id=pid, now=now)
            if not tasks:
                return done
            rid = tasks[0].region_id
        with write_session(factory) as s:
            campaigns.save_label(s, campaign=c, region_id=rid, person_id=pid, entities=[("cap", [])], unsure=False, client_id=f"{pid}-{rid}-x", seconds_spent=1.0, now=now)
            done.append(rid)
    return done


def test_each_region_gets_k_distinct_people_least_covered_first(factory) -> None:  # type: ignore[no-untyped-def]
    c = _campaign(factory, k=2)
    a, b, d = (_person(factory, n) for n in ("ann", "bob", "dee"))
    first = _work(factory, c, a, limit=3)
    # Bob is handed the regions nobody has first, not Ann's.
    with write_session(factory) as s:
        offered = [t.region_id for t in campaigns.lease_tasks(s, campaign=c, person_id=b)]
    assert not set(offered) & set(first)
    for pid in (a, b, d):
        regions = _work(factory, c, pid)
        assert len(regions) == len(set(regions))  # nobody gets a region twice
    with factory() as s:
        per_region = Counter(s.scalars(select(Label.region_id).where(Label.campaign_id == c.id)))
    assert set(per_region.values()) == {2} and len(per_region) == c.n_regions


def test_concurrent_annotators_never_exceed_k_or_repeat(factory) -> None:  # type: ignore[no-untyped-def]
    c = _campaign(factory, k=3)
    people = [_person(factory, f"p{i}") for i in range(10)]
    errors: list[BaseException] = []

    def go(pid: int) -> None:
        try:
            _work(factory, c, pid)
        except BaseException as exc:  # pragma: no cover - reported below
            errors.append(exc)

    threads = [threading.Thread(target=go, args=(p,)) for p in people]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert not errors
    with factory() as s:
        rows = s.execute(select(Label.region_id, Label.person_id).where(Label.campaign_id == c.id)).all()
        kept = dict(s.execute(select(CampaignRegion.region_id, CampaignRegion.n_labels).where(CampaignRegion.campaign_id == c.id)).all())
    per_region = Counter(r for r, _ in rows)
    assert max(per_region.values()) == 3 and len(per_region) == c.n_regions  # all done, never more than k
    assert len(rows) == len(set(rows))  # no person twice on a region
    assert all(kept[r] == n for r, n in per_region.items())  # the kept counter agrees with the labels


def test_a_lease_holds_the_last_place_until_it_expires(factory) -> None:  # type: ignore[no-untyped-def]
    c = _campaign(factory, k=1, lease_seconds=60)
    a, b = _person(factory, "ann"), _person(factory, "bob")
    now = utcnow()
    with write_session(factory) as s:
        held = [t.region_id for t in campaigns.lease_tasks(s, campaign=c, person_id=a, now=now)]
    with write_session(factory) as s:
        others = [t.region_id for t in campaigns.lease_tasks(s, campaign=c, person_id=b, now=now)]
    assert held and not set(held) & set(others)
    with write_session(factory) as s, pytest.raises(ConflictError, match="last places"):
        campaigns.save_label(s, campaign=c, region_id=held[0], person_id=b, entities=[("tag", [])], unsure=False, client_id="bob-steals-1", seconds_spent=None, now=now)
    # Ann walks away; after the lease runs out her regions go back to the pool.
    later = now + timedelta(seconds=61)
    with write_session(factory) as s:
        campaigns.skip_region(s, campaign=c, region_id=others[0], person_id=b)
        campaigns.skip_region(s, campaign=c, region_id=others[1], person_id=b)
        regained = [t.region_id for t in campaigns.lease_tasks(s, campaign=c, person_id=b, now=later)]
    assert set(held) == set(regained)
    with write_session(factory) as s, pytest.raises(ConflictError, match="ran out"):
        campaigns.save_label(s, campaign=c, region_id=held[0], person_id=a, entities=[("tag", [])], unsure=False, client_id="ann-late-1", seconds_spent=None, now=later)


def test_check_items_come_unannounced_once_per_person(factory) -> None:  # type: ignore[no-untyped-def]
    c = _campaign(factory, k=1, check_every=3)
    with write_session(factory) as s:
        for r in (1, 2):
            campaigns.set_check_answer(s, campaign_id=c.id, region_id=r, entities=[("cap", ["red"])])
        c = campaigns.get_campaign(s, c.id)
    a, b = _person(factory, "ann"), _person(factory, "bob")
    seq_a, seq_b = _work(factory, c, a, limit=9), _work(factory, c, b, limit=9)
    for seq in (seq_a, seq_b):
        assert sorted(r for r in seq if r in (1, 2)) == [1, 2]  # both people see both check items, once
        assert min(seq.index(1), seq.index(2)) == 2  # the first one in the third task
    with factory() as s:
        annotators, _ = campaigns.campaign_progress(s, c)
    assert {x.name: x.check_items for x in annotators} == {"ann": 2, "bob": 2}
    assert all(x.check_score == 1.0 for x in annotators)  # "cap" names the known entity (attributes are not scored)


def test_examples_are_shown_not_handed_out(factory) -> None:  # type: ignore[no-untyped-def]
    c = _campaign(factory, k=1)
    with write_session(factory) as s:
        campaigns.set_example(s, campaign_id=c.id, region_id=3, entities=[("tag", ["yellow"])])
        assert campaigns.examples(s, c.id) == [(3, "tag: yellow")]
        with pytest.raises(ConflictError, match="example"):
            campaigns.set_check_answer(s, campaign_id=c.id, region_id=3, entities=[("tag", [])])
    done = _work(factory, c, _person(factory, "ann"))
    assert 3 not in done and len(done) == c.n_regions - 1


def test_a_persons_label_count_follows_stores_and_undos(factory) -> None:  # type: ignore[no-untyped-def]
    # The count kept between requests must equal counting the rows after every kind of change: labels by
    # this person and by another, an undo of the newest label (whose id SQLite hands out again), a rolled-back store.
    c = _campaign(factory, k=3)
    ann, bob = _person(factory, "ann"), _person(factory, "bob")

    def counted(pid: int) -> int:
        with factory() as s:
            n = campaigns.labels_done(s, c.id, pid)
            assert n == len(list(s.scalars(select(Label.id).where(Label.campaign_id == c.id, Label.person_id == pid))))
            return n

    assert counted(ann) == 0
    _work(factory, c, ann, limit=3)
    assert counted(ann) == 3
    _work(factory, c, bob, limit=2)
    _work(factory, c, ann, limit=2)
    assert (counted(ann), counted(bob)) == (5, 2)
    with write_session(factory) as s:
        assert campaigns.undo_last(s, campaign=c, person_id=ann) is not None
    assert counted(ann) == 4
    with write_session(factory) as s:  # the region undone comes back first, stored under the freed id
        task = campaigns.lease_tasks(s, campaign=c, person_id=ann)[0]
        campaigns.save_label(s, campaign=c, region_id=task.region_id, person_id=ann, entities=[("tag", [])], unsure=False, client_id="again-1",
                             seconds_spent=None)
    assert counted(ann) == 5
    with write_session(factory) as s:
        assert campaigns.undo_last(s, campaign=c, person_id=bob) is not None
    assert (counted(ann), counted(bob)) == (5, 1)
    with pytest.raises(RuntimeError), write_session(factory) as s:  # counted inside a transaction that is then rolled back
        task = campaigns.lease_tasks(s, campaign=c, person_id=bob)[0]
        campaigns.save_label(s, campaign=c, region_id=task.region_id, person_id=bob, entities=[("cap", [])], unsure=False, client_id="gone-1",
                             seconds_spent=None)
        assert campaigns.labels_done(s, c.id, bob) == 2
        raise RuntimeError("rolled back")
    assert counted(bob) == 1
    _work(factory, c, ann, limit=1)
    assert (counted(ann), counted(bob)) == (6, 1)
    # An undo, another person's label under the freed id, then a new label: nothing counted in between.
    with write_session(factory) as s:
        assert campaigns.undo_last(s, campaign=c, person_id=ann) is not None
    for pid in (bob, ann):
        with write_session(factory) as s:
            task = campaigns.lease_tasks(s, campaign=c, person_id=pid)[0]
            campaigns.save_label(s, campaign=c, region_id=task.region_id, person_id=pid, entities=[("rim", [])], unsure=False,
                                 client_id=f"later-{pid}", seconds_spent=None)
    assert (counted(ann), counted(bob)) == (6, 2)


def test_people_asking_at_the_same_moment_never_hold_more_than_k_places(factory) -> None:  # type: ignore[no-untyped-def]
    """Twelve people ask for work at once, in rounds, on a campaign with one place per region: no region is ever
    held by two of them, nor labelled twice (on PostgreSQL this rests on the row locks, not on one writer)."""
    c = _campaign(factory, k=1)
    people = [_person(factory, f"q{i}") for i in range(12)]
    errors: list[BaseException] = []
    stored: list[tuple[int, int]] = []

    def ask(pid: int, gate: threading.Barrier, held: dict[int, list[int]]) -> None:
        try:
            gate.wait()
            with write_session(factory) as s:
                held[pid] = [t.region_id for t in campaigns.lease_tasks(s, campaign=c, person_id=pid)]
        except BaseException as exc:  # pragma: no cover - reported below
            errors.append(exc)

    for _ in range(2):
        gate = threading.Barrier(len(people), timeout=120)
        held: dict[int, list[int]] = {}
        threads = [threading.Thread(target=ask, args=(p, gate, held)) for p in people]
        for t in threads:
            t.start()
        for t in threads:
            t.join()
        assert not errors
        everyone = [r for regions in held.values() for r in regions]
        assert len(everyone) == len(set(everyone)) and everyone  # every place held once
        for pid, regions in held.items():
            with write_session(factory) as s:
                campaigns.save_label(s, campaign=c, region_id=regions[0], person_id=pid, entities=[("cap", [])], unsure=False,
                                     client_id=uuid.uuid4().hex, seconds_spent=None)
            stored.append((regions[0], pid))
    with factory() as s:
        per_region = Counter(s.scalars(select(Label.region_id).where(Label.campaign_id == c.id)))
    assert max(per_region.values()) == 1 and sum(per_region.values()) == len(stored) == 24
