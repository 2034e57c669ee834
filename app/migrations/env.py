"""Alembic's entry point: runs the revisions on the connection ``app.db`` hands over (inside its transaction).

SQLite gets batch mode, so a revision that alters a column rebuilds the table there (SQLite's
ALTER TABLE cannot change a column) and runs as plain ALTER TABLE on PostgreSQL.
"""

from __future__ import annotations

from alembic import context

from app.models import Base

connection = context.config.attributes.get("connection")
if connection is None:
    raise RuntimeError("heedmap's migrations run through app.db (heedmap opens and upgrades a project itself), or through ./dev migration")
context.configure(
    connection=connection,
    target_metadata=Base.metadata,
    render_as_batch=connection.dialect.name == "sqlite",
    compare_type=True,
)
with context.begin_transaction():
    context.run_migrations()
