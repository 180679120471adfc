"""monthly partitions of the shot-level tables on PostgreSQL

On PostgreSQL, shots, shot_parameters, shot_measurements and occupancy become tables
partitioned by range of the shot's time, one partition per UTC calendar month; every row
moves, measurement columns included (runlog.store.partitions). SQLite is unchanged.

Revision ID: 0004
Revises: 0003
Create Date: 2026-12-02
"""
from typing import Sequence, Union

from alembic import op

from runlog.store.partitions import partition_shot_tables, unpartition_shot_tables

revision: str = '0004'
down_revision: Union[str, None] = '0003'
branch_labels: Union[str, Sequence[str], None] = None
depends_on: Union[str, Sequence[str], None] = None


def upgrade() -> None:
    partition_shot_tables(op.get_bind())


def downgrade() -> None:
    unpartition_shot_tables(op.get_bind())
