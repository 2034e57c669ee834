"""Campaigns within a labelling budget: the stored sample, adaptive redundancy, closing a class, weighted results, the pages."""

from __future__ import annotations

from collections import Counter
from pathlib import Path

import pytest
from fastapi.testclient import TestClient
from sqlalchemy import select

from app import campaigns
from app.cli import main
from app.db import make_engine, session_factory, write_session
from app.errors import ConflictError, InvalidRequestError
from app.main import create_app
from app.models import CampaignRegion, CampaignSample, CampaignStratum, Label, Prediction, RegionRow
from app.people import ensure_person
from app.services.campaign_analysis import campaign_results, compute_results
from app.settings import Settings

from .conftest import join

pytestmark = pytest.mark.both_databases


def _campaign(factory, name: str = "c", k: int = 3, **kw: object) -> campaigns.CampaignInfo:  # type: ignore[no-untyped-def]
    with write_session(factory) as s:
        cid = campaigns.create_campaign(s, name=name, run_id=1, labels_per_region=k, **kw)  # type: ignore[arg-type]
        return campaigns.get_campaign(s, cid)


def _person(factory, name: str) -> int:  # type: ignore[no-untyped-def]
    with write_session(factory) as s:
        return ensure_person(s, name, "annotator")


def _work(factory, c, pid: int, says) -> list[int]:  # type: ignore[no-untyped-def]
    """Label until nothing is left for this person, naming ``says(region)``; the regions labelled, in order."""
    done = []
    while len(done) < 1000:
        with write_session(factory) as s:
            tasks = campaigns.lease_tasks(s, campaign=c, person_id=pid)
            if not tasks:
                return done
            rid = tasks[0].region_id
            campaigns.save_label(s, campaign=c, region_id=rid, person_id=pid, entities=says(rid), unsure=False, client_id=f"{pid}-{rid}",
                                 seconds_spent=1.0)
            done.append(rid)
    return done


def test_a_sampled_campaign_stores_its_strata_and_inclusion_probabilities(factory) -> None:  # type: ignore[no-untyped-def]
    c = _campaign(factory, regions_per_class=2, seed=5)
    with factory() as s:
        strata = {st.id: st for st in s.scalars(select(CampaignStratum).where(CampaignStratum.campaign_id == c.id))}
        drawn = list(s.scalars(select(CampaignSample).where(CampaignSample.campaign_id == c.id)))
        images_in_run = len(list(s.scalars(select(Prediction.id).where(Prediction.run_id == 1))))
        regions = set(s.scalars(select(CampaignRegion.region_id).where(CampaignRegion.campaign_id == c.id)))
        drawn_images = {d.image_id for d in drawn}
        of_drawn = set(s.scalars(select(RegionRow.id).join(Prediction, Prediction.id == RegionRow.prediction_id)
                                 .where(Prediction.run_id == 1, Prediction.image_id.in_(drawn_images))))
    assert sum(st.images for st in strata.values()) == images_in_run  # every image of the run belongs to one stratum
    assert regions == of_drawn  # all the regions of the drawn images, and no others
    per = Counter(d.stratum_id for d in drawn)
    for d in drawn:
        st = strata[d.stratum_id]
        assert d.inclusion_probability == pytest.approx(per[d.stratum_id] / st.images)
        assert st.drawn == per[d.stratum_id]
    assert len(drawn) < images_in_run  # a sample, not everything
    with write_session(factory) as s:  # the same seed draws the same sample
        again = campaigns.create_campaign(s, name="again", run_id=1, labels_per_region=3, regions_per_class=2, seed=5)
        assert set(s.scalars(select(CampaignSample.image_id).where(CampaignSample.campaign_id == again))) == drawn_images


def test_plan_options_are_checked(factory) -> None:  # type: ignore[no-untyped-def]
    with write_session(factory) as s:
        with pytest.raises(InvalidRequestError, match="not both"):
            campaigns.create_campaign(s, name="x", run_id=1, budget=100, regions_per_class=3)
    with write_session(factory) as s:
        with pytest.raises(InvalidRequestError, match="labels per region to 3"):
            campaigns.create_campaign(s, name="x", run_id=1, labels_per_region=2, adaptive=True)
    with write_session(factory) as s:
        with pytest.raises(InvalidRequestError, match="between 0 and 1"):
            campaigns.create_campaign(s, name="x", run_id=1, budget=100, confident_at=1.5)


