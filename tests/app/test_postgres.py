"""PostgreSQL as the shared database: the schema, several servers starting at once, the commands that set it up, its
faults, and the assignment guarantees with several server processes (uvicorn workers) writing at the same time.

These run against the server in HEEDMAP_TEST_POSTGRES_URL (CI starts one; ``eval "$(./dev postgres start)"`` locally)
and skip with that reason where there is none.
"""

from __future__ import annotations

import os
import re
import subprocess
import sys
import threading
import time
import uuid
from collections import Counter
from pathlib import Path

import httpx
import pytest
from alembic import command
from fastapi.testclient import TestClient
from sqlalchemy import func, select, text

from app.cli import main
from app.db import (
    NotAProjectError,
    ReadOnlyProjectError,
    _alembic_config,
    database_url_file,
    explained,
    head_revision,
    make_engine,
    open_project,
    session_factory,
    set_project_database,
    write_session,
)
from app.models import Label, Person
from app.people import create_invite

from .conftest import csrf_of, join, next_task
from .test_schema_migrations import _differences

pytestmark = pytest.mark.postgresql_only


@pytest.fixture()
def pg_project(tmp_path: Path, database_url: str) -> Path:
    """An empty project folder whose data lives in a fresh PostgreSQL database."""
    proj = tmp_path / "team"
    proj.mkdir(mode=0o700)
    set_project_database(proj, database_url)
    return proj


def test_a_new_database_matches_the_models_and_every_revision_round_trips(pg_project: Path) -> None:
    engine = make_engine(pg_project)
    assert _differences(engine) == []
    with engine.begin() as c:
        command.downgrade(_alembic_config(c), "base")
        command.upgrade(_alembic_config(c), "head")
    assert _differences(engine) == []
    engine.dispose()


