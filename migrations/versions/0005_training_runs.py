"""training runs

Revision ID: 0005
Revises: 0004
Create Date: 2026-12-02 02:36:09.430226
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

revision = '0005'
down_revision = '0004'
branch_labels = None
depends_on = None


def upgrade() -> None:
    op.create_table('training_run',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('unit', sa.String(length=64), nullable=False),
    sa.Column('active_unit', sa.String(length=64), nullable=True),
    sa.Column('requested_by', sa.String(length=100), nullable=False),
    sa.Column('requested_at', sa.DateTime(), nullable=False),
    sa.Column('until', sa.DateTime(), nullable=False),
    sa.Column('status', sa.String(length=10), nullable=False),
    sa.Column('stage', sa.String(length=100), nullable=False),
    sa.Column('started_at', sa.DateTime(), nullable=True),
    sa.Column('heartbeat_at', sa.DateTime(), nullable=True),
    sa.Column('finished_at', sa.DateTime(), nullable=True),
    sa.Column('model_id', sa.String(length=36), nullable=True),
    sa.Column('message', sa.String(length=500), nullable=True),
    sa.ForeignKeyConstraint(['unit'], ['unit.code'], name=op.f('fk_training_run_unit_unit')),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_training_run')),
    sa.UniqueConstraint('active_unit', name=op.f('uq_training_run_active_unit'))
    )
    with op.batch_alter_table('training_run', schema=None) as batch_op:
        batch_op.create_index('ix_training_run_unit_requested', ['unit', 'requested_at'],
                              unique=False)


def downgrade() -> None:
    with op.batch_alter_table('training_run', schema=None) as batch_op:
        batch_op.drop_index('ix_training_run_unit_requested')

    op.drop_table('training_run')
