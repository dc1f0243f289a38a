"""records: people, places, drawings, parts, runs, references, measurements, results

Revision ID: 0001
Revises: 
Create Date: 2026-12-01
"""

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op


revision: str = '0001'
down_revision: str | None = None
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None


def upgrade() -> None:
    op.create_table('drawing',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('number', sa.String(length=64), nullable=False),
    sa.Column('revision', sa.String(length=16), nullable=False),
    sa.Column('title', sa.String(length=200), nullable=False),
    sa.Column('surface_form_callout', sa.String(length=200), nullable=False),
    sa.Column('test_wavelength_nm', sa.Float(), nullable=False),
    sa.Column('clear_aperture_mm', sa.Float(), nullable=False),
    sa.Column('nominal_radius_mm', sa.Float(), nullable=True),
    sa.Column('min_valid_fraction', sa.Float(), nullable=False),
    sa.Column('created_at', sa.DateTime(timezone=True), nullable=False),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_drawing')),
    sa.UniqueConstraint('number', 'revision', name=op.f('uq_drawing_number_revision'))
    )
    op.create_table('machine',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('name', sa.String(length=64), nullable=False),
    sa.Column('kind', sa.String(length=64), nullable=False),
    sa.Column('notes', sa.String(length=1000), nullable=False),
    sa.Column('created_at', sa.DateTime(timezone=True), nullable=False),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_machine')),
    sa.UniqueConstraint('name', name=op.f('uq_machine_name'))
    )
    op.create_table('reference_optic',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('name', sa.String(length=64), nullable=False),
    sa.Column('kind', sa.String(length=32), nullable=False),
    sa.Column('diameter_mm', sa.Float(), nullable=False),
    sa.Column('notes', sa.String(length=1000), nullable=False),
    sa.Column('created_at', sa.DateTime(timezone=True), nullable=False),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_reference_optic')),
    sa.UniqueConstraint('name', name=op.f('uq_reference_optic_name'))
    )
    op.create_table('station',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('name', sa.String(length=64), nullable=False),
    sa.Column('instrument', sa.String(length=128), nullable=False),
    sa.Column('wavelength_nm', sa.Float(), nullable=False),
    sa.Column('requires_reference', sa.Boolean(), nullable=False),
    sa.Column('profile', sa.JSON(), nullable=False),
    sa.Column('created_at', sa.DateTime(timezone=True), nullable=False),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_station')),
    sa.UniqueConstraint('name', name=op.f('uq_station_name'))
    )
    op.create_table('user_account',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('username', sa.String(length=64), nullable=False),
    sa.Column('display_name', sa.String(length=128), nullable=False),
    sa.Column('role', sa.String(length=16), nullable=False),
    sa.Column('password_hash', sa.String(length=255), nullable=True),
    sa.Column('active', sa.Boolean(), nullable=False),
    sa.Column('failed_logins', sa.Integer(), nullable=False),
    sa.Column('locked_until', sa.DateTime(timezone=True), nullable=True),
    sa.Column('created_at', sa.DateTime(timezone=True), nullable=False),
    sa.CheckConstraint("role IN ('operator', 'lead', 'qa', 'metrology', 'manager', 'admin')", name=op.f('ck_user_account_role')),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_user_account')),
    sa.UniqueConstraint('username', name=op.f('uq_user_account_username'))
    )
    op.create_table('lot',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('code', sa.String(length=64), nullable=False),
    sa.Column('drawing_id', sa.Integer(), nullable=False),
    sa.Column('status', sa.String(length=16), nullable=False),
    sa.Column('created_at', sa.DateTime(timezone=True), nullable=False),
    sa.CheckConstraint("status IN ('open', 'released', 'rejected')", name=op.f('ck_lot_status')),
    sa.ForeignKeyConstraint(['drawing_id'], ['drawing.id'], name=op.f('fk_lot_drawing_id_drawing')),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_lot')),
    sa.UniqueConstraint('code', name=op.f('uq_lot_code'))
    )
    with op.batch_alter_table('lot', schema=None) as batch_op:
        batch_op.create_index(batch_op.f('ix_lot_drawing_id'), ['drawing_id'], unique=False)

    op.create_table('reference_calibration',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('reference_id', sa.Integer(), nullable=False),
    sa.Column('calibrated_at', sa.DateTime(timezone=True), nullable=False),
    sa.Column('valid_until', sa.DateTime(timezone=True), nullable=False),
    sa.Column('method', sa.String(length=64), nullable=False),
    sa.Column('uncertainty_nm', sa.Float(), nullable=False),
    sa.Column('pv_nm', sa.Float(), nullable=True),
    sa.Column('rms_nm', sa.Float(), nullable=True),
    sa.Column('coefficients', sa.JSON(), nullable=False),
    sa.Column('error_map_blob', sa.String(length=64), nullable=True),
    sa.Column('created_at', sa.DateTime(timezone=True), nullable=False),
    sa.ForeignKeyConstraint(['reference_id'], ['reference_optic.id'], name=op.f('fk_reference_calibration_reference_id_reference_optic')),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_reference_calibration'))
    )
    with op.batch_alter_table('reference_calibration', schema=None) as batch_op:
        batch_op.create_index(batch_op.f('ix_reference_calibration_reference_id_calibrated_at'), ['reference_id', 'calibrated_at'], unique=False)

    op.create_table('part',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('serial', sa.String(length=64), nullable=False),
    sa.Column('drawing_id', sa.Integer(), nullable=False),
    sa.Column('lot_id', sa.Integer(), nullable=True),
    sa.Column('status', sa.String(length=16), nullable=False),
    sa.Column('created_at', sa.DateTime(timezone=True), nullable=False),
    sa.CheckConstraint("status IN ('in_process', 'passed', 'rework', 'scrapped', 'released', 'rejected')", name=op.f('ck_part_status')),
    sa.ForeignKeyConstraint(['drawing_id'], ['drawing.id'], name=op.f('fk_part_drawing_id_drawing')),
    sa.ForeignKeyConstraint(['lot_id'], ['lot.id'], name=op.f('fk_part_lot_id_lot')),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_part')),
    sa.UniqueConstraint('serial', name=op.f('uq_part_serial'))
    )
    with op.batch_alter_table('part', schema=None) as batch_op:
        batch_op.create_index(batch_op.f('ix_part_drawing_id'), ['drawing_id'], unique=False)
        batch_op.create_index(batch_op.f('ix_part_lot_id'), ['lot_id'], unique=False)

    op.create_table('polishing_run',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('part_id', sa.Integer(), nullable=False),
    sa.Column('iteration', sa.Integer(), nullable=False),
    sa.Column('machine_id', sa.Integer(), nullable=True),
    sa.Column('operator_id', sa.Integer(), nullable=True),
    sa.Column('started_at', sa.DateTime(timezone=True), nullable=False),
    sa.Column('ended_at', sa.DateTime(timezone=True), nullable=True),
    sa.Column('params', sa.JSON(), nullable=False),
    sa.ForeignKeyConstraint(['machine_id'], ['machine.id'], name=op.f('fk_polishing_run_machine_id_machine')),
    sa.ForeignKeyConstraint(['operator_id'], ['user_account.id'], name=op.f('fk_polishing_run_operator_id_user_account')),
    sa.ForeignKeyConstraint(['part_id'], ['part.id'], name=op.f('fk_polishing_run_part_id_part')),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_polishing_run')),
    sa.UniqueConstraint('part_id', 'iteration', name=op.f('uq_polishing_run_part_id_iteration'))
    )
    with op.batch_alter_table('polishing_run', schema=None) as batch_op:
        batch_op.create_index(batch_op.f('ix_polishing_run_machine_id'), ['machine_id'], unique=False)
        batch_op.create_index(batch_op.f('ix_polishing_run_started_at'), ['started_at'], unique=False)

    op.create_table('measurement',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('part_id', sa.Integer(), nullable=False),
    sa.Column('run_id', sa.Integer(), nullable=True),
    sa.Column('station_id', sa.Integer(), nullable=False),
    sa.Column('reference_calibration_id', sa.Integer(), nullable=True),
    sa.Column('operator_id', sa.Integer(), nullable=True),
    sa.Column('measured_at', sa.DateTime(timezone=True), nullable=False),
    sa.Column('wavelength_nm', sa.Float(), nullable=False),
    sa.Column('dx_mm', sa.Float(), nullable=False),
    sa.Column('kind', sa.String(length=16), nullable=False),
    sa.Column('source_name', sa.String(length=255), nullable=False),
    sa.Column('source_sha256', sa.String(length=64), nullable=False),
    sa.Column('blob_key', sa.String(length=64), nullable=False),
    sa.Column('status', sa.String(length=16), nullable=False),
    sa.Column('created_at', sa.DateTime(timezone=True), nullable=False),
    sa.CheckConstraint("kind IN ('surface', 'wavefront')", name=op.f('ck_measurement_kind')),
    sa.CheckConstraint("status IN ('valid', 'rejected', 'superseded')", name=op.f('ck_measurement_status')),
    sa.ForeignKeyConstraint(['operator_id'], ['user_account.id'], name=op.f('fk_measurement_operator_id_user_account')),
    sa.ForeignKeyConstraint(['part_id'], ['part.id'], name=op.f('fk_measurement_part_id_part')),
    sa.ForeignKeyConstraint(['reference_calibration_id'], ['reference_calibration.id'], name=op.f('fk_measurement_reference_calibration_id_reference_calibration')),
    sa.ForeignKeyConstraint(['run_id'], ['polishing_run.id'], name=op.f('fk_measurement_run_id_polishing_run')),
    sa.ForeignKeyConstraint(['station_id'], ['station.id'], name=op.f('fk_measurement_station_id_station')),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_measurement')),
    sa.UniqueConstraint('source_sha256', name=op.f('uq_measurement_source_sha256'))
    )
    with op.batch_alter_table('measurement', schema=None) as batch_op:
        batch_op.create_index(batch_op.f('ix_measurement_blob_key'), ['blob_key'], unique=False)
        batch_op.create_index(batch_op.f('ix_measurement_measured_at'), ['measured_at'], unique=False)
        batch_op.create_index(batch_op.f('ix_measurement_part_id_measured_at'), ['part_id', 'measured_at'], unique=False)
        batch_op.create_index(batch_op.f('ix_measurement_reference_calibration_id'), ['reference_calibration_id'], unique=False)
        batch_op.create_index(batch_op.f('ix_measurement_run_id'), ['run_id'], unique=False)
        batch_op.create_index(batch_op.f('ix_measurement_station_id_measured_at'), ['station_id', 'measured_at'], unique=False)

    op.create_table('surface_result',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('measurement_id', sa.Integer(), nullable=False),
    sa.Column('settings_hash', sa.String(length=64), nullable=False),
    sa.Column('settings', sa.JSON(), nullable=False),
    sa.Column('software_version', sa.String(length=32), nullable=False),
    sa.Column('pv_nm', sa.Float(), nullable=False),
    sa.Column('rms_nm', sa.Float(), nullable=False),
    sa.Column('pvr_nm', sa.Float(), nullable=True),
    sa.Column('sag_nm', sa.Float(), nullable=True),
    sa.Column('irregularity_nm', sa.Float(), nullable=True),
    sa.Column('rsi_nm', sa.Float(), nullable=True),
    sa.Column('rmst_nm', sa.Float(), nullable=True),
    sa.Column('rmsi_nm', sa.Float(), nullable=True),
    sa.Column('rmsa_nm', sa.Float(), nullable=True),
    sa.Column('slope_rms_urad', sa.Float(), nullable=True),
    sa.Column('slope_max_urad', sa.Float(), nullable=True),
    sa.Column('valid_fraction', sa.Float(), nullable=False),
    sa.Column('psd_bands', sa.JSON(), nullable=False),
    sa.Column('created_at', sa.DateTime(timezone=True), nullable=False),
    sa.ForeignKeyConstraint(['measurement_id'], ['measurement.id'], name=op.f('fk_surface_result_measurement_id_measurement')),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_surface_result')),
    sa.UniqueConstraint('measurement_id', 'settings_hash', 'software_version', name=op.f('uq_surface_result_measurement_id_settings_hash_software_version'))
    )
    op.create_table('zernike_term',
    sa.Column('result_id', sa.Integer(), nullable=False),
    sa.Column('n', sa.Integer(), nullable=False),
    sa.Column('m', sa.Integer(), nullable=False),
    sa.Column('coef_nm', sa.Float(), nullable=False),
    sa.ForeignKeyConstraint(['result_id'], ['surface_result.id'], name=op.f('fk_zernike_term_result_id_surface_result')),
    sa.PrimaryKeyConstraint('result_id', 'n', 'm', name=op.f('pk_zernike_term'))
    )
    with op.batch_alter_table('zernike_term', schema=None) as batch_op:
        batch_op.create_index(batch_op.f('ix_zernike_term_n_m_result_id_coef_nm'), ['n', 'm', 'result_id', 'coef_nm'], unique=False)


