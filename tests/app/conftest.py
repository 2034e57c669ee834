from __future__ import annotations

import sqlite3
import uuid
from collections.abc import Iterator
from datetime import datetime
from pathlib import Path
from typing import Any

import pytest
from fastapi.testclient import TestClient

from app import campaigns
from app.campaigns import create_campaign
from app.cli import main
from app.db import make_engine, session_factory, write_session
from app.deps import COOKIE
from app.main import create_app
from app.people import create_invite, csrf_token, ensure_person
from app.settings import Settings
from app.store import latest_run_id


@pytest.fixture()
def factory(project: Path):  # type: ignore[no-untyped-def]
    """Sessions on the project's database (the app's own kind: expire_on_commit off)."""
    engine = make_engine(project)
    yield session_factory(engine)
    engine.dispose()


@pytest.fixture()
def checkpoints_made(monkeypatch: pytest.MonkeyPatch) -> list[int]:
    """The label counts at which the settling page computed a checkpoint's rules through a cache (appended as made)."""
    from app.services import stopping

    made: list[int] = []
    real = stopping._rules_at

    def counted(s, c, n, **kw):  # type: ignore[no-untyped-def]
        if kw.get("cache") is not None:
            made.append(n)
        return real(s, c, n, **kw)

    monkeypatch.setattr(stopping, "_rules_at", counted)
    return made


@pytest.fixture()
def campaign_id(project: Path) -> int:
    """A campaign over every region of the project's run, two annotators per region."""
    engine = make_engine(project)
    with write_session(session_factory(engine)) as s:
        cid = create_campaign(s, name="belt audit", run_id=latest_run_id(s) or 0, labels_per_region=2, instructions="Name the <b>parts</b>.")
    engine.dispose()
    return cid


@pytest.fixture()
def client(project: Path, campaign_id: int) -> Iterator[TestClient]:
    with TestClient(create_app(Settings(project_dir=project))) as c:
        yield c


def invite(client: TestClient, name: str, role: str = "annotator", campaign: int | None = None, now: datetime | None = None) -> str:
    """A fresh invite token for ``name`` (made straight in the database, as the CLI does)."""
    with write_session(client.app.state.sessions) as s:  # type: ignore[attr-defined]
        return create_invite(s, name=name, role=role, campaign_id=campaign, now=now)[1]


def join(client: TestClient, name: str, role: str = "annotator", campaign: int | None = None) -> str:
    """Sign the client in as ``name`` through an invite link; returns the session's anti-forgery token."""
    client.cookies.clear()
    token = invite(client, name, role, campaign)
    page = client.get(f"/join/{token}")
    assert page.status_code == 200, page.text
    r = client.post(f"/join/{token}", data={"join": page.context["join_token"]}, follow_redirects=False)  # type: ignore[attr-defined]
    assert r.status_code == 303, r.text
    return csrf_of(client)


def csrf_of(client: TestClient) -> str:
    """The anti-forgery token of the client's current session."""
    return csrf_token(client.app.state.key, client.cookies[COOKIE])  # type: ignore[attr-defined]


def start(client: TestClient, campaign_id: int) -> Any:
    """Have the next region handed out (a POST) and return the labelling page that shows it."""
    return client.post(f"/campaigns/{campaign_id}/next", data={"csrf": csrf_of(client)})


def next_task(client: TestClient, campaign_id: int) -> Any:
    """POST /api/campaigns/N/tasks/next as the signed-in client; the response."""
    return client.post(f"/api/campaigns/{campaign_id}/tasks/next", headers={"X-CSRF-Token": csrf_of(client)})


def label_some(project: Path, campaign_id: int) -> None:
    """A check item and a few labels by two people, stored as the app stores them."""
    (project.parent / "c.csv").write_text("region,answer\n1,cap: red\n")
    assert main(["checks", str(project), "--campaign", str(campaign_id), str(project.parent / "c.csv")]) == 0
    engine = make_engine(project)
    with write_session(session_factory(engine)) as s:
        c = campaigns.get_campaign(s, campaign_id)
        for name in ("ann", "bob"):
            person = ensure_person(s, name, "annotator")
            for _ in range(3):
                task = campaigns.lease_tasks(s, campaign=c, person_id=person)[0]
                campaigns.save_label(s, campaign=c, region_id=task.region_id, person_id=person, entities=[("cap", ["red"])], unsure=False,
                                     client_id=uuid.uuid4().hex, seconds_spent=None)
    engine.dispose()


def as_schema_3(db: sqlite3.Connection) -> None:
    """Take off a project's database what later revisions added (tables and columns schema 3 did not have), so a
    test can make a project of an older schema from a fresh one."""
    from app.migrations import schema_3

    tables = [r[0] for r in db.execute("SELECT name FROM sqlite_master WHERE type = 'table' AND name NOT LIKE 'sqlite_%'")]
    for name in tables:
        table = schema_3.metadata.tables.get(name)
        if table is None:
            db.execute(f'DROP TABLE "{name}"')
            continue
        for (column,) in db.execute(f'SELECT name FROM pragma_table_info("{name}")').fetchall():
            if column not in table.columns:
                db.execute(f'ALTER TABLE "{name}" DROP COLUMN "{column}"')
