"""LO power as a plan axis: the stepped LO level ([mixer] lo_levels_dbm) with every point and
every result. NULL for everything stored before, and for plans that do not step the LO: the
results' group_key (the UNIQUE with run_id) only names lo_dbm when it is set, so existing keys
do not change and nothing needs rewriting.

Revision ID: 0007
Revises: 0006
Create Date: 2026-12-04
"""

from alembic import op
import sqlalchemy as sa


revision = '0007'
down_revision = '0006'
branch_labels = None
depends_on = None


def upgrade() -> None:
    with op.batch_alter_table('points', schema=None) as batch_op:
        batch_op.add_column(sa.Column('lo_dbm', sa.Double(), nullable=True))
    with op.batch_alter_table('results', schema=None) as batch_op:
        batch_op.add_column(sa.Column('lo_dbm', sa.Double(), nullable=True))


def downgrade() -> None:
    # Results of an LO-stepped run would collide on group_key without lo_dbm: refuse rather than
    # merge or drop them silently.
    connection = op.get_bind()
    stepped = connection.execute(sa.text("SELECT COUNT(*) FROM results WHERE lo_dbm IS NOT NULL")).scalar()
    if stepped:
        raise RuntimeError(f"downgrade to 0006: {stepped} results are per LO level (lo_dbm set), which 0006 "
                           "cannot hold; delete those runs first")
    with op.batch_alter_table('results', schema=None) as batch_op:
        batch_op.drop_column('lo_dbm')
    with op.batch_alter_table('points', schema=None) as batch_op:
        batch_op.drop_column('lo_dbm')
