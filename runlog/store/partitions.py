"""Monthly partitions of the shot-level tables on PostgreSQL.

Owns the PostgreSQL layout of ``shots``, ``shot_parameters`` and ``occupancy``: each is
PARTITIONED BY RANGE (time), one partition per UTC calendar month (``shots_y2026m03`` holds
March 2026), so that the indexes of a catalogue of many years and apparatus stay the size
of a month. Owned here: the conversion of the plain tables the models create into
partitioned ones (a fresh catalogue, and migration 0004), its reverse, the partition names
and bounds, and :func:`ensure_partitions`, which creates missing ones.

``shot_measurements`` was partitioned alike from revision 0004 to 0016; since 0017 it is
one plain table keyed by shot id (:func:`measurements_out_of_partitions`), because a
partitioned table's columns are every partition's and a new measurement column then
changed every month. Its rows carry no time.

Sparse years get one partition. A month's own partitions buy index locality for the shots
of a busy month, and cost three tables each: a file whose shots fall in
:data:`SPARSE_YEAR_MONTHS` or more months of a year that has no partition yet, none of them
with :data:`SPARSE_MONTH_SHOTS` shots or more, makes one partition for the whole year
(``shots_y2016``) instead. A lab's file (a run, a day) touches one month, two at a month's
end; such a file is an archive of sparse records or a clock that jumped, and a 120-shot file
with one shot a month over ten years makes 30 tables, not 360. Later shots of that year go
to the year's partition, whatever their number; a year that already has months keeps
getting months. Times outside the plausible window are refused before any partition is made.

On PostgreSQL the children carry the shot's ``time`` (the partition key), every primary
key ends with it, and ``shots``' unique (run, shot) becomes (run, shot, time); ingest refuses
a shot index already in the catalogue by query, so that one stays unique per run. The
children (and ``shot_measurements``) have no foreign keys there (to shots, parameters or images): their rows are
written by ingest alone, with ids it has just read or allocated under the writer lock,
and the per-row trigger checks cost more than the rows themselves (docs/architecture.md).
``shots.run_id`` keeps its key to ``runs``. The models in :mod:`runlog.store.schema` stay
the SQLite layout, which this module never touches.

A new month is made as a plain table and then attached (``CREATE TABLE .. (LIKE ..)`` then
``ALTER TABLE .. ATTACH PARTITION``): attaching takes SHARE UPDATE EXCLUSIVE on the parent,
which neither readers nor writers wait for, where ``CREATE TABLE .. PARTITION OF`` would
take ACCESS EXCLUSIVE and queue every dashboard query behind the longest one running
(PostgreSQL 15 manual, 5.11.2.2 "Partition Maintenance"). Copying ``shots``' key to the new
month takes SHARE ROW EXCLUSIVE on ``runs``, which readers do not wait for either, and
runlog's writers of ``runs`` hold the writer lock the month is made under. There is no
DEFAULT partition: attaching a month would have to scan and lock it.
"""

from __future__ import annotations

import datetime as dt
import re
from collections.abc import Iterable, Mapping

from sqlalchemy import Column, Float, Integer, MetaData, String, Table, text
from sqlalchemy.engine import Connection

from runlog.errors import StoreError
from runlog.store.schema import BigId, UTCDateTime

__all__ = [
    "SHOT_PARAMETERS_WITH_TIME",
    "SHOT_TABLES",
    "MONITOR_TABLES",
    "PARTITIONED_TABLES",
    "partition_monitor_values",
    "partition_name",
    "year_partition_name",
    "PARTITION_NAME",
    "SPARSE_YEAR_MONTHS",
    "SPARSE_MONTH_SHOTS",
    "month_start",
    "is_partitioned",
    "missing_months",
    "ensure_months",
    "ensure_partitions",
    "partition_shot_tables",
    "unpartition_shot_tables",
    "measurements_out_of_partitions",
    "measurements_into_partitions",
]

#: ``shot_parameters`` as PostgreSQL holds it, with its shot's time (the partition key),
#: for queries that match a child row to its shot by id and time.
SHOT_PARAMETERS_WITH_TIME = Table(
    "shot_parameters",
    MetaData(),
    Column("shot_id", BigId),
    Column("parameter_id", Integer),
    Column("number_value", Float),
    Column("text_value", String),
    Column("time", UTCDateTime),
)

