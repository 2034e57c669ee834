"""Grouped labelling: each ticked crop keeps its own label with the group as provenance, and every
guarantee of single-crop labelling holds (k per region, no repeats, leases, retries, roles)."""

from __future__ import annotations

from collections import Counter
from pathlib import Path

import numpy as np
import pytest
from fastapi.testclient import TestClient
from sqlalchemy import func, select

from analysis.model_io import LoadedModel
from app import campaigns
from app.cli import main
from app.db import make_engine, session_factory, write_session
from app.embeddings import embed_run, load_embeddings
from app.errors import ConflictError, ForbiddenError, InvalidRequestError
from app.models import CampaignRegion, GroupLabel, Label, Lease, RegionGroupMember, RegionRow
from app.people import ensure_person

from .conftest import csrf_of, join

pytestmark = pytest.mark.both_databases


@pytest.fixture()
def grouped(project: Path, factory, varied_model: LoadedModel) -> campaigns.CampaignInfo:  # type: ignore[no-untyped-def]
    """A campaign (two people per region) whose regions are embedded with the run's model and grouped in eights."""
    embed_run(factory, project, 1, varied_model)
    emb = load_embeddings(project, 1)
    with write_session(factory) as s:
        cid = campaigns.create_campaign(s, name="grouped", run_id=1, labels_per_region=2)
        c = campaigns.get_campaign(s, cid)
        campaigns.make_groups(s, campaign=c, region_ids=list(emb.region_ids), vectors=emb.vectors, size=8, max_class_share=0.5)
    return c


def _person(factory, name: str) -> int:  # type: ignore[no-untyped-def]
    with write_session(factory) as s:
        return ensure_person(s, name, "annotator")


def test_embeddings_cover_every_region_of_the_run_in_one_file(project: Path, factory, varied_model: LoadedModel) -> None:  # type: ignore[no-untyped-def]
    got = embed_run(factory, project, 1, varied_model)
    emb = load_embeddings(project, 1)
    with factory() as s:
        regions = sorted(s.scalars(select(RegionRow.id)))
    assert sorted(emb.region_ids.tolist()) == regions and got.regions == len(regions)
    assert emb.vectors.shape == (len(regions), got.dimensions) and np.isfinite(emb.vectors).all()
    assert [p.name for p in (project / "runs" / "1").iterdir() if p.name.startswith("region_embeddings")] == ["region_embeddings.npz"]


def test_group_label_gives_each_ticked_crop_its_own_label_with_the_group_as_provenance(factory, grouped: campaigns.CampaignInfo) -> None:  # type: ignore[no-untyped-def]
    ann = _person(factory, "ann")
    with write_session(factory) as s:
        task = campaigns.lease_group(s, campaign=grouped, person_id=ann)
        assert task is not None and len(task.crops) >= 4
        shown = [t.region_id for t in task.crops]
        ticked, misfit = shown[1:], shown[0]
        got = campaigns.save_group_label(s, campaign=grouped, person_id=ann, group_id=task.group_id, ticked=ticked,
                                         entities=[("cap", ["red"])], unsure=False, client_id="g-ann-1", seconds_spent=12.0)
    assert got.stored and sorted(got.labelled) == sorted(ticked) and got.returned == (misfit,) and got.lost == ()
    with factory() as s:
        gl = s.scalar(select(GroupLabel))
        rows = s.execute(select(Label.region_id, Label.entities, Label.group_label_id, Label.seconds_spent).where(Label.person_id == ann)).all()
        assert sorted(r[0] for r in rows) == sorted(ticked)
        assert all(r[1] == [["cap", ["red"]]] and r[2] == gl.id for r in rows)
        assert sum(r[3] for r in rows) == pytest.approx(12.0)  # the group's time shared over its crops
        assert s.scalar(select(func.count()).select_from(Lease).where(Lease.person_id == ann)) == 0  # the misfit's place is back
        # Aggregation reads them as ordinary judgments, one per crop.
        judged = campaigns.judgments(s, grouped.id)
        assert sorted(j.region_id for j in judged) == sorted(ticked)
        assert {j.entities for j in judged} == {(("cap", ("red",)),)}
    # The misfit is not skipped: it goes back to the queue (here: offered to ann one at a time, never in that group again).
    with write_session(factory) as s:
        again = campaigns.lease_group(s, campaign=grouped, person_id=ann)
        assert again is None or again.group_id != task.group_id
        singles = [t.region_id for t in campaigns.lease_tasks(s, campaign=grouped, person_id=ann, want=200)]
    assert misfit in singles or again is not None


