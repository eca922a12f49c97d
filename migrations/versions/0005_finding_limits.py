"""Spec limits on sweet-spot findings: the findings' verdicts, the studies' centre frequency, the
new limit parameters (sweet spot, window width, IIP3 at the sweet spot) and a chamber
temperature range on limits; indexes for the result filters of `find` (spacing, bias, verdict).

Revision ID: 0005
Revises: 0004
Create Date: 2026-12-03
"""

from alembic import op
import sqlalchemy as sa


revision = '0005'
down_revision = '0004'
branch_labels = None
depends_on = None

OLD_PARAMETERS = ('iip3_dbm', 'oip3_dbm', 'gain_db', 'p1db_in_dbm', 'iip2_dbm')
NEW_PARAMETERS = OLD_PARAMETERS + ('sweet_spot_v', 'window_width_v', 'sweet_spot_iip3_dbm')
VERDICTS = ('pass', 'fail', 'no-limit')


def _in(column: str, allowed: tuple[str, ...]) -> str:
    return f"{column} IN ({', '.join(repr(a) for a in allowed)})"


RESULT_INDEXES = (('ix_results_spacing', 'spacing_hz'), ('ix_results_bias', 'bias_v'), ('ix_results_verdict', 'verdict'))


def upgrade() -> None:
    for name, column in RESULT_INDEXES:
        op.create_index(name, 'results', [column], unique=False)
    with op.batch_alter_table('spec_limits', schema=None) as batch_op:
        batch_op.add_column(sa.Column('temp_min_c', sa.Double(), nullable=True))
        batch_op.add_column(sa.Column('temp_max_c', sa.Double(), nullable=True))
        batch_op.drop_constraint(batch_op.f('ck_spec_limits_parameter'), type_='check')
        batch_op.create_check_constraint(batch_op.f('ck_spec_limits_parameter'), _in('parameter', NEW_PARAMETERS))
    with op.batch_alter_table('bias_studies', schema=None) as batch_op:
        batch_op.add_column(sa.Column('center_hz', sa.Double(), nullable=True))
    with op.batch_alter_table('bias_findings', schema=None) as batch_op:
        batch_op.add_column(sa.Column('verdict', sa.String(length=16), nullable=True))
        batch_op.add_column(sa.Column('verdict_detail', sa.Text(), nullable=True))
        batch_op.create_check_constraint(batch_op.f('ck_bias_findings_verdict'),
                                         f"verdict IS NULL OR {_in('verdict', VERDICTS)}")


def downgrade() -> None:
    for name, _column in RESULT_INDEXES:
        op.drop_index(name, table_name='results')
    with op.batch_alter_table('bias_findings', schema=None) as batch_op:
        batch_op.drop_constraint(batch_op.f('ck_bias_findings_verdict'), type_='check')
        batch_op.drop_column('verdict_detail')
        batch_op.drop_column('verdict')
    with op.batch_alter_table('bias_studies', schema=None) as batch_op:
        batch_op.drop_column('center_hz')
    # Limits on the new parameters cannot be kept under the old constraint.
    op.execute(f"DELETE FROM spec_limits WHERE NOT ({_in('parameter', OLD_PARAMETERS)})")
    with op.batch_alter_table('spec_limits', schema=None) as batch_op:
        batch_op.drop_constraint(batch_op.f('ck_spec_limits_parameter'), type_='check')
        batch_op.create_check_constraint(batch_op.f('ck_spec_limits_parameter'), _in('parameter', OLD_PARAMETERS))
        batch_op.drop_column('temp_max_c')
        batch_op.drop_column('temp_min_c')
