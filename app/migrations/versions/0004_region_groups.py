"""Grouped labelling: groups of similar regions, the group a person holds, group judgments, and each label's group.

Existing labels were given one crop at a time: their ``group_label_id`` stays NULL.

Revision ID: 0004_region_groups
Revises: 0003_budget
Create Date: 2026-12-03
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

revision = "0004_region_groups"
down_revision = "0003_budget"
branch_labels = None
depends_on = None


def upgrade() -> None:
    op.create_table('region_groups',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('campaign_id', sa.Integer(), nullable=False),
    sa.Column('position', sa.Integer(), nullable=False),
    sa.Column('created_at', sa.DateTime(), nullable=False),
    sa.ForeignKeyConstraint(['campaign_id'], ['campaigns.id'], ),
    sa.PrimaryKeyConstraint('id'),
    sa.UniqueConstraint('campaign_id', 'position')
    )
    op.create_table('group_labels',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('client_id', sa.String(), nullable=False),
    sa.Column('campaign_id', sa.Integer(), nullable=False),
    sa.Column('group_id', sa.Integer(), nullable=False),
    sa.Column('person_id', sa.Integer(), nullable=False),
    sa.Column('entities', sa.JSON(), nullable=False),
    sa.Column('unsure', sa.Boolean(), nullable=False),
    sa.Column('ticked', sa.JSON(), nullable=False),
    sa.Column('unticked', sa.JSON(), nullable=False),
    sa.Column('submitted_at', sa.DateTime(), nullable=False),
    sa.Column('seconds_spent', sa.Float(), nullable=True),
    sa.ForeignKeyConstraint(['campaign_id'], ['campaigns.id'], ),
    sa.ForeignKeyConstraint(['group_id'], ['region_groups.id'], ),
    sa.ForeignKeyConstraint(['person_id'], ['people.id'], ),
    sa.PrimaryKeyConstraint('id'),
    sa.UniqueConstraint('campaign_id', 'group_id', 'person_id'),
    sa.UniqueConstraint('client_id')
    )
    op.create_table('group_leases',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('campaign_id', sa.Integer(), nullable=False),
    sa.Column('person_id', sa.Integer(), nullable=False),
    sa.Column('group_id', sa.Integer(), nullable=False),
    sa.Column('expires_at', sa.DateTime(), nullable=False),
    sa.ForeignKeyConstraint(['campaign_id'], ['campaigns.id'], ),
    sa.ForeignKeyConstraint(['group_id'], ['region_groups.id'], ),
    sa.ForeignKeyConstraint(['person_id'], ['people.id'], ),
    sa.PrimaryKeyConstraint('id'),
    sa.UniqueConstraint('campaign_id', 'person_id')
    )
    op.create_table('region_group_members',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('campaign_id', sa.Integer(), nullable=False),
    sa.Column('group_id', sa.Integer(), nullable=False),
    sa.Column('region_id', sa.Integer(), nullable=False),
    sa.ForeignKeyConstraint(['campaign_id'], ['campaigns.id'], ),
    sa.ForeignKeyConstraint(['group_id'], ['region_groups.id'], ),
    sa.ForeignKeyConstraint(['region_id'], ['regions.id'], ),
    sa.PrimaryKeyConstraint('id'),
    sa.UniqueConstraint('campaign_id', 'region_id')
    )
    with op.batch_alter_table('region_group_members', schema=None) as batch_op:
        batch_op.create_index('ix_region_group_members_group', ['group_id', 'region_id'], unique=False)

    with op.batch_alter_table('labels', schema=None) as batch_op:
        batch_op.add_column(sa.Column('group_label_id', sa.Integer(), nullable=True))


def downgrade() -> None:
    with op.batch_alter_table('labels', schema=None) as batch_op:
        batch_op.drop_column('group_label_id')

    with op.batch_alter_table('region_group_members', schema=None) as batch_op:
        batch_op.drop_index('ix_region_group_members_group')

    op.drop_table('region_group_members')
    op.drop_table('group_leases')
    op.drop_table('group_labels')
    op.drop_table('region_groups')
