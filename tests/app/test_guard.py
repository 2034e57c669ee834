"""What the server does before a route reads anything: bounded bodies, anonymous writes refused, headers."""

from __future__ import annotations

import asyncio
import uuid
from pathlib import Path
from typing import Any

from fastapi.testclient import TestClient

from app.deps import COOKIE
from app.main import create_app
from app.security import KIB, body_limit
from app.settings import Settings

from .conftest import join, next_task


def _raw_post(app: Any, path: str, *, chunks: int, chunk: bytes, cookie: str | None = None, length: int | None = None) -> tuple[int, int]:
    """POST a body in chunks straight through ASGI; returns (status, bytes the app pulled from the client)."""
    headers = [(b"content-type", b"application/x-www-form-urlencoded")]
    if cookie:
        headers.append((b"cookie", f"{COOKIE}={cookie}".encode()))
    if length is not None:
        headers.append((b"content-length", str(length).encode()))
    scope = {"type": "http", "asgi": {"version": "3.0"}, "http_version": "1.1", "method": "POST", "scheme": "http", "path": path, "raw_path": path.encode(),
             "query_string": b"", "root_path": "", "headers": headers, "client": ("127.0.0.1", 1), "server": ("testserver", 80)}
    pulled = 0
    sent = 0
    status = 0

    async def receive() -> dict[str, Any]:
        nonlocal pulled, sent
        if sent >= chunks:
            return {"type": "http.disconnect"}
        sent += 1
        pulled += len(chunk)
        return {"type": "http.request", "body": chunk, "more_body": sent < chunks}

    async def send(message: dict[str, Any]) -> None:
        nonlocal status
        if message["type"] == "http.response.start":
            status = message["status"]

    asyncio.run(app(scope, receive, send))
    return status, pulled


def test_anonymous_writes_are_refused_before_the_body_is_read(client: TestClient, campaign_id: int) -> None:
    """Three anonymous 300 MB posts once grew the server by a gigabyte: now not one byte is read."""
    for path in (f"/campaigns/{campaign_id}/label", "/admin/campaigns", f"/api/campaigns/{campaign_id}/regions/1/labels"):
        status, pulled = _raw_post(client.app, path, chunks=300, chunk=b"x" * (1024 * 1024), length=300 * 1024 * 1024)
        assert (status, pulled) == (401, 0), path
        status, pulled = _raw_post(client.app, path, chunks=300, chunk=b"x" * (1024 * 1024), cookie="1.forged")
        assert (status, pulled) == (401, 0), path


def test_bodies_are_bounded_per_route_before_and_while_reading(client: TestClient, campaign_id: int) -> None:
    join(client, "ann", campaign=campaign_id)
    cookie = client.cookies[COOKIE]
    path = f"/campaigns/{campaign_id}/label"
    limit = body_limit("POST", path)
    assert limit == 16 * KIB and body_limit("POST", f"/campaigns/{campaign_id}/expectations") > 50_000
    status, pulled = _raw_post(client.app, path, chunks=300, chunk=b"x" * KIB, cookie=cookie, length=300 * KIB)
    assert (status, pulled) == (413, 0)  # a declared length past the bound: refused unread
    status, pulled = _raw_post(client.app, path, chunks=300, chunk=b"x" * KIB, cookie=cookie)  # no length given: stopped at the bound
    assert status == 413 and pulled <= limit + KIB
    r = client.post(path, data={"labels": "x" * (20 * KIB)}, headers={"X-CSRF-Token": "whatever"})
    assert r.status_code == 413 and "16 KiB" in r.json()["message"]


def test_every_answer_carries_the_security_headers(client: TestClient, campaign_id: int) -> None:
    join(client, "ann", campaign=campaign_id)
    for r in (client.get("/"), client.get(f"/campaigns/{campaign_id}/label"), client.get("/api/regions/99999/crop.png"), client.get("/static/heedmap.css"),
              client.post("/signout")):
        csp = r.headers["content-security-policy"]
        assert "frame-ancestors 'none'" in csp and "script-src 'self'" in csp and "default-src 'self'" in csp, r.url
        assert r.headers["x-content-type-options"] == "nosniff" and r.headers["referrer-policy"] == "no-referrer"
        assert r.headers["x-frame-options"] == "DENY"


def test_api_description_is_off_unless_asked_for(project: Path, client: TestClient) -> None:
    join(client, "root", role="admin")
    for url in ("/docs", "/openapi.json", "/redoc"):
        assert client.get(url).status_code == 404, url
    with TestClient(create_app(Settings(project_dir=project, api_docs=True))) as on:
        assert on.get("/openapi.json").json()["info"]["title"] == "heedmap"


def test_a_signed_in_write_within_bounds_still_works(client: TestClient, campaign_id: int) -> None:
    csrf = join(client, "bo", campaign=campaign_id)
    rid = next_task(client, campaign_id).json()["task"]["region_id"]
    body = {"client_id": uuid.uuid4().hex, "entities": [{"entity": "cap", "attributes": ["red"]}]}
    r = client.post(f"/api/campaigns/{campaign_id}/regions/{rid}/labels", json=body, headers={"X-CSRF-Token": csrf})
    assert r.status_code == 201 and r.json()["stored"] is True
