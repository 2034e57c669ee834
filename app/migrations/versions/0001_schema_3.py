"""Baseline: schema 3, the last hand-versioned schema (made by heedmap before Alembic managed it).

A project of schema 3 made before Alembic is stamped at this revision without running it; a new
database gets its tables from here.

Revision ID: 0001_schema_3
Revises:
Create Date: 2026-12-03
"""

from __future__ import annotations

from alembic import op

from app.migrations import schema_3

revision = "0001_schema_3"
down_revision = None
branch_labels = None
depends_on = None


def upgrade() -> None:
    bind = op.get_bind()
    schema_3.metadata.create_all(bind)
    bind.execute(schema_3.metadata.tables["schema_info"].insert().values(version=3))


def downgrade() -> None:
    schema_3.metadata.drop_all(op.get_bind())
