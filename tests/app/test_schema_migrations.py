"""Alembic manages the schema: a project made before it (schema 3) upgrades keeping every row, a new database
matches the models, and a database from a newer heedmap is refused.

``data/schema3_project/heedmap.db`` was written by heedmap at commit 5370aea, the last release that
kept its schema version by hand (``data/make_schema3_project.py`` made it).
"""

from __future__ import annotations

import shutil
import sqlite3
import uuid
from pathlib import Path
from typing import Any

import pytest
from alembic import command
from alembic.autogenerate import compare_metadata
from alembic.runtime.migration import MigrationContext
from sqlalchemy import select

from app import campaigns
from app.db import NotAProjectError, ReadOnlyProjectError, _alembic_config, head_revision, make_engine, open_project, session_factory, write_session
from app.errors import SchemaVersionError
from app.migrations import schema_3
from app.models import Base, Label, WordCount

SCHEMA3_DB = Path(__file__).parent / "data" / "schema3_project" / "heedmap.db"


def _rows(db: Path) -> dict[str, list[tuple[Any, ...]]]:
    """Every row of every schema-3 table (its schema-3 columns), in id order, read straight from the file."""
    conn = sqlite3.connect(db)
    try:
        out = {}
        for table in schema_3.metadata.tables.values():
            key = ", ".join(c.name for c in table.primary_key.columns)
            columns = ", ".join(c.name for c in table.columns)  # schema 3's columns: later revisions may add others
            out[table.name] = conn.execute(f"SELECT {columns} FROM {table.name} ORDER BY {key}").fetchall()
        return out
    finally:
        conn.close()


@pytest.fixture()
def schema3_project(tmp_path: Path) -> Path:
    project = tmp_path / "old"
    project.mkdir()
    shutil.copyfile(SCHEMA3_DB, project / "heedmap.db")
    return project


def test_the_fixture_is_a_schema_3_project_made_before_alembic() -> None:
    conn = sqlite3.connect(f"file:{SCHEMA3_DB}?mode=ro", uri=True)
    tables = {r[0] for r in conn.execute("SELECT name FROM sqlite_master WHERE type = 'table'")}
    assert conn.execute("SELECT version FROM schema_info").fetchall() == [(3,)]
    conn.close()
    assert "alembic_version" not in tables and set(schema_3.metadata.tables) == tables


def test_schema_3_project_upgrades_keeping_every_row(schema3_project: Path) -> None:
    db = schema3_project / "heedmap.db"
    before = _rows(db)
    assert len(before["labels"]) == 11 and len(before["withdrawn_labels"]) == 1 and before["word_counts"]
    engine = make_engine(schema3_project)
    with engine.connect() as c:
        assert MigrationContext.configure(c).get_current_revision() == head_revision()
    after = _rows(db)
    # Schema 3's tables keep every row as it was; only the fence for heedmaps from before Alembic moves to 4.
    assert after.pop("schema_info") == [(1, 4)] and before.pop("schema_info") == [(1, 3)]
    assert after == before
    with write_session(session_factory(engine)) as s:
        (c,) = campaigns.list_campaigns(s)
        counted = campaigns.label_counts(s, c.id)
        campaigns.recount_words(s, c.id)
        assert campaigns.label_counts(s, c.id) == counted  # the kept counts are the counts of the kept labels
        person = s.scalar(select(Label.person_id).order_by(Label.id)) or 0
        task = campaigns.lease_tasks(s, campaign=c, person_id=person)[0]
        assert campaigns.save_label(s, campaign=c, region_id=task.region_id, person_id=person, entities=[("cap", [])], unsure=False,
                                    client_id=uuid.uuid4().hex, seconds_spent=None)
        assert s.scalar(select(WordCount.n).where(WordCount.word == "cap", WordCount.kind == "entity")) == counted[0]["cap"] + 1
    engine.dispose()
    make_engine(schema3_project).dispose()  # opening again changes nothing
    assert _rows(db)["labels"][:-1] == before["labels"]