def test_servers_starting_at_once_migrate_the_database_once(pg_project: Path) -> None:
    errors: list[BaseException] = []
    gate = threading.Barrier(4, timeout=60)

    def start() -> None:
        try:
            gate.wait()
            make_engine(pg_project).dispose()
        except BaseException as exc:  # pragma: no cover - reported below
            errors.append(exc)

    threads = [threading.Thread(target=start) for _ in range(4)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert not errors
    engine = make_engine(pg_project)
    with engine.connect() as c:
        assert c.execute(text("SELECT version_num FROM alembic_version")).scalars().all() == [head_revision()]
        assert c.execute(text("SELECT version FROM schema_info")).scalars().all() == [4]
    engine.dispose()


def test_open_project_refuses_what_is_not_a_project(tmp_path: Path, database_url: str, pg_project: Path) -> None:
    with pytest.raises(NotAProjectError, match="is not a heedmap project"):
        open_project(tmp_path / "nothing", database_url=database_url)
    assert not (tmp_path / "nothing").exists()
    with pytest.raises(NotAProjectError, match="holds no heedmap project"):
        open_project(pg_project)  # the folder exists, its database is empty: only init, saliency or demo make one
    open_project(pg_project, create=True).dispose()
    open_project(pg_project).dispose()


def test_a_read_only_open_writes_nothing(pg_project: Path) -> None:
    make_engine(pg_project).dispose()
    engine = open_project(pg_project, readonly=True)
    with pytest.raises(ReadOnlyProjectError, match="cannot write"), explained(pg_project), write_session(session_factory(engine)) as s:
        s.add(Person(name="mallory", role="admin"))
    with session_factory(engine)() as s:
        assert s.scalar(select(func.count(Person.id))) == 0
    engine.dispose()


def test_init_records_the_database_and_every_command_uses_it(tmp_path: Path, database_url: str, capsys: pytest.CaptureFixture[str]) -> None:
    proj = tmp_path / "team"
    assert main(["init", str(proj), "--db", database_url]) == 0
    url_file = database_url_file(proj)
    assert url_file.read_text().strip() == database_url and url_file.stat().st_mode & 0o077 == 0  # owner-only: a URL may hold a password
    assert not (proj / "heedmap.db").exists()
    assert main(["invite", str(proj), "--name", "kim", "--role", "annotator"]) == 0
    assert main(["invite", str(proj), "--list"]) == 0
    assert "kim" in capsys.readouterr().out
    assert main(["backup", str(proj), "--out", str(tmp_path / "b.db")]) == 1
    assert "pg_dump" in capsys.readouterr().err
    assert main(["init", str(proj), "--db", database_url]) == 1  # already a project


def test_wrong_urls_and_unreachable_servers_say_what_to_fix(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    for url, says in [("mysql://u@h/db", "neither"), ("sqlite:///x.db", "leave out --db"), ("not a url", "not a database URL"),
                      (f"postgresql://nobody:secret@/none?host={tmp_path}", "cannot reach")]:
        assert main(["init", str(tmp_path / "p"), "--db", url]) == 1, url
        err = capsys.readouterr().err
        assert says in err and "Traceback" not in err and "secret" not in err, err


def test_several_workers_need_postgresql(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    sqlite_project = tmp_path / "solo"
    assert main(["init", str(sqlite_project)]) == 0
    assert main(["serve", str(sqlite_project), "--workers", "2"]) == 1
    assert "needs a PostgreSQL database" in capsys.readouterr().err


def test_text_the_database_cannot_store_is_refused_with_what_to_fix(client: TestClient, campaign_id: int) -> None:
    """PostgreSQL cannot store a NUL character in text (SQLite can): the answer says so, with 422, and keeps what was saved."""
    csrf = join(client, "root", role="admin")
    form = {"csrf": csrf, "instructions": "Name the\x00 parts.", "labels_per_region": "2", "method": "majority"}
    r = client.post(f"/admin/campaigns/{campaign_id}/settings", data=form, headers={"Accept": "application/json"}, follow_redirects=False)
    assert r.status_code == 422 and "NUL" in r.json()["message"], r.text
    with client.app.state.sessions() as s:  # type: ignore[attr-defined]
        assert s.scalar(text("SELECT instructions FROM campaigns WHERE id = :c"), {"c": campaign_id}) == "Name the <b>parts</b>."
    join(client, "ann", campaign=campaign_id)
    rid = next_task(client, campaign_id).json()["task"]["region_id"]
    body = {"client_id": uuid.uuid4().hex, "entities": [{"entity": "cap"}]}
    r = client.post(f"/api/campaigns/{campaign_id}/regions/{rid}/labels", json=body, headers={"X-CSRF-Token": csrf_of(client)})
    assert r.status_code == 201 and r.json()["stored"]


def _children(pid: int) -> list[int]:
    found = []
    for entry in Path("/proc").iterdir():
        if entry.name.isdigit():
            try:
                if int((entry / "stat").read_text().rsplit(")", 1)[1].split()[1]) == pid:
                    found.append(int(entry.name))
            except (OSError, IndexError, ValueError):
                continue
    return found


def test_two_server_processes_keep_the_assignment_guarantees(project: Path, campaign_id: int, tmp_path: Path) -> None:
    """Six annotators label a campaign through `heedmap serve --workers 2`, every request on a new connection (so
    requests land on both processes): no region gets more than k labels, nobody labels a region twice, every label
    acknowledged is stored, and a sign-in made by one process is honoured by the other (one signing key)."""
    engine = make_engine(project)
    with write_session(session_factory(engine)) as s:
        tokens = [create_invite(s, name=f"w{i}", role="annotator", campaign_id=campaign_id)[1] for i in range(6)]
        k = 2
    engine.dispose()
    import socket

    with socket.socket() as sock:
        sock.bind(("127.0.0.1", 0))
        port = sock.getsockname()[1]
    log = open(tmp_path / "serve.log", "w")  # noqa: SIM115 (closed below)
    server = subprocess.Popen([str(Path(sys.executable).with_name("heedmap")), "serve", str(project), "--port", str(port), "--workers", "2"],
                              stdout=log, stderr=subprocess.STDOUT, env={**os.environ, "PYTHONUNBUFFERED": "1"})
    base = f"http://127.0.0.1:{port}"
    acknowledged: list[tuple[int, str]] = []
    problems: list[str] = []
    try:
        for _ in range(600):
            try:
                if httpx.get(base + "/", timeout=1).status_code < 500 and len(_children(server.pid)) >= 2:
                    break
            except httpx.HTTPError:
                pass
            assert server.poll() is None, (tmp_path / "serve.log").read_text()
            time.sleep(0.1)
        assert len(_children(server.pid)) >= 2, "uvicorn did not start two workers"

        def annotate(token: str) -> None:
            fresh = httpx.Limits(max_keepalive_connections=0)  # every request on a new connection: either process may answer
            with httpx.Client(base_url=base, timeout=60, limits=fresh) as c:
                page = c.get(f"/join/{token}")
                join = re.search(r'name="join" value="([^"]+)"', page.text)
                r = c.post(f"/join/{token}", data={"join": join.group(1) if join else ""}, follow_redirects=True)
                csrf = re.search(r'name="csrf" value="([^"]+)"', r.text)
                if r.status_code != 200 or csrf is None:
                    problems.append(f"sign-in {r.status_code}")
                    return
                headers = {"X-CSRF-Token": csrf.group(1)}
                for _ in range(200):
                    r = c.post(f"/api/campaigns/{campaign_id}/tasks/next", headers=headers)
                    if r.status_code != 200:
                        problems.append(f"next {r.status_code}: {r.text[:200]}")
                        return
                    task = r.json().get("task")
                    if task is None:
                        return
                    body = {"client_id": uuid.uuid4().hex, "entities": [{"entity": "cap"}]}
                    r = c.post(f"/api/campaigns/{campaign_id}/regions/{task['region_id']}/labels", json=body, headers=headers)
                    if r.status_code == 201 and r.json()["stored"]:
                        acknowledged.append((task["region_id"], body["client_id"]))
                    elif r.status_code != 409:
                        problems.append(f"submit {r.status_code}: {r.text[:200]}")

        threads = [threading.Thread(target=annotate, args=(t,)) for t in tokens]
        for t in threads:
            t.start()
        for t in threads:
            t.join()
    finally:
        server.terminate()
        server.wait(timeout=30)
        log.close()
    assert not problems, problems
    engine = make_engine(project)
    with session_factory(engine)() as s:
        rows = s.execute(select(Label.region_id, Label.person_id, Label.client_id).where(Label.campaign_id == campaign_id)).all()
        n_regions = s.scalar(text("SELECT n_regions FROM campaigns WHERE id = :c"), {"c": campaign_id})
    engine.dispose()
    per_region = Counter(r for r, _, _ in rows)
    assert set(per_region.values()) == {k} and len(per_region) == n_regions  # every region done, none past k
    assert len({(r, p) for r, p, _ in rows}) == len(rows)  # nobody twice on a region
    assert {c for _, c in acknowledged} == {c for _, _, c in rows}  # every acknowledged label stored, nothing else