def test_a_third_person_is_asked_only_where_the_first_two_disagree(factory) -> None:  # type: ignore[no-untyped-def]
    c = _campaign(factory, adaptive=True)
    with factory() as s:
        regions = sorted(s.scalars(select(CampaignRegion.region_id).where(CampaignRegion.campaign_id == c.id)))
    disputed = set(regions[::3])
    # "Cap" and "caps" normalise to the same entity: agreement after normalisation, not on the raw text.
    _work(factory, c, _person(factory, "ann"), lambda r: [("cap", ["red"])])
    _work(factory, c, _person(factory, "bob"), lambda r: [("tag", [])] if r in disputed else [("Caps", [])])
    third = _work(factory, c, _person(factory, "cy"), lambda r: [("cap", [])])
    assert set(third) == disputed
    assert _work(factory, c, _person(factory, "dee"), lambda r: [("cap", [])]) == []  # all quotas met
    with factory() as s:
        per_region = Counter(s.scalars(select(Label.region_id).where(Label.campaign_id == c.id)))
        counts = campaigns.redundancy_counts(s, c.id)
    assert {r: n for r, n in per_region.items() if n == 3}.keys() == disputed
    assert all(per_region[r] == 2 for r in regions if r not in disputed)
    assert counts is not None and counts.extra_wanted == len(disputed) and counts.extra_done == len(disputed) and counts.extra_waiting == 0


def test_a_synonym_rule_that_makes_two_labels_agree_withdraws_the_third_place(factory) -> None:  # type: ignore[no-untyped-def]
    c = _campaign(factory, adaptive=True)
    _work(factory, c, _person(factory, "ann"), lambda r: [("cap", [])])
    _work(factory, c, _person(factory, "bob"), lambda r: [("lid", [])])
    with factory() as s:
        assert campaigns.redundancy_counts(s, c.id).extra_waiting == c.n_regions  # type: ignore[union-attr]
    with write_session(factory) as s:
        campaigns.add_synonym_rule(s, campaign_id=c.id, kind="merge", source="lid", target="cap")
    assert _work(factory, c, _person(factory, "cy"), lambda r: [("cap", [])]) == []


def test_a_closed_class_hands_out_no_more_tasks(factory) -> None:  # type: ignore[no-untyped-def]
    c = _campaign(factory, k=2)
    region_class = campaigns.region_classes(factory(), c.id)
    assert len(set(region_class.values())) > 1
    pid = _person(factory, "ann")
    with write_session(factory) as s:
        held = campaigns.lease_tasks(s, campaign=c, person_id=pid)
        closed = region_class[held[0].region_id]
        campaigns.close_class(s, campaign_id=c.id, cls=closed)
    done = _work(factory, c, pid, lambda r: [("cap", [])])
    assert done and all(region_class[r] != closed for r in done)
    with write_session(factory) as s:  # a region of the closed class held before closing is refused at submit
        with pytest.raises(ConflictError, match="closed early"):
            campaigns.save_label(s, campaign=c, region_id=held[0].region_id, person_id=pid, entities=[("cap", [])], unsure=False, client_id="late",
                                 seconds_spent=1.0)
    with write_session(factory) as s:
        campaigns.close_class(s, campaign_id=c.id, cls=closed, closed=False)
    again = _work(factory, c, pid, lambda r: [("cap", [])])
    assert again and all(region_class[r] == closed for r in again)
    with write_session(factory) as s:
        with pytest.raises(InvalidRequestError, match="no region of class"):
            campaigns.close_class(s, campaign_id=c.id, cls="no such class")


def test_results_of_a_sampled_campaign_are_weighted_and_say_what_they_stand_for(factory) -> None:  # type: ignore[no-untyped-def]
    c = _campaign(factory, k=2, regions_per_class=2, seed=1)
    for name in ("ann", "bob"):
        _work(factory, c, _person(factory, name), lambda r: [("cap", [])] if r % 2 else [("tag", [])])
    full = _campaign(factory, name="full", k=2)
    for name in ("ann", "bob"):
        _work(factory, full, _person(factory, name), lambda r: [("cap", [])] if r % 2 else [("tag", [])])
    with factory() as s:
        res = compute_results(s, c)
        plain = campaign_results(s, full.id)
        strata = list(s.scalars(select(CampaignStratum).where(CampaignStratum.campaign_id == c.id)))
    assert res.table.sampled and not plain.table.sampled
    assert res.table.stands_for == sum(st.images for st in strata if st.drawn > 0)
    assert len(res.table) == sum(st.drawn for st in strata)
    rules = res.table.rules(min_support=0.01).rules
    assert {"images_estimated", "confidence_high", "lift_low"} <= set(rules.columns)
    assert plain.table.stands_for == len(plain.table)
    assert "images_estimated" not in plain.table.rules(min_support=0.01).rules.columns
    assert "sampling weight" in res.table.frame().columns


