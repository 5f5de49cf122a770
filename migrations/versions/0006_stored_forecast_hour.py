"""one stored page forecast per clock hour

Several server workers each compute the page's forecast; the hour column and a unique
index let the database keep one per unit, model and hour.

Revision ID: 0006
Revises: 0005
Create Date: 2026-12-02 03:20:00
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

revision = '0006'
down_revision = '0005'
branch_labels = None
depends_on = None


def upgrade() -> None:
    with op.batch_alter_table('stored_forecast', schema=None) as batch_op:
        batch_op.add_column(sa.Column('hour', sa.DateTime(), nullable=True))
        batch_op.create_index('uq_stored_forecast_hour', ['unit', 'model_id', 'origin', 'hour'],
                              unique=True)


def downgrade() -> None:
    with op.batch_alter_table('stored_forecast', schema=None) as batch_op:
        batch_op.drop_index('uq_stored_forecast_hour')
        batch_op.drop_column('hour')
