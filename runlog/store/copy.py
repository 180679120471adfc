"""Copying a whole catalogue from one store to another (``runlog db copy``).

Owns the move of a catalogue between stores: from a SQLite file to a shared PostgreSQL
server above all, and also from PostgreSQL to a SQLite file or from one SQLite file to
another. Every table of the schema is copied with its ids, so the copy answers every
question as the original does and later ingests go on from where the original stopped.

The source is read in one read transaction (SQLite: a WAL read snapshot; PostgreSQL:
REPEATABLE READ), so an ingest writing meanwhile is in the copy wholly or not at all.
Tables are streamed in foreign-key order, a bounded chunk of rows at a time, into one
write transaction of the bulk writer (:mod:`runlog.store.bulk`: ADBC on SQLite, COPY on
PostgreSQL); the row counts of source and target are compared before it commits.

The target must be blank, or a catalogue at our schema revision that holds no rows (as
``runlog init`` leaves it). Two steps commit before the data transaction and are undone
on failure or Ctrl-C: the schema of a blank target (dropped again; a SQLite file that did
not exist is deleted), and on PostgreSQL the month partitions the writer makes for the
shots (:mod:`runlog.store.partitions`; those not there before are dropped again).
"""

from __future__ import annotations

from collections import Counter

import datetime as dt
import re
from collections.abc import Callable, Iterator
from contextlib import ExitStack, contextmanager
from dataclasses import dataclass, field
from pathlib import Path

import pyarrow as pa
from sqlalchemy import Boolean, Date, Float, Integer, LargeBinary, inspect
from sqlalchemy.engine import URL, Connection, Engine, make_url
from sqlalchemy.exc import ArgumentError

from runlog.errors import RunlogError, SchemaVersionError, StoreError
from runlog.store.arrow_reader import arrow_read, is_arrow
from runlog.store.bulk import Writer, open_writer
from runlog.store.engine import make_engine, redact, sqlite_path
from runlog.store.partitions import PARTITION_NAME, PARTITIONED_TABLES, SHOT_TABLES
from runlog.store.schema import MEASUREMENT_COLUMN_PREFIX, SCHEMA_REVISION, Base, UTCDateTime, measurement_column

__all__ = ["CHUNK_ROWS", "Progress", "copy_catalogue"]

#: Rows read and written at a time (fewer for wide tables, see ``_VALUES_PER_CHUNK``).
CHUNK_ROWS = 100_000
# A chunk is held as Python values once: a few million of them stay in the tens of MB.
_VALUES_PER_CHUNK = 1_000_000

#: Called after each chunk with (table, rows copied so far, rows of the table).
Progress = Callable[[str, int, int], None]

# The partitioned children, which carry their shot's time on PostgreSQL (not
# ``shot_measurements``: one plain table keyed by shot id since revision 0017).
_CHILDREN = frozenset(SHOT_TABLES[1:])
_PARTITION_TIME = "time"
_MEASUREMENT = re.compile(rf"{MEASUREMENT_COLUMN_PREFIX}(\d+)")
_PARTITION = PARTITION_NAME


@dataclass(frozen=True)
class _Column:
    name: str
    kind: str  # time | date | boolean | integer | float | text | binary
    source: str  # the expression that reads it from the source


@dataclass
class _TablePlan:
    name: str
    columns: list[_Column]
    sql: str
    rows: int = 0  # in the source snapshot


@dataclass
class _Target:
    """What the target was before the copy, so that a failed copy can leave it so."""

    url: str
    dialect: str
    file: Path | None = None
    file_existed: bool = True
    new_folders: list[Path] = field(default_factory=list)
    blank: bool = False  # no tables at all: the copy creates the schema
    tables: frozenset[str] = frozenset()
    step: str = "opening the catalogues"  # for the message of a failure
    touched: bool = False  # something may have been written to it
    committed: bool = False


