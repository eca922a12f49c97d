"""The gate and drain supplies' read-back with every point of a bias bench.

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


def downgrade() -> None:
    with op.batch_alter_table('points', schema=None) as batch_op:
        for name in reversed(BIAS_COLUMNS):
            batch_op.drop_column(name)
