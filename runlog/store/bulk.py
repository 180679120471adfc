"""Bulk writing: one transaction per file, small statements and fast appends on one connection.

SQLite: an ADBC connection (``adbc_ingest`` appends Arrow tables at ~1-2 M rows/s) that
opens the transaction with ``BEGIN IMMEDIATE``, so concurrent writers queue on the busy
timeout instead of failing half-way. PostgreSQL: the SQLAlchemy/psycopg connection, with
``COPY ... FROM STDIN`` for appends, under the writer lock so that shot ids are allocated
by one writer at a time. Both speak the same tiny interface, so ingest is written once.
Statements use ``:name`` parameters.

The writer lock on PostgreSQL is the row of ``alembic_version``, locked ``FOR UPDATE``
(:func:`take_writer_lock`). Locking a row needs the UPDATE privilege on its table, which
a read-only role never has, so no reader can take or hold it — an advisory lock, which any
role may take, let a reader stop every ingest. Every wait is bounded: the lock itself
waits at most :data:`WRITER_WAIT_S` for another writer's file, every later lock in the
transaction :data:`LOCK_TIMEOUT_S` (:data:`DDL_LOCK_TIMEOUT_S` in the short schema
transactions), every statement :data:`STATEMENT_TIMEOUT_S`; a wait that runs out is a
``busy`` refusal of that one file, never a hang. See docs/architecture.md, "Writers and
readers on PostgreSQL".

Schema changes are made ahead of the data transaction, each in a short transaction of its
own (:func:`short_write`): on PostgreSQL the shot-level tables are partitioned by month,
and the writer first makes the months it is told of; ingest adds new measurement columns
the same way. Such a change waits for the ACCESS EXCLUSIVE lock, and while it waits every
new reader of the table queues behind it, so it waits only :data:`DDL_LOCK_TIMEOUT_S` and
is tried again a few times: a reader idle in an open transaction delays an ingest by
seconds and then the file is refused (naming the session that holds the table), instead
of blocking the ingest and, behind it, the dashboard.
"""

from __future__ import annotations

import datetime as dt
import io
import re
import time
from collections.abc import Callable, Iterable, Mapping
from typing import Any, Protocol

import numpy as np
import pyarrow as pa
import pyarrow.csv as pacsv
from sqlalchemy import text
from sqlalchemy.engine import Engine

from runlog.store.engine import BUSY_TIMEOUT_MS, exclusive_bulk_writer, sqlite_path
from runlog.store.failures import BusyError
from runlog.store.partitions import SHOT_TABLES, ensure_partitions, missing_months
from runlog.store.schema import to_epoch_us

__all__ = [
    "Writer",
    "open_writer",
    "short_write",
    "take_writer_lock",
    "WRITER_WAIT_S",
    "LOCK_TIMEOUT_S",
    "DDL_LOCK_TIMEOUT_S",
    "STATEMENT_TIMEOUT_S",
    "DDL_ATTEMPTS",
]

_PARAMETER = re.compile(r":([A-Za-z_][A-Za-z0-9_]*)")

#: How long a writer waits for another writer's file (SQLite's busy timeout is alike).
WRITER_WAIT_S = 600
#: How long any other lock of the data transaction is waited for.
LOCK_TIMEOUT_S = 30
#: How long a schema change waits for its table (readers queue behind it meanwhile).
DDL_LOCK_TIMEOUT_S = 3
#: How often a schema change is tried before the file is refused; pauses 1, 2, 4 ... s.
DDL_ATTEMPTS = 4
#: The longest any one statement of a writer may run.
STATEMENT_TIMEOUT_S = 900

_WRITER_LOCK_SQL = "SELECT version_num FROM alembic_version FOR UPDATE"
_LOCK_NOT_AVAILABLE = "55P03"


