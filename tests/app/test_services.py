"""The campaign-analysis service: what the pages take their results from."""

from __future__ import annotations

import uuid

import pytest
from fastapi.testclient import TestClient

from analysis.concept_votes import presence_agreement
from app.campaigns import get_campaign
from app.services.campaign_analysis import ResultsCache, agreement_summary, campaign_results, votes

from .conftest import join, next_task

pytestmark = pytest.mark.both_databases


def _label(client: TestClient, campaign_id: int, who: str, n: int) -> None:
    csrf = join(client, who)
    for _ in range(n):
        nxt = next_task(client, campaign_id).json()["task"]
        if nxt is None:
            return
        entities = [{"entity": "cap", "attributes": ["red"]}] if nxt["region_id"] % 2 else [{"entity": "tag"}, {"entity": who}]
        body = {"client_id": uuid.uuid4().hex, "entities": entities}
        assert client.post(f"/api/campaigns/{campaign_id}/regions/{nxt['region_id']}/labels", json=body, headers={"X-CSRF-Token": csrf}).status_code == 201


def test_agreement_summary_shows_the_same_concepts_as_computing_all_of_them(client: TestClient, campaign_id: int) -> None:
    for who in ("p", "q", "r"):
        _label(client, campaign_id, who, 8)
    with client.app.state.sessions() as s:  # type: ignore[attr-defined]
        c = get_campaign(s, campaign_id)
        every = presence_agreement(votes(s, c), n_boot=200)
        assert len(every) > 3
        for top in (1, 3, len(every)):
            assert agreement_summary(s, c, top_concepts=top).concepts == every[:top]


def test_results_are_cached_per_state_of_the_labels(client: TestClient, campaign_id: int) -> None:
    _label(client, campaign_id, "p", 30)
    cache = ResultsCache()
    with client.app.state.sessions() as s:  # type: ignore[attr-defined]
        first = campaign_results(s, campaign_id, cache=cache)
        assert campaign_results(s, campaign_id, cache=cache).table is first.table
    _label(client, campaign_id, "q", 1)
    with client.app.state.sessions() as s:  # type: ignore[attr-defined]
        again = campaign_results(s, campaign_id, cache=cache)
        assert again.table is not first.table
        assert again.table.presence.equals(campaign_results(s, campaign_id).table.presence)  # the uncached path agrees


def test_concepts_export_is_kept_until_a_new_label(client: TestClient, campaign_id: int) -> None:
    from app.services.exports import concepts_export

    _label(client, campaign_id, "p", 12)
    join(client, "boss", "analyst")
    url = f"/campaigns/{campaign_id}/exports/concepts.csv"
    first = client.get(url)
    assert first.status_code == 200 and client.get(url).content == first.content
    _label(client, campaign_id, "q", 3)
    join(client, "boss", "analyst")
    again = client.get(url)
    with client.app.state.sessions() as s:  # type: ignore[attr-defined]
        fresh = concepts_export(campaign_results(s, campaign_id), "csv").body
    assert again.content == fresh and again.content != first.content


def _results_agree_with_a_fresh_computation(client: TestClient, campaign_id: int, cache: ResultsCache) -> object:
    """The cached results now, after checking they equal results computed afresh without the cache."""
    with client.app.state.sessions() as s:  # type: ignore[attr-defined]
        cached = campaign_results(s, campaign_id, cache=cache)
        fresh = campaign_results(s, campaign_id)
        assert cached.table.concepts == fresh.table.concepts
        assert cached.table.presence.equals(fresh.table.presence)
        return cached.table


def test_an_undone_label_stored_again_with_another_answer_changes_the_results(client: TestClient, campaign_id: int) -> None:
    # Undoing the newest label frees the highest id, which SQLite hands to the next label: the count and the
    # highest id come back as they were, the answer does not.
    _label(client, campaign_id, "p", 6)
    csrf = join(client, "q")
    task = next_task(client, campaign_id).json()["task"]
    url = f"/api/campaigns/{campaign_id}/regions/{task['region_id']}/labels"
    assert client.post(url, json={"client_id": uuid.uuid4().hex, "entities": [{"entity": "cap"}]}, headers={"X-CSRF-Token": csrf}).status_code == 201
    cache = ResultsCache()
    before = _results_agree_with_a_fresh_computation(client, campaign_id, cache)
    assert "hinge" not in before.concepts  # type: ignore[attr-defined]
    assert client.post(f"/api/campaigns/{campaign_id}/undo", headers={"X-CSRF-Token": csrf}).json()["region_id"] == task["region_id"]
    assert client.post(url, json={"client_id": uuid.uuid4().hex, "entities": [{"entity": "hinge"}]}, headers={"X-CSRF-Token": csrf}).status_code == 201
    after = _results_agree_with_a_fresh_computation(client, campaign_id, cache)
    assert "hinge" in after.concepts  # type: ignore[attr-defined]


