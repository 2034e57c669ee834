"""What the server keeps beside the database between runs (a campaign's labels, a run's predictions, the settling
checkpoints): a restart reads them back instead of recomputing, and only while the database still holds what they were
made from; a torn, damaged or stale file is ignored and everything is read from the database as if it were not there."""

from __future__ import annotations

import shutil
import stat
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from analysis.pipeline import campaign_votes
from app import campaigns, store
from app.db import write_session
from app.layout import ProjectLayout
from app.models import Campaign
from app.people import ensure_person
from app.services import campaign_analysis, label_snapshot, run_snapshot, stopping
from app.services.campaign_analysis import ResultsCache
from app.services.label_store import LabelStore

pytestmark = pytest.mark.both_databases


@pytest.fixture()
def campaign(factory) -> campaigns.CampaignInfo:  # type: ignore[no-untyped-def]
    with write_session(factory) as s:
        cid = campaigns.create_campaign(s, name="kept", run_id=1, labels_per_region=3, settle_window=10)
        return campaigns.get_campaign(s, cid)


def _label(factory, c: campaigns.CampaignInfo, name: str, *, limit: int = 10_000, tag: str = "") -> list[str]:  # type: ignore[no-untyped-def]
    """``name`` labels up to ``limit`` regions (its predicted class's mark, and ``tag`` when given); the client ids used."""
    with factory() as s:
        region_class = campaigns.region_classes(s, c.id)
    with write_session(factory) as s:
        pid = ensure_person(s, name, "annotator")
    done: list[str] = []
    while len(done) < limit:
        with write_session(factory) as s:
            tasks = campaigns.lease_tasks(s, campaign=c, person_id=pid)
            if not tasks:
                break
            rid = tasks[0].region_id
            entities = [(f"mark of {region_class[rid]}", ["white"] if rid % 2 else [])] + ([(tag, [])] if tag else [])
            client_id = f"{name}-{rid}-{tag}"
            campaigns.save_label(s, campaign=c, region_id=rid, person_id=pid, entities=entities, unsure=rid % 7 == 0,
                                 client_id=client_id, seconds_spent=1.0)
            done.append(client_id)
    return done


def _undo(factory, c: campaigns.CampaignInfo, name: str) -> None:  # type: ignore[no-untyped-def]
    with write_session(factory) as s:
        pid = ensure_person(s, name, "annotator")
        assert campaigns.undo_last(s, campaign=c, person_id=pid) is not None


def _agrees(factory, held: LabelStore, c: campaigns.CampaignInfo) -> None:  # type: ignore[no-untyped-def]
    """What ``held`` hands on equals a fresh read of the database, judgments and votes."""
    with factory() as s:
        version = store.labels_version(s, c.id)
        fresh = campaigns.judgments(s, c.id)
        assert held.judgments(s, c.id, version) == fresh
        rules, region_class = campaigns.synonym_rules(s, c.id)[0], campaigns.region_classes(s, c.id)
        a = campaign_votes(fresh, rules=rules, region_class=region_class)
        b = campaign_votes(held.read(s, c.id, version, rules=rules, region_class=region_class), rules=rules, region_class=region_class)
        assert (a.regions, a.annotators, a.concepts, a.families) == (b.regions, b.annotators, b.concepts, b.families)
        for name in ("pair_region", "pair_concept", "known", "vote_pair", "vote_annotator", "vote_yes"):
            assert np.array_equal(getattr(a, name), getattr(b, name)), name


class _Counting(LabelStore):
    """A label store that counts its full reads from the database."""

    full_reads = 0

    def _fetch(self, s, campaign_id, after):  # type: ignore[no-untyped-def]
        if after == 0:
            _Counting.full_reads += 1
        return super()._fetch(s, campaign_id, after)


def _restart(folder: Path) -> _Counting:
    _Counting.full_reads = 0
    return _Counting(snapshots=folder, save_every=1)


