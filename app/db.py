"""Engine factory for the project's SQLite file: WAL, busy timeout, write lock taken up front."""

from __future__ import annotations

from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any

from sqlalchemy import create_engine, event, select
from sqlalchemy.engine import Engine
from sqlalchemy.orm import Session, sessionmaker

from .errors import SchemaVersionError
from .layout import ProjectLayout
from .models import SCHEMA_VERSION, Base, SchemaInfo


def make_engine(project_dir: Path) -> Engine:
    """One engine per app or CLI run, over ``project_dir/heedmap.db``; creates the schema when new."""
    project_dir.mkdir(parents=True, exist_ok=True)
    engine = create_engine(f"sqlite:///{ProjectLayout(project_dir).database}", connect_args={"check_same_thread": False, "timeout": 30})

    @event.listens_for(engine, "connect")
    def _pragmas(dbapi_conn: Any, _record: Any) -> None:
        dbapi_conn.isolation_level = None  # we emit BEGIN ourselves
        cur = dbapi_conn.cursor()
        cur.execute("PRAGMA foreign_keys=ON")
        cur.execute("PRAGMA journal_mode=WAL")
        cur.execute("PRAGMA synchronous=NORMAL")
        cur.execute("PRAGMA busy_timeout=30000")
        cur.close()

    @event.listens_for(engine, "begin")
    def _begin(conn: Any) -> None:
        # Read-then-write transactions under a deferred BEGIN fail with "database is locked"
        # when writers race; writes therefore take the lock up front.
        conn.exec_driver_sql("BEGIN IMMEDIATE" if conn.get_execution_options().get("immediate") else "BEGIN")

    _ensure_schema(engine)
    return engine


def _ensure_schema(engine: Engine) -> None:
    """Create the tables of a new project, or bring an older project's schema up to date in one transaction."""
    with engine.connect() as c:
        has_info = c.exec_driver_sql("SELECT name FROM sqlite_master WHERE type='table' AND name='schema_info'").first()
        found = c.exec_driver_sql("SELECT version FROM schema_info").scalar() if has_info else None
    if found is not None and found > SCHEMA_VERSION:
        raise SchemaVersionError(f"this database has schema version {found}, newer than this heedmap's {SCHEMA_VERSION}; upgrade heedmap.")
    if found == 1:
        _migrate_v1(engine)
    Base.metadata.create_all(engine)
    with Session(engine) as s, s.begin():
        row = s.scalar(select(SchemaInfo))
        if row is None:
            s.add(SchemaInfo(version=SCHEMA_VERSION))


def _migrate_v1(engine: Engine) -> None:
    """Version 1 had annotators and annotations without campaigns: people keep their ids, and
    their labels move into a campaign over the run they belong to."""
    with engine.begin() as c:
        c.exec_driver_sql("ALTER TABLE saliency_runs ADD COLUMN model_path VARCHAR")
        c.exec_driver_sql("ALTER TABLE saliency_runs ADD COLUMN sidecar_path VARCHAR")
        Base.metadata.create_all(c)
        c.exec_driver_sql("INSERT INTO people (id, name, role, created_at) SELECT id, name, 'annotator', created_at FROM annotators")
        runs = [r[0] for r in c.exec_driver_sql(
            "SELECT DISTINCT p.run_id FROM annotations a JOIN regions r ON r.id = a.region_id JOIN predictions p ON p.id = r.prediction_id ORDER BY p.run_id"
        )]
        for run_id in runs:
            most = c.exec_driver_sql(
                "SELECT COALESCE(MAX(n), 0) FROM (SELECT COUNT(*) AS n FROM annotations a JOIN regions r ON r.id = a.region_id "
                "JOIN predictions p ON p.id = r.prediction_id WHERE p.run_id = ? GROUP BY a.region_id)", (run_id,)
            ).scalar()
            cid = c.exec_driver_sql(
                "INSERT INTO campaigns (name, run_id, classes, labels_per_region, instructions, lease_seconds, check_every, method, expectations, "
                "n_regions, n_checks, created_at) VALUES (?, ?, '[]', ?, '', 600, 10, 'majority', '', 0, 0, CURRENT_TIMESTAMP)",
                (f"labels of run {run_id} (from version 1)", run_id, max(3, int(most or 0))),
            ).lastrowid
            c.exec_driver_sql(
                "INSERT INTO campaign_regions (campaign_id, region_id, n_labels) SELECT ?, r.id, 0 FROM regions r JOIN predictions p ON p.id = r.prediction_id WHERE p.run_id = ?",
                (cid, run_id),
            )
            c.exec_driver_sql(
                "INSERT INTO labels (client_id, campaign_id, region_id, person_id, entities, unsure, submitted_at, seconds_spent) "
                "SELECT a.client_id, ?, a.region_id, a.annotator_id, a.entities, 0, a.submitted_at, a.seconds_spent FROM annotations a "
                "JOIN regions r ON r.id = a.region_id JOIN predictions p ON p.id = r.prediction_id WHERE p.run_id = ?",
                (cid, run_id),
            )
            c.exec_driver_sql("UPDATE campaigns SET n_regions = (SELECT COUNT(*) FROM campaign_regions WHERE campaign_id = ?) WHERE id = ?", (cid, cid))
            c.exec_driver_sql(
                "UPDATE campaign_regions SET n_labels = (SELECT COUNT(*) FROM labels l WHERE l.campaign_id = campaign_regions.campaign_id "
                "AND l.region_id = campaign_regions.region_id) WHERE campaign_id = ?", (cid,)
            )
        c.exec_driver_sql("DROP TABLE annotations")
        c.exec_driver_sql("DROP TABLE annotators")
        c.exec_driver_sql("UPDATE schema_info SET version = 2")


def session_factory(engine: Engine) -> sessionmaker[Session]:
    return sessionmaker(engine, expire_on_commit=False)


def lazy_write_factory(engine: Engine) -> sessionmaker[Session]:
    """Sessions whose transaction opens with BEGIN IMMEDIATE at their first statement, not when made.

    A request's session is made in one thread and used in the route's worker thread: taking the
    write lock only there means a worker never waits for a lock while holding nothing useful.
    """
    return sessionmaker(engine.execution_options(immediate=True), expire_on_commit=False)


@contextmanager
def write_session(factory: sessionmaker[Session]) -> Iterator[Session]:
    """A session whose transaction starts with BEGIN IMMEDIATE and commits once at the end."""
    with factory() as s:
        s.connection(execution_options={"immediate": True})
        try:
            yield s
            s.commit()
        except BaseException:
            s.rollback()
            raise
