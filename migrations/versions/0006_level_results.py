"""Results at one drive level and the intercept convention: the level_results table (IM3 dBc and
single-point intercepts per point), results.intercept_convention (mean or worse; NULL for results
stored before it, which are means), spec_limits.tone_dbm (the stated tone level of an IMD limit)
and the IMD limit parameters im3_dbc and im3_dbc_pep.

Revision ID: 0006
Revises: 0005
Create Date: 2026-12-04
"""

from alembic import op
import sqlalchemy as sa


revision = '0006'
down_revision = '0005'
branch_labels = None
depends_on = None

OLD_PARAMETERS = ('iip3_dbm', 'oip3_dbm', 'gain_db', 'p1db_in_dbm', 'iip2_dbm', 'sweet_spot_v', 'window_width_v',
                  'sweet_spot_iip3_dbm')
NEW_PARAMETERS = OLD_PARAMETERS + ('im3_dbc', 'im3_dbc_pep')
CONVENTIONS = ('mean', 'worse')
LEVEL_VALUES = ('im3_lower_dbc', 'im3_upper_dbc', 'im3_lower_dbc_pep', 'im3_upper_dbc_pep', 'iip3_lower_dbm',
                'iip3_upper_dbm', 'iip3_dbm', 'oip3_lower_dbm', 'oip3_upper_dbm', 'oip3_dbm', 'iip3_bound_db',
                'im3_bound_db')


def _in(column: str, allowed: tuple[str, ...]) -> str:
    return f"{column} IN ({', '.join(repr(a) for a in allowed)})"


def upgrade() -> None:
    op.create_table(
        'level_results',
        sa.Column('id', sa.Integer(), nullable=False),
        sa.Column('result_id', sa.Integer(), nullable=False),
        sa.Column('point_id', sa.Integer(), nullable=False),
        sa.Column('tone_dbm', sa.Double(), nullable=False),
        *(sa.Column(name, sa.Double(), nullable=True) for name in LEVEL_VALUES),
        sa.ForeignKeyConstraint(['result_id'], ['results.id'], name=op.f('fk_level_results_result_id_results'),
                                ondelete='CASCADE'),
        sa.ForeignKeyConstraint(['point_id'], ['points.id'], name=op.f('fk_level_results_point_id_points'),
                                ondelete='CASCADE'),
        sa.PrimaryKeyConstraint('id', name=op.f('pk_level_results')),
    )
    op.create_index(op.f('ix_level_results_result_id'), 'level_results', ['result_id'], unique=False)
    with op.batch_alter_table('results', schema=None) as batch_op:
        batch_op.add_column(sa.Column('intercept_convention', sa.String(length=8), nullable=True))
        batch_op.create_check_constraint(batch_op.f('ck_results_intercept_convention'),
                                         f"intercept_convention IS NULL OR {_in('intercept_convention', CONVENTIONS)}")
    with op.batch_alter_table('spec_limits', schema=None) as batch_op:
        batch_op.add_column(sa.Column('tone_dbm', sa.Double(), nullable=True))
        batch_op.drop_constraint(batch_op.f('ck_spec_limits_parameter'), type_='check')
        batch_op.create_check_constraint(batch_op.f('ck_spec_limits_parameter'), _in('parameter', NEW_PARAMETERS))


def downgrade() -> None:
    # IMD limits cannot be kept under the old constraint, nor judged without their tone level.
    op.execute(f"DELETE FROM spec_limits WHERE NOT ({_in('parameter', OLD_PARAMETERS)})")
    with op.batch_alter_table('spec_limits', schema=None) as batch_op:
        batch_op.drop_constraint(batch_op.f('ck_spec_limits_parameter'), type_='check')
        batch_op.create_check_constraint(batch_op.f('ck_spec_limits_parameter'), _in('parameter', OLD_PARAMETERS))
        batch_op.drop_column('tone_dbm')
    with op.batch_alter_table('results', schema=None) as batch_op:
        batch_op.drop_constraint(batch_op.f('ck_results_intercept_convention'), type_='check')
        batch_op.drop_column('intercept_convention')
    op.drop_index(op.f('ix_level_results_result_id'), table_name='level_results')
    op.drop_table('level_results')
