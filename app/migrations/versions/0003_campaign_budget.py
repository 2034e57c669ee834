"""Campaigns within a labelling budget: a plan per campaign, the strata and drawn images of a sample, each region's quota.

``campaign_regions.quota`` is the number of labels a region wants where it differs from the
campaign's labels_per_region (adaptive labelling: 2, more on disagreement; 0 in a class closed
early); NULL keeps the campaign's number, so existing campaigns are unchanged.

Revision ID: 0003_budget
Revises: 0002_fence
Create Date: 2026-12-03
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

revision = "0003_budget"
down_revision = "0002_fence"
branch_labels = None
depends_on = None


def upgrade() -> None:
    with op.batch_alter_table("campaign_regions") as batch:
        batch.add_column(sa.Column("quota", sa.Integer(), nullable=True))
    op.create_table(
        "campaign_plans",
        sa.Column("campaign_id", sa.Integer(), sa.ForeignKey("campaigns.id"), primary_key=True),
        sa.Column("sampled", sa.Boolean(), nullable=False),
        sa.Column("budget", sa.Integer(), nullable=True),
        sa.Column("regions_per_class", sa.Integer(), nullable=True),
        sa.Column("confident_at", sa.Float(), nullable=False),
        sa.Column("seed", sa.Integer(), nullable=False),
        sa.Column("adaptive", sa.Boolean(), nullable=False),
        sa.Column("base_labels", sa.Integer(), nullable=False),
        sa.Column("settle_window", sa.Integer(), nullable=False),
        sa.Column("closed_classes", sa.JSON(), nullable=False),
    )
    op.create_table(
        "campaign_strata",
        sa.Column("id", sa.Integer(), primary_key=True),
        sa.Column("campaign_id", sa.Integer(), sa.ForeignKey("campaigns.id"), nullable=False),
        sa.Column("name", sa.String(), nullable=False),
        sa.Column("cls", sa.String(), nullable=False),
        sa.Column("kind", sa.String(), nullable=False),
        sa.Column("images", sa.Integer(), nullable=False),
        sa.Column("regions", sa.Integer(), nullable=False),
        sa.Column("drawn", sa.Integer(), nullable=False),
        sa.UniqueConstraint("campaign_id", "name"),
    )
    op.create_table(
        "campaign_samples",
        sa.Column("id", sa.Integer(), primary_key=True),
        sa.Column("campaign_id", sa.Integer(), sa.ForeignKey("campaigns.id"), nullable=False),
        sa.Column("image_id", sa.Integer(), sa.ForeignKey("images.id"), nullable=False),
        sa.Column("stratum_id", sa.Integer(), sa.ForeignKey("campaign_strata.id"), nullable=False),
        sa.Column("inclusion_probability", sa.Float(), nullable=False),
        sa.UniqueConstraint("campaign_id", "image_id"),
    )


def downgrade() -> None:
    op.drop_table("campaign_samples")
    op.drop_table("campaign_strata")
    op.drop_table("campaign_plans")
    with op.batch_alter_table("campaign_regions") as batch:
        batch.drop_column("quota")
