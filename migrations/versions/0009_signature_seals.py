"""signature seals: an HMAC of every signature under a key held outside the database

Revision ID: 0009
Revises: 0008
Create Date: 2026-12-03

Write-once, like the signatures they seal. Signatures made before this revision are sealed by
the upgrade command once their evidence and audit trail verify.
"""

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

revision: str = '0009'
down_revision: str | None = '0008'
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None

MESSAGE = 'signature_seal records are write-once'


def upgrade() -> None:
    op.create_table(
        'signature_seal',
        sa.Column('signature_id', sa.Integer(), nullable=False),
        sa.Column('key_id', sa.String(length=16), nullable=False),
        sa.Column('hmac_sha256', sa.String(length=64), nullable=False),
        sa.ForeignKeyConstraint(
            ['signature_id'],
            ['signature.id'],
            name=op.f('fk_signature_seal_signature_id_signature'),
        ),
        sa.PrimaryKeyConstraint('signature_id', name=op.f('pk_signature_seal')),
    )
    if op.get_bind().dialect.name == 'postgresql':
        op.execute(
            'CREATE TRIGGER signature_seal_write_once BEFORE UPDATE OR DELETE ON signature_seal '
            'FOR EACH ROW EXECUTE FUNCTION write_once_guard()'
        )
    else:
        for event in ('UPDATE', 'DELETE'):
            op.execute(
                f'CREATE TRIGGER signature_seal_no_{event.lower()} BEFORE {event} '
                f"ON signature_seal BEGIN SELECT RAISE(ABORT, '{MESSAGE}'); END"
            )


def downgrade() -> None:
    if op.get_bind().dialect.name == 'postgresql':
        op.execute('DROP TRIGGER signature_seal_write_once ON signature_seal')
    else:
        for event in ('update', 'delete'):
            op.execute(f'DROP TRIGGER signature_seal_no_{event}')
    op.drop_table('signature_seal')