def test_a_synonym_rule_replaced_by_another_changes_the_results(client: TestClient, campaign_id: int) -> None:
    from app.campaigns import add_synonym_rule, delete_synonym_rule
    from app.db import write_session

    _label(client, campaign_id, "p", 12)
    cache = ResultsCache()
    with write_session(client.app.state.sessions) as s:  # type: ignore[attr-defined]
        rule = add_synonym_rule(s, campaign_id=campaign_id, kind="merge", source="tag", target="cap")
    merged = _results_agree_with_a_fresh_computation(client, campaign_id, cache)
    assert "tag" not in merged.concepts  # type: ignore[attr-defined]
    with write_session(client.app.state.sessions) as s:  # type: ignore[attr-defined]
        delete_synonym_rule(s, campaign_id=campaign_id, rule_id=rule)
        s.flush()
        add_synonym_rule(s, campaign_id=campaign_id, kind="merge", source="cap", target="tag")  # the freed id again, another rule
    swapped = _results_agree_with_a_fresh_computation(client, campaign_id, cache)
    assert "cap" not in swapped.concepts and "tag" in swapped.concepts  # type: ignore[attr-defined]


def test_a_check_item_given_another_answer_changes_the_results_key(client: TestClient, campaign_id: int) -> None:
    from app.campaigns import set_check_answer
    from app.db import write_session
    from app.store import labels_version

    with write_session(client.app.state.sessions) as s:  # type: ignore[attr-defined]
        set_check_answer(s, campaign_id=campaign_id, region_id=1, entities=[("cap", ["red"])])
    with client.app.state.sessions() as s:  # type: ignore[attr-defined]
        first = labels_version(s, campaign_id)
    with write_session(client.app.state.sessions) as s:  # type: ignore[attr-defined]
        set_check_answer(s, campaign_id=campaign_id, region_id=1, entities=[("tag", [])])
    with client.app.state.sessions() as s:  # type: ignore[attr-defined]
        assert labels_version(s, campaign_id) != first


def test_progress_is_cached_until_a_label_or_a_skip(client: TestClient, campaign_id: int) -> None:
    from app.services.campaign_analysis import campaign_progress

    _label(client, campaign_id, "p", 3)
    cache = ResultsCache()
    with client.app.state.sessions() as s:  # type: ignore[attr-defined]
        first = campaign_progress(s, campaign_id, cache=cache)
        assert campaign_progress(s, campaign_id, cache=cache) is first
        assert {a.name: (a.labels, a.skips) for a in first[0]} == {"p": (3, 0)}
    csrf = join(client, "p")
    task = next_task(client, campaign_id).json()["task"]
    assert client.post(f"/api/campaigns/{campaign_id}/regions/{task['region_id']}/skip", headers={"X-CSRF-Token": csrf}).status_code == 204
    with client.app.state.sessions() as s:  # type: ignore[attr-defined]
        skipped = campaign_progress(s, campaign_id, cache=cache)
        assert {a.name: (a.labels, a.skips) for a in skipped[0]} == {"p": (3, 1)}
    _label(client, campaign_id, "q", 1)
    with client.app.state.sessions() as s:  # type: ignore[attr-defined]
        labelled = campaign_progress(s, campaign_id, cache=cache)
        assert {a.name: (a.labels, a.skips) for a in labelled[0]} == {"p": (3, 1), "q": (1, 0)}
        assert labelled == campaign_progress(s, campaign_id)  # the uncached path agrees