def copy_catalogue(source_url: str, target_url: str, *, progress: Progress | None = None) -> dict[str, int]:
    """Copy the whole catalogue at ``source_url`` into ``target_url``; rows copied per table.

    The source must be at this runlog's schema revision; the target must be an empty
    database or a catalogue without rows (SQLite file or PostgreSQL database). All or
    nothing: on any failure, Ctrl-C included, the target is left as it was.
    """
    source_shown, target_shown = redact(source_url), redact(target_url)
    source_file = _sqlite_file(source_url)
    if source_file is not None and not source_file.exists():
        raise StoreError(f"no catalogue at {source_shown}: the file does not exist")
    target = _Target(target_shown, _backend(target_url))
    target.file = _sqlite_file(target_url)
    if target.dialect == "sqlite" and target.file is None:
        raise StoreError(f"cannot copy into {target_shown}: give a SQLite file or a PostgreSQL database, not an in-memory one")
    if _same_store(source_url, target_url):
        raise StoreError(f"source and target are the same catalogue ({source_shown})")
    if target.file is not None:
        target.file_existed = target.file.exists()
        target.new_folders = [folder for folder in (target.file.parent, *target.file.parent.parents) if not folder.exists()]
    source = engine = None
    try:
        source = make_engine(source_url)
        engine = make_engine(target_url)
        with _snapshot(source, source_shown) as reading:
            _check_target(engine, target)
            return _copy(reading, engine, target, progress)
    except BaseException as error:
        if target.committed:
            raise
        try:
            _undo(engine, target)
        except Exception as undo_error:
            raise StoreError(
                f"copying {source_shown} to {target_shown} failed while {target.step}: {_first_line(error)}; "
                f"undoing what was written failed too ({_first_line(undo_error)}): check the target"
            ) from error
        if isinstance(error, Exception) and not isinstance(error, RunlogError):
            raise StoreError(f"copying {source_shown} to {target_shown} failed while {target.step}: {_first_line(error)}; the target is as it was") from error
        raise
    finally:
        for opened in (source, engine):
            if opened is not None:
                opened.dispose()


# --- the two ends --------------------------------------------------------------------------


def _backend(url: str) -> str:
    try:
        return make_url(url).get_backend_name()
    except (ArgumentError, ValueError):
        return ""  # make_engine says why


def _sqlite_file(url: str) -> Path | None:
    try:
        path = sqlite_path(url)
    except (ArgumentError, ValueError):
        return None
    return None if path is None else path.resolve()


def _same_store(source_url: str, target_url: str) -> bool:
    source_file, target_file = _sqlite_file(source_url), _sqlite_file(target_url)
    if source_file is not None or target_file is not None:
        return source_file == target_file
    try:
        a, b = make_url(source_url), make_url(target_url)
    except (ArgumentError, ValueError):
        return False

    def place(url: URL) -> tuple:
        return url.get_backend_name(), url.host, url.port, url.database, url.query.get("host"), url.query.get("port")

    return place(a) == place(b)


@contextmanager
def _snapshot(engine: Engine, shown: str) -> Iterator[Connection]:
    """One read transaction on the source, at our schema revision, for the whole copy.

    A SQLite source is read through the ADBC driver (:mod:`runlog.store.arrow_reader`),
    whose Arrow batches cost a tenth of Python's rows, unless this process has the file
    open already; then, and on PostgreSQL, through the ordinary connection.
    """
    with ExitStack() as stack:
        reading = stack.enter_context(arrow_read(engine)) if engine.dialect.name == "sqlite" else None
        if reading is None:
            reading = stack.enter_context(engine.connect())
            if reading.dialect.name == "postgresql":
                reading.execution_options(isolation_level="REPEATABLE READ")
            stack.enter_context(reading.begin())
            if reading.dialect.name == "postgresql":
                reading.exec_driver_sql("SET TRANSACTION READ ONLY")
        # The snapshot is taken by the first read (SQLite: the WAL read mark).
        if not inspect(reading).has_table("alembic_version"):
            raise SchemaVersionError(shown, None, SCHEMA_REVISION)
        found = reading.exec_driver_sql("SELECT version_num FROM alembic_version").scalar()
        if found != SCHEMA_REVISION:
            raise SchemaVersionError(shown, found, SCHEMA_REVISION)
        yield reading


def _check_target(engine: Engine, target: _Target) -> None:
    """Refuse a target that holds anything; note whether it is blank."""
    with engine.connect() as connection:
        names = set(inspect(connection).get_table_names())
        target.tables = frozenset(names)
        if not names:
            target.blank = True
            return
        if "alembic_version" not in names:
            listed = ", ".join(sorted(names)[:5]) + (f" and {len(names) - 5} more" if len(names) > 5 else "")
            raise StoreError(f"target {target.url} is not empty and not a runlog catalogue: it holds the tables {listed}; nothing was copied")
        found = connection.exec_driver_sql("SELECT version_num FROM alembic_version").scalar()
        if found != SCHEMA_REVISION:
            raise SchemaVersionError(target.url, found, SCHEMA_REVISION)
        held = []
        for table in Base.metadata.sorted_tables:
            if connection.exec_driver_sql(f"SELECT 1 FROM {table.name} LIMIT 1").first() is not None:
                count = connection.exec_driver_sql(f"SELECT count(*) FROM {table.name}").scalar_one()
                held.append(f"{count} {'row' if count == 1 else 'rows'} in {table.name}")
        if held:
            raise StoreError(f"target catalogue {target.url} is not empty: it holds {', '.join(held)}; copy into an empty database or a new catalogue; nothing was copied")


