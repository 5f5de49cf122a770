"""feed messages, the stays they made, dead letters

- feed_message: one row per message received from an HL7 v2 or FHIR feed (source, control
  id unique per source, times, outcome, reason, SHA-256 of the text; no text, nothing
  identifying).
- feed_stay: the pseudonymous visit key of a stay made from a feed and the known-at time of
  its last change.
- feed_dead_letter: messages that could not be applied yet, pseudonymised, for replay.

Revision ID: 0009
Revises: 0008
Create Date: 2026-12-05 01:00:00
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

revision = '0009'
down_revision = '0008'
branch_labels = None
depends_on = None


def upgrade() -> None:
    op.create_table(
        'feed_message',
        sa.Column('id', sa.Integer(), nullable=False),
        sa.Column('kind', sa.String(length=10), nullable=False),
        sa.Column('source', sa.String(length=100), nullable=False),
        sa.Column('control_id', sa.String(length=200), nullable=False),
        sa.Column('message_type', sa.String(length=20), nullable=False),
        sa.Column('digest', sa.String(length=64), nullable=False),
        sa.Column('sent_at', sa.DateTime(), nullable=True),
        sa.Column('received_at', sa.DateTime(), nullable=False),
        sa.Column('outcome', sa.String(length=12), nullable=False),
        sa.Column('reason', sa.String(length=500), nullable=True),
        sa.Column('repeats', sa.Integer(), server_default='0', nullable=False),
        sa.Column('unmapped', sa.JSON(), nullable=True),
        sa.Column('batch_id', sa.Integer(), nullable=True),
        sa.ForeignKeyConstraint(['batch_id'], ['import_batch.id'],
                                name=op.f('fk_feed_message_batch_id_import_batch')),
        sa.PrimaryKeyConstraint('id', name=op.f('pk_feed_message')),
        sa.UniqueConstraint('source', 'control_id',
                            name=op.f('uq_feed_message_source_control_id')),
    )
    op.create_index('ix_feed_message_received', 'feed_message', ['received_at'])
    op.create_table(
        'feed_stay',
        sa.Column('stay_id', sa.String(length=64), nullable=False),
        sa.Column('visit', sa.String(length=64), nullable=False),
        sa.Column('known_at', sa.DateTime(), nullable=False),
        sa.Column('message_id', sa.Integer(), nullable=True),
        sa.ForeignKeyConstraint(['stay_id'], ['stay.stay_id'],
                                name=op.f('fk_feed_stay_stay_id_stay')),
        sa.ForeignKeyConstraint(['message_id'], ['feed_message.id'],
                                name=op.f('fk_feed_stay_message_id_feed_message')),
        sa.PrimaryKeyConstraint('stay_id', name=op.f('pk_feed_stay')),
    )
    op.create_index(op.f('ix_feed_stay_visit'), 'feed_stay', ['visit'])
    op.create_table(
        'feed_dead_letter',
        sa.Column('id', sa.Integer(), nullable=False),
        sa.Column('message_id', sa.Integer(), nullable=False),
        sa.Column('visit', sa.String(length=64), nullable=True),
        sa.Column('reason', sa.String(length=500), nullable=False),
        sa.Column('events', sa.JSON(), nullable=True),
        sa.Column('text', sa.Text(), nullable=True),
        sa.Column('created_at', sa.DateTime(), nullable=False),
        sa.Column('expires_at', sa.DateTime(), nullable=False),
        sa.Column('attempts', sa.Integer(), server_default='0', nullable=False),
        sa.Column('resolved_at', sa.DateTime(), nullable=True),
        sa.ForeignKeyConstraint(['message_id'], ['feed_message.id'],
                                name=op.f('fk_feed_dead_letter_message_id_feed_message')),
        sa.PrimaryKeyConstraint('id', name=op.f('pk_feed_dead_letter')),
        sa.UniqueConstraint('message_id', name=op.f('uq_feed_dead_letter_message_id')),
    )
    op.create_index(op.f('ix_feed_dead_letter_visit'), 'feed_dead_letter', ['visit'])


def downgrade() -> None:
    op.drop_index(op.f('ix_feed_dead_letter_visit'), table_name='feed_dead_letter')
    op.drop_table('feed_dead_letter')
    op.drop_index(op.f('ix_feed_stay_visit'), table_name='feed_stay')
    op.drop_table('feed_stay')
    op.drop_index('ix_feed_message_received', table_name='feed_message')
    op.drop_table('feed_message')