def take_writer_lock(connection, lock_timeout_s: float = LOCK_TIMEOUT_S) -> None:
    """Take the writer lock in ``connection``'s open PostgreSQL transaction, then bound
    every later lock wait of the transaction by ``lock_timeout_s``."""
    connection.execute(text(f"SET LOCAL statement_timeout = '{int(STATEMENT_TIMEOUT_S * 1000)}ms'"))
    connection.execute(text(f"SET LOCAL lock_timeout = '{int(WRITER_WAIT_S * 1000)}ms'"))
    try:
        connection.execute(text(_WRITER_LOCK_SQL)).all()
    except Exception as error:
        if _lock_not_available(error):
            raise BusyError(f"another writer held the writer lock for over {WRITER_WAIT_S} s (lock timeout); try again when it is done") from None
        raise
    connection.execute(text(f"SET LOCAL lock_timeout = '{int(lock_timeout_s * 1000)}ms'"))


def _lock_not_available(error: BaseException) -> bool:
    driver = getattr(error, "orig", None) or error
    return getattr(driver, "sqlstate", None) == _LOCK_NOT_AVAILABLE or "lock timeout" in str(driver).lower()


def _holders(engine: Engine, table: str) -> str:
    """Who holds ``table`` (or its partitions) in another session, for the refusal."""
    try:
        with engine.connect() as connection:
            rows = connection.execute(
                text(
                    "SELECT DISTINCT a.pid, a.usename, a.state, a.xact_start FROM pg_locks l "
                    "JOIN pg_stat_activity a ON a.pid = l.pid "
                    "WHERE l.granted AND l.pid <> pg_backend_pid() AND l.relation IN ("
                    "  SELECT c.oid FROM pg_class c WHERE c.oid = to_regclass(:t) "
                    "  UNION SELECT i.inhrelid FROM pg_inherits i WHERE i.inhparent = to_regclass(:t)) "
                    "ORDER BY a.xact_start LIMIT 3"
                ),
                {"t": table},
            ).all()
    except Exception:  # noqa: BLE001 - the refusal is worth more than the detail
        return ""
    if not rows:
        return ""
    shown = [f"pid {pid} (role {user}, {state}{f' since {start:%H:%M:%S}' if start else ''})" for pid, user, state, start in rows]
    return f"; {table} is held by session {', '.join(shown)}"


def short_write(engine: Engine, work: Callable[[object], None], *, what: str, table: str | None = None) -> None:
    """Run ``work(connection)`` in a short write transaction of its own, under the writer
    lock on PostgreSQL (``BEGIN IMMEDIATE`` on SQLite), for schema changes made ahead of a
    file's data transaction.

    On PostgreSQL its locks are waited for at most :data:`DDL_LOCK_TIMEOUT_S`; a wait that
    runs out rolls back and tries again after a pause, :data:`DDL_ATTEMPTS` times in all,
    then raises :class:`BusyError` naming ``what`` and the sessions holding ``table``.
    """
    if engine.dialect.name == "sqlite":
        with engine.connect().execution_options(sqlite_begin="IMMEDIATE") as connection, connection.begin():
            work(connection)
        return
    for attempt in range(DDL_ATTEMPTS):
        try:
            with engine.connect() as connection, connection.begin():
                take_writer_lock(connection, DDL_LOCK_TIMEOUT_S)
                work(connection)
            return
        except Exception as error:
            if isinstance(error, BusyError) or not _lock_not_available(error):
                raise  # the writer lock's own wait, or not a wait at all
            if attempt + 1 == DDL_ATTEMPTS:
                waited = DDL_ATTEMPTS * DDL_LOCK_TIMEOUT_S + 2 ** (DDL_ATTEMPTS - 1) - 1
                holders = _holders(engine, table) if table else ""
                raise BusyError(f"{what} waited {waited} s for its table and gave up{holders}; close that session's open transaction, or try again") from None
            time.sleep(2**attempt)


