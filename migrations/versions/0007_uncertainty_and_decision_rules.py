"""uncertainty and decision rules: the drawing's decision rule, gage studies, shop settings, and
whether a judged result lies inside an uncertainty range

Revision ID: 0007
Revises: 0006
Create Date: 2026-12-03

Existing drawings take the rule of simple acceptance (what every verdict so far applied);
existing judgements are marked not conditional (they were made without an uncertainty).
Gage studies are write-once, like the other quality records.
"""

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

revision: str = '0007'
down_revision: str | None = '0006'
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None

MESSAGE = 'gage_study records are write-once; corrections are new records'


def upgrade() -> None:
    op.create_table(
        'shop_setting',
        sa.Column('key', sa.String(length=64), nullable=False),
        sa.Column('value', sa.JSON(), nullable=False),
        sa.Column('updated_at', sa.DateTime(timezone=True), nullable=False),
        sa.Column('updated_by', sa.String(length=64), nullable=False),
        sa.PrimaryKeyConstraint('key', name=op.f('pk_shop_setting')),
    )
    op.create_table(
        'gage_study',
        sa.Column('id', sa.Integer(), nullable=False),
        sa.Column('station_id', sa.Integer(), nullable=False),
        sa.Column('quantity', sa.String(length=32), nullable=False),
        sa.Column('studied_at', sa.DateTime(timezone=True), nullable=False),
        sa.Column('method', sa.String(length=32), nullable=False),
        sa.Column('repeatability', sa.Float(), nullable=False),
        sa.Column('reproducibility', sa.Float(), nullable=False),
        sa.Column('grr', sa.Float(), nullable=False),
        sa.Column('part_variation', sa.Float(), nullable=False),
        sa.Column('ndc', sa.Integer(), nullable=False),
        sa.Column('tolerance', sa.Float(), nullable=True),
        sa.Column('source_name', sa.String(length=255), nullable=False),
        sa.Column('recorded_by_id', sa.Integer(), nullable=False),
        sa.ForeignKeyConstraint(
            ['recorded_by_id'],
            ['user_account.id'],
            name=op.f('fk_gage_study_recorded_by_id_user_account'),
        ),
        sa.ForeignKeyConstraint(
            ['station_id'], ['station.id'], name=op.f('fk_gage_study_station_id_station')
        ),
        sa.PrimaryKeyConstraint('id', name=op.f('pk_gage_study')),
    )
    with op.batch_alter_table('gage_study', schema=None) as batch_op:
        batch_op.create_index(
            batch_op.f('ix_gage_study_station_id_quantity_studied_at'),
            ['station_id', 'quantity', 'studied_at'],
            unique=False,
        )
    # plain ADD COLUMN (no table rebuild on SQLite, so callout_outcome keeps its triggers)
    op.add_column(
        'callout_outcome',
        sa.Column('conditional', sa.Boolean(), nullable=False, server_default=sa.false()),
    )
    op.add_column(
        'drawing',
        sa.Column('decision_rule', sa.String(length=32), nullable=False, server_default='simple'),
    )
    if op.get_bind().dialect.name == 'postgresql':
        op.execute(
            'CREATE TRIGGER gage_study_write_once BEFORE UPDATE OR DELETE ON gage_study '
            'FOR EACH ROW EXECUTE FUNCTION write_once_guard()'
        )
    else:
        for event in ('UPDATE', 'DELETE'):
            op.execute(
                f'CREATE TRIGGER gage_study_no_{event.lower()} BEFORE {event} ON gage_study '
                f"BEGIN SELECT RAISE(ABORT, '{MESSAGE}'); END"
            )


def downgrade() -> None:
    if op.get_bind().dialect.name == 'postgresql':
        op.execute('DROP TRIGGER gage_study_write_once ON gage_study')
    else:
        for event in ('update', 'delete'):
            op.execute(f'DROP TRIGGER gage_study_no_{event}')
    with op.batch_alter_table('drawing', schema=None) as batch_op:
        batch_op.drop_column('decision_rule')
    with op.batch_alter_table('callout_outcome', schema=None) as batch_op:
        batch_op.drop_column('conditional')
    if op.get_bind().dialect.name == 'sqlite':  # the rebuild dropped the write-once triggers
        message = 'callout_outcome records are write-once; corrections are new records'
        for event in ('UPDATE', 'DELETE'):
            op.execute(
                f'CREATE TRIGGER callout_outcome_no_{event.lower()} BEFORE {event} '
                f"ON callout_outcome BEGIN SELECT RAISE(ABORT, '{message}'); END"
            )
    with op.batch_alter_table('gage_study', schema=None) as batch_op:
        batch_op.drop_index(batch_op.f('ix_gage_study_station_id_quantity_studied_at'))
    op.drop_table('gage_study')
    op.drop_table('shop_setting')
