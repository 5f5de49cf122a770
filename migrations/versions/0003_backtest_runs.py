"""backtest runs

Revision ID: 0003
Revises: 0002
Create Date: 2026-12-02 00:16:19.820483
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op



revision = '0003'
down_revision = '0002'
branch_labels = None
depends_on = None


def upgrade() -> None:
    op.create_table('backtest_run',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('unit', sa.String(length=64), nullable=False),
    sa.Column('created_at', sa.DateTime(), nullable=False),
    sa.Column('date_from', sa.Date(), nullable=False),
    sa.Column('date_to', sa.Date(), nullable=False),
    sa.Column('days', sa.Integer(), nullable=False),
    sa.Column('result', sa.Text(), nullable=False),
    sa.ForeignKeyConstraint(['unit'], ['unit.code'], name=op.f('fk_backtest_run_unit_unit')),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_backtest_run'))
    )
    with op.batch_alter_table('backtest_run', schema=None) as batch_op:
        batch_op.create_index('ix_backtest_run_unit_created', ['unit', 'created_at'], unique=False)



def downgrade() -> None:
    with op.batch_alter_table('backtest_run', schema=None) as batch_op:
        batch_op.drop_index('ix_backtest_run_unit_created')

    op.drop_table('backtest_run')
