"""observation revision: a correction at the same recorded_at

A correction entered within the same second as the value it corrects (or under a fixed
replay clock) has the same recorded_at; the revision numbers such entries in the order
they were made, and the unique key includes it.

Revision ID: 0007
Revises: 0006
Create Date: 2026-12-04 22:00:00
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

revision = '0007'
down_revision = '0006'
branch_labels = None
depends_on = None


def upgrade() -> None:
    with op.batch_alter_table('observation', schema=None) as batch_op:
        batch_op.add_column(sa.Column('revision', sa.Integer(), server_default='0',
                                      nullable=False))
        batch_op.drop_constraint('uq_observation_stay_id_observed_at_name_recorded_at',
                                 type_='unique')
        batch_op.create_unique_constraint(
            'uq_observation_stay_id_observed_at_name_recorded_at_revision',
            ['stay_id', 'observed_at', 'name', 'recorded_at', 'revision'])


def downgrade() -> None:
    # Corrections at the same recorded_at cannot be kept under the old key: only the latest
    # revision of each stays.
    observation = sa.table('observation', sa.column('id', sa.Integer()),
                           sa.column('stay_id', sa.String()), sa.column('observed_at'),
                           sa.column('name', sa.String()), sa.column('recorded_at'),
                           sa.column('revision', sa.Integer()))
    later = sa.alias(observation, 'later')
    op.execute(observation.delete().where(sa.exists().where(
        later.c.stay_id == observation.c.stay_id, later.c.observed_at == observation.c.observed_at,
        later.c.name == observation.c.name, later.c.recorded_at == observation.c.recorded_at,
        later.c.revision > observation.c.revision)))
    with op.batch_alter_table('observation', schema=None) as batch_op:
        batch_op.drop_constraint('uq_observation_stay_id_observed_at_name_recorded_at_revision',
                                 type_='unique')
        batch_op.create_unique_constraint(
            'uq_observation_stay_id_observed_at_name_recorded_at',
            ['stay_id', 'observed_at', 'name', 'recorded_at'])
        batch_op.drop_column('revision')