def _undo(engine: Engine | None, target: _Target) -> None:
    """Take back what committed before the data transaction failed (see the module notes)."""
    if engine is not None:
        engine.dispose()
    if target.file is not None and not target.file_existed:
        for suffix in ("", "-wal", "-shm", "-journal"):
            Path(f"{target.file}{suffix}").unlink(missing_ok=True)
        for folder in target.new_folders:  # deepest first
            try:
                folder.rmdir()
            except OSError:
                break
        return
    if engine is None or not target.touched:
        return
    with engine.connect() as connection:
        names = set(inspect(connection).get_table_names())
        if target.blank:
            ours = [table.name for table in reversed(Base.metadata.sorted_tables)] + ["alembic_version"]
            drop = [name for name in ours if name in names]
        else:
            drop = sorted(name for name in names - target.tables if _PARTITION.fullmatch(name))
        connection.rollback()  # ends the inspection's transaction
        if not drop:
            return
        with connection.begin():
            if connection.dialect.name == "postgresql":
                # The partitions of a parent go with it.
                connection.exec_driver_sql(f"DROP TABLE IF EXISTS {', '.join(drop)} CASCADE")
            else:
                for name in drop:
                    connection.exec_driver_sql(f"DROP TABLE IF EXISTS {name}")


# --- what to read ----------------------------------------------------------------------------


def _kind(column) -> str:
    kind = column.type
    if isinstance(kind, UTCDateTime):
        return "time"
    if isinstance(kind, Date):
        return "date"
    if isinstance(kind, Boolean):
        return "boolean"
    if isinstance(kind, LargeBinary):
        return "binary"
    if isinstance(kind, Float):
        return "float"
    if isinstance(kind, Integer):
        return "integer"
    return "text"


def _read_as(kind: str, column: str, dialect: str) -> str:
    """The source expression of a column, as plain values both backends agree on: times as
    integer microseconds since the epoch, dates as ISO text, booleans as 0 or 1."""
    if dialect != "postgresql":
        return column  # SQLite stores them so
    if kind == "time":
        # The epoch is numeric, exact to the microsecond, since PostgreSQL 14.
        return f"CAST(EXTRACT(EPOCH FROM {column}) * 1000000 AS BIGINT)"
    if kind == "date":
        return f"to_char({column}, 'YYYY-MM-DD')"
    if kind == "boolean":
        return f"CAST({column} AS INTEGER)"
    return column


def _plans(reading: Connection, target_dialect: str) -> list[_TablePlan]:
    """What to read from each table of the schema, parents before children."""
    source_dialect = reading.dialect.name
    plans = []
    for table in Base.metadata.sorted_tables:
        found = [column["name"] for column in inspect(reading).get_columns(table.name)]
        known = {column.name for column in table.columns}
        measured = sorted((name for name in found if _MEASUREMENT.fullmatch(name)), key=lambda name: int(name[len(MEASUREMENT_COLUMN_PREFIX) :])) if table.name == "shot_measurements" else []
        # Columns made ahead of any name (runlog.store.measurement_columns) hold no value
        # and stay behind; the target makes its own blocks.
        named = {measurement_column(mid) for (mid,) in reading.exec_driver_sql("SELECT id FROM measurements")} if measured else set()
        unknown = [name for name in found if name not in known and name not in measured and not (table.name in _CHILDREN and name == _PARTITION_TIME)]
        measured = [name for name in measured if name in named]
        if unknown:
            raise StoreError(f"source table {table.name} has columns runlog does not know: {', '.join(unknown)}")
        columns = [_Column(column.name, _kind(column), _read_as(_kind(column), f"c.{column.name}", source_dialect)) for column in table.columns]
        columns += [_Column(name, "float", f"c.{name}") for name in measured]
        joined = ""
        if table.name in _CHILDREN and target_dialect == "postgresql":
            # The target's children carry their shot's time, the partition key.
            if _PARTITION_TIME in found:
                columns.append(_Column(_PARTITION_TIME, "time", _read_as("time", f"c.{_PARTITION_TIME}", source_dialect)))
            else:
                columns.append(_Column(_PARTITION_TIME, "time", _read_as("time", f"s.{_PARTITION_TIME}", source_dialect)))
                joined = " JOIN shots s ON s.id = c.shot_id"
        # Key order: the target's B-trees (SQLite WITHOUT ROWID tables above all) fill in order.
        order = ", ".join(f"c.{column.name}" for column in table.primary_key.columns)
        sql = f"SELECT {', '.join(column.source for column in columns)} FROM {table.name} c{joined} ORDER BY {order}"
        plans.append(_TablePlan(table.name, columns, sql, int(reading.exec_driver_sql(f"SELECT count(*) FROM {table.name}").scalar_one())))
    return plans


