"""Every route, sent bad input, answers with a client error and our error shape: never a 500."""

from __future__ import annotations

import itertools
import re
import uuid

import pytest
from fastapi.routing import APIRoute
from fastapi.testclient import TestClient

from app.routes import admin, auth, labelling, pages, regions, results

from .conftest import join, next_task

BAD_PATH_VALUES = ("0", "abc", "99999999999999999999")
BAD_QUERIES = ({}, {"target": "nonsense", "max_len": "0", "min_support": "7", "threshold": "-3", "a": "x" * 300, "b": "", "q": "((("},
               {"min_support": "nan", "threshold": "inf", "prune": "maybe", "kind": "x"})
BAD_FORMS = ({}, {"region_id": "x", "client_id": "short", "labels": ";;;", "name": "", "run_id": "-1", "labels_per_region": "0",
                  "method": "", "role": "emperor", "days": "-5", "kind": "nope", "source": "", "text": "[[[", "answer": "::"},
             {"labels_per_region": "999999999999999999999", "lease_minutes": "nan", "check_every": "0", "campaign_id": "abc"})
BAD_JSON = (b"", b"{", b"[]", b'{"client_id": 5, "entities": "cap"}', b'{"client_id": "' + b"x" * 100 + b'", "entities": [{"entity": ""}]}')


def _routes() -> list[APIRoute]:
    """Every route the app mounts (each router's paths carry its prefix)."""
    return [r for m in (admin, auth, labelling, pages, regions, results) for router in m.routers for r in router.routes if isinstance(r, APIRoute)]


def _fill(path: str, value: str, campaign_id: int, real: bool) -> str:
    """The path with every parameter set to ``value``, or (``real``) the campaign id set to a real one."""
    def one(m: re.Match[str]) -> str:
        name = m.group(1)
        if real and name == "campaign_id":
            return str(campaign_id)
        if name in ("fmt", "kind"):
            return "xlsx"
        return value
    return re.sub(r"\{(\w+)(?::\w+)?\}", one, path)


def _check(response: object, where: str) -> None:
    status = response.status_code  # type: ignore[attr-defined]
    assert status < 500, f"{where} answered {status}: {response.text[:300]}"  # type: ignore[attr-defined]
    if status >= 400 and response.headers.get("content-type", "").startswith("application/json"):  # type: ignore[attr-defined]
        body = response.json()  # type: ignore[attr-defined]
        assert set(body) == {"message", "code", "status"} and body["status"] == status and body["message"], where


@pytest.mark.parametrize("labelled", [False, True], ids=["no-labels", "labelled"])
def test_no_route_answers_500_to_bad_input(client: TestClient, campaign_id: int, labelled: bool) -> None:
    if labelled:
        csrf = join(client, "lab")
        for _ in range(6):
            nxt = next_task(client, campaign_id).json()["task"]
            if nxt is None:
                break
            body = {"client_id": uuid.uuid4().hex, "entities": [{"entity": "cap", "attributes": ["red"]}]}
            client.post(f"/api/campaigns/{campaign_id}/regions/{nxt['region_id']}/labels", json=body, headers={"X-CSRF-Token": csrf})
    routes = _routes()
    assert len(routes) > 30  # every area's routes are mounted
    for role in ("admin", None):
        csrf = join(client, f"bad-{role}", role) if role else ""
        if role is None:
            client.cookies.clear()
        headers = {"X-CSRF-Token": csrf}
        values = BAD_PATH_VALUES if role else BAD_PATH_VALUES[:1]  # signed out, every route stops at the sign-in check
        for route, value, real in itertools.product(routes, values, (False, True)):
            if route.path == "/signout" or (real and "{campaign_id}" not in route.path):
                continue  # signing out takes no input (and would end this walk's sign-in)
            url = _fill(route.path, value, campaign_id, real)
            for method in sorted(route.methods):
                if method == "GET":
                    for q in BAD_QUERIES:
                        _check(client.get(url, params=q, follow_redirects=False), f"{role} GET {url} {q}")
                elif method == "POST":
                    for form in BAD_FORMS:
                        _check(client.post(url, data={**form, "csrf": csrf}, follow_redirects=False), f"{role} POST form {url} {form}")
                    for raw in BAD_JSON:
                        resp = client.post(url, content=raw, headers={**headers, "content-type": "application/json"}, follow_redirects=False)
                        _check(resp, f"{role} POST json {url} {raw[:40]!r}")
