"""stored series keys

Each run's reference series (its sequence plus the fingerprint of its constant settings)
was rebuilt from ``run_parameters`` by every drift query. It is kept in the store now
(:mod:`runlog.store.series_keys`): ``run_settings`` (a run's parameters as its series sees
them), ``sequence_series`` (per apparatus and sequence, the parameters left out as varying
and the declaration they were computed with) and ``runs.series_fingerprint``, with ``series_rollups``
(per day and series, the counts a drift point needs). The upgrade fills them for the runs
already stored.

Revision ID: 0014
Revises: 0009
Create Date: 2026-12-02
"""
from typing import Sequence, Union

from alembic import op
import sqlalchemy as sa
import runlog.store.schema


revision: str = '0014'
down_revision: Union[str, None] = '0009'
branch_labels: Union[str, Sequence[str], None] = None
depends_on: Union[str, Sequence[str], None] = None


def upgrade() -> None:
    op.create_table('sequence_series',
    sa.Column('apparatus_id', sa.Integer(), nullable=False),
    sa.Column('sequence', sa.String(length=200), nullable=False),
    sa.Column('basis', sa.String(length=64), nullable=False),
    sa.Column('varying', sa.Text(), nullable=False),
    sa.ForeignKeyConstraint(['apparatus_id'], ['apparatus.id'], name=op.f('fk_sequence_series_apparatus_id_apparatus')),
    sa.PrimaryKeyConstraint('apparatus_id', 'sequence', name=op.f('pk_sequence_series'))
    )
    op.create_table('run_settings',
    sa.Column('run_id', sa.Integer(), nullable=False),
    sa.Column('parameter_id', sa.Integer(), nullable=False),
    sa.Column('scanned', sa.Boolean(), nullable=False),
    sa.Column('with_unit', sa.Boolean(), nullable=False),
    sa.Column('value', sa.Text(), nullable=True),
    sa.ForeignKeyConstraint(['parameter_id'], ['parameters.id'], name=op.f('fk_run_settings_parameter_id_parameters')),
    sa.ForeignKeyConstraint(['run_id'], ['runs.id'], name=op.f('fk_run_settings_run_id_runs'), ondelete='CASCADE'),
    sa.PrimaryKeyConstraint('run_id', 'parameter_id', name=op.f('pk_run_settings'))
    )
    op.create_table('series_rollups',
    sa.Column('apparatus_id', sa.Integer(), nullable=False),
    sa.Column('day', sa.Date(), nullable=False),
    sa.Column('sequence', sa.String(length=200), nullable=False),
    sa.Column('fingerprint', sa.String(length=16), nullable=False),
    sa.Column('name', sa.String(length=100), nullable=False),
    sa.Column('unit', sa.String(length=60), nullable=False),
    sa.Column('units', sa.Integer(), nullable=False),
    sa.Column('runs', sa.Integer(), nullable=False),
    sa.Column('shots', sa.BigInteger(), nullable=False),
    sa.Column('successes', sa.BigInteger(), nullable=True),
    sa.Column('trials', sa.BigInteger(), nullable=True),
    sa.Column('counted_shots', sa.BigInteger(), nullable=True),
    sa.Column('successes_squares', sa.Float(), nullable=True),
    sa.Column('trials_squares', sa.Float(), nullable=True),
    sa.Column('successes_trials', sa.Float(), nullable=True),
    sa.ForeignKeyConstraint(['apparatus_id'], ['apparatus.id'], name=op.f('fk_series_rollups_apparatus_id_apparatus')),
    sa.PrimaryKeyConstraint('apparatus_id', 'day', 'sequence', 'fingerprint', 'name', name=op.f('pk_series_rollups'))
    )
    with op.batch_alter_table('runs', schema=None) as batch_op:
        batch_op.add_column(sa.Column('series_fingerprint', sa.String(length=16), nullable=True))
        batch_op.create_index(batch_op.f('ix_runs_apparatus_id_sequence_series_fingerprint'), ['apparatus_id', 'sequence', 'series_fingerprint'], unique=False)

    # The keys of the runs already stored, as ingest writes them from now on.
    from runlog.store.series_keys import over, rebuild

    rebuild(over(op.get_bind()))


def downgrade() -> None:
    with op.batch_alter_table('runs', schema=None) as batch_op:
        batch_op.drop_index(batch_op.f('ix_runs_apparatus_id_sequence_series_fingerprint'))
        batch_op.drop_column('series_fingerprint')

    op.drop_table('series_rollups')
    op.drop_table('run_settings')
    op.drop_table('sequence_series')
