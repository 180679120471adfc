"""monitor time series

The lab's slow-control values (room temperature, laser powers, ...) as monitors: their raw
values (on PostgreSQL partitioned by month of their time, runlog.store.partitions), their
minute / hour / lab-day rollups kept at ingest, and which file brought which values.

Revision ID: 0013
Revises: 0012
Create Date: 2026-12-02
"""
from typing import Sequence, Union

from alembic import op
import sqlalchemy as sa
import runlog.store.schema
from runlog.store.partitions import partition_monitor_values


revision: str = '0013'
down_revision: Union[str, None] = '0012'
branch_labels: Union[str, Sequence[str], None] = None
depends_on: Union[str, Sequence[str], None] = None


def upgrade() -> None:
    op.create_table('monitor_values',
    sa.Column('monitor_id', sa.Integer(), autoincrement=False, nullable=False),
    sa.Column('time', runlog.store.schema.UTCDateTime(timezone=True), nullable=False),
    sa.Column('value', sa.Float(), nullable=False),
    sa.PrimaryKeyConstraint('monitor_id', 'time', name=op.f('pk_monitor_values')),
    sqlite_with_rowid=False
    )
    partition_monitor_values(op.get_bind())
    op.create_table('monitors',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('apparatus_id', sa.Integer(), nullable=False),
    sa.Column('name', sa.String(length=200), nullable=False),
    sa.Column('unit', sa.String(length=60), nullable=False),
    sa.Column('value_count', sa.BigInteger(), nullable=False),
    sa.Column('first_time', runlog.store.schema.UTCDateTime(timezone=True), nullable=True),
    sa.Column('last_time', runlog.store.schema.UTCDateTime(timezone=True), nullable=True),
    sa.ForeignKeyConstraint(['apparatus_id'], ['apparatus.id'], name=op.f('fk_monitors_apparatus_id_apparatus')),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_monitors')),
    sa.UniqueConstraint('apparatus_id', 'name', name=op.f('uq_monitors_apparatus_id_name'))
    )
    op.create_table('monitor_files',
    sa.Column('ingest_id', sa.Integer(), nullable=False),
    sa.Column('monitor_id', sa.Integer(), nullable=False),
    sa.Column('value_count', sa.BigInteger(), nullable=False),
    sa.ForeignKeyConstraint(['ingest_id'], ['ingest_log.id'], name=op.f('fk_monitor_files_ingest_id_ingest_log')),
    sa.ForeignKeyConstraint(['monitor_id'], ['monitors.id'], name=op.f('fk_monitor_files_monitor_id_monitors'), ondelete='CASCADE'),
    sa.PrimaryKeyConstraint('ingest_id', 'monitor_id', name=op.f('pk_monitor_files'))
    )
    with op.batch_alter_table('monitor_files', schema=None) as batch_op:
        batch_op.create_index(batch_op.f('ix_monitor_files_monitor_id'), ['monitor_id'], unique=False)

    op.create_table('monitor_rollups',
    sa.Column('monitor_id', sa.Integer(), nullable=False),
    sa.Column('resolution', sa.String(length=10), nullable=False),
    sa.Column('start', runlog.store.schema.UTCDateTime(timezone=True), nullable=False),
    sa.Column('value_count', sa.BigInteger(), nullable=False),
    sa.Column('value_sum', sa.Float(), nullable=False),
    sa.Column('value_square_sum', sa.Float(), nullable=False),
    sa.Column('minimum', sa.Float(), nullable=False),
    sa.Column('maximum', sa.Float(), nullable=False),
    sa.ForeignKeyConstraint(['monitor_id'], ['monitors.id'], name=op.f('fk_monitor_rollups_monitor_id_monitors'), ondelete='CASCADE'),
    sa.PrimaryKeyConstraint('monitor_id', 'resolution', 'start', name=op.f('pk_monitor_rollups')),
    sqlite_with_rowid=False
    )


def downgrade() -> None:
    op.drop_table('monitor_rollups')
    with op.batch_alter_table('monitor_files', schema=None) as batch_op:
        batch_op.drop_index(batch_op.f('ix_monitor_files_monitor_id'))

    op.drop_table('monitor_files')
    op.drop_table('monitors')
    op.drop_table('monitor_values')