def test_each_ticked_crop_keeps_what_it_shows_besides_what_the_group_shares(factory, grouped: campaigns.CampaignInfo) -> None:  # type: ignore[no-untyped-def]
    """A group names what its crops share; a crop's own additions join its label, as on the single-crop page."""
    ann = _person(factory, "ann")
    with write_session(factory) as s:
        task = campaigns.lease_group(s, campaign=grouped, person_id=ann)
        assert task is not None and len(task.crops) >= 3
        shown = [t.region_id for t in task.crops]
        with pytest.raises(InvalidRequestError, match="not ticked"):
            campaigns.save_group_label(s, campaign=grouped, person_id=ann, group_id=task.group_id, ticked=shown[1:], entities=[("cap", [])],
                                       unsure=False, client_id="g-extra-0", seconds_spent=None, extras={shown[0]: [("tag", [])]})
        with pytest.raises(InvalidRequestError, match="nothing recognisable"):
            campaigns.save_group_label(s, campaign=grouped, person_id=ann, group_id=task.group_id, ticked=shown, entities=[],
                                       unsure=False, client_id="g-extra-0", seconds_spent=None, extras={shown[0]: [("tag", [])]})
    extras = {shown[0]: [("tag", ["yellow"]), ("Caps", ["red"])], shown[1]: [("body", ["blue"])]}
    for _ in range(2):  # the second is a retry: stored once
        with write_session(factory) as s:
            got = campaigns.save_group_label(s, campaign=grouped, person_id=ann, group_id=task.group_id, ticked=shown, entities=[("cap", [])],
                                             unsure=False, client_id="g-extra-1", seconds_spent=None, extras=extras)
    assert not got.stored and sorted(got.labelled) == sorted(shown)
    with factory() as s:
        stored = dict(s.execute(select(Label.region_id, Label.entities).where(Label.person_id == ann)).all())
    assert stored[shown[0]] == [["cap", ["red"]], ["tag", ["yellow"]]]  # "Caps" is the shared cap: its attribute joins it
    assert stored[shown[1]] == [["cap", []], ["body", ["blue"]]]
    assert all(stored[r] == [["cap", []]] for r in shown[2:])
    with write_session(factory) as s, pytest.raises(ConflictError, match="other content"):
        campaigns.save_group_label(s, campaign=grouped, person_id=ann, group_id=task.group_id, ticked=shown, entities=[("cap", [])],
                                   unsure=False, client_id="g-extra-1", seconds_spent=None, extras={shown[0]: [("tag", [])]})


def test_crop_entities_merge_additions_into_what_the_group_shares() -> None:
    """Invariants of the merge: shared things first, an addition of a shared thing adds its attributes once, new things follow."""
    shared = [("cap", ["red"]), ("label band", [])]
    assert campaigns.crop_entities(shared, []) == shared
    assert campaigns.crop_entities(shared, [("Cap", ["Red", "round"]), ("tag", [])]) == [("cap", ["red", "round"]), ("label band", []), ("tag", [])]
    assert campaigns.crop_entities([], [("tag", ["yellow"])]) == [("tag", ["yellow"])]
    from app.campaigns.groups import crop_additions

    extra = [("Cap", ["Red", "round"]), ("tag", [])]
    assert crop_additions(shared, campaigns.crop_entities(shared, extra)) == [("cap", ["round"]), ("tag", [])]


