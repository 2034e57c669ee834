"""The campaign-analysis service: what the pages take their results from."""

from __future__ import annotations

import uuid

from fastapi.testclient import TestClient

from analysis.concept_votes import presence_agreement
from app.campaigns import get_campaign
from app.services.campaign_analysis import ResultsCache, agreement_summary, campaign_results, votes

from .conftest import join, next_task


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
