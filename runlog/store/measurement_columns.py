"""The measurement columns of ``shot_measurements``, made ahead of the names that use them.

A measurement's values are the column ``m_<id>`` of ``shot_measurements``
(:func:`runlog.store.schema.measurement_column`); every reader finds a measurement's column
from its id alone. What this module owns is when those columns are made.

On PostgreSQL ``shot_measurements`` was partitioned by month until revision 0017
(:mod:`runlog.store.partitions`), and a partitioned table's columns are every partition's
columns: one ``ADD COLUMN`` locked and changed each month, so a new name cost time in
proportion to the months stored (one name 0.1 s with 130 months, against 0.4 ms on a plain
table; benchmarks/RESULTS.md). Revision 0015 made columns in blocks of :data:`BLOCK` (``m_1`` .. ``m_64``, ``m_65`` .. ``m_128``, ...):
the first name of a block makes the whole block in one statement, and every other name of
it is a row of ``measurements`` and nothing more. Revision 0017 made the table one plain
table keyed by shot id, so the block's one statement changes one table however many months
are stored. The blocks stay: a block costs one lock of the table where each name would
take its own. A column made ahead is NULL in every row; PostgreSQL stores no bytes for a
NULL beyond one bit of the row's null bitmap, which a row with any missing value carries
anyway (a block costs at most 8 bytes a row, 64 bits).

On SQLite a new column is a change of the schema text alone, whatever the rows, and every
column of a row written later costs a byte of its record header even when NULL: there a
name makes its own column only, as before (:data:`BLOCK` is 1).

A column may exist before its name (the rest of a block, or a name whose transaction rolled
back after the sequence gave out its id); such a column holds no value and no reader asks
for it. Revision 0015 made that part of the layout; it makes the rest of a PostgreSQL
catalogue's current block, so its next new names need no change of the table either.
"""

from __future__ import annotations

import re
from collections.abc import Iterable

from sqlalchemy import text
from sqlalchemy.engine import Connection

from runlog.store.schema import MEASUREMENT_COLUMN_PREFIX, measurement_column

__all__ = ["BLOCK", "block_size", "present_columns", "columns_to_make", "make_columns", "make_first_block"]

#: Measurement columns made together on PostgreSQL.
BLOCK = 64

_COLUMN = re.compile(rf"{MEASUREMENT_COLUMN_PREFIX}(\d+)")


def block_size(dialect: str) -> int:
    """How many measurement columns a new name's block makes on ``dialect``."""
    return BLOCK if dialect == "postgresql" else 1


def present_columns(connection: Connection) -> set[int]:
    """The measurement ids that have their column in ``shot_measurements``."""
    if connection.dialect.name == "sqlite":
        names = [row[1] for row in connection.exec_driver_sql("PRAGMA table_info(shot_measurements)")]
    else:
        names = connection.execute(
            text("SELECT attname FROM pg_attribute WHERE attrelid = to_regclass('shot_measurements') AND attnum > 0 AND NOT attisdropped")
        ).scalars().all()
    return {int(found.group(1)) for name in names if (found := _COLUMN.fullmatch(name))}


def columns_to_make(ids: Iterable[int], present: set[int], block: int, limit: int) -> list[int]:
    """The measurement ids whose columns are to be made so that every one of ``ids`` has
    its column: the missing columns of each id's block, in order.

    A block never reaches past ``limit`` (the most names a catalogue holds,
    :data:`runlog.contract.MAX_MEASUREMENTS`; a PostgreSQL table has at most 1600 columns);
    an id past it (the sequence gave ids to names whose transaction rolled back) makes its
    own column only.
    """
    wanted: set[int] = set()
    for mid in ids:
        mid = int(mid)
        if mid in present:
            continue
        if mid > limit:
            wanted.add(mid)
            continue
        first = (mid - 1) // block * block + 1
        wanted.update(k for k in range(first, min(first + block - 1, limit) + 1) if k not in present)
    return sorted(wanted)


def make_columns(connection: Connection, ids: Iterable[int], limit: int) -> list[int]:
    """Make the columns ``ids`` need, block by block (:func:`columns_to_make`), in the
    caller's transaction; returns the ids whose columns were made.

    The caller holds the writer lock (:func:`runlog.store.bulk.short_write`), so no other
    writer makes a column meanwhile. On PostgreSQL one ``ALTER TABLE`` makes them all;
    SQLite takes one column a statement.
    """
    dialect = connection.dialect.name
    ids = list(ids)
    if not ids:
        return []
    made = columns_to_make(ids, present_columns(connection), block_size(dialect), limit)
    if not made:
        return []
    if dialect == "postgresql":
        connection.exec_driver_sql("ALTER TABLE shot_measurements " + ", ".join(f"ADD COLUMN {measurement_column(k)} DOUBLE PRECISION" for k in made))
    else:
        for k in made:
            connection.exec_driver_sql(f"ALTER TABLE shot_measurements ADD COLUMN {measurement_column(k)} REAL")
    return made


def make_first_block(connection: Connection) -> list[int]:
    """Make the first block of measurement columns (a new PostgreSQL catalogue, before any
    shot, where it costs nothing); as revision 0015 does for an upgraded one."""
    if block_size(connection.dialect.name) == 1:
        return []
    return make_columns(connection, [1], BLOCK)