def test_undo_withdraws_the_whole_group_judgment_and_hands_the_group_back(factory, grouped: campaigns.CampaignInfo) -> None:  # type: ignore[no-untyped-def]
    ann = _person(factory, "ann")
    with write_session(factory) as s:
        task = campaigns.lease_group(s, campaign=grouped, person_id=ann)
        assert task is not None
        shown = [t.region_id for t in task.crops]
        campaigns.save_group_label(s, campaign=grouped, person_id=ann, group_id=task.group_id, ticked=shown[1:], entities=[("cap", ["red"])],
                                   unsure=False, client_id="g-undo-1", seconds_spent=None, extras={shown[1]: [("tag", [])]})
    with factory() as s:
        before = dict(s.execute(select(CampaignRegion.region_id, CampaignRegion.n_labels).where(CampaignRegion.campaign_id == grouped.id)).all())
    with write_session(factory) as s:
        undone = campaigns.undo_last_submission(s, campaign=grouped, person_id=ann)
    assert undone is not None and undone.group_id == task.group_id and sorted(undone.regions) == sorted(shown[1:]) and undone.text == "cap: red"
    assert undone.additions == ((shown[1], "tag"),)  # what that crop showed besides comes back to edit too
    with factory() as s:
        assert s.scalar(select(func.count()).select_from(Label).where(Label.person_id == ann)) == 0  # every crop's label, not only the last
        assert s.scalar(select(func.count()).select_from(GroupLabel)) == 0
        after = dict(s.execute(select(CampaignRegion.region_id, CampaignRegion.n_labels).where(CampaignRegion.campaign_id == grouped.id)).all())
    assert all(after[r] == before[r] - 1 for r in shown[1:]) and all(after[r] == before[r] for r in after if r not in shown[1:])
    with factory() as s:  # the same group is the person's again, with every crop it showed
        held = campaigns.held_group(s, campaign=grouped, person_id=ann)
    assert held is not None and held.group_id == task.group_id and [t.region_id for t in held.crops] == shown
    with write_session(factory) as s, pytest.raises(ConflictError, match="undone"):  # a late retry of the undone submit stores nothing
        campaigns.save_group_label(s, campaign=grouped, person_id=ann, group_id=task.group_id, ticked=shown[1:], entities=[("cap", ["red"])],
                                   unsure=False, client_id="g-undo-1", seconds_spent=None, extras={shown[1]: [("tag", [])]})
    with write_session(factory) as s:
        again = campaigns.save_group_label(s, campaign=grouped, person_id=ann, group_id=task.group_id, ticked=shown, entities=[("cap", [])],
                                           unsure=False, client_id="g-undo-2", seconds_spent=None)
    assert again.stored and sorted(again.labelled) == sorted(shown)
    # A single label after it is undone alone; then the next undo takes the group judgment again.
    with write_session(factory) as s:
        single = campaigns.lease_tasks(s, campaign=grouped, person_id=ann, want=1)
        assert single
        campaigns.save_label(s, campaign=grouped, region_id=single[0].region_id, person_id=ann, entities=[("rim", [])], unsure=False,
                             client_id="single-after", seconds_spent=None, require_lease=True)
    with write_session(factory) as s:
        first = campaigns.undo_last_submission(s, campaign=grouped, person_id=ann)
        second = campaigns.undo_last_submission(s, campaign=grouped, person_id=ann)
    assert first is not None and first.group_id is None and first.regions == (single[0].region_id,) and first.text == "rim"
    assert second is not None and second.group_id == task.group_id and len(second.regions) == len(shown)


def test_groups_keep_k_per_region_and_no_repeats(factory, grouped: campaigns.CampaignInfo) -> None:  # type: ignore[no-untyped-def]
    people = [_person(factory, n) for n in ("p1", "p2", "p3", "p4")]
    rounds = 0
    while rounds < 200:
        worked = False
        for pid in people:
            with write_session(factory) as s:
                task = campaigns.lease_group(s, campaign=grouped, person_id=pid)
                if task is None:
                    continue
                worked = True
                crops = [t.region_id for t in task.crops]
                ticked = crops[: max(1, len(crops) - 1)]  # one misfit each time
                campaigns.save_group_label(s, campaign=grouped, person_id=pid, group_id=task.group_id, ticked=ticked, entities=[("body", [])],
                                           unsure=False, client_id=f"g{pid}-{task.group_id}", seconds_spent=None)
        rounds += 1
        if not worked:
            break
    with factory() as s:
        per_region = Counter(s.scalars(select(Label.region_id)))
        pairs = Counter(s.execute(select(Label.region_id, Label.person_id)).all())
        stored_n = dict(s.execute(select(CampaignRegion.region_id, CampaignRegion.n_labels).where(CampaignRegion.campaign_id == grouped.id)).all())
        n_groups = s.scalar(select(func.count(func.distinct(RegionGroupMember.group_id))))
        judged = s.scalar(select(func.count()).select_from(GroupLabel))
    assert max(per_region.values()) <= 2 and max(pairs.values()) == 1
    assert all(stored_n[r] == n for r, n in per_region.items())
    assert judged <= 4 * n_groups  # no person judges a group twice
    assert sum(per_region.values()) >= len(stored_n)  # most places are filled by groups alone


