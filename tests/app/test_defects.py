"""Defects found in review, each pinned by a test that failed before its fix."""

from __future__ import annotations

import uuid
from pathlib import Path

import pytest
from fastapi.testclient import TestClient

from app import campaigns
from app.db import make_engine, session_factory, write_session
from app.errors import InvalidRequestError

from .conftest import join, next_task


def test_campaign_whose_only_label_is_not_sure_answers_without_a_server_error(client: TestClient, campaign_id: int) -> None:
    csrf = join(client, "una")
    nxt = next_task(client, campaign_id).json()["task"]
    body = {"client_id": uuid.uuid4().hex, "entities": [{"entity": "cap"}], "unsure": True}
    r = client.post(f"/api/campaigns/{campaign_id}/regions/{nxt['region_id']}/labels", json=body, headers={"X-CSRF-Token": csrf})
    assert r.status_code == 201
    join(client, "rev", "reviewer")
    for path in ("agreement", "results", "exports/main-labels.csv"):
        got = client.get(f"/campaigns/{campaign_id}/{path}")
        assert got.status_code == 404, (path, got.status_code, got.text[:300])
        assert "not sure" in got.text, path  # the message says why there is nothing to show


@pytest.mark.parametrize(("field", "value", "words"), [("labels_per_region", 0, "labels per region"), ("method", "", "aggregation method")])
def test_update_campaign_refuses_zero_and_empty_instead_of_storing_them(project: Path, campaign_id: int, field: str, value: object, words: str) -> None:
    engine = make_engine(project)
    factory = session_factory(engine)
    try:
        with pytest.raises(InvalidRequestError, match=words), write_session(factory) as s:
            campaigns.update_campaign(s, campaign_id, **{field: value})  # type: ignore[arg-type]
        with factory() as s:
            c = campaigns.get_campaign(s, campaign_id)
        assert (c.labels_per_region, c.method) == (2, "majority")
    finally:
        engine.dispose()