def test_pages_budget_form_stopping_and_closing(project: Path) -> None:
    with TestClient(create_app(Settings(project_dir=project))) as client:
        csrf = join(client, "root", "admin")
        r = client.post("/admin/campaigns", data={"csrf": csrf, "name": "sampled", "run_id": "1", "labels_per_region": "3", "budget": "12",
                                                  "adaptive": "1"}, follow_redirects=False)
        assert r.status_code == 303, r.text
        cid = int(r.headers["location"].rsplit("/", 1)[1])
        page = client.get(f"/admin/campaigns/{cid}")
        assert page.status_code == 200
        assert "sized for a budget of 12 judgments" in page.text and "data-strata" in page.text and "data-extra-waiting" in page.text
        bad = client.post("/admin/campaigns", data={"csrf": csrf, "name": "bad", "run_id": "1", "budget": "lots"})
        assert bad.status_code == 422 and "whole number" in bad.text
        stop = client.get(f"/campaigns/{cid}/stopping")
        assert stop.status_code == 200 and "no labels yet" in stop.text
        cls = stop.context["status"].classes[0].cls  # type: ignore[attr-defined]
        r = client.post(f"/campaigns/{cid}/classes/close", data={"csrf": csrf, "cls": cls}, follow_redirects=False)
        assert r.status_code == 303
        assert "data-closed" in client.get(f"/campaigns/{cid}/stopping").text
        assert client.post(f"/campaigns/{cid}/classes/close", data={"csrf": csrf, "cls": "nope"}).status_code == 422


def test_cli_makes_a_campaign_with_a_budget(project: Path, capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["campaign", str(project), "--name", "sampled", "--budget", "10", "--adaptive"]) == 0
    assert "regions" in capsys.readouterr().out
    assert main(["campaign", str(project), "--name", "bad", "--budget", "10", "--regions-per-class", "3"]) == 1
    assert "not both" in capsys.readouterr().err


def test_results_page_and_exports_of_a_sampled_campaign(project: Path) -> None:
    engine = make_engine(project)
    f = session_factory(engine)
    c = _campaign(f, k=2, regions_per_class=2, seed=2)
    for name in ("ann", "bob"):
        _work(f, c, _person(f, name), lambda r: [("cap", [])] if r % 3 else [("tag", ["yellow"])])
    with f() as s:
        stands_for = compute_results(s, c).table.stands_for
    engine.dispose()
    with TestClient(create_app(Settings(project_dir=project))) as client:
        join(client, "rev", "reviewer")
        page = client.get(f"/campaigns/{c.id}/results?min_support=0.01")
        assert page.status_code == 200
        assert f'<strong data-stands-for>{stands_for:,} images</strong>' in page.text
        doc = client.get(f"/campaigns/{c.id}/exports/rules.json?min_support=0.01").json()
        assert doc["sample_stands_for_images"] == stands_for
        assert all("images_estimated" in r for r in doc["rules"])
        assert "sampling weight" in client.get(f"/campaigns/{c.id}/exports/concepts.csv").text.splitlines()[0]
        assert client.get(f"/campaigns/{c.id}/plots/frequency.png").status_code == 200
        assert client.get(f"/campaigns/{c.id}/stopping").status_code == 200
        for page in ("ask", "errors", "expectations"):  # pages that count the sample itself say so
            assert "data-sample-note" in client.get(f"/campaigns/{c.id}/{page}").text, page
        assert "data-sample-note" not in client.get(f"/campaigns/{c.id}/compare").text  # its rates are weighted


def test_the_budget_revision_leaves_existing_campaigns_as_they_were(tmp_path: Path) -> None:
    """A project made before campaign plans: every region keeps the campaign's k (quota NULL), and a sample can be drawn there."""
    import shutil
    import sqlite3

    project = tmp_path / "old"
    project.mkdir()
    shutil.copyfile(Path(__file__).parent / "data" / "schema3_project" / "heedmap.db", project / "heedmap.db")
    engine = make_engine(project)
    conn = sqlite3.connect(project / "heedmap.db")
    assert {r[0] for r in conn.execute("SELECT quota FROM campaign_regions")} == {None}
    assert conn.execute("SELECT COUNT(*) FROM campaign_plans").fetchone() == (0,)
    conn.close()
    f = session_factory(engine)
    with write_session(f) as s:
        (c,) = campaigns.list_campaigns(s)
        assert campaigns.plan_of(s, c.id) is None and campaigns.sample_of(s, c.id) is None
        cid = campaigns.create_campaign(s, name="sampled after upgrade", run_id=c.run_id, labels_per_region=3, regions_per_class=1, adaptive=True)
        assert campaigns.plan_of(s, cid) is not None
    engine.dispose()