def test_a_restart_reads_the_kept_labels_and_stays_exact_through_new_labels_undos_and_a_reused_id(factory, campaign, project: Path) -> None:  # type: ignore[no-untyped-def]
    folder = ProjectLayout(project).label_cache
    _label(factory, campaign, "ann", limit=12)
    held = _restart(folder)
    _agrees(factory, held, campaign)
    assert _Counting.full_reads == 1  # nothing kept yet: read whole, then kept
    kept = label_snapshot.path_for(folder, campaign.id)
    assert kept.is_file() and stat.S_IMODE(kept.stat().st_mode) == 0o600 and stat.S_IMODE(folder.stat().st_mode) == 0o700

    for change in ("labels", "undo", "undo the last id, then label again", "two undos", "nothing"):
        if change == "labels":
            _label(factory, campaign, "bob", limit=5, tag="scrap")
        elif change == "undo":
            _undo(factory, campaign, "ann")
        elif change.startswith("undo the last"):
            _undo(factory, campaign, "bob")  # the highest id, freed and handed out again (SQLite) with another answer
            _label(factory, campaign, "bob", limit=1, tag="hinge")
        elif change == "two undos":
            _undo(factory, campaign, "bob")
            _undo(factory, campaign, "ann")
        held = _restart(folder)
        _agrees(factory, held, campaign)
        assert _Counting.full_reads <= 1, change  # read from the file and brought up to date, or (a reused id) read whole
        if change in ("labels", "undo", "two undos", "nothing"):
            assert _Counting.full_reads == 0, change