def test_labels_held_between_requests_equal_the_stored_ones_after_labels_undo_and_relabel(client: TestClient, campaign_id: int) -> None:
    # One label store across every change: what it holds and the votes made from it equal a fresh read each time.
    import numpy as np

    from analysis.pipeline import campaign_votes
    from app import campaigns, store
    from app.services.label_store import LabelStore

    held = LabelStore()

    def agrees() -> None:
        with client.app.state.sessions() as s:  # type: ignore[attr-defined]
            version = store.labels_version(s, campaign_id)
            fresh = campaigns.judgments(s, campaign_id)
            assert held.judgments(s, campaign_id, version) == fresh
            rules, region_class = campaigns.synonym_rules(s, campaign_id)[0], campaigns.region_classes(s, campaign_id)
            a = campaign_votes(fresh, rules=rules, region_class=region_class)
            b = campaign_votes(held.read(s, campaign_id, version, rules=rules, region_class=region_class), rules=rules, region_class=region_class)
            assert (a.regions, a.annotators, a.concepts, a.families) == (b.regions, b.annotators, b.concepts, b.families)
            for name in ("pair_region", "pair_concept", "known", "vote_pair", "vote_annotator", "vote_yes"):
                assert np.array_equal(getattr(a, name), getattr(b, name)), name
            assert np.array_equal(a.main_entities.label_codes, b.main_entities.label_codes)

    _label(client, campaign_id, "p", 5)
    agrees()
    _label(client, campaign_id, "q", 4)
    agrees()
    csrf = join(client, "q")
    task = next_task(client, campaign_id).json()["task"]
    url = f"/api/campaigns/{campaign_id}/regions/{task['region_id']}/labels"
    assert client.post(url, json={"client_id": uuid.uuid4().hex, "entities": [{"entity": "cap"}], "unsure": True},
                       headers={"X-CSRF-Token": csrf}).status_code == 201
    agrees()
    assert client.post(f"/api/campaigns/{campaign_id}/undo", headers={"X-CSRF-Token": csrf}).status_code == 200
    agrees()
    # The freed highest id handed out again, with another answer.
    assert client.post(url, json={"client_id": uuid.uuid4().hex, "entities": [{"entity": "hinge", "attributes": ["steel"]}]},
                       headers={"X-CSRF-Token": csrf}).status_code == 201
    agrees()
    assert client.post(f"/api/campaigns/{campaign_id}/undo", headers={"X-CSRF-Token": csrf}).status_code == 200
    assert client.post(f"/api/campaigns/{campaign_id}/undo", headers={"X-CSRF-Token": csrf}).status_code == 200
    agrees()


def test_rules_are_kept_with_their_results_until_a_new_label(client: TestClient, campaign_id: int) -> None:
    from app.services.campaign_analysis import campaign_rules

    _label(client, campaign_id, "p", 12)
    cache = ResultsCache()
    with client.app.state.sessions() as s:  # type: ignore[attr-defined]
        res = campaign_results(s, campaign_id, cache=cache)
        first = campaign_rules(res, min_support=0.01)
        assert campaign_rules(campaign_results(s, campaign_id, cache=cache), min_support=0.01) is first
        assert campaign_rules(res, min_support=0.01, max_len=1) is not first
        assert first.rules.equals(campaign_rules(campaign_results(s, campaign_id), min_support=0.01).rules)  # the uncached path agrees
    _label(client, campaign_id, "q", 4)
    with client.app.state.sessions() as s:  # type: ignore[attr-defined]
        again = campaign_rules(campaign_results(s, campaign_id, cache=cache), min_support=0.01)
        assert again is not first
        assert again.rules.equals(campaign_rules(campaign_results(s, campaign_id), min_support=0.01).rules)


def test_warming_makes_what_the_first_results_page_and_csv_need(client: TestClient, campaign_id: int) -> None:
    from app.services.campaign_analysis import campaign_rules, warm_results
    from app.services.exports import cached_concepts_export, concepts_export

    cache = ResultsCache()
    assert warm_results(client.app.state.sessions, cache, min_support=0.02) == []  # type: ignore[attr-defined]  # no labels: nothing to warm
    _label(client, campaign_id, "p", 12)
    assert warm_results(client.app.state.sessions, cache, min_support=0.02) == [campaign_id]  # type: ignore[attr-defined]
    made: list[object] = []
    with client.app.state.sessions() as s:  # type: ignore[attr-defined]
        res = campaign_results(s, campaign_id, cache=cache)
        rules = res.cache.get_or_make(("rules", "predicted", 2, 0.02, True, *res.version), lambda: made.append(1))  # type: ignore[union-attr]
        assert not made and rules is campaign_rules(res, min_support=0.02)  # found made, not made again
        assert cached_concepts_export(res, "csv").body == concepts_export(campaign_results(s, campaign_id), "csv").body  # the uncached path agrees
        assert res.table.presence.equals(campaign_results(s, campaign_id).table.presence)


def test_a_result_being_made_is_made_once_for_threads_asking_together() -> None:
    import threading

    cache = ResultsCache()
    started, release = threading.Event(), threading.Event()
    calls: list[int] = []

    def make() -> list[int]:
        calls.append(1)
        started.set()
        release.wait(10)
        return calls

    first = threading.Thread(target=lambda: cache.get_or_make(("k",), make))
    first.start()
    started.wait(10)
    got: list[object] = []
    second = threading.Thread(target=lambda: got.append(cache.get_or_make(("k",), make)))
    second.start()
    second.join(0.5)  # let it ask while the first is still making (without the wait it would make it again)
    assert second.is_alive()
    release.set()
    first.join(10)
    second.join(10)
    assert calls == [1] and got == [calls]


