"""callout_outcome: the verdict owner's per-field judgement of each result, stored with it

Revision ID: 0006
Revises: 0005
Create Date: 2026-12-03

One row per result (write-once, like the result): the fields of the part's drawing callout,
each measured value (whole aperture or worst test-field sub-aperture), limit, margin and pass.
The KPIs read it; release and the pages add the live blockers. Results stored before this
revision get their rows from the upgrade command (it judges them from their stored maps).
"""

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

revision: str = '0006'
down_revision: str | None = '0005'
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None

MESSAGE = 'callout_outcome records are write-once; corrections are new records'


def upgrade() -> None:
    op.create_table(
        'callout_outcome',
        sa.Column('result_id', sa.Integer(), nullable=False),
        sa.Column('drawing_id', sa.Integer(), nullable=False),
        sa.Column('conforms', sa.Boolean(), nullable=False),
        sa.Column('passes', sa.Boolean(), nullable=False),
        sa.Column('failed_fields', sa.String(length=255), nullable=False),
        sa.Column('fields', sa.JSON(), nullable=False),
        sa.Column('test_field', sa.JSON(), nullable=True),
        sa.Column('blockers', sa.JSON(), nullable=False),
        sa.Column('created_at', sa.DateTime(timezone=True), nullable=False),
        sa.ForeignKeyConstraint(
            ['drawing_id'], ['drawing.id'], name=op.f('fk_callout_outcome_drawing_id_drawing')
        ),
        sa.ForeignKeyConstraint(
            ['result_id'],
            ['surface_result.id'],
            name=op.f('fk_callout_outcome_result_id_surface_result'),
        ),
        sa.PrimaryKeyConstraint('result_id', name=op.f('pk_callout_outcome')),
    )
    with op.batch_alter_table('callout_outcome', schema=None) as batch_op:
        batch_op.create_index(
            batch_op.f('ix_callout_outcome_drawing_id'), ['drawing_id'], unique=False
        )
    if op.get_bind().dialect.name == 'postgresql':
        op.execute(
            'CREATE TRIGGER callout_outcome_write_once BEFORE UPDATE OR DELETE ON callout_outcome '
            'FOR EACH ROW EXECUTE FUNCTION write_once_guard()'
        )
        op.execute(
            'CREATE TRIGGER callout_outcome_no_truncate BEFORE TRUNCATE ON callout_outcome '
            'FOR EACH STATEMENT EXECUTE FUNCTION write_once_guard()'
        )
    else:
        for event in ('UPDATE', 'DELETE'):
            op.execute(
                f'CREATE TRIGGER callout_outcome_no_{event.lower()} BEFORE {event} '
                f"ON callout_outcome BEGIN SELECT RAISE(ABORT, '{MESSAGE}'); END"
            )


def downgrade() -> None:
    if op.get_bind().dialect.name == 'postgresql':
        op.execute('DROP TRIGGER callout_outcome_write_once ON callout_outcome')
        op.execute('DROP TRIGGER callout_outcome_no_truncate ON callout_outcome')
    else:
        for event in ('update', 'delete'):
            op.execute(f'DROP TRIGGER callout_outcome_no_{event}')
    with op.batch_alter_table('callout_outcome', schema=None) as batch_op:
        batch_op.drop_index(batch_op.f('ix_callout_outcome_drawing_id'))
    op.drop_table('callout_outcome')