def test_consistent_labels_settle_each_class_and_a_short_campaign_does_not(factory) -> None:  # type: ignore[no-untyped-def]
    from app.services.stopping import stopping_status

    c = _campaign(factory, k=2, settle_window=10)
    region_class = campaigns.region_classes(factory(), c.id)
    says = lambda r: [(f"mark of {region_class[r]}", [])]  # noqa: E731  every region of a class shows its own mark
    _work(factory, c, _person(factory, "ann"), says)
    with factory() as s:
        early = stopping_status(s, c, min_support=0.01)
    _work(factory, c, _person(factory, "bob"), says)
    with factory() as s:
        late = stopping_status(s, c, min_support=0.01)
    assert late.judgments == 2 * len(region_class) >= 2 * late.window
    assert len(late.checkpoints) == 2
    for st in late.classes:  # one rule per class, confidence 1, the same at every checkpoint
        assert st.top == (f"mark of {st.cls}",) and st.settled, st
    assert early.judgments == len(region_class)
    # a window longer than the campaign: nothing to compare with yet
    d = _campaign(factory, name="d", k=2, settle_window=10_000)
    _work(factory, d, _person(factory, "cy"), says)
    with factory() as s:
        short = stopping_status(s, d, min_support=0.01)
    assert short.checkpoints == () and all(not st.settled and "too few judgments" in st.reason for st in short.classes)


def test_a_spent_budget_hands_out_nothing_more_and_honours_the_places_held(factory) -> None:  # type: ignore[no-untyped-def]
    budget = 7
    c = _campaign(factory, budget=budget)
    assert c.n_regions >= 5, "the sample must have room for more judgments than the budget, or the check could not fail"
    held_by, worker, late = (_person(factory, n) for n in ("ann", "bob", "cy"))
    with write_session(factory) as s:
        held = campaigns.lease_tasks(s, campaign=c, person_id=held_by)  # two places held when the budget runs out
    assert len(held) == 2
    done = _work(factory, c, worker, lambda r: [("cap", [])])
    assert len(done) == budget - len(held)  # ann's two held places count against the budget
    with write_session(factory) as s:
        assert campaigns.lease_tasks(s, campaign=c, person_id=late) == []
        for t in held:  # what was handed out within the budget is taken
            campaigns.save_label(s, campaign=c, region_id=t.region_id, person_id=held_by, entities=[("tag", [])], unsure=False,
                                 client_id=f"held-{t.region_id}", seconds_spent=1.0)
    with factory() as s:
        labels = len(list(s.scalars(select(Label.id).where(Label.campaign_id == c.id))))
    assert labels == budget
    with write_session(factory) as s:
        assert campaigns.lease_tasks(s, campaign=c, person_id=held_by) == []
        free = next(r for r in campaigns.region_classes(s, c.id) if r not in done)
        with pytest.raises(ConflictError, match="spent its judgment budget"):  # a label without a place handed out
            campaigns.save_label(s, campaign=c, region_id=free, person_id=late, entities=[("cap", [])], unsure=False, client_id="no-hold",
                                 seconds_spent=1.0)
    # Regions per class alone set no budget: labelling goes on to k per region.
    d = _campaign(factory, name="per class", k=1, regions_per_class=2)
    assert len(_work(factory, d, _person(factory, "dee"), lambda r: [("cap", [])])) == d.n_regions


def test_cli_shows_settling_and_closes_and_reopens_a_class(project: Path, capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["campaign", str(project), "--name", "sampled", "--budget", "30"]) == 0
    capsys.readouterr()
    assert main(["stopping", str(project), "--json"]) == 0
    doc = __import__("json").loads(capsys.readouterr().out)
    assert doc["budget"] == 30 and doc["judgments_given"] == 0 and doc["budget_left"] == 30
    cls = doc["classes"][0]["class"]
    assert main(["stopping", str(project), "--campaign", "sampled", "--close", cls]) == 0
    out = capsys.readouterr().out
    assert f"class {cls!r} closed early" in out and f"{cls}: closed early" in out and "rule of thumb" in out
    engine = make_engine(project)
    with session_factory(engine)() as s:
        assert campaigns.plan_of(s, doc["campaign"]).closed_classes == (cls,)  # type: ignore[union-attr]
    engine.dispose()
    assert main(["stopping", str(project), "--campaign", str(doc["campaign"]), "--reopen", cls]) == 0
    out = capsys.readouterr().out
    assert f"{cls}: closed early" not in out and f"class {cls!r} open again" in out
    # Reopening a class that is open says nothing changed instead of claiming it reopened.
    assert main(["stopping", str(project), "--campaign", str(doc["campaign"]), "--reopen", cls]) == 0
    assert "was not closed; nothing changed" in capsys.readouterr().out
    # Bad input: one line saying what to fix, no traceback.
    assert main(["stopping", str(project), "--close", "no such class"]) == 1
    err = capsys.readouterr().err
    assert "no region of class 'no such class'" in err and "Traceback" not in err
    assert main(["stopping", str(project), "--campaign", "nope"]) == 1
    err = capsys.readouterr().err
    assert "no campaign 'nope'" in err and "sampled" in err and "Traceback" not in err
