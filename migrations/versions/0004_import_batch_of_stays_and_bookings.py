"""import batch of stays and bookings

Revision ID: 0004
Revises: 0003
Create Date: 2026-12-02 00:58:40.234413
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op



revision = '0004'
down_revision = '0003'
branch_labels = None
depends_on = None


def upgrade() -> None:
    with op.batch_alter_table('booking', schema=None) as batch_op:
        batch_op.add_column(sa.Column('batch_id', sa.Integer(), nullable=True))
        batch_op.create_foreign_key(batch_op.f('fk_booking_batch_id_import_batch'), 'import_batch', ['batch_id'], ['id'])

    with op.batch_alter_table('stay', schema=None) as batch_op:
        batch_op.add_column(sa.Column('batch_id', sa.Integer(), nullable=True))
        batch_op.create_foreign_key(batch_op.f('fk_stay_batch_id_import_batch'), 'import_batch', ['batch_id'], ['id'])



def downgrade() -> None:
    with op.batch_alter_table('stay', schema=None) as batch_op:
        batch_op.drop_constraint(batch_op.f('fk_stay_batch_id_import_batch'), type_='foreignkey')
        batch_op.drop_column('batch_id')

    with op.batch_alter_table('booking', schema=None) as batch_op:
        batch_op.drop_constraint(batch_op.f('fk_booking_batch_id_import_batch'), type_='foreignkey')
        batch_op.drop_column('batch_id')