@pytest.mark.parametrize("damage", ["torn", "garbage", "another database", "stale rows", "renamed campaign"])
def test_a_damaged_or_foreign_labels_file_is_ignored(factory, campaign, project: Path, damage: str) -> None:  # type: ignore[no-untyped-def]
    folder = ProjectLayout(project).label_cache
    _label(factory, campaign, "ann", limit=10)
    _agrees(factory, _restart(folder), campaign)
    kept = label_snapshot.path_for(folder, campaign.id)
    data = kept.read_bytes()
    if damage == "torn":
        kept.write_bytes(data[: len(data) // 2])
    elif damage == "garbage":
        kept.write_bytes(bytes(range(256)) * 8)
    elif damage in ("another database", "stale rows"):
        with factory() as s:
            snap = label_snapshot.read(folder, s, campaign.id)
        assert snap is not None
        rows = snap.rows.copy()
        if damage == "stale rows":
            rows[0, 0] += 1  # a region moved: consistent in itself (its sums are rewritten), not with the database
        else:
            rows[:, 2] = 0  # every label says the first thing: the same ids, other answers
            rows[:, 0] = rows[::-1, 0]
        label_snapshot.write(folder, label_snapshot.Snapshot(snap.campaign_id, snap.identity, snap.ids, rows, snap.clients, snap.person_ids,
                                                             snap.texts, snap.entities, snap.withdrawn))
    else:
        with write_session(factory) as s:
            s.get(Campaign, campaign.id).name = "another"  # type: ignore[union-attr]
    held = _restart(folder)
    _agrees(factory, held, campaign)
    assert _Counting.full_reads == 1  # swapped in place, regions add up the same: their sums weighted by id do not


def test_a_swapped_answer_in_the_kept_labels_is_caught_by_the_zip_checksum(factory, campaign, project: Path) -> None:  # type: ignore[no-untyped-def]
    # A flipped byte inside the file (a flaky disk) fails the archive's own checksum: read whole instead.
    folder = ProjectLayout(project).label_cache
    _label(factory, campaign, "ann", limit=10)
    _agrees(factory, _restart(folder), campaign)
    kept = label_snapshot.path_for(folder, campaign.id)
    data = bytearray(kept.read_bytes())
    at = data.find(b"rows.npy")
    data[at + 200] ^= 0x01  # inside the rows array's data
    kept.write_bytes(bytes(data))
    held = _restart(folder)
    _agrees(factory, held, campaign)
    assert _Counting.full_reads == 1


def test_an_unwritable_cache_folder_changes_nothing_but_speed(factory, campaign, project: Path) -> None:  # type: ignore[no-untyped-def]
    folder = ProjectLayout(project).label_cache
    shutil.rmtree(folder, ignore_errors=True)  # what the saliency job kept there
    folder.write_text("not a folder")  # mkdir and every write fail
    _label(factory, campaign, "ann", limit=6)
    held = _restart(folder)
    _agrees(factory, held, campaign)
    assert folder.read_text() == "not a folder"


def test_the_kept_predictions_equal_the_stored_ones_and_a_changed_run_is_read_again(factory, campaign, project: Path) -> None:  # type: ignore[no-untyped-def]
    folder = ProjectLayout(project).label_cache
    with factory() as s:
        fresh = store.prediction_frame(s, campaign.run_id)
        first = campaign_analysis.prediction_frame(s, campaign.run_id, cache=ResultsCache(labels=LabelStore(snapshots=folder)))
        assert (folder / f"predictions-{campaign.run_id}.npz").is_file()
        again = campaign_analysis.prediction_frame(s, campaign.run_id, cache=ResultsCache(labels=LabelStore(snapshots=folder)))
    for frame in (first, again):
        pd.testing.assert_frame_equal(frame, fresh, check_exact=True)
        assert frame.dtypes.to_dict() == fresh.dtypes.to_dict()
    with factory() as s:
        sums = run_snapshot.run_sums(s, campaign.run_id)
        assert run_snapshot.read(folder, campaign.run_id, sums) is not None
        assert run_snapshot.read(folder, campaign.run_id, (*sums[:-1], int(str(sums[-1])) + 1)) is None  # a region more: read again
        assert run_snapshot.read(folder, campaign.run_id, ()) is None  # the run is gone
    (folder / f"predictions-{campaign.run_id}.npz").write_bytes(b"PK\x03\x04 torn")
    with factory() as s:
        torn = campaign_analysis.prediction_frame(s, campaign.run_id, cache=ResultsCache(labels=LabelStore(snapshots=folder)))
    pd.testing.assert_frame_equal(torn, fresh, check_exact=True)


def test_a_restart_takes_the_settling_checkpoints_from_their_file(factory, campaign, project: Path, checkpoints_made: list[int]) -> None:  # type: ignore[no-untyped-def]
    folder = ProjectLayout(project).label_cache
    made = checkpoints_made
    assert len(_label(factory, campaign, "ann")) >= 15 and len(_label(factory, campaign, "bob")) >= 15

    def status() -> stopping.StoppingStatus:
        with factory() as s:
            return stopping.stopping_status(s, campaign, min_support=0.01, cache=ResultsCache(labels=LabelStore(snapshots=folder)))

    first = status()
    assert len(first.checkpoints) == 2 and sorted(made) == sorted(first.checkpoints)
    with factory() as s:
        fresh = stopping.stopping_status(s, campaign, min_support=0.01)
    made.clear()
    again = status()  # a restart: only the results now are computed, the checkpoints come from the file
    assert made == [] and (again.checkpoints, again.classes) == (first.checkpoints, first.classes) == (fresh.checkpoints, fresh.classes)
    (folder / f"settling-{campaign.id}.json").write_text('{"format": "heedmap settling checkpoints 1", "entries": {"x": [[1, 2]]}}')
    made.clear()
    damaged = status()
    assert sorted(made) == sorted(damaged.checkpoints) and damaged.classes == fresh.classes
    _undo(factory, campaign, "ann")  # a label among the checkpoints' undone: their key changes, they are made again
    made.clear()
    undone = status()
    with factory() as s:
        assert undone.classes == stopping.stopping_status(s, campaign, min_support=0.01).classes
    assert sorted(made) == sorted(undone.checkpoints)


def test_the_collector_pause_nests_across_threads_and_leaves_it_as_it_was() -> None:
    import gc
    import threading

    from app.services.campaign_analysis import collector_paused

    assert gc.isenabled()
    inside = threading.Event()
    release = threading.Event()

    def other() -> None:
        with collector_paused():
            inside.set()
            release.wait(5)

    t = threading.Thread(target=other)
    with collector_paused():
        assert not gc.isenabled()
        t.start()
        assert inside.wait(5)
    assert not gc.isenabled()  # the other thread's result is still being made
    release.set()
    t.join(5)
    assert gc.isenabled()
    gc.disable()  # off before: stays off after
    try:
        with collector_paused():
            pass
        assert not gc.isenabled()
    finally:
        gc.enable()


def test_a_restart_reuses_the_kept_readings_and_reads_again_under_new_synonym_rules(factory, campaign, project: Path,
                                                                                  monkeypatch: pytest.MonkeyPatch) -> None:  # type: ignore[no-untyped-def]
    from app.services import label_store

    folder = ProjectLayout(project).label_cache
    _label(factory, campaign, "ann", limit=12)
    _label(factory, campaign, "bob", limit=12, tag="Scraps")
    read: list[object] = []
    real = label_store.read_label

    def counted(*args, **kw):  # type: ignore[no-untyped-def]
        read.append(args[0])
        return real(*args, **kw)

    monkeypatch.setattr(label_store, "read_label", counted)
    _agrees(factory, _restart(folder), campaign)
    assert read  # nothing kept yet: every distinct label read, then kept with the labels
    read.clear()
    _agrees(factory, _restart(folder), campaign)
    assert read == []  # a restart takes the readings from the file
    with write_session(factory) as s:
        campaigns.add_synonym_rule(s, campaign_id=campaign.id, kind="merge", source="scrap", target="paper scrap")
    _agrees(factory, _restart(folder), campaign)  # other rules: read again, and the same as a fresh read
    assert read


def test_the_saliency_job_keeps_its_finished_runs_predictions(factory, project: Path) -> None:  # type: ignore[no-untyped-def]
    # The project fixture ran the job: its prediction frame is kept beside the database, equal to the stored rows.
    folder = ProjectLayout(project).label_cache
    with factory() as s:
        run = store.latest_run_id(s)
        assert run is not None
        kept = run_snapshot.read(folder, run, run_snapshot.run_sums(s, run))
        fresh = store.prediction_frame(s, run)
    assert kept is not None
    pd.testing.assert_frame_equal(kept, fresh, check_exact=True)


def test_a_database_restored_and_labelled_again_alike_is_read_whole(factory, campaign, project: Path) -> None:  # type: ignore[no-untyped-def]
    # As after a backup restored underneath: the last label is gone and the same person labels the same region again,
    # with an answer as long, under the same id. Counts and sums agree; the new submission's client id does not.
    from sqlalchemy import delete, insert, select

    from app.models import Label

    folder = ProjectLayout(project).label_cache
    _label(factory, campaign, "ann", limit=8)
    _agrees(factory, _restart(folder), campaign)
    with write_session(factory) as s:
        last = s.execute(select(Label.id, Label.region_id, Label.person_id, Label.entities, Label.unsure)
                         .where(Label.campaign_id == campaign.id).order_by(Label.id.desc()).limit(1)).one()
        text = last.entities[0][0]
        swapped = [[text[::-1] if text[::-1] != text else text.upper(), list(last.entities[0][1])], *last.entities[1:]]
        s.execute(delete(Label).where(Label.id == last.id))
        s.execute(insert(Label).values(id=last.id, client_id="restored-and-labelled-again", campaign_id=campaign.id, region_id=last.region_id,
                                       person_id=last.person_id, entities=swapped, unsure=last.unsure))
    held = _restart(folder)
    _agrees(factory, held, campaign)
    assert _Counting.full_reads == 1


def test_settling_checkpoints_kept_for_another_campaign_of_the_same_id_are_not_used(factory, campaign, project: Path,
                                                                                   checkpoints_made: list[int]) -> None:  # type: ignore[no-untyped-def]
    folder = ProjectLayout(project).label_cache
    assert len(_label(factory, campaign, "ann")) >= 15 and len(_label(factory, campaign, "bob")) >= 15

    def status() -> stopping.StoppingStatus:
        with factory() as s:
            c = campaigns.get_campaign(s, campaign.id)
            return stopping.stopping_status(s, c, min_support=0.01, cache=ResultsCache(labels=LabelStore(snapshots=folder)))

    first = status()
    assert sorted(checkpoints_made) == sorted(first.checkpoints)
    with write_session(factory) as s:
        s.get(Campaign, campaign.id).name = "another"  # type: ignore[union-attr]  # as another database's campaign 1 would be
    checkpoints_made.clear()
    status()
    assert sorted(checkpoints_made) == sorted(first.checkpoints)  # made again, not taken from the file