#: The partitioned shot-level tables, parent first; partitioned alike, month by month.
#: ``shot_measurements`` is a plain table keyed by shot id since revision 0017.
SHOT_TABLES = ("shots", "shot_parameters", "occupancy")
#: The monitors' raw values (runlog.monitors), partitioned by month of their own time; its
#: key (monitor_id, time) already holds the partition key, so the layout equals the model's.
MONITOR_TABLES = ("monitor_values",)
PARTITIONED_TABLES = SHOT_TABLES + MONITOR_TABLES
#: The tables revision 0004 partitions: ``shot_measurements`` too, until revision 0017
#: takes it out again (:func:`measurements_out_of_partitions`).
_REVISION_0004_TABLES = ("shots", "shot_parameters", "shot_measurements", "occupancy")
_NAMED = _REVISION_0004_TABLES + MONITOR_TABLES
_MEASUREMENTS = "shot_measurements"

_KEY = "time"

#: The name of a month's or a year's partition of a partitioned table (or of
#: ``shot_measurements`` in a catalogue before revision 0017).
PARTITION_NAME = re.compile(rf"({'|'.join(_NAMED)})_y\d{{4}}(m\d{{2}})?")
#: A file's shots in this many months of a year without partitions, ...
SPARSE_YEAR_MONTHS = 3
#: ... each month with fewer shots than this, make one partition for the year.
SPARSE_MONTH_SHOTS = 1_000

# Each table's primary key on PostgreSQL: the SQLite key, then the partition key.
_PRIMARY_KEYS = {
    "shots": ("id", _KEY),
    "shot_parameters": ("shot_id", "parameter_id", _KEY),
    "shot_measurements": ("shot_id", _KEY),
    "occupancy": ("shot_id", "image_id", _KEY),
}
_SHOTS_UNIQUE = ("run_id", "shot", _KEY)


def month_start(value: dt.date | dt.datetime) -> dt.date:
    """The first day of the UTC calendar month holding ``value`` (an aware time, or a date)."""
    if isinstance(value, dt.datetime):
        if value.tzinfo is None:
            raise ValueError(f"naive datetime {value!r}: times must carry a time zone")
        value = value.astimezone(dt.timezone.utc).date()
    return value.replace(day=1)


