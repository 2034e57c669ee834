"""Schema version 4 in ``schema_info``: heedmap from before Alembic refuses the project ("upgrade heedmap").

Those versions read only ``schema_info.version`` and would otherwise open a database whose later
revisions they do not know. From here on ``alembic_version`` says where a database stands.

Revision ID: 0002_fence
Revises: 0001_schema_3
Create Date: 2026-12-03
"""

from __future__ import annotations

from alembic import op

revision = "0002_fence"
down_revision = "0001_schema_3"
branch_labels = None
depends_on = None


def upgrade() -> None:
    op.execute("UPDATE schema_info SET version = 4")


def downgrade() -> None:
    op.execute("UPDATE schema_info SET version = 3")
