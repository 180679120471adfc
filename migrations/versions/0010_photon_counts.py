"""photon counts per site

Files may carry per-site photon counts of an image (counts.<image>); the catalogue keeps
them, with the threshold ingest used when it derived the image's occupancy from them, so
that the detection figures can be computed from the count histogram of a run.

Revision ID: 0010
Revises: 0008
Create Date: 2026-12-02
"""
from typing import Sequence, Union

from alembic import op
import sqlalchemy as sa

revision: str = '0010'
down_revision: Union[str, None] = '0008'
branch_labels: Union[str, Sequence[str], None] = None
depends_on: Union[str, Sequence[str], None] = None


def upgrade() -> None:
    op.create_table('photon_counts',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('run_id', sa.Integer(), nullable=False),
    sa.Column('image_id', sa.Integer(), nullable=False),
    sa.Column('sites', sa.Integer(), nullable=False),
    sa.Column('threshold', sa.Float(), nullable=True),
    sa.Column('shots', sa.LargeBinary(), nullable=False),
    sa.Column('counts', sa.LargeBinary(), nullable=False),
    sa.ForeignKeyConstraint(['image_id'], ['images.id'], name=op.f('fk_photon_counts_image_id_images'), ondelete='CASCADE'),
    sa.ForeignKeyConstraint(['run_id'], ['runs.id'], name=op.f('fk_photon_counts_run_id_runs'), ondelete='CASCADE'),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_photon_counts'))
    )
    with op.batch_alter_table('photon_counts', schema=None) as batch_op:
        batch_op.create_index(batch_op.f('ix_photon_counts_run_id'), ['run_id'], unique=False)


def downgrade() -> None:
    with op.batch_alter_table('photon_counts', schema=None) as batch_op:
        batch_op.drop_index(batch_op.f('ix_photon_counts_run_id'))
    op.drop_table('photon_counts')
