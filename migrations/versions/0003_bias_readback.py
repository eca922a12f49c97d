"""The gate and drain supplies' read-back with every point of a bias bench; sweet-spot studies
with their DC transfer points and findings.

Revision ID: 0003
Revises: 0002
Create Date: 2026-12-03
"""

from alembic import op
import sqlalchemy as sa


revision = '0003'
down_revision = '0002'
branch_labels = None
depends_on = None

BIAS_COLUMNS = ('gate_read_v', 'gate_current_a', 'drain_read_v', 'drain_current_a')


def upgrade() -> None:
    with op.batch_alter_table('points', schema=None) as batch_op:
        for name in BIAS_COLUMNS:
            batch_op.add_column(sa.Column(name, sa.Double(), nullable=True))
    op.create_table('bias_studies',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('guid', sa.String(length=36), nullable=False),
    sa.Column('device_id', sa.Integer(), nullable=False),
    sa.Column('created_at', sa.DateTime(timezone=True), nullable=False),
    sa.Column('bench_name', sa.String(length=200), nullable=False),
    sa.Column('temp_k', sa.Double(), nullable=True),
    sa.Column('drain_v', sa.Double(), nullable=False),
    sa.Column('window_points', sa.Integer(), nullable=False),
    sa.Column('polyorder', sa.Integer(), nullable=False),
    sa.Column('step_v', sa.Double(), nullable=False),
    sa.Column('current_sigma_a', sa.Double(), nullable=False),
    sa.Column('run_guids', sa.Text(), nullable=False),
    sa.ForeignKeyConstraint(['device_id'], ['devices.id'], name=op.f('fk_bias_studies_device_id_devices')),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_bias_studies')),
    sa.UniqueConstraint('guid', name=op.f('uq_bias_studies_guid'))
    )
    with op.batch_alter_table('bias_studies', schema=None) as batch_op:
        batch_op.create_index(batch_op.f('ix_bias_studies_device_id'), ['device_id'], unique=False)
    op.create_table('dc_points',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('study_id', sa.Integer(), nullable=False),
    sa.Column('seq', sa.Integer(), nullable=False),
    sa.Column('gate_v', sa.Double(), nullable=False),
    sa.Column('gate_read_v', sa.Double(), nullable=False),
    sa.Column('drain_read_v', sa.Double(), nullable=False),
    sa.Column('drain_current_a', sa.Double(), nullable=False),
    sa.ForeignKeyConstraint(['study_id'], ['bias_studies.id'], name=op.f('fk_dc_points_study_id_bias_studies'), ondelete='CASCADE'),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_dc_points')),
    sa.UniqueConstraint('study_id', 'seq', name=op.f('uq_dc_points_study_id_seq'))
    )
    op.create_table('bias_findings',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('study_id', sa.Integer(), nullable=False),
    sa.Column('kind', sa.String(length=16), nullable=False),
    sa.Column('drive_tone_dbm', sa.Double(), nullable=True),
    sa.Column('sweet_spot_v', sa.Double(), nullable=False),
    sa.Column('sweet_spot_bound_v', sa.Double(), nullable=False),
    sa.Column('peak_iip3_dbm', sa.Double(), nullable=False),
    sa.Column('window_threshold_dbm', sa.Double(), nullable=True),
    sa.Column('window_low_v', sa.Double(), nullable=True),
    sa.Column('window_high_v', sa.Double(), nullable=True),
    sa.Column('window_bound_v', sa.Double(), nullable=True),
    sa.Column('drain_current_a', sa.Double(), nullable=True),
    sa.Column('gain_db', sa.Double(), nullable=True),
    sa.Column('input_offset_db', sa.Double(), nullable=True),
    sa.Column('method', sa.Text(), nullable=False),
    sa.CheckConstraint("kind IN ('dc-prediction', 'two-tone')", name=op.f('ck_bias_findings_kind')),
    sa.ForeignKeyConstraint(['study_id'], ['bias_studies.id'], name=op.f('fk_bias_findings_study_id_bias_studies'), ondelete='CASCADE'),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_bias_findings'))
    )
    with op.batch_alter_table('bias_findings', schema=None) as batch_op:
        batch_op.create_index(batch_op.f('ix_bias_findings_study_id'), ['study_id'], unique=False)


def downgrade() -> None:
    op.drop_table('bias_findings')
    op.drop_table('dc_points')
    op.drop_table('bias_studies')
    with op.batch_alter_table('points', schema=None) as batch_op:
        for name in reversed(BIAS_COLUMNS):
            batch_op.drop_column(name)
