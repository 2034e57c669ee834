"""Every route has an access rule, and each rule holds for every role: a new route without one fails here."""

from __future__ import annotations

import re

from fastapi.testclient import TestClient

from app.deps import COOKIE
from app.people import csrf_token

from .conftest import invite

ROLES = ("anonymous", "annotator", "reviewer", "analyst", "admin")
# The least role each route lets in: "public" (anyone, joining has its own token), "viewer" (anyone signed in;
# what an annotator sees is narrowed inside), or a role and everyone above it.
MATRIX: dict[tuple[str, str], str] = {
    ("GET", "/"): "public",
    ("GET", "/join/{token}"): "public",
    ("POST", "/join/{token}"): "public",
    ("POST", "/signout"): "viewer",
    ("GET", "/campaigns/{campaign_id}/label"): "annotator",
    ("POST", "/campaigns/{campaign_id}/label"): "annotator",
    ("POST", "/campaigns/{campaign_id}/next"): "annotator",
    ("POST", "/campaigns/{campaign_id}/skip"): "annotator",
    ("POST", "/campaigns/{campaign_id}/undo"): "annotator",
    ("POST", "/api/campaigns/{campaign_id}/tasks/next"): "annotator",
    ("POST", "/api/campaigns/{campaign_id}/regions/{region_id}/labels"): "annotator",
    ("POST", "/api/campaigns/{campaign_id}/regions/{region_id}/skip"): "annotator",
    ("POST", "/api/campaigns/{campaign_id}/undo"): "annotator",
    ("GET", "/api/campaigns/{campaign_id}/vocabulary"): "annotator",
    ("GET", "/campaigns/{campaign_id}/groups"): "annotator",
    ("POST", "/campaigns/{campaign_id}/groups/next"): "annotator",
    ("POST", "/campaigns/{campaign_id}/groups/label"): "annotator",
    ("POST", "/campaigns/{campaign_id}/groups/skip"): "annotator",
    ("POST", "/api/campaigns/{campaign_id}/groups/next"): "annotator",
    ("POST", "/api/campaigns/{campaign_id}/groups/{group_id}/labels"): "annotator",
    ("GET", "/api/regions/{region_id}/crop.png"): "viewer",
    ("GET", "/api/regions/{region_id}/outline.png"): "viewer",
    ("GET", "/api/regions/{region_id}/overlay.png"): "viewer",
    ("GET", "/api/images/{image_id}/thumb.png"): "reviewer",
    ("GET", "/admin"): "admin",
    ("POST", "/admin/campaigns"): "admin",
    ("POST", "/admin/invites"): "admin",
    ("POST", "/admin/people/role"): "admin",
    ("POST", "/admin/invites/{invite_id}/revoke"): "admin",
    ("GET", "/admin/campaigns/{campaign_id}"): "admin",
    ("POST", "/admin/campaigns/{campaign_id}/settings"): "admin",
    ("POST", "/admin/campaigns/{campaign_id}/checks"): "admin",
    ("GET", "/admin/campaigns/{campaign_id}/labels.csv"): "admin",
    ("GET", "/campaigns/{campaign_id}/results"): "reviewer",
    ("GET", "/campaigns/{campaign_id}/plots/{kind}.png"): "reviewer",
    ("GET", "/campaigns/{campaign_id}/exports/rules.{fmt}"): "reviewer",
    ("GET", "/campaigns/{campaign_id}/exports/concepts.{fmt}"): "reviewer",
    ("GET", "/campaigns/{campaign_id}/exports/main-labels.csv"): "reviewer",
    ("GET", "/campaigns/{campaign_id}/ask"): "reviewer",
    ("GET", "/campaigns/{campaign_id}/expectations"): "reviewer",
    ("POST", "/campaigns/{campaign_id}/expectations"): "analyst",
    ("GET", "/campaigns/{campaign_id}/errors"): "reviewer",
    ("GET", "/campaigns/{campaign_id}/compare"): "reviewer",
    ("GET", "/campaigns/{campaign_id}/report.html"): "reviewer",
    ("GET", "/campaigns/{campaign_id}/agreement"): "reviewer",
    ("GET", "/campaigns/{campaign_id}/synonyms"): "reviewer",
    ("POST", "/campaigns/{campaign_id}/synonyms"): "analyst",
    ("POST", "/campaigns/{campaign_id}/synonyms/{rule_id}/delete"): "analyst",
    ("GET", "/campaigns/{campaign_id}/stopping"): "reviewer",
    ("POST", "/campaigns/{campaign_id}/classes/close"): "analyst",
}
LEVEL = {"public": -1, "viewer": 0, "anonymous": -1, "annotator": 1, "reviewer": 2, "analyst": 3, "admin": 4}


def _routes(client: TestClient) -> set[tuple[str, str]]:
    schema = client.app.openapi()  # type: ignore[attr-defined]  # built even while /openapi.json is off
    return {(method.upper(), path) for path, ops in schema["paths"].items() for method in ops}


def test_every_route_has_an_access_rule(client: TestClient) -> None:
    found = _routes(client)
    missing = sorted(found - set(MATRIX))
    assert not missing, f"routes without an access rule in this matrix (add one, and the guard): {missing}"
    assert not sorted(set(MATRIX) - found), "the matrix names routes that are gone"


def _fill(path: str, campaign_id: int) -> str:
    values = {"campaign_id": campaign_id, "region_id": 1, "image_id": 1, "invite_id": 999999, "group_id": 999999, "rule_id": 999999, "kind": "frequency",
              "fmt": "csv", "token": "not-a-real-token"}
    return re.sub(r"\{(\w+)\}", lambda m: str(values[m.group(1)]), path)


def test_each_role_gets_what_its_rule_says(client: TestClient, campaign_id: int) -> None:
    """Every route, called by each role: those below its rule are refused (401 signed out, 403 naming the role), the rest get past the guard."""
    cookies = {}
    for role in ROLES[1:]:
        client.cookies.clear()
        token = invite(client, f"matrix {role}", role=role)
        page = client.get(f"/join/{token}")
        client.post(f"/join/{token}", data={"join": page.context["join_token"]}, follow_redirects=False)  # type: ignore[attr-defined]
        cookies[role] = client.cookies[COOKIE]
    client.cookies.clear()
    failures = []
    for (method, path), rule in sorted(MATRIX.items()):
        url = _fill(path, campaign_id)
        for role in ROLES:
            headers = {}
            if role != "anonymous":
                headers = {"cookie": f"{COOKIE}={cookies[role]}", "x-csrf-token": csrf_token(client.app.state.key, cookies[role])}  # type: ignore[attr-defined]
            if method == "GET":
                r = client.get(url, headers=headers, follow_redirects=False)
            elif url.startswith("/api/"):
                r = client.post(url, json={}, headers=headers, follow_redirects=False)
            else:
                r = client.post(url, data={}, headers=headers, follow_redirects=False)
            text = r.text
            needs = re.search(r"needs the (\w+) role", text)
            if rule == "public" or LEVEL[role] >= LEVEL[rule]:
                ok = r.status_code != 401 and needs is None and "sign in first" not in text
            elif role == "anonymous":
                ok = r.status_code == 401 and "sign in" in text
            else:
                ok = r.status_code == 403 and needs is not None and LEVEL[needs.group(1)] > LEVEL[role]
            if not ok:
                failures.append((role, method, url, r.status_code, text[:160]))
    assert not failures, failures
