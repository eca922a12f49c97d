"""Chamber temperature: the set point and the chamber's reading with every point, the set point
with every result, and the temperature series of sweet-spot studies.

Revision ID: 0004
Revises: 0003
Create Date: 2026-12-03
"""

from alembic import op
import sqlalchemy as sa


revision = '0004'
down_revision = '0003'
branch_labels = None
depends_on = None


def upgrade() -> None:
    with op.batch_alter_table('points', schema=None) as batch_op:
        batch_op.add_column(sa.Column('temperature_c', sa.Double(), nullable=True))
        batch_op.add_column(sa.Column('chamber_read_c', sa.Double(), nullable=True))
    with op.batch_alter_table('results', schema=None) as batch_op:
        batch_op.add_column(sa.Column('temperature_c', sa.Double(), nullable=True))
    with op.batch_alter_table('bias_studies', schema=None) as batch_op:
        batch_op.add_column(sa.Column('series_guid', sa.String(length=36), nullable=True))
        batch_op.add_column(sa.Column('temperature_c', sa.Double(), nullable=True))
        batch_op.create_index(batch_op.f('ix_bias_studies_series_guid'), ['series_guid'], unique=False)


def downgrade() -> None:
    with op.batch_alter_table('bias_studies', schema=None) as batch_op:
        batch_op.drop_index(batch_op.f('ix_bias_studies_series_guid'))
        batch_op.drop_column('temperature_c')
        batch_op.drop_column('series_guid')
    with op.batch_alter_table('results', schema=None) as batch_op:
        batch_op.drop_column('temperature_c')
    with op.batch_alter_table('points', schema=None) as batch_op:
        batch_op.drop_column('chamber_read_c')
        batch_op.drop_column('temperature_c')
