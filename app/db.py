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
from .models import SCHEMA_VERSION, Base, SchemaInfo

DB_NAME = "heedmap.db"


def make_engine(project_dir: Path) -> Engine:
    """One engine per app or CLI run, over ``project_dir/heedmap.db``; creates the schema when new."""
    project_dir.mkdir(parents=True, exist_ok=True)
    engine = create_engine(f"sqlite:///{project_dir / DB_NAME}", connect_args={"check_same_thread": False, "timeout": 30})

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
    Base.metadata.create_all(engine)
    with Session(engine) as s, s.begin():
        row = s.scalar(select(SchemaInfo))
        if row is None:
            s.add(SchemaInfo(version=SCHEMA_VERSION))
        elif row.version > SCHEMA_VERSION:
            raise SchemaVersionError(
                f"this database has schema version {row.version}, newer than this heedmap's {SCHEMA_VERSION}; upgrade heedmap."
            )


def session_factory(engine: Engine) -> sessionmaker[Session]:
    return sessionmaker(engine, expire_on_commit=False)


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
