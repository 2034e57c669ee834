"""Secrets are the owner's only; invites never change a role; rotating the key ends every session."""

from __future__ import annotations

import stat
from pathlib import Path

import pytest
from fastapi.testclient import TestClient
from sqlalchemy import select

from app.cli import main
from app.db import make_engine, session_factory, write_session
from app.deps import COOKIE
from app.errors import ConflictError
from app.main import create_app
from app.models import Person, Secret
from app.people import create_invite, key_path, load_key, session_cookie, set_role
from app.settings import Settings

from .conftest import invite, join


def _mode(path: Path) -> int:
    return stat.S_IMODE(path.stat().st_mode)


def test_signing_key_lives_in_an_owner_only_file_and_new_projects_are_owner_only(tmp_path: Path, client: TestClient) -> None:
    project = Path(client.app.state.settings.project_dir)  # type: ignore[attr-defined]
    assert _mode(key_path(project)) == 0o600
    assert bytes.fromhex(key_path(project).read_text().strip()) == client.app.state.key  # type: ignore[attr-defined]
    with client.app.state.sessions() as s:  # type: ignore[attr-defined]
        assert s.scalars(select(Secret)).all() == []  # nothing secret in the database
    assert main(["init", str(tmp_path / "fresh")]) == 0
    assert _mode(tmp_path / "fresh") == 0o700 and _mode(tmp_path / "fresh" / "heedmap.db") == 0o600
    assert _mode(key_path(tmp_path / "fresh")) == 0o600


def test_a_key_left_in_the_database_by_an_older_version_signs_nobody_in(project: Path, campaign_id: int) -> None:
    """Anyone who could read heedmap.db could forge an admin cookie with the key kept there."""
    old_key = bytes(range(32))
    engine = make_engine(project)
    with write_session(session_factory(engine)) as s:
        s.merge(Secret(name="cookie_key", value=old_key.hex()))
        invite_id, _ = create_invite(s, name="boss", role="admin")
    engine.dispose()
    (project / "heedmap.db").chmod(0o644)
    with TestClient(create_app(Settings(project_dir=project))) as client:
        client.cookies.set(COOKIE, session_cookie(old_key, invite_id))
        assert client.get("/admin").status_code == 401
        with client.app.state.sessions() as s:  # type: ignore[attr-defined]
            assert s.get(Secret, "cookie_key") is None  # the exposed key is gone for good
    assert _mode(project / "heedmap.db") == 0o600


def test_rotating_the_key_signs_everyone_out(client: TestClient, project: Path, capsys: pytest.CaptureFixture[str]) -> None:
    join(client, "root", role="admin")
    assert client.get("/admin").status_code == 200
    assert main(["keys", str(project), "--rotate"]) == 0
    assert "signed out" in capsys.readouterr().out
    assert _mode(key_path(project)) == 0o600
    assert client.get("/admin").status_code == 401  # the running server reads the new key at once
    join(client, "root", role="admin")  # a fresh invite link still works
    assert client.get("/admin").status_code == 200


def test_an_invite_never_changes_an_existing_persons_role(client: TestClient, project: Path, campaign_id: int,
                                                         capsys: pytest.CaptureFixture[str]) -> None:
    join(client, "ed", role="analyst")
    assert client.get(f"/campaigns/{campaign_id}/agreement").status_code in (200, 404)  # allowed (404: no labels yet)
    assert main(["invite", str(project), "--name", "ed", "--role", "annotator"]) == 1
    assert "does not change a role" in capsys.readouterr().err
    with pytest.raises(ConflictError, match="as analyst"):
        invite(client, "ed", role="annotator")
    csrf = join(client, "root", role="admin")
    r = client.post("/admin/invites", data={"csrf": csrf, "name": "root", "role": "annotator"})  # the admin locking themself out
    assert r.status_code == 409 and "does not change a role" in r.text
    with client.app.state.sessions() as s:  # type: ignore[attr-defined]
        roles = dict(s.execute(select(Person.name, Person.role)).all())
    assert roles["ed"] == "analyst" and roles["root"] == "admin"
    assert client.get("/admin").status_code == 200
    # A role changes only on purpose, and the last admin stays one.
    assert main(["role", str(project), "--name", "ed", "--role", "reviewer"]) == 0
    assert main(["role", str(project), "--name", "root", "--role", "annotator"]) == 1
    assert "only admin" in capsys.readouterr().err
    with write_session(client.app.state.sessions) as s:  # type: ignore[attr-defined]
        assert set_role(s, "ed", "analyst") == "reviewer"
    csrf = join(client, "root", role="admin")
    assert client.post("/admin/people/role", data={"csrf": csrf, "name": "ed", "role": "admin"}, follow_redirects=False).status_code == 303
    lone = client.post("/admin/people/role", data={"csrf": csrf, "name": "nobody", "role": "admin"})
    assert lone.status_code == 404 and "nobody called" in lone.text


def test_server_processes_starting_at_once_share_one_key(tmp_path: Path) -> None:
    """Several workers (``serve --workers N``) may make the key at the same moment: every one ends with the same key."""
    import threading

    gate = threading.Barrier(8, timeout=60)
    keys: list[bytes] = []

    def start() -> None:
        gate.wait()
        keys.append(load_key(tmp_path))

    threads = [threading.Thread(target=start) for _ in range(8)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert len(keys) == 8 and len(set(keys)) == 1 and load_key(tmp_path) == keys[0]
    assert _mode(key_path(tmp_path)) == 0o600 and [p.name for p in tmp_path.iterdir()] == ["secret.key"]  # no temporary file left