def test_a_failed_make_is_not_kept_and_the_next_asker_makes_it() -> None:
    cache = ResultsCache()

    def fail() -> int:
        raise ValueError("no")

    with pytest.raises(ValueError):
        cache.get_or_make(("k",), fail)
    assert cache.get_or_make(("k",), lambda: 7) == 7


@pytest.mark.parametrize("warm_campaigns", [3, 0])
def test_the_app_warms_the_labelled_campaigns_results_at_start_up_unless_turned_off(client: TestClient, campaign_id: int, warm_campaigns: int) -> None:
    from dataclasses import replace

    from app import store
    from app.main import create_app
    from app.settings import Settings

    _label(client, campaign_id, "p", 12)
    settings: Settings = replace(client.app.state.settings, warm_campaigns=warm_campaigns)  # type: ignore[attr-defined]
    with TestClient(create_app(settings)) as started:
        assert started.app.state.warmed.wait(60)  # type: ignore[attr-defined]
        cache: ResultsCache = started.app.state.results_cache  # type: ignore[attr-defined]
        with started.app.state.sessions() as s:  # type: ignore[attr-defined]
            version = store.labels_version(s, campaign_id)
            made: list[int] = []
            found = cache.get_or_make(("results", *version), lambda: made.append(1) or 1)
            if warm_campaigns:  # made at start-up: the page finds it
                assert not made and found.table.presence.equals(campaign_results(s, campaign_id).table.presence)  # type: ignore[attr-defined]
            else:  # nothing warmed: the first page makes it
                assert found == 1 and made == [1]


def test_warming_more_campaigns_than_the_default_keeps_every_one_of_them(client: TestClient, campaign_id: int) -> None:
    from dataclasses import replace

    from app import store
    from app.campaigns import create_campaign
    from app.db import write_session
    from app.main import create_app
    from app.settings import Settings

    with write_session(client.app.state.sessions) as s:  # type: ignore[attr-defined]
        run_id = store.latest_run_id(s) or 0
        ids = [campaign_id] + [create_campaign(s, name=f"audit {k}", run_id=run_id, labels_per_region=2) for k in range(5)]
    for cid in ids:
        _label(client, cid, f"p{cid}", 12)
    settings: Settings = replace(client.app.state.settings, warm_campaigns=6)  # type: ignore[attr-defined]
    with TestClient(create_app(settings)) as started:
        assert started.app.state.warmed.wait(120)  # type: ignore[attr-defined]
        cache: ResultsCache = started.app.state.results_cache  # type: ignore[attr-defined]
        made: list[int] = []
        with started.app.state.sessions() as s:  # type: ignore[attr-defined]
            for cid in ids:  # the newest (warmed first) too: none was pushed out by the older ones
                cache.get_or_make(("results", *store.labels_version(s, cid)), lambda cid=cid: made.append(cid))  # type: ignore[misc]
    assert made == []


def test_the_warm_campaigns_setting_is_bounded_and_read_from_the_environment(monkeypatch: pytest.MonkeyPatch) -> None:
    from app.settings import Settings, SettingsError, get_settings

    with pytest.raises(SettingsError, match="warm_campaigns"):
        Settings(warm_campaigns=-1)
    monkeypatch.setenv("HEEDMAP_WARM_CAMPAIGNS", "0")
    assert get_settings().warm_campaigns == 0


def test_the_prediction_frame_holds_each_predictions_row_and_its_regions_in_id_order(client: TestClient) -> None:
    from sqlalchemy import select

    from app import store
    from app.models import ImageRow, Prediction, RegionRow

    with client.app.state.sessions() as s:  # type: ignore[attr-defined]
        run_id = store.latest_run_id(s)
        assert run_id is not None
        frame = store.prediction_frame(s, run_id)
        predictions = s.scalars(select(Prediction).where(Prediction.run_id == run_id)).all()
        assert sorted(frame.index.tolist()) == frame.index.tolist() == sorted(p.image_id for p in predictions)
        with_regions = 0
        for p in predictions:
            image = s.get(ImageRow, p.image_id)
            regions = s.scalars(select(RegionRow).where(RegionRow.prediction_id == p.id).order_by(RegionRow.id)).all()
            row = frame.loc[p.image_id]
            assert (row["path"], row["label"], row["split"], row["predicted"]) == (image.path, image.label, image.split, p.predicted)
            assert row["confidence"] == pytest.approx(p.confidence)
            assert row["regions"] == [r.id for r in regions] and row["mass_shares"] == pytest.approx([r.mass_share for r in regions])
            with_regions += bool(regions)
        assert with_regions > 0
