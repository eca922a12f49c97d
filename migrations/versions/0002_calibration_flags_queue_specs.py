"""Calibration sets with their offsets and system residuals; point and result flags, bounds,
second-order products and verdicts; the job queue; spec limits; run ownership for resume; and the
indexes the characterization queries need.

Revision ID: 0002
Revises: 0001
Create Date: 2026-12-01
"""

from alembic import op
import sqlalchemy as sa


revision = '0002'
down_revision = '0001'
branch_labels = None
depends_on = None


def upgrade() -> None:
    op.create_table('spec_limits',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('part_number', sa.String(length=200), nullable=False),
    sa.Column('parameter', sa.String(length=32), nullable=False),
    sa.Column('min_value', sa.Double(), nullable=True),
    sa.Column('max_value', sa.Double(), nullable=True),
    sa.Column('freq_min_hz', sa.Double(), nullable=False),
    sa.Column('freq_max_hz', sa.Double(), nullable=False),
    sa.Column('spacing_min_hz', sa.Double(), nullable=True),
    sa.Column('spacing_max_hz', sa.Double(), nullable=True),
    sa.Column('bias_min_v', sa.Double(), nullable=True),
    sa.Column('bias_max_v', sa.Double(), nullable=True),
    sa.Column('created_at', sa.DateTime(timezone=True), nullable=False),
    sa.Column('notes', sa.Text(), nullable=True),
    sa.CheckConstraint("parameter IN ('iip3_dbm', 'oip3_dbm', 'gain_db', 'p1db_in_dbm', 'iip2_dbm')", name=op.f('ck_spec_limits_parameter')),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_spec_limits'))
    )
    with op.batch_alter_table('spec_limits', schema=None) as batch_op:
        batch_op.create_index(batch_op.f('ix_spec_limits_part_number'), ['part_number'], unique=False)

    op.create_table('calibration_sets',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('name', sa.String(length=200), nullable=False),
    sa.Column('method', sa.String(length=16), nullable=False),
    sa.Column('created_at', sa.DateTime(timezone=True), nullable=False),
    sa.Column('operator', sa.String(length=200), nullable=True),
    sa.Column('bench_id', sa.Integer(), nullable=True),
    sa.Column('instruments_json', sa.JSON(), nullable=False),
    sa.Column('source_files_json', sa.JSON(), nullable=False),
    sa.Column('freq_min_hz', sa.Double(), nullable=False),
    sa.Column('freq_max_hz', sa.Double(), nullable=False),
    sa.Column('valid_days', sa.Double(), nullable=False),
    sa.Column('expired_at', sa.DateTime(timezone=True), nullable=True),
    sa.Column('notes', sa.Text(), nullable=True),
    sa.CheckConstraint("method IN ('table', 'touchstone', 'measured', 'bench-file')", name=op.f('ck_calibration_sets_method')),
    sa.ForeignKeyConstraint(['bench_id'], ['benches.id'], name=op.f('fk_calibration_sets_bench_id_benches')),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_calibration_sets')),
    sa.UniqueConstraint('name', name=op.f('uq_calibration_sets_name'))
    )
    op.create_table('calibration_offsets',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('calibration_set_id', sa.Integer(), nullable=False),
    sa.Column('path', sa.String(length=8), nullable=False),
    sa.Column('freq_hz', sa.Double(), nullable=False),
    sa.Column('loss_db', sa.Double(), nullable=False),
    sa.CheckConstraint("path IN ('in1', 'in2', 'out')", name=op.f('ck_calibration_offsets_path')),
    sa.ForeignKeyConstraint(['calibration_set_id'], ['calibration_sets.id'], name=op.f('fk_calibration_offsets_calibration_set_id_calibration_sets'), ondelete='CASCADE'),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_calibration_offsets')),
    sa.UniqueConstraint('calibration_set_id', 'path', 'freq_hz', name=op.f('uq_calibration_offsets_calibration_set_id_path_freq_hz'))
    )
    op.create_table('system_residuals',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('calibration_set_id', sa.Integer(), nullable=False),
    sa.Column('center_hz', sa.Double(), nullable=False),
    sa.Column('spacing_hz', sa.Double(), nullable=False),
    sa.Column('atten_db', sa.Double(), nullable=False),
    sa.Column('system_ip3_dbm', sa.Double(), nullable=True),
    sa.Column('source_ip3_dbm', sa.Double(), nullable=True),
    sa.Column('analyzer_ip3_dbm', sa.Double(), nullable=True),
    sa.Column('sweep_json', sa.JSON(), nullable=False),
    sa.Column('created_at', sa.DateTime(timezone=True), nullable=False),
    sa.ForeignKeyConstraint(['calibration_set_id'], ['calibration_sets.id'], name=op.f('fk_system_residuals_calibration_set_id_calibration_sets'), ondelete='CASCADE'),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_system_residuals')),
    sa.UniqueConstraint('calibration_set_id', 'center_hz', 'spacing_hz', name=op.f('uq_system_residuals_calibration_set_id_center_hz_spacing_hz'))
    )
    op.create_table('jobs',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('guid', sa.String(length=36), nullable=False),
    sa.Column('bench_name', sa.String(length=200), nullable=False),
    sa.Column('plan_name', sa.String(length=200), nullable=False),
    sa.Column('plan_text', sa.Text(), nullable=False),
    sa.Column('plan_sha256', sa.String(length=64), nullable=False),
    sa.Column('plan_path', sa.Text(), nullable=True),
    sa.Column('status', sa.String(length=16), nullable=False),
    sa.Column('priority', sa.Integer(), nullable=False),
    sa.Column('created_at', sa.DateTime(timezone=True), nullable=False),
    sa.Column('claimed_by', sa.String(length=255), nullable=True),
    sa.Column('claimed_at', sa.DateTime(timezone=True), nullable=True),
    sa.Column('finished_at', sa.DateTime(timezone=True), nullable=True),
    sa.Column('run_id', sa.Integer(), nullable=True),
    sa.Column('message', sa.Text(), nullable=True),
    sa.CheckConstraint("status IN ('queued', 'running', 'done', 'failed', 'cancelled')", name=op.f('ck_jobs_status')),
    sa.ForeignKeyConstraint(['run_id'], ['runs.id'], name=op.f('fk_jobs_run_id_runs'), ondelete='SET NULL'),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_jobs')),
    sa.UniqueConstraint('guid', name=op.f('uq_jobs_guid'))
    )
    with op.batch_alter_table('jobs', schema=None) as batch_op:
        batch_op.create_index('ix_jobs_bench_status_priority', ['bench_name', 'status', 'priority', 'id'], unique=False)

    op.create_table('point_flags',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('point_id', sa.Integer(), nullable=False),
    sa.Column('flag', sa.String(length=32), nullable=False),
    sa.Column('cause', sa.String(length=16), nullable=True),
    sa.Column('detail', sa.Text(), nullable=False),
    sa.Column('error_db', sa.Double(), nullable=True),
    sa.CheckConstraint("cause IS NULL OR cause IN ('noise', 'distortion', 'overload')", name=op.f('ck_point_flags_cause')),
    sa.CheckConstraint("flag IN ('analyzer-limited', 'source-intermod-limited', 'compressed', 'tone-imbalance', 'slope')", name=op.f('ck_point_flags_flag')),
    sa.ForeignKeyConstraint(['point_id'], ['points.id'], name=op.f('fk_point_flags_point_id_points'), ondelete='CASCADE'),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_point_flags'))
    )
    with op.batch_alter_table('point_flags', schema=None) as batch_op:
        batch_op.create_index(batch_op.f('ix_point_flags_point_id'), ['point_id'], unique=False)

    op.create_table('result_flags',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('result_id', sa.Integer(), nullable=False),
    sa.Column('flag', sa.String(length=32), nullable=False),
    sa.Column('cause', sa.String(length=16), nullable=True),
    sa.Column('detail', sa.Text(), nullable=False),
    sa.Column('error_db', sa.Double(), nullable=True),
    sa.CheckConstraint("cause IS NULL OR cause IN ('noise', 'distortion', 'overload')", name=op.f('ck_result_flags_cause')),
    sa.CheckConstraint("flag IN ('analyzer-limited', 'source-intermod-limited', 'compressed', 'tone-imbalance', 'slope')", name=op.f('ck_result_flags_flag')),
    sa.ForeignKeyConstraint(['result_id'], ['results.id'], name=op.f('fk_result_flags_result_id_results'), ondelete='CASCADE'),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_result_flags'))
    )
    with op.batch_alter_table('result_flags', schema=None) as batch_op:
        batch_op.create_index('ix_result_flags_result_flag', ['result_id', 'flag'], unique=False)

    with op.batch_alter_table('devices', schema=None) as batch_op:
        batch_op.create_index(batch_op.f('ix_devices_lot'), ['lot'], unique=False)
        batch_op.create_index(batch_op.f('ix_devices_serial'), ['serial'], unique=False)
        batch_op.create_index(batch_op.f('ix_devices_wafer'), ['wafer'], unique=False)

    with op.batch_alter_table('points', schema=None) as batch_op:
        batch_op.add_column(sa.Column('source1_correction_db', sa.Double(), nullable=True))
        batch_op.add_column(sa.Column('source2_correction_db', sa.Double(), nullable=True))
        batch_op.add_column(sa.Column('step_atten_db', sa.Double(), nullable=True))
        batch_op.add_column(sa.Column('raw_lower_step_dbm', sa.Double(), nullable=True))
        batch_op.add_column(sa.Column('raw_upper_step_dbm', sa.Double(), nullable=True))
        batch_op.add_column(sa.Column('raw_diff_dbm', sa.Double(), nullable=True))
        batch_op.add_column(sa.Column('raw_sum_dbm', sa.Double(), nullable=True))
        batch_op.add_column(sa.Column('out_loss_diff_db', sa.Double(), nullable=True))
        batch_op.add_column(sa.Column('out_loss_sum_db', sa.Double(), nullable=True))
        batch_op.add_column(sa.Column('im2_diff_dbm', sa.Double(), nullable=True))
        batch_op.add_column(sa.Column('im2_sum_dbm', sa.Double(), nullable=True))

    with op.batch_alter_table('results', schema=None) as batch_op:
        batch_op.add_column(sa.Column('iip3_bound_db', sa.Double(), nullable=True))
        batch_op.add_column(sa.Column('iip2_dbm', sa.Double(), nullable=True))
        batch_op.add_column(sa.Column('oip2_dbm', sa.Double(), nullable=True))
        batch_op.add_column(sa.Column('slope_im2', sa.Double(), nullable=True))
        batch_op.add_column(sa.Column('calibration_set_id', sa.Integer(), nullable=True))
        batch_op.add_column(sa.Column('verdict', sa.String(length=16), nullable=True))
        batch_op.add_column(sa.Column('verdict_detail', sa.Text(), nullable=True))
        batch_op.create_check_constraint(op.f('ck_results_verdict'), "verdict IS NULL OR verdict IN ('pass', 'fail', 'no-limit')")
        batch_op.create_index('ix_results_center_spacing', ['center_hz', 'spacing_hz'], unique=False)
        batch_op.create_foreign_key(batch_op.f('fk_results_calibration_set_id_calibration_sets'), 'calibration_sets', ['calibration_set_id'], ['id'])

    with op.batch_alter_table('runs', schema=None) as batch_op:
        batch_op.add_column(sa.Column('calibration_set_id', sa.Integer(), nullable=True))
        batch_op.add_column(sa.Column('owner', sa.String(length=255), nullable=True))
        batch_op.add_column(sa.Column('heartbeat_at', sa.DateTime(timezone=True), nullable=True))
        batch_op.create_index(batch_op.f('ix_runs_device_id'), ['device_id'], unique=False)
        batch_op.create_index(batch_op.f('ix_runs_started_at'), ['started_at'], unique=False)
        batch_op.create_foreign_key(batch_op.f('fk_runs_calibration_set_id_calibration_sets'), 'calibration_sets', ['calibration_set_id'], ['id'])



