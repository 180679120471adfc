"""figure counts and per-site counts

Counting figures keep their successes and trials so that days and filters pool them
exactly; per-site counts of a run feed the fill and survival maps.

Revision ID: 0002
Revises: 0001
Create Date: 2026-12-01
"""
from typing import Sequence, Union

from alembic import op
import sqlalchemy as sa

revision: str = '0002'
down_revision: Union[str, None] = '0001'
branch_labels: Union[str, Sequence[str], None] = None
depends_on: Union[str, Sequence[str], None] = None


def upgrade() -> None:
    op.create_table('site_counts',
    sa.Column('run_id', sa.Integer(), nullable=False),
    sa.Column('name', sa.String(length=100), nullable=False),
    sa.Column('sites', sa.Integer(), nullable=False),
    sa.Column('successes', sa.LargeBinary(), nullable=False),
    sa.Column('trials', sa.LargeBinary(), nullable=False),
    sa.ForeignKeyConstraint(['run_id'], ['runs.id'], name=op.f('fk_site_counts_run_id_runs'), ondelete='CASCADE'),
    sa.PrimaryKeyConstraint('run_id', 'name', name=op.f('pk_site_counts'))
    )
    with op.batch_alter_table('figures', schema=None) as batch_op:
        batch_op.add_column(sa.Column('successes', sa.BigInteger(), nullable=True))
        batch_op.add_column(sa.Column('trials', sa.BigInteger(), nullable=True))


def downgrade() -> None:
    with op.batch_alter_table('figures', schema=None) as batch_op:
        batch_op.drop_column('trials')
        batch_op.drop_column('successes')
    op.drop_table('site_counts')