def _months(reading: Connection) -> dict[dt.date, int]:
    """The UTC calendar months the source's shots and monitor values fall in, with their rows."""
    months: Counter[dt.date] = Counter()
    for table in ("shots", "monitor_values"):
        if reading.dialect.name == "postgresql":
            found = reading.exec_driver_sql(f"SELECT CAST(date_trunc('month', time AT TIME ZONE 'UTC') AS DATE), count(*) FROM {table} GROUP BY 1").all()
            months.update({month: int(count) for month, count in found})
        else:
            found = reading.exec_driver_sql(f"SELECT strftime('%Y-%m', time / 1000000, 'unixepoch'), count(*) FROM {table} GROUP BY 1").all()
            months.update({dt.date(int(month[:4]), int(month[5:7]), 1): int(count) for month, count in found})
    return dict(sorted(months.items()))


def _chunks(reading: Connection, plan: _TablePlan, size: int) -> Iterator[pa.Table]:
    """The rows of a table in the snapshot, ``size`` at a time, as Arrow tables the writer takes."""
    if is_arrow(reading):
        yield from _arrow_chunks(reading, plan, size)
        return
    raw = reading.connection.driver_connection
    postgres = reading.dialect.name == "postgresql"
    # PostgreSQL: a server-side cursor, so that the rows never pile up in the client.
    cursor = raw.cursor(name="runlog_copy") if postgres else raw.cursor()
    try:
        if postgres:
            cursor.itersize = size
        cursor.execute(plan.sql)
        while rows := cursor.fetchmany(size):
            yield _from_rows(plan.columns, rows)
    finally:
        cursor.close()


# A value of each kind, for the first row of an ADBC read (see _arrow_chunks).
_TYPED = {"time": "0", "boolean": "0", "integer": "0", "float": "0.0", "text": "''", "date": "''", "binary": "X''"}


def _arrow_chunks(reading: Connection, plan: _TablePlan, size: int) -> Iterator[pa.Table]:
    # The driver takes each column's type from the first batch, and refuses a later value
    # of another type: a column that is NULL throughout the first batch would become
    # int64 and fail at its first text. A first row of typed values, dropped again, fixes
    # every type; the columns' affinities keep the later values to those types.
    typed = ", ".join(f"{_TYPED[column.kind]} AS c{index}" for index, column in enumerate(plan.columns))
    cursor = reading.connection.driver_connection.adbc.cursor()
    try:
        cursor.adbc_statement.set_options(**{"adbc.sqlite.query.batch_rows": str(size)})
        cursor.execute(f"SELECT {typed} UNION ALL SELECT * FROM ({plan.sql})")
        first = True
        for batch in cursor.fetch_record_batch():
            if first:
                batch, first = batch.slice(1), False
            if batch.num_rows:
                yield _from_arrow(plan.columns, batch)
    finally:
        cursor.close()


_ARROW = {
    "integer": pa.int64(),
    "float": pa.float64(),
    "text": pa.string(),
    "date": pa.string(),  # ISO text: SQLite stores it so, PostgreSQL's COPY reads it
    "binary": pa.binary(),
}


def _from_rows(columns: list[_Column], rows: list[tuple]) -> pa.Table:
    arrays = []
    for column, values in zip(columns, zip(*rows)):
        if column.kind == "time":
            arrays.append(pa.array(values, pa.int64()).cast(pa.timestamp("us", tz="UTC")))
        elif column.kind == "boolean":
            arrays.append(pa.array(values, pa.int64()).cast(pa.bool_()))
        elif column.kind == "binary":
            arrays.append(pa.array([None if value is None else bytes(value) for value in values], pa.binary()))
        else:
            arrays.append(pa.array(values, _ARROW[column.kind]))
    return pa.table(arrays, names=[column.name for column in columns])