def test_a_held_group_holds_its_crops_places(factory, grouped: campaigns.CampaignInfo) -> None:  # type: ignore[no-untyped-def]
    a, b, c = (_person(factory, n) for n in ("a", "b", "c"))
    with write_session(factory) as s:
        ta = campaigns.lease_group(s, campaign=grouped, person_id=a)
        tb = campaigns.lease_group(s, campaign=grouped, person_id=b)
        tc = campaigns.lease_group(s, campaign=grouped, person_id=c)
    assert ta is not None and tb is not None
    held_twice = {t.region_id for t in ta.crops} & {t.region_id for t in tb.crops}
    assert tc is None or not held_twice & {t.region_id for t in tc.crops}  # two people hold both places of those crops
    with write_session(factory) as s:  # asking again returns the same group, not a new one
        again = campaigns.lease_group(s, campaign=grouped, person_id=a)
    assert again is not None and again.group_id == ta.group_id and [t.region_id for t in again.crops] == [t.region_id for t in ta.crops]


def test_group_submit_is_idempotent_and_checks_what_was_handed_out(factory, grouped: campaigns.CampaignInfo) -> None:  # type: ignore[no-untyped-def]
    a, b = _person(factory, "a"), _person(factory, "b")
    with write_session(factory) as s:
        ta = campaigns.lease_group(s, campaign=grouped, person_id=a)
        assert ta is not None
        crops = [t.region_id for t in ta.crops]
        with pytest.raises(InvalidRequestError, match="tick at least one"):
            campaigns.save_group_label(s, campaign=grouped, person_id=a, group_id=ta.group_id, ticked=[], entities=[("cap", [])], unsure=False,
                                       client_id="x1", seconds_spent=None)
        with pytest.raises(ForbiddenError, match="not handed to you"):
            campaigns.save_group_label(s, campaign=grouped, person_id=b, group_id=ta.group_id, ticked=crops[:1], entities=[("cap", [])],
                                       unsure=False, client_id="x2", seconds_spent=None)
    for _ in range(2):
        with write_session(factory) as s:
            got = campaigns.save_group_label(s, campaign=grouped, person_id=a, group_id=ta.group_id, ticked=crops, entities=[("cap", [])],
                                             unsure=False, client_id="x3", seconds_spent=None)
    assert not got.stored and sorted(got.labelled) == sorted(crops)  # the retry stored nothing and answers as before
    with factory() as s:
        assert s.scalar(select(func.count()).select_from(Label)) == len(crops)
    with write_session(factory) as s, pytest.raises(ConflictError, match="other content"):
        campaigns.save_group_label(s, campaign=grouped, person_id=a, group_id=ta.group_id, ticked=crops, entities=[("rim", [])],
                                   unsure=False, client_id="x3", seconds_spent=None)


