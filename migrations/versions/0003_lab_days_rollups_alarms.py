"""lab days, daily rollups, alarms, settings

Runs get the lab day they started on; daily rollups pool figures per apparatus, day,
sequence and figure so drift queries need not touch shots; alarms record drift findings.

Revision ID: 0003
Revises: 0002
Create Date: 2026-12-01
"""
from typing import Sequence, Union

from alembic import op
import sqlalchemy as sa
import runlog.store.schema

revision: str = '0003'
down_revision: Union[str, None] = '0002'
branch_labels: Union[str, Sequence[str], None] = None
depends_on: Union[str, Sequence[str], None] = None


def upgrade() -> None:
    op.create_table('settings',
    sa.Column('key', sa.String(length=100), nullable=False),
    sa.Column('value', sa.Text(), nullable=False),
    sa.PrimaryKeyConstraint('key', name=op.f('pk_settings'))
    )
    op.create_table('daily_rollups',
    sa.Column('apparatus_id', sa.Integer(), nullable=False),
    sa.Column('day', sa.Date(), nullable=False),
    sa.Column('sequence', sa.String(length=200), nullable=False),
    sa.Column('name', sa.String(length=100), nullable=False),
    sa.Column('unit', sa.String(length=60), nullable=False),
    sa.Column('runs', sa.Integer(), nullable=False),
    sa.Column('shots', sa.BigInteger(), nullable=False),
    sa.Column('successes', sa.BigInteger(), nullable=True),
    sa.Column('trials', sa.BigInteger(), nullable=True),
    sa.Column('value_count', sa.Integer(), nullable=False),
    sa.Column('value_sum', sa.Float(), nullable=False),
    sa.Column('value_square_sum', sa.Float(), nullable=False),
    sa.Column('weight_sum', sa.Float(), nullable=True),
    sa.Column('weighted_value_sum', sa.Float(), nullable=True),
    sa.Column('weighted_square_sum', sa.Float(), nullable=True),
    sa.ForeignKeyConstraint(['apparatus_id'], ['apparatus.id'], name=op.f('fk_daily_rollups_apparatus_id_apparatus')),
    sa.PrimaryKeyConstraint('apparatus_id', 'day', 'sequence', 'name', name=op.f('pk_daily_rollups'))
    )
    op.create_table('alarms',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('apparatus_id', sa.Integer(), nullable=False),
    sa.Column('quantity', sa.String(length=100), nullable=False),
    sa.Column('sequence', sa.String(length=200), nullable=False),
    sa.Column('day', sa.Date(), nullable=False),
    sa.Column('reason', sa.String(length=20), nullable=False),
    sa.Column('method', sa.String(length=100), nullable=False),
    sa.Column('value', sa.Float(), nullable=True),
    sa.Column('size', sa.Float(), nullable=True),
    sa.Column('detail', sa.Text(), nullable=False),
    sa.Column('status', sa.String(length=20), nullable=False),
    sa.Column('created_at', runlog.store.schema.UTCDateTime(timezone=True), nullable=False),
    sa.Column('acknowledged_at', runlog.store.schema.UTCDateTime(timezone=True), nullable=True),
    sa.Column('annotation_id', sa.Integer(), nullable=True),
    sa.ForeignKeyConstraint(['annotation_id'], ['annotations.id'], name=op.f('fk_alarms_annotation_id_annotations')),
    sa.ForeignKeyConstraint(['apparatus_id'], ['apparatus.id'], name=op.f('fk_alarms_apparatus_id_apparatus')),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_alarms')),
    sa.UniqueConstraint('apparatus_id', 'quantity', 'sequence', 'day', 'reason', name=op.f('uq_alarms_apparatus_id_quantity_sequence_day_reason'))
    )
    with op.batch_alter_table('alarms', schema=None) as batch_op:
        batch_op.create_index(batch_op.f('ix_alarms_status'), ['status'], unique=False)
    with op.batch_alter_table('runs', schema=None) as batch_op:
        batch_op.add_column(sa.Column('day', sa.Date(), nullable=True))
        batch_op.create_index(batch_op.f('ix_runs_apparatus_id_day'), ['apparatus_id', 'day'], unique=False)
    # Existing runs: their UTC start date (the default lab time zone is UTC); `runlog init`
    # then rebuilds the daily rollups.
    if op.get_bind().dialect.name == "sqlite":
        op.execute("UPDATE runs SET day = date(started / 1000000, 'unixepoch')")
    else:
        op.execute("UPDATE runs SET day = (started AT TIME ZONE 'UTC')::date")


def downgrade() -> None:
    with op.batch_alter_table('runs', schema=None) as batch_op:
        batch_op.drop_index(batch_op.f('ix_runs_apparatus_id_day'))
        batch_op.drop_column('day')
    with op.batch_alter_table('alarms', schema=None) as batch_op:
        batch_op.drop_index(batch_op.f('ix_alarms_status'))
    op.drop_table('alarms')
    op.drop_table('daily_rollups')
    op.drop_table('settings')
