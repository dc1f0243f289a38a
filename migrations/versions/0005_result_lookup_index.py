"""index surface_result (measurement_id, id): the newest result of a measurement by one probe

Revision ID: 0005
Revises: 0004
Create Date: 2026-12-02

Without it PostgreSQL answers max(id) for one measurement by walking the primary key backwards.
"""

from collections.abc import Sequence

from alembic import op

revision: str = '0005'
down_revision: str | None = '0004'
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None


def upgrade() -> None:
    with op.batch_alter_table('surface_result', schema=None) as batch_op:
        batch_op.create_index(
            batch_op.f('ix_surface_result_measurement_id_id'), ['measurement_id', 'id'], unique=False
        )


def downgrade() -> None:
    with op.batch_alter_table('surface_result', schema=None) as batch_op:
        batch_op.drop_index(batch_op.f('ix_surface_result_measurement_id_id'))
