"""shot_measurements one plain table keyed by shot id on PostgreSQL

On PostgreSQL ``shot_measurements`` stops being partitioned by month: its rows (every
measurement column, the blocks of columns made ahead included) move into one plain table
keyed by shot id, in this revision's transaction (one INSERT .. SELECT, the key built
afterwards); the partitions' ``time`` column goes, the shot's time stays in ``shots``. A
new block of measurement columns is then one change of one table, however many months
the catalogue holds (runlog.store.partitions.measurements_out_of_partitions). SQLite is
unchanged.

The downgrade partitions it again like ``shots`` (one partition for each of shots'),
each row with its shot's time.

Revision ID: 0017
Revises: 0014
Create Date: 2026-12-02
"""
from typing import Sequence, Union

from alembic import op

from runlog.store.partitions import measurements_into_partitions, measurements_out_of_partitions

revision: str = '0017'
down_revision: Union[str, None] = '0014'
branch_labels: Union[str, Sequence[str], None] = None
depends_on: Union[str, Sequence[str], None] = None


def upgrade() -> None:
    measurements_out_of_partitions(op.get_bind())


def downgrade() -> None:
    measurements_into_partitions(op.get_bind())
