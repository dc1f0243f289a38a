"""release: verdict snapshot on dispositions, signed dispositions on signatures, write-once triggers

Revision ID: 0003
Revises: 0002
Create Date: 2026-12-02

Write-once tables refuse UPDATE and DELETE in the database itself (the services refuse them
first): the audit trail, signatures, dispositions, results and their Zernike terms; a lot that
has left the 'open' status is frozen. A correction is a new record.
"""

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

revision: str = '0003'
down_revision: str | None = '0002'
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None

WRITE_ONCE = ('audit_event', 'signature', 'disposition', 'surface_result', 'zernike_term')
MESSAGE = '%s records are write-once; corrections are new records'
LOT_MESSAGE = 'a signed lot is frozen; corrections are new records'


def upgrade() -> None:
    with op.batch_alter_table('disposition', schema=None) as batch_op:
        batch_op.add_column(sa.Column('verdict', sa.JSON(), nullable=False, server_default='{}'))
    with op.batch_alter_table('signature', schema=None) as batch_op:
        batch_op.add_column(
            sa.Column('disposition_ids', sa.JSON(), nullable=False, server_default='[]')
        )
    if op.get_bind().dialect.name == 'postgresql':
        op.execute(
            """
            CREATE FUNCTION write_once_guard() RETURNS trigger LANGUAGE plpgsql AS $$
            BEGIN
                RAISE EXCEPTION '% records are write-once; corrections are new records',
                    TG_TABLE_NAME USING ERRCODE = 'insufficient_privilege';
            END $$;
            """
        )
        op.execute(
            f"""
            CREATE FUNCTION lot_frozen_guard() RETURNS trigger LANGUAGE plpgsql AS $$
            BEGIN
                IF OLD.status <> 'open' THEN
                    RAISE EXCEPTION '{LOT_MESSAGE}' USING ERRCODE = 'insufficient_privilege';
                END IF;
                RETURN NEW;
            END $$;
            """
        )
        for table in WRITE_ONCE:
            op.execute(
                f'CREATE TRIGGER {table}_write_once BEFORE UPDATE OR DELETE ON {table} '
                'FOR EACH ROW EXECUTE FUNCTION write_once_guard()'
            )
            op.execute(
                f'CREATE TRIGGER {table}_no_truncate BEFORE TRUNCATE ON {table} '
                'FOR EACH STATEMENT EXECUTE FUNCTION write_once_guard()'
            )
        op.execute(
            'CREATE TRIGGER lot_frozen BEFORE UPDATE OR DELETE ON lot '
            'FOR EACH ROW EXECUTE FUNCTION lot_frozen_guard()'
        )
    else:
        for table in WRITE_ONCE:
            for event in ('UPDATE', 'DELETE'):
                op.execute(
                    f'CREATE TRIGGER {table}_no_{event.lower()} BEFORE {event} ON {table} '
                    f"BEGIN SELECT RAISE(ABORT, '{MESSAGE % table}'); END"
                )
        for event in ('UPDATE', 'DELETE'):
            op.execute(
                f"CREATE TRIGGER lot_frozen_{event.lower()} BEFORE {event} ON lot "
                f"WHEN OLD.status <> 'open' BEGIN SELECT RAISE(ABORT, '{LOT_MESSAGE}'); END"
            )


def downgrade() -> None:
    if op.get_bind().dialect.name == 'postgresql':
        op.execute('DROP TRIGGER lot_frozen ON lot')
        for table in WRITE_ONCE:
            op.execute(f'DROP TRIGGER {table}_write_once ON {table}')
            op.execute(f'DROP TRIGGER {table}_no_truncate ON {table}')
        op.execute('DROP FUNCTION lot_frozen_guard()')
        op.execute('DROP FUNCTION write_once_guard()')
    else:
        for event in ('update', 'delete'):
            op.execute(f'DROP TRIGGER lot_frozen_{event}')
            for table in WRITE_ONCE:
                op.execute(f'DROP TRIGGER {table}_no_{event}')
    with op.batch_alter_table('signature', schema=None) as batch_op:
        batch_op.drop_column('disposition_ids')
    with op.batch_alter_table('disposition', schema=None) as batch_op:
        batch_op.drop_column('verdict')