def test_group_pages_and_api_store_one_label_per_ticked_crop(client: TestClient, project: Path, varied_model: LoadedModel) -> None:
    engine = make_engine(project)
    factory = session_factory(engine)
    embed_run(factory, project, 1, varied_model)
    engine.dispose()
    assert main(["groups", str(project), "--campaign", "belt audit", "--size", "8"]) == 0
    csrf = join(client, "gina")
    page = client.get("/campaigns/1/groups")
    assert page.status_code == 200 and page.template.name == "annotate_group.html" and page.context["group"] is None  # type: ignore[attr-defined]
    r = client.post("/campaigns/1/groups/next", data={"csrf": csrf}, follow_redirects=True)
    group = r.context["group"]  # type: ignore[attr-defined]
    assert group is not None and 'data-tick' in r.text
    ids = [c.region_id for c in group.crops]
    form = {"csrf": csrf, "group_id": group.group_id, "client_id": "form-group-1", "labels": "cap: red", "tick": ids[:-1], "also_region": ids,
            "also": ["tag: yellow"] + [""] * (len(ids) - 2) + ["rim"]}
    bad = client.post("/campaigns/1/groups/label", data=form)  # the last crop is unticked but has an addition: re-shown, nothing lost
    assert bad.status_code == 422 and "not ticked" in bad.text and 'value="tag: yellow"' in bad.text and 'value="cap: red"' in bad.text
    r = client.post("/campaigns/1/groups/label", data={**form, "also": ["tag: yellow"] + [""] * (len(ids) - 1)}, follow_redirects=False)
    assert r.status_code == 303, r.text
    with client.app.state.sessions() as s:  # type: ignore[attr-defined]
        got = dict(s.execute(select(Label.region_id, Label.entities).where(Label.client_id.startswith("form-group-1/"))).all())
    assert got[ids[0]] == [["cap", ["red"]], ["tag", ["yellow"]]] and all(got[r] == [["cap", ["red"]]] for r in ids[1:-1])
    undo = client.post("/campaigns/1/undo", data={"csrf": csrf}, follow_redirects=True)  # the whole judgment comes back, on the group page
    assert undo.status_code == 200 and undo.template.name == "annotate_group.html" and 'value="cap: red"' in undo.text  # type: ignore[attr-defined]
    assert undo.context["group"].group_id == group.group_id  # type: ignore[attr-defined]
    assert 'value="tag: yellow"' in undo.text  # the first crop's own addition is back in its box
    many = client.get("/campaigns/1/groups", params={"also": [f"{i}:x" for i in range(40)]})
    assert many.status_code == 422 and "Traceback" not in many.text
    r = client.post("/campaigns/1/groups/label", data={**form, "client_id": "form-group-3", "also": [""] * len(ids)}, follow_redirects=False)
    assert r.status_code == 303, r.text
    bad = client.post("/campaigns/1/groups/label", data={"csrf": csrf, "group_id": 999, "client_id": "form-group-2", "labels": ";;", "tick": [1]})
    assert bad.status_code in (303, 422) and "Traceback" not in bad.text
    api = client.post("/api/campaigns/1/groups/next", headers={"X-CSRF-Token": csrf}).json()
    if api["group"] is not None:
        g = api["group"]
        body = {"client_id": "api-group-1", "entities": [{"entity": "body", "attributes": ["blue"]}], "ticked": [c["region_id"] for c in g["crops"]],
                "also": [{"region_id": g["crops"][0]["region_id"], "entities": [{"entity": "tag", "attributes": []}]}]}
        first = client.post(f"/api/campaigns/1/groups/{g['group_id']}/labels", json=body, headers={"X-CSRF-Token": csrf})
        again = client.post(f"/api/campaigns/1/groups/{g['group_id']}/labels", json=body, headers={"X-CSRF-Token": csrf})
        assert first.status_code == 201 and first.json()["stored"] and again.status_code == 201 and not again.json()["stored"]
        with client.app.state.sessions() as s:  # type: ignore[attr-defined]
            assert s.scalar(select(Label.entities).where(Label.client_id == f"api-group-1/{g['crops'][0]['region_id']}")) == [["body", ["blue"]], ["tag", []]]
        twice = client.post(f"/api/campaigns/1/groups/{g['group_id']}/labels", json={**body, "client_id": "api-group-3", "also": body["also"] * 2},
                            headers={"X-CSRF-Token": csrf})
        assert twice.status_code == 422 and "twice" in twice.json()["message"]
        undone = client.post("/api/campaigns/1/undo", headers={"X-CSRF-Token": csrf}).json()
        assert undone["group_id"] == g["group_id"] and sorted(undone["regions"]) == sorted(c["region_id"] for c in g["crops"])
        too_many = client.post(f"/api/campaigns/1/groups/{g['group_id']}/labels", json={**body, "client_id": "api-group-2", "ticked": list(range(40))},
                               headers={"X-CSRF-Token": csrf})
        assert too_many.status_code == 422
    with client.app.state.sessions() as s:  # type: ignore[attr-defined]
        assert s.scalar(select(func.count()).select_from(Label).where(Label.group_label_id.is_not(None))) >= len(ids) - 1
    no_token = client.post("/campaigns/1/groups/next", data={})
    assert no_token.status_code == 403 and "anti-forgery" in no_token.text
    assert csrf_of(client)
    assert 'href="/campaigns/1/groups" data-group-link' in client.get("/campaigns/1/label").text  # the single-crop page leads to the groups
    with client.app.state.sessions() as s:  # type: ignore[attr-defined]
        counts = campaigns.group_counts(s, 1)
        from_groups = s.scalar(select(func.count()).select_from(Label).where(Label.group_label_id.is_not(None)))
        judged = s.scalar(select(func.count()).select_from(GroupLabel))
    assert counts is not None and counts.labels_from_groups == from_groups and counts.judgments == judged and counts.unticked >= 1
    join(client, "root", "admin")
    admin = client.get("/admin/campaigns/1")
    assert admin.status_code == 200 and "data-groups" in admin.text
    assert f"<span data-group-labels>{from_groups}</span>" in admin.text and f"<span data-group-judgments>{judged}</span>" in admin.text