class Writer(Protocol):
    dialect: str
    #: Whether the shot-level tables are partitioned by month, so that the children carry
    #: the shot's ``time`` (PostgreSQL).
    partitioned: bool

    def rows(self, sql: str, params: dict[str, Any] | None = None) -> list[tuple]: ...

    def execute(self, sql: str, params: dict[str, Any] | None = None) -> None: ...

    def append(self, table: str, data: pa.Table) -> None: ...

    def commit(self) -> None: ...

    def rollback(self) -> None: ...

    def close(self) -> None: ...


def _sqlite_value(value: Any) -> Any:
    if isinstance(value, dt.datetime):
        if value.tzinfo is None:
            raise ValueError("naive datetime")
        return to_epoch_us(value)
    if isinstance(value, dt.date):
        return value.isoformat()  # SQLAlchemy's Date on SQLite: ISO text
    if isinstance(value, (bool, np.bool_)):
        return int(value)
    if isinstance(value, np.integer):
        return int(value)
    if isinstance(value, np.floating):
        return float(value)
    return value


def _sqlite_arrow(data: pa.Table) -> pa.Table:
    # Times as integer microseconds since the epoch, as UTCDateTime stores them on SQLite.
    columns = []
    for column in data.columns:
        if pa.types.is_timestamp(column.type):
            column = column.cast(pa.timestamp("us", tz="UTC")).cast(pa.int64())
        elif pa.types.is_boolean(column.type):
            column = column.cast(pa.int64())
        columns.append(column)
    return pa.table(columns, names=data.column_names)


class _SqliteWriter:
    dialect = "sqlite"
    partitioned = False

    def __init__(self, engine: Engine):
        import adbc_driver_sqlite.dbapi as adbc_sqlite

        path = sqlite_path(engine.url)
        if path is None:
            raise ValueError("bulk writing needs a SQLite file, not an in-memory database")
        self._path = str(path.resolve())
        exclusive_bulk_writer(self._path, True)
        try:
            self._connection = adbc_sqlite.connect(str(path), autocommit=True)
            self._cursor = self._connection.cursor()
            # Foreign keys are off on this connection only: every id it writes was just
            # read or allocated inside the same transaction, and checking each of millions
            # of appended rows against its parent costs a third of the write time.
            for pragma in (f"busy_timeout={BUSY_TIMEOUT_MS}", "journal_mode=WAL", "synchronous=NORMAL", "foreign_keys=OFF", "cache_size=-65536"):
                self._cursor.execute(f"PRAGMA {pragma}")
                self._cursor.fetchall()
            self._cursor.execute("BEGIN IMMEDIATE")
        except BaseException:
            exclusive_bulk_writer(self._path, False)
            raise
        self._open = True

    def _run(self, sql: str, params: dict[str, Any] | None) -> None:
        names = _PARAMETER.findall(sql)
        values = [_sqlite_value((params or {})[name]) for name in names]
        self._cursor.execute(_PARAMETER.sub("?", sql), values if values else None)

    def rows(self, sql: str, params: dict[str, Any] | None = None) -> list[tuple]:
        self._run(sql, params)
        return [tuple(row) for row in self._cursor.fetchall()]

    def execute(self, sql: str, params: dict[str, Any] | None = None) -> None:
        self._run(sql, params)

    def append(self, table: str, data: pa.Table) -> None:
        if data.num_rows:
            self._cursor.adbc_ingest(table, _sqlite_arrow(data), mode="append")

    def commit(self) -> None:
        self._cursor.execute("COMMIT")
        self._open = False

    def rollback(self) -> None:
        if self._open:
            self._cursor.execute("ROLLBACK")
            self._open = False

    def close(self) -> None:
        try:
            self.rollback()
        except Exception:  # noqa: BLE001 - closing discards the transaction anyway; the error that
            pass  # led here (e.g. a read-only file) is the one to report, not the rollback's
        finally:
            self._open = False
            try:
                self._cursor.close()
                self._connection.close()
            finally:
                exclusive_bulk_writer(self._path, False)


