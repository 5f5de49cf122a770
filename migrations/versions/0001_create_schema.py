"""create schema

Revision ID: 0001
Revises: 
Create Date: 2026-12-01 23:24:55.409926
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op



revision = '0001'
down_revision = None
branch_labels = None
depends_on = None


def upgrade() -> None:
    op.create_table('import_batch',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('kind', sa.String(length=20), nullable=False),
    sa.Column('filename', sa.String(length=255), nullable=False),
    sa.Column('sha256', sa.String(length=64), nullable=False),
    sa.Column('rows', sa.Integer(), nullable=False),
    sa.Column('inserted', sa.Integer(), nullable=False),
    sa.Column('updated', sa.Integer(), nullable=False),
    sa.Column('unchanged', sa.Integer(), nullable=False),
    sa.Column('actor', sa.String(length=100), nullable=False),
    sa.Column('created_at', sa.DateTime(), nullable=False),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_import_batch'))
    )
    with op.batch_alter_table('import_batch', schema=None) as batch_op:
        batch_op.create_index(batch_op.f('ix_import_batch_sha256'), ['sha256'], unique=False)

    op.create_table('unit',
    sa.Column('code', sa.String(length=64), nullable=False),
    sa.Column('census_time', sa.String(length=5), nullable=False),
    sa.Column('created_at', sa.DateTime(), nullable=False),
    sa.PrimaryKeyConstraint('code', name=op.f('pk_unit'))
    )
    op.create_table('audit_event',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('at', sa.DateTime(), nullable=False),
    sa.Column('actor', sa.String(length=100), nullable=False),
    sa.Column('action', sa.String(length=20), nullable=False),
    sa.Column('entity', sa.String(length=30), nullable=False),
    sa.Column('entity_id', sa.String(length=200), nullable=False),
    sa.Column('before', sa.JSON(), nullable=True),
    sa.Column('after', sa.JSON(), nullable=True),
    sa.Column('batch_id', sa.Integer(), nullable=True),
    sa.ForeignKeyConstraint(['batch_id'], ['import_batch.id'], name=op.f('fk_audit_event_batch_id_import_batch')),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_audit_event'))
    )
    with op.batch_alter_table('audit_event', schema=None) as batch_op:
        batch_op.create_index('ix_audit_entity', ['entity', 'entity_id'], unique=False)
        batch_op.create_index(batch_op.f('ix_audit_event_at'), ['at'], unique=False)

    op.create_table('booking',
    sa.Column('booking_id', sa.String(length=64), nullable=False),
    sa.Column('unit', sa.String(length=64), nullable=False),
    sa.Column('booked_at', sa.DateTime(), nullable=False),
    sa.Column('planned_date', sa.Date(), nullable=False),
    sa.Column('age', sa.Integer(), nullable=True),
    sa.Column('sex', sa.String(length=1), nullable=True),
    sa.Column('specialty', sa.String(length=100), nullable=True),
    sa.Column('source', sa.String(length=100), nullable=True),
    sa.Column('procedure', sa.String(length=100), nullable=True),
    sa.Column('cancelled_at', sa.DateTime(), nullable=True),
    sa.ForeignKeyConstraint(['unit'], ['unit.code'], name=op.f('fk_booking_unit_unit')),
    sa.PrimaryKeyConstraint('booking_id', name=op.f('pk_booking'))
    )
    with op.batch_alter_table('booking', schema=None) as batch_op:
        batch_op.create_index('ix_booking_unit_planned', ['unit', 'planned_date'], unique=False)

    op.create_table('census_snapshot',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('unit', sa.String(length=64), nullable=False),
    sa.Column('taken_at', sa.DateTime(), nullable=False),
    sa.Column('batch_id', sa.Integer(), nullable=True),
    sa.ForeignKeyConstraint(['batch_id'], ['import_batch.id'], name=op.f('fk_census_snapshot_batch_id_import_batch')),
    sa.ForeignKeyConstraint(['unit'], ['unit.code'], name=op.f('fk_census_snapshot_unit_unit')),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_census_snapshot')),
    sa.UniqueConstraint('unit', 'taken_at', name=op.f('uq_census_snapshot_unit_taken_at'))
    )
    op.create_table('stay',
    sa.Column('stay_id', sa.String(length=64), nullable=False),
    sa.Column('unit', sa.String(length=64), nullable=False),
    sa.Column('admitted_at', sa.DateTime(), nullable=False),
    sa.Column('discharged_at', sa.DateTime(), nullable=True),
    sa.Column('discharge_source', sa.String(length=10), nullable=True),
    sa.Column('admission_type', sa.String(length=10), nullable=False),
    sa.Column('outcome', sa.String(length=10), nullable=True),
    sa.Column('age', sa.Integer(), nullable=True),
    sa.Column('sex', sa.String(length=1), nullable=True),
    sa.Column('specialty', sa.String(length=100), nullable=True),
    sa.Column('source', sa.String(length=100), nullable=True),
    sa.Column('booking_id', sa.String(length=64), nullable=True),
    sa.ForeignKeyConstraint(['unit'], ['unit.code'], name=op.f('fk_stay_unit_unit')),
    sa.PrimaryKeyConstraint('stay_id', name=op.f('pk_stay'))
    )
    with op.batch_alter_table('stay', schema=None) as batch_op:
        batch_op.create_index('ix_stay_unit_admitted', ['unit', 'admitted_at'], unique=False)

    op.create_table('trained_model',
    sa.Column('id', sa.String(length=36), nullable=False),
    sa.Column('unit', sa.String(length=64), nullable=False),
    sa.Column('trained_until', sa.DateTime(), nullable=False),
    sa.Column('created_at', sa.DateTime(), nullable=False),
    sa.Column('kind', sa.String(length=40), nullable=False),
    sa.Column('payload', sa.Text(), nullable=False),
    sa.ForeignKeyConstraint(['unit'], ['unit.code'], name=op.f('fk_trained_model_unit_unit')),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_trained_model'))
    )
    with op.batch_alter_table('trained_model', schema=None) as batch_op:
        batch_op.create_index('ix_trained_model_unit_until', ['unit', 'trained_until'], unique=False)

    op.create_table('unit_beds',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('unit', sa.String(length=64), nullable=False),
    sa.Column('valid_from', sa.Date(), nullable=True),
    sa.Column('beds', sa.Integer(), nullable=False),
    sa.Column('batch_id', sa.Integer(), nullable=True),
    sa.ForeignKeyConstraint(['batch_id'], ['import_batch.id'], name=op.f('fk_unit_beds_batch_id_import_batch')),
    sa.ForeignKeyConstraint(['unit'], ['unit.code'], name=op.f('fk_unit_beds_unit_unit')),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_unit_beds')),
    sa.UniqueConstraint('unit', 'valid_from', name=op.f('uq_unit_beds_unit_valid_from'))
    )
    with op.batch_alter_table('unit_beds', schema=None) as batch_op:
        batch_op.create_index(batch_op.f('ix_unit_beds_unit'), ['unit'], unique=False)

    op.create_table('census_row',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('snapshot_id', sa.Integer(), nullable=False),
    sa.Column('stay_id', sa.String(length=64), nullable=False),
    sa.Column('bed', sa.String(length=64), nullable=True),
    sa.Column('admitted_at', sa.DateTime(), nullable=False),
    sa.Column('admission_type', sa.String(length=10), nullable=False),
    sa.Column('age', sa.Integer(), nullable=True),
    sa.Column('sex', sa.String(length=1), nullable=True),
    sa.Column('specialty', sa.String(length=100), nullable=True),
    sa.Column('source', sa.String(length=100), nullable=True),
    sa.Column('booking_id', sa.String(length=64), nullable=True),
    sa.ForeignKeyConstraint(['snapshot_id'], ['census_snapshot.id'], name=op.f('fk_census_row_snapshot_id_census_snapshot')),
    sa.ForeignKeyConstraint(['stay_id'], ['stay.stay_id'], name=op.f('fk_census_row_stay_id_stay')),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_census_row')),
    sa.UniqueConstraint('snapshot_id', 'stay_id', name=op.f('uq_census_row_snapshot_id_stay_id'))
    )
    with op.batch_alter_table('census_row', schema=None) as batch_op:
        batch_op.create_index(batch_op.f('ix_census_row_snapshot_id'), ['snapshot_id'], unique=False)
        batch_op.create_index(batch_op.f('ix_census_row_stay_id'), ['stay_id'], unique=False)

    op.create_table('observation',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('stay_id', sa.String(length=64), nullable=False),
    sa.Column('observed_at', sa.DateTime(), nullable=False),
    sa.Column('name', sa.String(length=64), nullable=False),
    sa.Column('value', sa.Float(), nullable=False),
    sa.Column('recorded_at', sa.DateTime(), nullable=False),
    sa.Column('batch_id', sa.Integer(), nullable=True),
    sa.ForeignKeyConstraint(['batch_id'], ['import_batch.id'], name=op.f('fk_observation_batch_id_import_batch')),
    sa.ForeignKeyConstraint(['stay_id'], ['stay.stay_id'], name=op.f('fk_observation_stay_id_stay')),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_observation')),
    sa.UniqueConstraint('stay_id', 'observed_at', 'name', 'recorded_at', name=op.f('uq_observation_stay_id_observed_at_name_recorded_at'))
    )
    with op.batch_alter_table('observation', schema=None) as batch_op:
        batch_op.create_index('ix_observation_stay_name', ['stay_id', 'name'], unique=False)

    op.create_table('stored_forecast',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('unit', sa.String(length=64), nullable=False),
    sa.Column('as_of', sa.DateTime(), nullable=False),
    sa.Column('model_id', sa.String(length=36), nullable=False),
    sa.Column('created_at', sa.DateTime(), nullable=False),
    sa.Column('origin', sa.String(length=20), nullable=False),
    sa.Column('payload', sa.Text(), nullable=False),
    sa.ForeignKeyConstraint(['model_id'], ['trained_model.id'], name=op.f('fk_stored_forecast_model_id_trained_model')),
    sa.ForeignKeyConstraint(['unit'], ['unit.code'], name=op.f('fk_stored_forecast_unit_unit')),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_stored_forecast'))
    )
    with op.batch_alter_table('stored_forecast', schema=None) as batch_op:
        batch_op.create_index('ix_stored_forecast_unit_as_of', ['unit', 'as_of'], unique=False)



def downgrade() -> None:
    with op.batch_alter_table('stored_forecast', schema=None) as batch_op:
        batch_op.drop_index('ix_stored_forecast_unit_as_of')

    op.drop_table('stored_forecast')
    with op.batch_alter_table('observation', schema=None) as batch_op:
        batch_op.drop_index('ix_observation_stay_name')

    op.drop_table('observation')
    with op.batch_alter_table('census_row', schema=None) as batch_op:
        batch_op.drop_index(batch_op.f('ix_census_row_stay_id'))
        batch_op.drop_index(batch_op.f('ix_census_row_snapshot_id'))

    op.drop_table('census_row')
    with op.batch_alter_table('unit_beds', schema=None) as batch_op:
        batch_op.drop_index(batch_op.f('ix_unit_beds_unit'))

    op.drop_table('unit_beds')
    with op.batch_alter_table('trained_model', schema=None) as batch_op:
        batch_op.drop_index('ix_trained_model_unit_until')

    op.drop_table('trained_model')
    with op.batch_alter_table('stay', schema=None) as batch_op:
        batch_op.drop_index('ix_stay_unit_admitted')

    op.drop_table('stay')
    op.drop_table('census_snapshot')
    with op.batch_alter_table('booking', schema=None) as batch_op:
        batch_op.drop_index('ix_booking_unit_planned')

    op.drop_table('booking')
    with op.batch_alter_table('audit_event', schema=None) as batch_op:
        batch_op.drop_index(batch_op.f('ix_audit_event_at'))
        batch_op.drop_index('ix_audit_entity')

    op.drop_table('audit_event')
    op.drop_table('unit')
    with op.batch_alter_table('import_batch', schema=None) as batch_op:
        batch_op.drop_index(batch_op.f('ix_import_batch_sha256'))

    op.drop_table('import_batch')