def test_groups_command_needs_embeddings_first(project: Path, campaign_id: int, capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["groups", str(project), "--campaign", "belt audit"]) == 1
    assert "heedmap embed" in capsys.readouterr().err
    assert main(["embed", str(project)]) == 1  # the fixture's run did not record its model file
    assert "give --model and --sidecar" in capsys.readouterr().err


def test_simulated_group_annotators_fill_every_place_through_the_app(project: Path, factory, grouped: campaigns.CampaignInfo,  # type: ignore[no-untyped-def]
                                                                    small_scenes: Path) -> None:
    from app.demo_groups import simulate_group_annotations

    got = simulate_group_annotations(factory, project, small_scenes, grouped.id, 3, seed=1)
    with factory() as s:
        per_region = Counter(s.scalars(select(Label.region_id).where(Label.campaign_id == grouped.id)))
        n_regions = s.scalar(select(func.count()).select_from(CampaignRegion).where(CampaignRegion.campaign_id == grouped.id))
        provenance = s.scalar(select(func.count()).select_from(Label).where(Label.group_label_id.is_not(None)))
    assert got.group_judgments > 0 and got.labels_from_groups == provenance > 0
    assert len(per_region) == n_regions and set(per_region.values()) == {2}  # every region has its k labels, none more
    assert got.labels_from_groups + got.single_labels == sum(per_region.values())
    # Grouped crops keep their other parts: labels from groups name about as many of a region's true parts as the same people
    # labelling every region one at a time would (simulated in memory here, with the same error model for a single crop).
    from app.demo import region_truths
    from demo_data.annotators import demo_crowd, simulate_label

    with factory() as s:
        truths = {r: (set(t), scene["parts"]) for r, t, scene in region_truths(s, project, small_scenes, grouped)}
        rows = s.execute(select(Label.region_id, Label.entities).where(Label.campaign_id == grouped.id, Label.group_label_id.is_not(None))).all()
    rng = np.random.default_rng(7)
    several = {r for r, (t, _) in truths.items() if len(t) >= 2}  # regions that show more than one part: where a group could lose some
    grouped_recall = float(np.mean([len(truths[r][0] & {str(e[0]) for e in ents}) / len(truths[r][0]) for r, ents in rows if r in several]))
    single_recall = float(np.mean([len(truths[r][0] & {e for e, _ in simulate_label(a, sorted(truths[r][0]), truths[r][1], rng)}) / len(truths[r][0])
                                   for r in several for a in demo_crowd(3, 1)]))
    print(f"true parts named per label: from groups {grouped_recall:.2f}, one crop at a time {single_recall:.2f}")
    assert grouped_recall > single_recall - 0.1


def test_group_error_model_misses_misfits_at_its_rate() -> None:
    """Invented data (an invariant of the simulation): a crop that does not fit stays ticked at about ``miss_misfit``."""
    import numpy as np

    from demo_data.annotators import SimulatedAnnotator
    from demo_data.group_annotators import GroupErrors, judge_group

    rng = np.random.default_rng(0)
    perfect = SimulatedAnnotator("p", accuracy=1.0, synonym_rate=0.0, typo_rate=0.0)
    truths = [["cap"]] * 9 + [["rim"]] * 3
    left = fitted = 0
    for _ in range(400):
        got = judge_group(perfect, truths, [{"cap": ["red"]}] * 12, rng, GroupErrors(miss_misfit=0.2, drop_fit=0.0))
        assert got is not None and got.entities[0][0] == "cap"
        left += sum(got.ticked[9:])
        fitted += sum(got.ticked[:9])
    assert fitted == 9 * 400
    assert abs(left / 1200 - 0.2) < 0.04  # binomial sd about 0.012


