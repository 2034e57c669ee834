"""A mistyped path, a read-only, damaged or full database: one clear message each, nothing lost, no traceback."""

from __future__ import annotations

import sqlite3
import uuid
from pathlib import Path

import pytest
from fastapi.testclient import TestClient
from sqlalchemy import event, func, select
from sqlalchemy.engine import Engine

from app import db
from app.cli import main
from app.db import DamagedProjectError, NotAProjectError, make_engine, session_factory
from app.main import create_app
from app.models import Label
from app.settings import Settings

from .conftest import join, label_some, next_task


@pytest.mark.parametrize("argv", [
    ["serve", "{p}"], ["invite", "{p}", "--name", "kim"], ["invite", "{p}", "--list"], ["campaign", "{p}", "--name", "x"], ["ask", "{p}", "tag"],
    ["keys", "{p}", "--rotate"], ["role", "{p}", "--name", "kim", "--role", "admin"], ["backup", "{p}", "--out", "{p}.bak"],
    ["export", "{p}", "--out", "{p}.csv"],
])
def test_commands_that_do_not_make_a_project_refuse_a_missing_one(tmp_path: Path, argv: list[str], capsys: pytest.CaptureFixture[str]) -> None:
    typo = tmp_path / "projcet"
    assert main([a.format(p=typo) for a in argv]) == 1
    err = capsys.readouterr().err
    assert "not a heedmap project" in err and str(typo.resolve()) in err and "Traceback" not in err
    assert not typo.exists()


def test_the_server_does_not_start_over_a_missing_project(tmp_path: Path) -> None:
    with pytest.raises(NotAProjectError, match="not a heedmap project"):
        with TestClient(create_app(Settings(project_dir=tmp_path / "nothing"))):
            pass
    assert not (tmp_path / "nothing").exists()


def test_reading_commands_work_on_a_read_only_project_and_writes_say_why_not(project: Path, campaign_id: int, tmp_path: Path,
                                                                          monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]) -> None:
    label_some(project, campaign_id)
    monkeypatch.setattr(db, "_writable", lambda path: False)  # root may write anywhere; the check is what we test
    assert main(["invite", str(project), "--list"]) == 0
    assert main(["export", str(project), "--what", "concepts", "--out", str(tmp_path / "c.csv")]) == 0
    assert main(["backup", str(project), "--out", str(tmp_path / "b.db")]) == 0
    capsys.readouterr()
    assert main(["invite", str(project), "--name", "kim"]) == 1
    err = capsys.readouterr().err
    assert "read-only" in err and "Traceback" not in err and "heedmap.db" in err


def _damage(path: Path, how: str) -> None:
    data = bytearray(path.read_bytes())
    if how == "random bytes":
        path.write_bytes(bytes(range(256)) * 64)
    elif how == "truncated":
        path.write_bytes(bytes(data[: len(data) // 3]))
    else:  # pages in the middle overwritten where their cells are (the end of a page; its start is often unused)
        page = 4096
        for at in range(2 * page, len(data) - page, 3 * page):
            data[at + page - 400 : at + page - 100] = b"\xff" * 300
        path.write_bytes(bytes(data))


@pytest.mark.parametrize("how", ["random bytes", "truncated", "damaged pages"])
def test_a_damaged_database_is_found_at_start_with_what_to_do(project: Path, campaign_id: int, how: str, capsys: pytest.CaptureFixture[str]) -> None:
    label_some(project, campaign_id)
    _damage(project / "heedmap.db", how)
    for argv in (["invite", str(project), "--list"], ["ask", str(project), "tag"], ["serve", str(project)]):
        assert main(argv) == 1, argv
        err = capsys.readouterr().err
        assert "is damaged" in err and "heedmap backup" in err and "Traceback" not in err, err
    with pytest.raises(DamagedProjectError):
        with TestClient(create_app(Settings(project_dir=project))):
            pass


def test_a_full_disk_answers_with_what_happened_and_stores_nothing(client: TestClient, campaign_id: int) -> None:
    csrf = join(client, "ann", campaign=campaign_id)
    rid = next_task(client, campaign_id).json()["task"]["region_id"]

    def full(conn, cursor, statement, *args):  # type: ignore[no-untyped-def]
        if statement.lstrip().upper().startswith("INSERT INTO LABELS"):
            raise sqlite3.OperationalError("database or disk is full")  # what SQLite says when a write cannot grow the file

    event.listen(Engine, "before_cursor_execute", full)
    try:
        body = {"client_id": uuid.uuid4().hex, "entities": [{"entity": "cap"}]}
        r = client.post(f"/api/campaigns/{campaign_id}/regions/{rid}/labels", json=body, headers={"X-CSRF-Token": csrf})
        page = client.post(f"/campaigns/{campaign_id}/label", data={"csrf": csrf, "region_id": str(rid), "client_id": uuid.uuid4().hex, "labels": "cap"})
    finally:
        event.remove(Engine, "before_cursor_execute", full)
    assert r.status_code == 507 and r.json()["code"] == "disk_full" and "nothing of this action was saved" in r.json()["message"]
    assert page.status_code == 507 and "Free some space" in page.text
    with client.app.state.sessions() as s:  # type: ignore[attr-defined]
        assert s.scalar(select(func.count(Label.id))) == 0


def test_backup_copies_the_database_while_it_is_open(project: Path, campaign_id: int, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    label_some(project, campaign_id)
    engine = make_engine(project)  # held open, as a running server would
    assert main(["backup", str(project), "--out", str(tmp_path / "copy.db")]) == 0
    copy = sqlite3.connect(tmp_path / "copy.db")
    assert copy.execute("SELECT COUNT(*) FROM campaign_regions WHERE check_answer IS NOT NULL").fetchone() == (1,)
    copy.close()
    assert (tmp_path / "copy.db").stat().st_mode & 0o077 == 0
    assert main(["backup", str(project), "--out", str(tmp_path / "copy.db")]) == 1
    assert "exists already" in capsys.readouterr().err
    engine.dispose()


def test_acknowledged_writes_are_flushed_to_disk_at_commit(client: TestClient) -> None:
    """Durability promise: a label answered "stored" survives a power cut (synchronous=FULL under WAL)."""
    for factory in (client.app.state.writers, client.app.state.sessions):  # type: ignore[attr-defined]
        with factory() as s:
            assert s.connection().exec_driver_sql("PRAGMA synchronous").scalar() == 2  # 2 = FULL
            assert s.connection().exec_driver_sql("PRAGMA journal_mode").scalar() == "wal"
    engine = make_engine(Path(client.app.state.settings.project_dir))  # type: ignore[attr-defined]
    with session_factory(engine)() as s:  # the CLI's writes too
        assert s.connection().exec_driver_sql("PRAGMA synchronous").scalar() == 2
    engine.dispose()