def downgrade() -> None:
    with op.batch_alter_table('runs', schema=None) as batch_op:
        batch_op.drop_constraint(batch_op.f('fk_runs_calibration_set_id_calibration_sets'), type_='foreignkey')
        batch_op.drop_index(batch_op.f('ix_runs_started_at'))
        batch_op.drop_index(batch_op.f('ix_runs_device_id'))
        batch_op.drop_column('heartbeat_at')
        batch_op.drop_column('owner')
        batch_op.drop_column('calibration_set_id')

    with op.batch_alter_table('results', schema=None) as batch_op:
        batch_op.drop_constraint(batch_op.f('fk_results_calibration_set_id_calibration_sets'), type_='foreignkey')
        batch_op.drop_index('ix_results_center_spacing')
        batch_op.drop_constraint(op.f('ck_results_verdict'), type_='check')
        batch_op.drop_column('verdict_detail')
        batch_op.drop_column('verdict')
        batch_op.drop_column('calibration_set_id')
        batch_op.drop_column('slope_im2')
        batch_op.drop_column('oip2_dbm')
        batch_op.drop_column('iip2_dbm')
        batch_op.drop_column('iip3_bound_db')

    with op.batch_alter_table('points', schema=None) as batch_op:
        batch_op.drop_column('im2_sum_dbm')
        batch_op.drop_column('im2_diff_dbm')
        batch_op.drop_column('out_loss_sum_db')
        batch_op.drop_column('out_loss_diff_db')
        batch_op.drop_column('raw_sum_dbm')
        batch_op.drop_column('raw_diff_dbm')
        batch_op.drop_column('raw_upper_step_dbm')
        batch_op.drop_column('raw_lower_step_dbm')
        batch_op.drop_column('step_atten_db')
        batch_op.drop_column('source2_correction_db')
        batch_op.drop_column('source1_correction_db')

    with op.batch_alter_table('devices', schema=None) as batch_op:
        batch_op.drop_index(batch_op.f('ix_devices_wafer'))
        batch_op.drop_index(batch_op.f('ix_devices_lot'))
        batch_op.drop_index(batch_op.f('ix_devices_serial'))

    with op.batch_alter_table('result_flags', schema=None) as batch_op:
        batch_op.drop_index('ix_result_flags_result_flag')

    op.drop_table('result_flags')
    with op.batch_alter_table('point_flags', schema=None) as batch_op:
        batch_op.drop_index(batch_op.f('ix_point_flags_point_id'))

    op.drop_table('point_flags')
    with op.batch_alter_table('jobs', schema=None) as batch_op:
        batch_op.drop_index('ix_jobs_bench_status_priority')

    op.drop_table('jobs')
    op.drop_table('system_residuals')
    op.drop_table('calibration_offsets')
    op.drop_table('calibration_sets')
    with op.batch_alter_table('spec_limits', schema=None) as batch_op:
        batch_op.drop_index(batch_op.f('ix_spec_limits_part_number'))

    op.drop_table('spec_limits')
