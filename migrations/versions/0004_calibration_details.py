"""calibration details: per-term uncertainty, undetermined terms, registration, method notes

Revision ID: 0004
Revises: 0003
Create Date: 2026-12-02
"""

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

revision: str = '0004'
down_revision: str | None = '0003'
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None


def upgrade() -> None:
    with op.batch_alter_table('reference_calibration', schema=None) as batch_op:
        batch_op.add_column(sa.Column('details', sa.JSON(), nullable=False, server_default='{}'))


def downgrade() -> None:
    with op.batch_alter_table('reference_calibration', schema=None) as batch_op:
        batch_op.drop_column('details')
