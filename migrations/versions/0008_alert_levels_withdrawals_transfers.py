"""alert levels per unit, withdrawn observations, transfers between units

- unit.warning_level / unit.alarm_level: the chance of more patients than staffed beds at
  which a night is shown as a warning / an alarm (blank: the site's defaults).
- observation.withdrawn: an entry that withdraws the value it follows (append-only: the
  withdrawn value stays stored; the latest entry says it no longer counts).
- stay.patient / stay.from_unit / stay.to_unit: the pseudonymous person and the units a
  stay came from and went to (DATA_CONTRACT stays.csv; all optional).

Revision ID: 0008
Revises: 0007
Create Date: 2026-12-05 00:30:00
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

revision = '0008'
down_revision = '0007'
branch_labels = None
depends_on = None


def upgrade() -> None:
    with op.batch_alter_table('unit', schema=None) as batch_op:
        batch_op.add_column(sa.Column('warning_level', sa.Float(), nullable=True))
        batch_op.add_column(sa.Column('alarm_level', sa.Float(), nullable=True))
    with op.batch_alter_table('observation', schema=None) as batch_op:
        batch_op.add_column(sa.Column('withdrawn', sa.Boolean(), server_default=sa.false(),
                                      nullable=False))
    with op.batch_alter_table('stay', schema=None) as batch_op:
        batch_op.add_column(sa.Column('patient', sa.String(length=64), nullable=True))
        batch_op.add_column(sa.Column('from_unit', sa.String(length=64), nullable=True))
        batch_op.add_column(sa.Column('to_unit', sa.String(length=64), nullable=True))
        batch_op.create_index('ix_stay_patient', ['patient'])


def downgrade() -> None:
    with op.batch_alter_table('stay', schema=None) as batch_op:
        batch_op.drop_index('ix_stay_patient')
        batch_op.drop_column('to_unit')
        batch_op.drop_column('from_unit')
        batch_op.drop_column('patient')
    # Withdrawn entries are dropped with the flag: kept, they would count again.
    op.execute("DELETE FROM observation WHERE withdrawn")
    with op.batch_alter_table('observation', schema=None) as batch_op:
        batch_op.drop_column('withdrawn')
    with op.batch_alter_table('unit', schema=None) as batch_op:
        batch_op.drop_column('alarm_level')
        batch_op.drop_column('warning_level')
