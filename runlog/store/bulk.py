"""Bulk writing: one transaction per file, small statements and fast appends on one connection.

SQLite: an ADBC connection (``adbc_ingest`` appends Arrow tables at ~1-2 M rows/s) that
opens the transaction with ``BEGIN IMMEDIATE``, so concurrent writers queue on the busy
timeout instead of failing half-way. PostgreSQL: the SQLAlchemy/psycopg connection, with
``COPY ... FROM STDIN`` for appends and a transaction-scoped advisory lock so that shot ids
are allocated by one writer at a time. Both speak the same tiny interface, so ingest is
written once. Statements use ``:name`` parameters.

On PostgreSQL the shot-level tables are partitioned by month: the writer first makes the
months it is told of, in a short transaction of its own under the same lock, so the data
transaction never creates tables and the common case (the months exist) costs one query.
"""

from __future__ import annotations

import datetime as dt
import io
import re
from collections.abc import Iterable
from typing import Any, Protocol

import numpy as np
import pyarrow as pa
import pyarrow.csv as pacsv
from sqlalchemy import text
from sqlalchemy.engine import Engine

from runlog.store.engine import BUSY_TIMEOUT_MS, exclusive_bulk_writer, sqlite_path
from runlog.store.partitions import ensure_months, missing_months
from runlog.store.schema import to_epoch_us

__all__ = ["Writer", "open_writer"]

_PARAMETER = re.compile(r":([A-Za-z_][A-Za-z0-9_]*)")
# Any constant works; it only has to be the same for every runlog writer.
_WRITER_LOCK = 0x72756E6C6F67


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


def _make_months(engine: Engine, months: Iterable[dt.date]) -> None:
    """Create the missing month partitions, committed before the data transaction begins.

    Waiting for the writer lock holds no other lock, and attaching a month blocks neither
    readers nor writers (runlog.store.partitions), so a new month costs the dashboard
    nothing; under the lock, no other writer adds a measurement column meanwhile.
    """
    months = sorted(set(months))
    if not months:
        return
    with engine.connect() as connection:
        missing = missing_months(connection, months)
        connection.rollback()
        if not missing:
            return
        with connection.begin():
            connection.execute(text("SELECT pg_advisory_xact_lock(:key)"), {"key": _WRITER_LOCK})
            for month in missing:
                ensure_months(connection, month, month)


class _PostgresWriter:
    dialect = "postgresql"
    partitioned = True

    def __init__(self, engine: Engine, months: Iterable[dt.date] = ()):
        _make_months(engine, months)
        self._connection = engine.connect()
        self._transaction = self._connection.begin()
        self._connection.execute(text("SELECT pg_advisory_xact_lock(:key)"), {"key": _WRITER_LOCK})

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


def open_writer(engine: Engine, months: Iterable[dt.date] = ()) -> Writer:
    """A writer holding an open write transaction on the catalogue.

    ``months`` (UTC calendar months, as dates) are those the shots to be written fall in;
    on PostgreSQL their partitions are made first. Rows outside them cannot be written there.
    """
    if engine.dialect.name == "sqlite":
        return _SqliteWriter(engine)
    return _PostgresWriter(engine, months)