def test_the_revisions_form_one_line() -> None:
    """Two revisions with the same parent (two people's changes landed side by side) would be two heads."""
    from alembic.script import ScriptDirectory

    from app.db import MIGRATIONS

    heads = ScriptDirectory(str(MIGRATIONS)).get_heads()
    assert len(heads) == 1, f"the revisions have {len(heads)} heads {heads}: set the down_revision of the newer one to the other"


def _differences(engine: Any) -> list[Any]:
    with engine.connect() as c:
        return list(compare_metadata(MigrationContext.configure(c, opts={"compare_type": True}), Base.metadata))


def test_a_new_database_matches_the_models(tmp_path: Path) -> None:
    """Fails when app/models.py changed without an Alembic revision (DEVELOPERS.md: how to add one)."""
    engine = make_engine(tmp_path / "new")
    assert _differences(engine) == []
    engine.dispose()


def test_an_upgraded_schema_3_project_matches_the_models(schema3_project: Path) -> None:
    engine = make_engine(schema3_project)
    assert _differences(engine) == []
    engine.dispose()


def test_every_revision_downgrades_and_upgrades_again(tmp_path: Path) -> None:
    engine = make_engine(tmp_path / "new")
    with engine.begin() as c:
        command.downgrade(_alembic_config(c), "base")
        command.upgrade(_alembic_config(c), "head")
    assert _differences(engine) == []
    engine.dispose()


def test_a_database_from_a_newer_heedmap_is_refused(tmp_path: Path) -> None:
    make_engine(tmp_path / "p").dispose()
    db = sqlite3.connect(tmp_path / "p" / "heedmap.db")
    db.execute("UPDATE alembic_version SET version_num = 'f00d_from_the_future'")
    db.commit()
    db.close()
    with pytest.raises(SchemaVersionError, match="newer heedmap made it. Upgrade heedmap"):
        make_engine(tmp_path / "p")


def test_a_newer_hand_kept_version_is_refused(schema3_project: Path) -> None:
    db = sqlite3.connect(schema3_project / "heedmap.db")
    db.execute("UPDATE schema_info SET version = 99")
    db.commit()
    db.close()
    with pytest.raises(SchemaVersionError, match="upgrade heedmap"):
        make_engine(schema3_project)


def test_a_read_only_schema_3_project_is_not_written(schema3_project: Path) -> None:
    db = schema3_project / "heedmap.db"
    raw = db.read_bytes()
    with pytest.raises(ReadOnlyProjectError, match="needs an upgrade"):
        make_engine(schema3_project, readonly=True)
    assert db.read_bytes() == raw
    wal = db.with_name("heedmap.db-wal")  # SQLite's reader of a WAL database may make an empty log beside it
    assert not wal.exists() or wal.stat().st_size == 0


def test_open_project_refuses_a_missing_project(tmp_path: Path) -> None:
    with pytest.raises(NotAProjectError, match="is not a heedmap project"):
        open_project(tmp_path / "nothing")
    assert not (tmp_path / "nothing").exists()


def test_revision_0004_gives_old_labels_no_group_and_lets_the_campaign_be_grouped(schema3_project: Path) -> None:
    """Labels given before groups existed keep their content and name no group; a group judgment can then be stored."""
    import numpy as np

    from app.models import GroupLabel

    engine = make_engine(schema3_project)
    with write_session(session_factory(engine)) as s:
        assert {r for r in s.scalars(select(Label.group_label_id))} == {None}
        (c,) = campaigns.list_campaigns(s)
        regions = sorted(campaigns.region_classes(s, c.id))
        vectors = np.random.default_rng(0).normal(size=(len(regions), 4)).astype(np.float32)
        got = campaigns.make_groups(s, campaign=c, region_ids=regions, vectors=vectors, size=8)
        assert got.regions >= 1
        person = s.scalar(select(Label.person_id).order_by(Label.id.desc())) or 0
        task = campaigns.lease_group(s, campaign=c, person_id=person)
        if task is not None:
            ticked = [t.region_id for t in task.crops]
            campaigns.save_group_label(s, campaign=c, person_id=person, group_id=task.group_id, ticked=ticked, entities=[("cap", [])], unsure=False,
                                       client_id=uuid.uuid4().hex, seconds_spent=None)
            assert s.scalar(select(GroupLabel.id)) is not None
    engine.dispose()