@pytest.mark.sqlite_only
def test_next_group_walks_the_load_index_instead_of_grouping_the_campaign(factory, grouped: campaigns.CampaignInfo) -> None:  # type: ignore[no-untyped-def]
    """SQLite's own query plan: the next group is found by walking the (campaign, n_labels, region) index in order and stopping at
    the first open region, with no temporary sort or grouping of the campaign's rows."""
    from datetime import datetime

    from app.campaigns.groups import first_open_group
    from app.models import utcnow

    with factory() as s:
        q = first_open_group(grouped, _person(factory, "planner"), utcnow()).compile(s.get_bind())
        params = tuple(str(q.params[k]) if isinstance(q.params[k], datetime) else q.params[k] for k in q.positiontup or ())
        plan = [str(r[-1]) for r in s.connection().exec_driver_sql("EXPLAIN QUERY PLAN " + str(q), params)]
    print("\n".join(plan))
    assert any("ix_campaign_regions_load" in step for step in plan), plan
    assert not any("TEMP B-TREE" in step for step in plan), plan


def test_a_class_closed_early_hands_out_no_crop_in_groups(factory, grouped: campaigns.CampaignInfo) -> None:  # type: ignore[no-untyped-def]
    """Groups mix classes; once a class is closed its crops leave the groups handed out (its regions want no more labels)."""
    with factory() as s:
        classes = Counter(campaigns.region_classes(s, grouped.id).values())
    closed = classes.most_common(1)[0][0]
    with write_session(factory) as s:
        campaigns.close_class(s, campaign_id=grouped.id, cls=closed)
    ann = _person(factory, "ann")
    seen: list[str] = []
    for _ in range(60):
        with write_session(factory) as s:
            task = campaigns.lease_group(s, campaign=grouped, person_id=ann)
            if task is None:
                break
            seen += [t.predicted for t in task.crops]
            got = campaigns.save_group_label(s, campaign=grouped, person_id=ann, group_id=task.group_id, ticked=[t.region_id for t in task.crops],
                                             entities=[("body", [])], unsure=False, client_id=f"closed-{task.group_id}", seconds_spent=None)
            assert got.lost == ()
    assert seen and closed not in seen and set(seen) <= set(classes)


def test_simulated_group_labels_keep_each_crops_other_parts() -> None:
    """Invented data (an invariant of the simulation): a careful annotator's label of a ticked crop that fits names exactly that
    crop's parts, what the group shares and what it shows besides; with ``miss_other`` the other parts go missing at that rate."""
    from demo_data.annotators import SimulatedAnnotator
    from demo_data.group_annotators import GroupErrors, judge_group

    rng = np.random.default_rng(0)
    perfect = SimulatedAnnotator("p", accuracy=1.0, synonym_rate=0.0, typo_rate=0.0)
    truths = [["body", "cap"], ["body", "tag"], ["body"], ["body", "cap", "label band"], ["rim"]]
    attrs = [{"cap": ["red"]}, {"tag": ["yellow"]}, {}, {"cap": ["blue"]}, {}]
    got = judge_group(perfect, truths, attrs, rng, GroupErrors(miss_misfit=0.0, drop_fit=0.0, miss_other=0.0))
    assert got is not None and got.entities[0][0] == "body" and got.ticked == [True, True, True, True, False]
    for i in range(4):
        assert sorted(e for e, _ in got.crop_label(i)) == sorted(truths[i])
    assert got.extras[4] == []
    named = total = 0
    for _ in range(300):
        got = judge_group(perfect, truths, attrs, rng, GroupErrors(miss_misfit=0.0, drop_fit=0.0, miss_other=0.3))
        assert got is not None
        named += sum(len(got.extras[i]) for i in range(4))
        total += 4  # cap, tag, cap, label band: the other parts of the four fitting crops
    assert abs(named / total - 0.7) < 0.04  # binomial sd about 0.013


def test_demo_refuses_a_group_size_off_the_screen_before_writing_anything(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    out = tmp_path / "demo"
    assert main(["demo", "--no-serve", "--group-size", "5", "--out", str(out)]) == 1
    err = capsys.readouterr().err
    assert "--group-size" in err and "8-16" in err and "Traceback" not in err and not out.exists()