def _from_arrow(columns: list[_Column], batch: pa.RecordBatch) -> pa.Table:
    arrays = []
    for column, array in zip(columns, batch.columns):
        if column.kind == "time":
            array = array.cast(pa.int64()).cast(pa.timestamp("us", tz="UTC"))
        elif column.kind == "boolean":
            array = array.cast(pa.int64()).cast(pa.bool_())
        else:
            array = array.cast(_ARROW[column.kind])
        arrays.append(array)
    return pa.table(arrays, names=[column.name for column in columns])


# --- the copy --------------------------------------------------------------------------------


def _copy(reading: Connection, engine: Engine, target: _Target, progress: Progress | None) -> dict[str, int]:
    target.step = "reading the source"
    plans = _plans(reading, engine.dialect.name)
    months = _months(reading) if engine.dialect.name == "postgresql" else {}
    target.touched = True
    if target.blank:
        from runlog.store.migrate import create_or_upgrade

        target.step = "creating the target's schema"
        create_or_upgrade(engine)
    target.step = "opening the target for writing"
    writer = open_writer(engine, months, PARTITIONED_TABLES)
    try:
        _add_measurement_columns(writer, next(plan for plan in plans if plan.name == "shot_measurements"))
        copied = {}
        for plan in plans:
            target.step = f"copying {plan.name}"
            copied[plan.name] = _copy_table(reading, writer, plan, progress)
        target.step = "checking the copy"
        if writer.dialect == "postgresql":
            _move_sequences(writer)
        for plan in plans:
            found = int(writer.rows(f"SELECT count(*) FROM {plan.name}")[0][0])
            if not plan.rows == copied[plan.name] == found:
                raise StoreError(f"the copy of {plan.name} does not add up: {plan.rows} rows in the source, {copied[plan.name]} read, {found} in the target; nothing was copied")
        if writer.dialect == "postgresql":
            # Autovacuum analyses the partitions, never a partitioned parent.
            writer.execute(f"ANALYZE {', '.join((*PARTITIONED_TABLES, 'shot_measurements'))}")
        target.step = "committing"
        writer.commit()
        target.committed = True
    finally:
        writer.close()
    return copied


def _copy_table(reading: Connection, writer: Writer, plan: _TablePlan, progress: Progress | None) -> int:
    size = max(1_000, min(CHUNK_ROWS, _VALUES_PER_CHUNK // len(plan.columns)))
    done = 0
    for chunk in _chunks(reading, plan, size):
        writer.append(plan.name, chunk)
        done += chunk.num_rows
        if progress is not None:
            progress(plan.name, done, plan.rows)
    return done


def _add_measurement_columns(writer: Writer, plan: _TablePlan) -> None:
    """Give the target's ``shot_measurements`` the source's ``m_<id>`` columns (ids are kept)."""
    if writer.dialect == "sqlite":
        present = {row[1] for row in writer.rows("PRAGMA table_info(shot_measurements)")}
        real = "REAL"
    else:
        present = {row[0] for row in writer.rows("SELECT column_name FROM information_schema.columns WHERE table_schema = current_schema() AND table_name = 'shot_measurements'")}
        real = "DOUBLE PRECISION"
    missing = [measurement_column(int(found.group(1))) for column in plan.columns if (found := _MEASUREMENT.fullmatch(column.name)) and column.name not in present]
    if missing and writer.dialect == "postgresql":
        # One statement: one change of the table, not one per column.
        writer.execute("ALTER TABLE shot_measurements " + ", ".join(f"ADD COLUMN {name} {real}" for name in missing))
        return
    for name in missing:
        writer.execute(f"ALTER TABLE shot_measurements ADD COLUMN {name} {real}")


def _move_sequences(writer: Writer) -> None:
    """Move each PostgreSQL id sequence past the copied ids, so that later inserts go on
    from there (SQLite takes the next rowid from the table itself)."""
    for table in Base.metadata.sorted_tables:
        key = list(table.primary_key.columns)
        if len(key) != 1 or not isinstance(key[0].type, Integer):
            continue
        name = key[0].name
        # setval(NULL, ...) is NULL: a key without a sequence (shots.id) is left alone.
        writer.rows(f"SELECT setval(pg_get_serial_sequence(:t, :c), COALESCE(MAX({name}), 0) + 1, false) FROM {table.name}", {"t": table.name, "c": name})


def _first_line(error: BaseException) -> str:
    message = str(error).strip()
    return message.splitlines()[0] if message else type(error).__name__
