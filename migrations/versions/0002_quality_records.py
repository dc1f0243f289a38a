"""quality records: dispositions, signatures, audit trail

Revision ID: 0002
Revises: 0001
Create Date: 2026-12-01
"""

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op


revision: str = '0002'
down_revision: str | None = '0001'
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None


def upgrade() -> None:
    op.create_table('audit_event',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('occurred_at', sa.DateTime(timezone=True), nullable=False),
    sa.Column('actor', sa.String(length=64), nullable=False),
    sa.Column('action', sa.String(length=32), nullable=False),
    sa.Column('table_name', sa.String(length=64), nullable=False),
    sa.Column('record_id', sa.String(length=64), nullable=False),
    sa.Column('before', sa.JSON(), nullable=True),
    sa.Column('after', sa.JSON(), nullable=True),
    sa.Column('reason', sa.String(length=1000), nullable=False),
    sa.Column('prev_hash', sa.String(length=64), nullable=False),
    sa.Column('row_hash', sa.String(length=64), nullable=False),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_audit_event')),
    sa.UniqueConstraint('prev_hash', name=op.f('uq_audit_event_prev_hash')),
    sa.UniqueConstraint('row_hash', name=op.f('uq_audit_event_row_hash'))
    )
    with op.batch_alter_table('audit_event', schema=None) as batch_op:
        batch_op.create_index(batch_op.f('ix_audit_event_table_name_record_id'), ['table_name', 'record_id'], unique=False)

    op.create_table('signature',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('lot_id', sa.Integer(), nullable=False),
    sa.Column('user_id', sa.Integer(), nullable=False),
    sa.Column('printed_name', sa.String(length=128), nullable=False),
    sa.Column('meaning', sa.String(length=16), nullable=False),
    sa.Column('evidence_sha256', sa.String(length=64), nullable=False),
    sa.Column('signed_at', sa.DateTime(timezone=True), nullable=False),
    sa.CheckConstraint("meaning IN ('released', 'reviewed', 'rejected')", name=op.f('ck_signature_meaning')),
    sa.ForeignKeyConstraint(['lot_id'], ['lot.id'], name=op.f('fk_signature_lot_id_lot')),
    sa.ForeignKeyConstraint(['user_id'], ['user_account.id'], name=op.f('fk_signature_user_id_user_account')),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_signature'))
    )
    with op.batch_alter_table('signature', schema=None) as batch_op:
        batch_op.create_index(batch_op.f('ix_signature_lot_id'), ['lot_id'], unique=False)

    op.create_table('disposition',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('lot_id', sa.Integer(), nullable=False),
    sa.Column('part_id', sa.Integer(), nullable=False),
    sa.Column('result_id', sa.Integer(), nullable=True),
    sa.Column('decision', sa.String(length=16), nullable=False),
    sa.Column('deviation_number', sa.String(length=64), nullable=True),
    sa.Column('reason', sa.String(length=1000), nullable=False),
    sa.Column('decided_by_id', sa.Integer(), nullable=False),
    sa.Column('decided_at', sa.DateTime(timezone=True), nullable=False),
    sa.CheckConstraint("decision IN ('accept', 'reject', 'rework', 'accept_deviation')", name=op.f('ck_disposition_decision')),
    sa.ForeignKeyConstraint(['decided_by_id'], ['user_account.id'], name=op.f('fk_disposition_decided_by_id_user_account')),
    sa.ForeignKeyConstraint(['lot_id'], ['lot.id'], name=op.f('fk_disposition_lot_id_lot')),
    sa.ForeignKeyConstraint(['part_id'], ['part.id'], name=op.f('fk_disposition_part_id_part')),
    sa.ForeignKeyConstraint(['result_id'], ['surface_result.id'], name=op.f('fk_disposition_result_id_surface_result')),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_disposition'))
    )
    with op.batch_alter_table('disposition', schema=None) as batch_op:
        batch_op.create_index(batch_op.f('ix_disposition_lot_id'), ['lot_id'], unique=False)
        batch_op.create_index(batch_op.f('ix_disposition_part_id'), ['part_id'], unique=False)


def downgrade() -> None:
    with op.batch_alter_table('disposition', schema=None) as batch_op:
        batch_op.drop_index(batch_op.f('ix_disposition_part_id'))
        batch_op.drop_index(batch_op.f('ix_disposition_lot_id'))

    op.drop_table('disposition')
    with op.batch_alter_table('signature', schema=None) as batch_op:
        batch_op.drop_index(batch_op.f('ix_signature_lot_id'))

    op.drop_table('signature')
    with op.batch_alter_table('audit_event', schema=None) as batch_op:
        batch_op.drop_index(batch_op.f('ix_audit_event_table_name_record_id'))

    op.drop_table('audit_event')
