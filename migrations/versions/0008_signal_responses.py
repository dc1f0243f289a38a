"""signal responses: what was found and done about an episode of control-chart signals

Revision ID: 0008
Revises: 0007
Create Date: 2026-12-03

Write-once, like the other quality records: a later response to the same episode supersedes.
"""

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

revision: str = '0008'
down_revision: str | None = '0007'
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None

MESSAGE = 'signal_response records are write-once; corrections are new records'


def upgrade() -> None:
    op.create_table(
        'signal_response',
        sa.Column('id', sa.Integer(), nullable=False),
        sa.Column('metric', sa.String(length=32), nullable=False),
        sa.Column('drawing', sa.String(length=64), nullable=True),
        sa.Column('grouping', sa.String(length=16), nullable=False),
        sa.Column('group_name', sa.String(length=64), nullable=False),
        sa.Column('first_measurement_id', sa.Integer(), nullable=False),
        sa.Column('last_measurement_id', sa.Integer(), nullable=False),
        sa.Column('cause', sa.String(length=1000), nullable=False),
        sa.Column('action', sa.String(length=1000), nullable=False),
        sa.Column('recorded_by_id', sa.Integer(), nullable=False),
        sa.Column('recorded_at', sa.DateTime(timezone=True), nullable=False),
        sa.ForeignKeyConstraint(
            ['first_measurement_id'],
            ['measurement.id'],
            name=op.f('fk_signal_response_first_measurement_id_measurement'),
        ),
        sa.ForeignKeyConstraint(
            ['last_measurement_id'],
            ['measurement.id'],
            name=op.f('fk_signal_response_last_measurement_id_measurement'),
        ),
        sa.ForeignKeyConstraint(
            ['recorded_by_id'],
            ['user_account.id'],
            name=op.f('fk_signal_response_recorded_by_id_user_account'),
        ),
        sa.PrimaryKeyConstraint('id', name=op.f('pk_signal_response')),
    )
    op.create_index(
        'ix_signal_response_episode',
        'signal_response',
        ['metric', 'grouping', 'group_name', 'first_measurement_id'],
        unique=False,
    )
    if op.get_bind().dialect.name == 'postgresql':
        op.execute(
            'CREATE TRIGGER signal_response_write_once BEFORE UPDATE OR DELETE ON signal_response '
            'FOR EACH ROW EXECUTE FUNCTION write_once_guard()'
        )
    else:
        for event in ('UPDATE', 'DELETE'):
            op.execute(
                f'CREATE TRIGGER signal_response_no_{event.lower()} BEFORE {event} '
                f"ON signal_response BEGIN SELECT RAISE(ABORT, '{MESSAGE}'); END"
            )


def downgrade() -> None:
    if op.get_bind().dialect.name == 'postgresql':
        op.execute('DROP TRIGGER signal_response_write_once ON signal_response')
    else:
        for event in ('update', 'delete'):
            op.execute(f'DROP TRIGGER signal_response_no_{event}')
    op.drop_index('ix_signal_response_episode', table_name='signal_response')
    op.drop_table('signal_response')
