"""tool influence functions and dwell plans of sub-aperture machines

Revision ID: 0011
Revises: 0010
Create Date: 2026-12-03

Both write-once: a newer record supersedes; the run that follows a plan names it.
"""

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

revision: str = '0011'
down_revision: str | None = '0010'
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None

TABLES = ('tool_influence', 'dwell_plan')


def upgrade() -> None:
    op.create_table('tool_influence',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('machine_id', sa.Integer(), nullable=False),
    sa.Column('name', sa.String(length=64), nullable=False),
    sa.Column('kind', sa.String(length=16), nullable=False),
    sa.Column('params', sa.JSON(), nullable=False),
    sa.Column('blob_key', sa.String(length=64), nullable=True),
    sa.Column('dx_mm', sa.Float(), nullable=True),
    sa.Column('notes', sa.String(length=1000), nullable=False),
    sa.Column('recorded_by_id', sa.Integer(), nullable=False),
    sa.Column('recorded_at', sa.DateTime(timezone=True), nullable=False),
    sa.ForeignKeyConstraint(['machine_id'], ['machine.id'], name=op.f('fk_tool_influence_machine_id_machine')),
    sa.ForeignKeyConstraint(['recorded_by_id'], ['user_account.id'], name=op.f('fk_tool_influence_recorded_by_id_user_account')),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_tool_influence'))
    )
    with op.batch_alter_table('tool_influence', schema=None) as batch_op:
        batch_op.create_index(batch_op.f('ix_tool_influence_machine_id'), ['machine_id'], unique=False)

    op.create_table('dwell_plan',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('part_id', sa.Integer(), nullable=False),
    sa.Column('measurement_id', sa.Integer(), nullable=False),
    sa.Column('tool_influence_id', sa.Integer(), nullable=False),
    sa.Column('settings', sa.JSON(), nullable=False),
    sa.Column('settings_sha256', sa.String(length=64), nullable=False),
    sa.Column('dwell_blob', sa.String(length=64), nullable=False),
    sa.Column('total_time_s', sa.Float(), nullable=False),
    sa.Column('predicted', sa.JSON(), nullable=False),
    sa.Column('predicted_verdict', sa.String(length=16), nullable=False),
    sa.Column('planned_by_id', sa.Integer(), nullable=False),
    sa.Column('planned_at', sa.DateTime(timezone=True), nullable=False),
    sa.ForeignKeyConstraint(['measurement_id'], ['measurement.id'], name=op.f('fk_dwell_plan_measurement_id_measurement')),
    sa.ForeignKeyConstraint(['part_id'], ['part.id'], name=op.f('fk_dwell_plan_part_id_part')),
    sa.ForeignKeyConstraint(['planned_by_id'], ['user_account.id'], name=op.f('fk_dwell_plan_planned_by_id_user_account')),
    sa.ForeignKeyConstraint(['tool_influence_id'], ['tool_influence.id'], name=op.f('fk_dwell_plan_tool_influence_id_tool_influence')),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_dwell_plan'))
    )
    with op.batch_alter_table('dwell_plan', schema=None) as batch_op:
        batch_op.create_index(batch_op.f('ix_dwell_plan_part_id'), ['part_id'], unique=False)

    for table in TABLES:
        if op.get_bind().dialect.name == 'postgresql':
            op.execute(
                f'CREATE TRIGGER {table}_write_once BEFORE UPDATE OR DELETE ON {table} '
                'FOR EACH ROW EXECUTE FUNCTION write_once_guard()'
            )
        else:
            for event in ('UPDATE', 'DELETE'):
                op.execute(
                    f'CREATE TRIGGER {table}_no_{event.lower()} BEFORE {event} ON {table} '
                    f"BEGIN SELECT RAISE(ABORT, '{table} records are write-once'); END"
                )


def downgrade() -> None:
    for table in TABLES:
        if op.get_bind().dialect.name == 'postgresql':
            op.execute(f'DROP TRIGGER {table}_write_once ON {table}')
        else:
            for event in ('update', 'delete'):
                op.execute(f'DROP TRIGGER {table}_no_{event}')
    with op.batch_alter_table('dwell_plan', schema=None) as batch_op:
        batch_op.drop_index(batch_op.f('ix_dwell_plan_part_id'))

    op.drop_table('dwell_plan')
    with op.batch_alter_table('tool_influence', schema=None) as batch_op:
        batch_op.drop_index(batch_op.f('ix_tool_influence_machine_id'))

    op.drop_table('tool_influence')