def _next_month(month: dt.date) -> dt.date:
    return dt.date(month.year + month.month // 12, month.month % 12 + 1, 1)


def _months(first: dt.date | dt.datetime, last: dt.date | dt.datetime) -> list[dt.date]:
    month, end = month_start(first), month_start(last)
    months = []
    while month <= end:
        months.append(month)
        month = _next_month(month)
    return months


def partition_name(table: str, month: dt.date | dt.datetime) -> str:
    """The partition of ``table`` that holds ``month``, e.g. ``shots_y2026m03``."""
    if table not in _NAMED:
        raise ValueError(f"'{table}' is not a partitioned shot-level or monitor table")
    month = month_start(month)
    return f"{table}_y{month.year:04d}m{month.month:02d}"


def year_partition_name(table: str, year: int) -> str:
    """The partition of ``table`` that holds a whole sparse year, e.g. ``shots_y2016``."""
    if table not in _NAMED:
        raise ValueError(f"'{table}' is not a partitioned shot-level or monitor table")
    return f"{table}_y{int(year):04d}"


def _covered(attached: set[str], table: str, month: dt.date) -> bool:
    return partition_name(table, month) in attached or year_partition_name(table, month.year) in attached


def _year_has_partitions(attached: set[str], table: str, year: int) -> bool:
    prefix = f"{table}_y{int(year):04d}"
    return any(name == prefix or (name.startswith(prefix + "m") and PARTITION_NAME.fullmatch(name)) for name in attached)


def is_partitioned(connection: Connection) -> bool:
    """Whether ``shots`` is a partitioned table here (PostgreSQL at revision 0004 or later)."""
    if connection.dialect.name != "postgresql":
        return False
    found = connection.execute(text("SELECT 1 FROM pg_partitioned_table WHERE partrelid = to_regclass('shots')")).first()
    return found is not None


def _attached(connection: Connection, tables: Iterable[str] = SHOT_TABLES) -> set[str]:
    """The partitions attached to ``tables`` (the shot-level tables by default)."""
    rows = connection.execute(
        text(
            "SELECT child.relname FROM pg_inherits JOIN pg_class child ON child.oid = pg_inherits.inhrelid "
            "WHERE pg_inherits.inhparent IN (SELECT to_regclass(name) FROM unnest(CAST(:tables AS text[])) AS name)"
        ),
        {"tables": list(tables)},
    )
    return {name for (name,) in rows}


def missing_months(connection: Connection, months: Iterable[dt.date | dt.datetime], tables: tuple[str, ...] = SHOT_TABLES) -> list[dt.date]:
    """Those of ``months`` that lack a partition of any of ``tables`` (shot-level by default), in order.

    A catalogue query that waits for no lock: ingest asks it first, so that the common
    case (every month already there) costs nothing more.
    """
    attached = _attached(connection, tables)
    wanted = sorted({month_start(month) for month in months})
    return [month for month in wanted if any(not _covered(attached, table, month) for table in tables)]


def ensure_months(connection: Connection, first: dt.date | dt.datetime, last: dt.date | dt.datetime, tables: tuple[str, ...] = SHOT_TABLES) -> list[str]:
    """Create the missing month partitions of every shot-level table, ``first``..``last``
    (whole UTC months, both included; a month inside a year's partition is there already);
    returns the partitions created, in order.

    Idempotent. Two sessions must not run it at once (both would create the same table):
    ingest calls it in a short transaction of its own under the writer lock (see
    :mod:`runlog.store.bulk`), before its data transaction; migrations run alone.
    """
    attached = _attached(connection, tables)
    created = []
    for month in _months(first, last):
        for table in tables:
            if not _covered(attached, table, month):
                created.append(_make(connection, table, partition_name(table, month), month, _next_month(month)))
    return created


def ensure_partitions(connection: Connection, months: Mapping[dt.date, int | None], tables: tuple[str, ...] = SHOT_TABLES) -> list[str]:
    """Create the partitions of ``tables`` that rows in ``months`` (UTC months, as their first
    days, with how many rows each will get; None: not known) need; returns those created.

    A year with no partition yet whose months here are :data:`SPARSE_YEAR_MONTHS` or more,
    each with a known count under :data:`SPARSE_MONTH_SHOTS`, gets one partition for the
    year; every other month its own. Idempotent, under the writer lock as :func:`ensure_months`.
    """
    attached = _attached(connection, tables)
    counts: dict[dt.date, int | None] = {}
    for month, count in months.items():
        month = month_start(month)
        known = counts.get(month, 0)
        counts[month] = None if count is None or known is None else known + int(count)
    created = []
    years = sorted({month.year for month in counts})
    for year in years:
        wanted = sorted(month for month in counts if month.year == year and any(not _covered(attached, table, month) for table in tables))
        if not wanted:
            continue
        sparse = len(wanted) >= SPARSE_YEAR_MONTHS and all(counts[month] is not None and counts[month] < SPARSE_MONTH_SHOTS for month in wanted)
        if sparse and not any(_year_has_partitions(attached, table, year) for table in tables):
            for table in tables:
                created.append(_make(connection, table, year_partition_name(table, year), dt.date(year, 1, 1), dt.date(year + 1, 1, 1)))
            continue
        for month in wanted:
            created += ensure_months(connection, month, month, tables)
            attached = _attached(connection, tables)
    return created


def _make(connection: Connection, table: str, name: str, first: dt.date, end: dt.date) -> str:
    """Create ``name`` as a plain table like ``table`` and attach it for [first, end) (UTC days)."""
    low = dt.datetime(first.year, first.month, first.day, tzinfo=dt.timezone.utc)
    high = dt.datetime(end.year, end.month, end.day, tzinfo=dt.timezone.utc)
    # LIKE copies the columns (measurement columns included) and NOT NULLs; attaching
    # adds the parent's keys, indexes and foreign keys to the new, empty table.
    connection.exec_driver_sql(f"CREATE TABLE IF NOT EXISTS {name} (LIKE {table})")
    connection.exec_driver_sql(
        f"ALTER TABLE {table} ATTACH PARTITION {name} "
        f"FOR VALUES FROM ('{low.isoformat(sep=' ')}') TO ('{high.isoformat(sep=' ')}')"
    )
    return name


def _columns(connection: Connection, table: str) -> list[tuple[str, str, bool]]:
    """(name, SQL type, NOT NULL) of each column of ``table`` in order, measurement columns included."""
    rows = connection.execute(
        text(
            "SELECT attname, format_type(atttypid, atttypmod), attnotnull FROM pg_attribute "
            "WHERE attrelid = to_regclass(:t) AND attnum > 0 AND NOT attisdropped ORDER BY attnum"
        ),
        {"t": table},
    )
    return [(name, sql_type, bool(not_null)) for name, sql_type, not_null in rows]


def _constraints(connection: Connection, table: str, kinds: str) -> list[tuple[str, str]]:
    """(name, definition) of the constraints of ``table`` whose kind is in ``kinds`` ('p', 'u', 'f')."""
    rows = connection.execute(
        text("SELECT conname, pg_get_constraintdef(oid) FROM pg_constraint WHERE conrelid = to_regclass(:t) AND contype = ANY(:k) ORDER BY conname"),
        {"t": table, "k": list(kinds)},
    )
    return [(name, definition) for name, definition in rows]


def _step_aside(connection: Connection, table: str, suffix: str) -> None:
    """Rename ``table`` and the indexes of its keys (index names are unique per schema, and
    the table that replaces it reuses them)."""
    for name, _ in _constraints(connection, table, "pu"):
        connection.exec_driver_sql(f'ALTER INDEX "{name}" RENAME TO "{(name + suffix)[:63]}"')
    connection.exec_driver_sql(f"ALTER TABLE {table} RENAME TO {table}{suffix}")


def _listed(names: Iterable[str], alias: str = "") -> str:
    return ", ".join(f'{alias}"{name}"' for name in names)


def _move_rows(connection: Connection, table: str, source: str, columns: list[str], select: str) -> int:
    moved = connection.exec_driver_sql(f"INSERT INTO {table} ({_listed(columns)}) {select}").rowcount
    before = int(connection.exec_driver_sql(f"SELECT count(*) FROM {source}").scalar_one())
    if moved != before:
        raise StoreError(f"moving the rows of {table}: {before - moved} of its {before} rows have no shot; nothing was changed")
    return moved


def partition_shot_tables(connection: Connection) -> dict[str, int]:
    """Turn the four plain shot-level tables into monthly partitioned ones, moving every row
    (measurement columns included); returns the rows moved per table.

    Runs inside the caller's transaction: migration 0004, and a fresh catalogue right after
    ``create_all``, so both end with the same layout; both then take ``shot_measurements``
    out of the partitioning again (revision 0017, :func:`measurements_out_of_partitions`). A no-op on SQLite and on a catalogue
    already partitioned. A child row without its shot raises :class:`StoreError` (the
    caller's transaction then rolls back and nothing changes).
    """
    if connection.dialect.name != "postgresql" or is_partitioned(connection):
        return {}
    old = "_unpartitioned"
    columns = {table: _columns(connection, table) for table in _REVISION_0004_TABLES}
    shots_foreign_keys = _constraints(connection, "shots", "f")
    for table in _REVISION_0004_TABLES:
        _step_aside(connection, table, old)
    for table in _REVISION_0004_TABLES:
        definitions = [f'"{name}" {sql_type}{" NOT NULL" if not_null else ""}' for name, sql_type, not_null in columns[table]]
        if table != "shots":
            definitions.append(f'"{_KEY}" timestamp with time zone NOT NULL')
        definitions.append(f"CONSTRAINT pk_{table} PRIMARY KEY ({', '.join(_PRIMARY_KEYS[table])})")
        if table == "shots":
            definitions.append(f"CONSTRAINT uq_shots_{'_'.join(_SHOTS_UNIQUE)} UNIQUE ({', '.join(_SHOTS_UNIQUE)})")
            definitions += [f'CONSTRAINT "{name}" {definition}' for name, definition in shots_foreign_keys]
        connection.exec_driver_sql(f"CREATE TABLE {table} ({', '.join(definitions)}) PARTITION BY RANGE ({_KEY})")
    months = connection.exec_driver_sql(f"SELECT DISTINCT date_trunc('month', time AT TIME ZONE 'UTC')::date FROM shots{old}").scalars().all()
    for month in sorted(months):
        ensure_months(connection, month, month, _REVISION_0004_TABLES)
    moved = {}
    for table in _REVISION_0004_TABLES:
        names = [name for name, _, _ in columns[table]]
        if table == "shots":
            select = f"SELECT {_listed(names)} FROM shots{old}"
            moved[table] = _move_rows(connection, table, f"shots{old}", names, select)
        else:
            # The join gives each child row its shot's time; a row without a shot would drop out.
            select = f"SELECT {_listed(names, 'c.')}, s.time FROM {table}{old} c JOIN shots{old} s ON s.id = c.shot_id"
            moved[table] = _move_rows(connection, table, f"{table}{old}", [*names, _KEY], select)
    # Children first: the old ones still refer to the old shots.
    for table in reversed(_REVISION_0004_TABLES):
        connection.exec_driver_sql(f"DROP TABLE {table}{old}")
    if any(moved.values()):
        # Autovacuum analyses the partitions, never a partitioned parent.
        connection.exec_driver_sql(f"ANALYZE {', '.join(_REVISION_0004_TABLES)}")
    return moved


def unpartition_shot_tables(connection: Connection) -> dict[str, int]:
    """The reverse of :func:`partition_shot_tables` (downgrade below 0004): plain tables as the
    models define them, every row and measurement column moved back; rows moved per table.

    A child row without its shot fails the models' foreign keys, and the caller's
    transaction rolls back.
    """
    if connection.dialect.name != "postgresql" or not is_partitioned(connection):
        return {}
    from runlog.store.schema import Base

    old = "_partitioned"
    columns = {table: [(name, sql_type) for name, sql_type, _ in _columns(connection, table) if not (name == _KEY and table != "shots")] for table in _REVISION_0004_TABLES}
    for table in _REVISION_0004_TABLES:
        _step_aside(connection, table, old)
    for table in _REVISION_0004_TABLES:
        Base.metadata.tables[table].create(connection)
        known = {column.name for column in Base.metadata.tables[table].columns}
        for name, sql_type in columns[table]:
            if name not in known:  # a measurement column
                connection.exec_driver_sql(f'ALTER TABLE {table} ADD COLUMN "{name}" {sql_type}')
    moved = {}
    for table in _REVISION_0004_TABLES:
        names = [name for name, _ in columns[table]]
        select = f"SELECT {_listed(names)} FROM {table}{old}"
        moved[table] = _move_rows(connection, table, f"{table}{old}", names, select)
    for table in reversed(_REVISION_0004_TABLES):
        connection.exec_driver_sql(f"DROP TABLE {table}{old}")
    return moved


def _measurements_partitioned(connection: Connection) -> bool:
    found = connection.execute(text("SELECT 1 FROM pg_partitioned_table WHERE partrelid = to_regclass(:t)"), {"t": _MEASUREMENTS}).first()
    return found is not None


def measurements_out_of_partitions(connection: Connection) -> int | None:
    """Make the month-partitioned ``shot_measurements`` one plain table keyed by shot id,
    every row and column (measurement columns and the blocks made ahead) kept, the
    partitions' ``time`` column dropped; returns the rows moved, None when there was
    nothing to do (SQLite, or already plain).

    Why: a partitioned table's columns are every partition's, so a new block of
    measurement columns locked and changed each month; on one table it is one change,
    however many months (docs/scaling.md, "Measurement columns and month partitions").
    Shot ids grow with ingest, so new rows still go to the end of the key's index. The
    shot's time stays in ``shots`` alone; readers join by shot id.

    Runs in the caller's transaction (migration 0017, and a fresh catalogue right after
    :func:`partition_shot_tables`): the rows are copied with one ``INSERT .. SELECT`` in key
    order, the key is built once afterwards, and a count that does not add up (or a shot
    id held twice) raises, so the transaction rolls back and nothing changes. The new table
    has no foreign key to ``shots``, as the partitions had none: PostgreSQL's ``shots`` is
    keyed by (id, time), and its rows are written by ingest alone under the writer lock.
    """
    if connection.dialect.name != "postgresql" or not _measurements_partitioned(connection):
        return None
    old = "_partitioned"
    columns = [(name, sql_type, not_null) for name, sql_type, not_null in _columns(connection, _MEASUREMENTS) if name != _KEY]
    _step_aside(connection, _MEASUREMENTS, old)
    definitions = [f'"{name}" {sql_type}{" NOT NULL" if not_null else ""}' for name, sql_type, not_null in columns]
    connection.exec_driver_sql(f"CREATE TABLE {_MEASUREMENTS} ({', '.join(definitions)})")
    names = [name for name, _, _ in columns]
    moved = _move_rows(connection, _MEASUREMENTS, f"{_MEASUREMENTS}{old}", names, f"SELECT {_listed(names)} FROM {_MEASUREMENTS}{old} ORDER BY shot_id")
    # A key built from sorted rows at the end costs less than one kept up row by row; a
    # shot id held twice (which the old key, with its time, allowed in principle) fails here.
    connection.exec_driver_sql(f"ALTER TABLE {_MEASUREMENTS} ADD CONSTRAINT pk_{_MEASUREMENTS} PRIMARY KEY (shot_id)")
    connection.exec_driver_sql(f"DROP TABLE {_MEASUREMENTS}{old}")
    if moved:
        connection.exec_driver_sql(f"ANALYZE {_MEASUREMENTS}")
    return moved


def measurements_into_partitions(connection: Connection) -> int | None:
    """The reverse of :func:`measurements_out_of_partitions` (downgrade below 0017):
    ``shot_measurements`` partitioned like ``shots`` again, one partition for each of
    ``shots``' (a month or a sparse year), each row with its shot's time; returns the rows
    moved, None when there was nothing to do. A row without its shot raises
    :class:`StoreError` and the caller's transaction rolls back."""
    if connection.dialect.name != "postgresql" or not is_partitioned(connection) or _measurements_partitioned(connection):
        return None
    old = "_plain"
    columns = _columns(connection, _MEASUREMENTS)
    _step_aside(connection, _MEASUREMENTS, old)
    definitions = [f'"{name}" {sql_type}{" NOT NULL" if not_null else ""}' for name, sql_type, not_null in columns]
    definitions.append(f'"{_KEY}" timestamp with time zone NOT NULL')
    definitions.append(f"CONSTRAINT pk_{_MEASUREMENTS} PRIMARY KEY ({', '.join(_PRIMARY_KEYS[_MEASUREMENTS])})")
    connection.exec_driver_sql(f"CREATE TABLE {_MEASUREMENTS} ({', '.join(definitions)}) PARTITION BY RANGE ({_KEY})")
    for name in sorted(_attached(connection, ("shots",))):
        found = re.fullmatch(r"shots_y(\d{4})(?:m(\d{2}))?", name)
        if found is None:
            raise StoreError(f"shots has a partition runlog did not make: {name}; nothing was changed")
        year = int(found.group(1))
        if found.group(2) is None:
            first, end = dt.date(year, 1, 1), dt.date(year + 1, 1, 1)
        else:
            first = dt.date(year, int(found.group(2)), 1)
            end = _next_month(first)
        _make(connection, _MEASUREMENTS, _MEASUREMENTS + name[len("shots") :], first, end)
    names = [name for name, _, _ in columns]
    select = f"SELECT {_listed(names, 'c.')}, s.time FROM {_MEASUREMENTS}{old} c JOIN shots s ON s.id = c.shot_id"
    moved = _move_rows(connection, _MEASUREMENTS, f"{_MEASUREMENTS}{old}", [*names, _KEY], select)
    connection.exec_driver_sql(f"DROP TABLE {_MEASUREMENTS}{old}")
    if moved:
        connection.exec_driver_sql(f"ANALYZE {_MEASUREMENTS}")
    return moved


def partition_monitor_values(connection: Connection) -> bool:
    """Make the (empty) plain ``monitor_values`` the models create a table partitioned by
    month of ``time``, same columns and key; True when it did. A no-op on SQLite and when
    already partitioned. Runs in the caller's transaction: migration 0013 and a fresh
    catalogue right after ``create_all``, so both end with the same layout."""
    if connection.dialect.name != "postgresql":
        return False
    table = MONITOR_TABLES[0]
    found = connection.execute(text("SELECT 1 FROM pg_partitioned_table WHERE partrelid = to_regclass(:t)"), {"t": table}).first()
    if found is not None:
        return False
    if connection.exec_driver_sql(f"SELECT 1 FROM {table} LIMIT 1").first() is not None:
        raise StoreError(f"{table} already holds values; it is partitioned only when new")
    columns = _columns(connection, table)
    keys = _constraints(connection, table, "p")
    connection.exec_driver_sql(f"DROP TABLE {table}")
    definitions = [f'"{name}" {sql_type}{" NOT NULL" if not_null else ""}' for name, sql_type, not_null in columns]
    definitions += [f'CONSTRAINT "{name}" {definition}' for name, definition in keys]
    connection.exec_driver_sql(f"CREATE TABLE {table} ({', '.join(definitions)}) PARTITION BY RANGE ({_KEY})")
    return True