def downgrade() -> None:
    with op.batch_alter_table('zernike_term', schema=None) as batch_op:
        batch_op.drop_index(batch_op.f('ix_zernike_term_n_m_result_id_coef_nm'))

    op.drop_table('zernike_term')
    op.drop_table('surface_result')
    with op.batch_alter_table('measurement', schema=None) as batch_op:
        batch_op.drop_index(batch_op.f('ix_measurement_station_id_measured_at'))
        batch_op.drop_index(batch_op.f('ix_measurement_run_id'))
        batch_op.drop_index(batch_op.f('ix_measurement_reference_calibration_id'))
        batch_op.drop_index(batch_op.f('ix_measurement_part_id_measured_at'))
        batch_op.drop_index(batch_op.f('ix_measurement_measured_at'))
        batch_op.drop_index(batch_op.f('ix_measurement_blob_key'))

    op.drop_table('measurement')
    with op.batch_alter_table('polishing_run', schema=None) as batch_op:
        batch_op.drop_index(batch_op.f('ix_polishing_run_started_at'))
        batch_op.drop_index(batch_op.f('ix_polishing_run_machine_id'))

    op.drop_table('polishing_run')
    with op.batch_alter_table('part', schema=None) as batch_op:
        batch_op.drop_index(batch_op.f('ix_part_lot_id'))
        batch_op.drop_index(batch_op.f('ix_part_drawing_id'))

    op.drop_table('part')
    with op.batch_alter_table('reference_calibration', schema=None) as batch_op:
        batch_op.drop_index(batch_op.f('ix_reference_calibration_reference_id_calibrated_at'))

    op.drop_table('reference_calibration')
    with op.batch_alter_table('lot', schema=None) as batch_op:
        batch_op.drop_index(batch_op.f('ix_lot_drawing_id'))

    op.drop_table('lot')
    op.drop_table('user_account')
    op.drop_table('station')
    op.drop_table('reference_optic')
    op.drop_table('machine')
    op.drop_table('drawing')