def _copy_text(data: pa.Table) -> pa.Table:
    columns = []
    for column in data.columns:
        if pa.types.is_binary(column.type) or pa.types.is_large_binary(column.type) or pa.types.is_fixed_size_binary(column.type):
            # bytea in COPY's text form: \x followed by hex digits.
            column = pa.array(["\\x" + value.hex() if value is not None else None for value in column.to_pylist()], pa.string())
        columns.append(column)
    return pa.table(columns, names=data.column_names)


def _make_months(engine: Engine, months: Iterable[dt.date] | Mapping[dt.date, int], tables: tuple[str, ...] = SHOT_TABLES) -> None:
    """Create the missing partitions, committed before the data transaction begins.

    ``months`` are UTC months (first days), with the rows each will get when known (a
    sparse year then gets one partition: :func:`runlog.store.partitions.ensure_partitions`).
    Attaching a partition blocks neither readers nor writers (runlog.store.partitions), so
    a new month costs the dashboard nothing; under the writer lock, no other writer adds a
    measurement column meanwhile.
    """
    counts: dict[dt.date, int | None] = dict(months) if isinstance(months, Mapping) else {month: None for month in months}
    if not counts:
        return
    with engine.connect() as connection:
        missing = missing_months(connection, counts, tables)
        connection.rollback()
    if not missing:
        return

    def make(connection) -> None:
        ensure_partitions(connection, {month: counts[month] for month in missing}, tables)

    short_write(engine, make, what=f"making the month partitions {missing[0]:%Y-%m}..{missing[-1]:%Y-%m}", table=tables[0])


class _PostgresWriter:
    dialect = "postgresql"
    partitioned = True

    def __init__(self, engine: Engine, months: Iterable[dt.date] | Mapping[dt.date, int] = (), tables: tuple[str, ...] = SHOT_TABLES):
        _make_months(engine, months, tables)
        self._connection = engine.connect()
        self._transaction = self._connection.begin()
        try:
            take_writer_lock(self._connection)
        except BaseException:
            self.close()
            raise

    def rows(self, sql: str, params: dict[str, Any] | None = None) -> list[tuple]:
        return [tuple(row) for row in self._connection.execute(text(sql), params or {}).fetchall()]

    def execute(self, sql: str, params: dict[str, Any] | None = None) -> None:
        self._connection.execute(text(sql), params or {})

    def append(self, table: str, data: pa.Table) -> None:
        if not data.num_rows:
            return
        buffer = io.BytesIO()
        pacsv.write_csv(
            _copy_text(data),
            buffer,
            pacsv.WriteOptions(include_header=False, quoting_style="needed", batch_size=65536),
        )
        columns = ", ".join(data.column_names)
        raw = self._connection.connection.driver_connection
        with raw.cursor() as cursor:
            with cursor.copy(f"COPY {table} ({columns}) FROM STDIN WITH (FORMAT csv)") as copy:
                copy.write(buffer.getbuffer())

    def commit(self) -> None:
        self._transaction.commit()

    def rollback(self) -> None:
        if self._transaction.is_active:
            self._transaction.rollback()

    def close(self) -> None:
        try:
            self.rollback()
        except Exception:  # noqa: BLE001 - as for SQLite: report the error that led here
            pass
        finally:
            self._connection.close()


def open_writer(engine: Engine, months: Iterable[dt.date] | Mapping[dt.date, int] = (), tables: tuple[str, ...] = SHOT_TABLES) -> Writer:
    """A writer holding an open write transaction on the catalogue.

    ``months`` (UTC calendar months, as dates; a mapping gives the rows of each) are those
    the rows to be written fall in; on PostgreSQL the partitions of ``tables`` (the
    shot-level tables by default, or the monitor values) for them are made first. Rows
    outside them cannot be written there.
    """
    if engine.dialect.name == "sqlite":
        return _SqliteWriter(engine)
    return _PostgresWriter(engine, months, tables)
