"""run removals: what each polishing run removed (before − after), a derived record

Revision ID: 0010
Revises: 0009
Create Date: 2026-12-03

Write-once: a later measurement of the run adds a newer row, which supersedes.
"""

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

revision: str = '0010'
down_revision: str | None = '0009'
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None

MESSAGE = 'run_removal records are write-once; a newer row supersedes'


def upgrade() -> None:
    op.create_table('run_removal',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('run_id', sa.Integer(), nullable=False),
    sa.Column('before_measurement_id', sa.Integer(), nullable=False),
    sa.Column('after_measurement_id', sa.Integer(), nullable=False),
    sa.Column('blob_key', sa.String(length=64), nullable=False),
    sa.Column('dx_mm', sa.Float(), nullable=False),
    sa.Column('pv_nm', sa.Float(), nullable=False),
    sa.Column('rms_nm', sa.Float(), nullable=False),
    sa.Column('depth_nm', sa.Float(), nullable=True),
    sa.Column('bands', sa.JSON(), nullable=False),
    sa.Column('zernike', sa.JSON(), nullable=False),
    sa.Column('created_at', sa.DateTime(timezone=True), nullable=False),
    sa.ForeignKeyConstraint(['after_measurement_id'], ['measurement.id'], name=op.f('fk_run_removal_after_measurement_id_measurement')),
    sa.ForeignKeyConstraint(['before_measurement_id'], ['measurement.id'], name=op.f('fk_run_removal_before_measurement_id_measurement')),
    sa.ForeignKeyConstraint(['run_id'], ['polishing_run.id'], name=op.f('fk_run_removal_run_id_polishing_run')),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_run_removal'))
    )
    with op.batch_alter_table('run_removal', schema=None) as batch_op:
        batch_op.create_index(batch_op.f('ix_run_removal_run_id'), ['run_id'], unique=False)

    if op.get_bind().dialect.name == 'postgresql':
        op.execute(
            'CREATE TRIGGER run_removal_write_once BEFORE UPDATE OR DELETE ON run_removal '
            'FOR EACH ROW EXECUTE FUNCTION write_once_guard()'
        )
    else:
        for event in ('UPDATE', 'DELETE'):
            op.execute(
                f'CREATE TRIGGER run_removal_no_{event.lower()} BEFORE {event} '
                f"ON run_removal BEGIN SELECT RAISE(ABORT, '{MESSAGE}'); END"
            )


def downgrade() -> None:
    if op.get_bind().dialect.name == 'postgresql':
        op.execute('DROP TRIGGER run_removal_write_once ON run_removal')
    else:
        for event in ('update', 'delete'):
            op.execute(f'DROP TRIGGER run_removal_no_{event}')
    with op.batch_alter_table('run_removal', schema=None) as batch_op:
        batch_op.drop_index(batch_op.f('ix_run_removal_run_id'))

    op.drop_table('run_removal')
