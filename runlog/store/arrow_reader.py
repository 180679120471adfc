"""Reading the catalogue straight into Arrow columns.

Owns the read connection through the ADBC SQLite driver. A large read (the million shots
of an export) comes back as Arrow arrays built in C: about three times faster than
Python's ``sqlite3``, whose per-value Python objects are most of the cost. The
connection is a SQLAlchemy connection as well (the ADBC DB-API under the SQLite dialect),
so the small queries of the same read (runs, figures, ingest log) run in the same read
transaction and see the same snapshot as the large one.

The ADBC driver carries its own copy of SQLite: :mod:`runlog.store.engine` keeps it and
Python's copy from having the same file open at once. When the file is busy in this
process (or the catalogue is not a SQLite file), :func:`arrow_read` gives ``None`` and
the caller reads through its ordinary connection.

On PostgreSQL a large read goes through the ADBC PostgreSQL driver on a second
connection that imports the first one's snapshot (:func:`fetch_postgres_arrow`).
"""

from __future__ import annotations

from collections.abc import Iterator
from contextlib import contextmanager
from typing import Any

import pyarrow as pa
from sqlalchemy import create_engine
from sqlalchemy.engine import Connection, Engine
from sqlalchemy.pool import NullPool

from runlog.store.engine import BUSY_TIMEOUT_MS, hold_for_adbc, release_from_adbc, sqlite_path

__all__ = ["arrow_read", "is_arrow", "fetch_arrow", "fetch_arrow_parallel", "fetch_postgres_arrow", "parallel_readers", "bound_values"]

# The driver infers each column's type from the first batch of rows and refuses a later
# value of another type (a text after 1 024 NULLs). The small queries read through
# SQLAlchemy get one batch of up to this many rows; the large reads of the shots never
# return a NULL (see runlog.selection), so their batches stay at the driver's default.
_SMALL_QUERY_ROWS = 1 << 22


class _Cursor:
    """An ADBC cursor whose rows come from one Arrow table per statement.

    The driver's own ``fetchone`` builds each row value by value (about 13 µs a row);
    converting the result column by column, a slice of rows at a time, is twenty times
    faster and keeps only one slice of Python rows in memory.
    """

    _SLICE = 10_000

    def __init__(self, cursor: Any):
        self._cursor = cursor
        self._table: pa.Table | None = None
        self._done = False
        self._at = 0  # next row of the table not yet in the buffer
        self._buffer: list[tuple] = []
        self._taken = 0  # rows of the buffer handed out

    def execute(self, operation: str, parameters: Any = None) -> None:
        self._table, self._done, self._at, self._buffer, self._taken = None, False, 0, [], 0
        self._cursor.execute(operation, parameters if parameters else None)

    def _result(self) -> pa.Table | None:
        if self._table is None and not self._done:
            self._done = True
            if self._cursor.description is not None:
                self._table = self._cursor.fetch_arrow_table()
        return self._table

    @staticmethod
    def _rows(table: pa.Table) -> list[tuple]:
        return list(zip(*(column.to_pylist() for column in table.columns)))

    def _fill(self) -> bool:
        """Rows waiting in the buffer, converting the next slice if needed; ``False`` at the end."""
        if self._taken < len(self._buffer):
            return True
        table = self._result()
        if table is None or self._at >= table.num_rows:
            return False
        piece = table.slice(self._at, self._SLICE)
        self._at += piece.num_rows
        self._buffer, self._taken = self._rows(piece), 0
        return True

    def fetchone(self) -> tuple | None:
        if not self._fill():
            return None
        self._taken += 1
        return self._buffer[self._taken - 1]

    def fetchmany(self, size: int | None = None) -> list[tuple]:
        size = self._cursor.arraysize if size is None else size
        out: list[tuple] = []
        while len(out) < size and self._fill():
            part = self._buffer[self._taken : self._taken + size - len(out)]
            self._taken += len(part)
            out += part
        return out

    def fetchall(self) -> list[tuple]:
        out = self._buffer[self._taken :]
        self._taken = len(self._buffer)
        table = self._result()
        if table is not None and self._at < table.num_rows:
            out += self._rows(table.slice(self._at))
            self._at = table.num_rows
        return out

    def __getattr__(self, name: str) -> Any:
        return getattr(self._cursor, name)


class _Connection:
    """The ADBC DB-API connection as the SQLite dialect expects it."""

    def __init__(self, adbc: Any):
        self.adbc = adbc
        self.siblings: list[Any] = []  # more connections reading the same snapshot

    def create_function(self, *args: Any, **kwargs: Any) -> None:
        # The dialect registers a REGEXP function on connect; no runlog query uses it.
        return None

    def cursor(self) -> _Cursor:
        cursor = self.adbc.cursor()
        cursor.adbc_statement.set_options(**{"adbc.sqlite.query.batch_rows": str(_SMALL_QUERY_ROWS)})
        return _Cursor(cursor)

    def __getattr__(self, name: str) -> Any:
        return getattr(self.adbc, name)


@contextmanager
def arrow_read(engine: Engine, *, parallel: int = 1) -> Iterator[Connection | None]:
    """A connection to the catalogue's SQLite file through ADBC for reading, inside one read
    transaction; ``None`` when that cannot be had (not a SQLite file, the driver missing,
    the file open in another connection of this process).

    ``parallel`` > 1 asks for that many connections reading the same snapshot, for
    :func:`fetch_arrow_parallel`. They start their read transactions while a write lock
    is held, so no commit can fall between them; when a writer holds the lock at that
    moment the read is not split (:func:`parallel_readers` gives 1) rather than waiting.
    """
    path = sqlite_path(engine.url) if engine.dialect.name == "sqlite" else None
    if path is None or not path.exists():
        yield None
        return
    try:
        import adbc_driver_sqlite.dbapi as adbc_sqlite
    except ImportError:
        yield None
        return
    resolved = str(path.resolve())
    if not hold_for_adbc(resolved):
        yield None
        return

    def open_reader(timeout_ms: int = BUSY_TIMEOUT_MS) -> Any:
        # autocommit off: the driver opens a (deferred) transaction, so every query of
        # this connection reads the snapshot taken by its first read.
        connection = adbc_sqlite.connect(str(path), autocommit=False)
        _run(connection, f"PRAGMA busy_timeout={timeout_ms}")
        return connection

    opened: list[Any] = []
    try:
        primary = _Connection(open_reader())
        opened.append(primary.adbc)
        reader = create_engine("sqlite://", creator=lambda: primary, poolclass=NullPool)
        try:
            # SQLAlchemy ends the driver's first transaction after its first connect;
            # the read transaction that counts starts below.
            with reader.connect() as connection:
                _start_reading(adbc_sqlite, str(path), primary, parallel, open_reader, opened)
                yield connection
        finally:
            reader.dispose()
    finally:
        for connection in reversed(opened):
            try:
                connection.close()
            except Exception:  # closed already, or closing after a failure
                pass
        release_from_adbc(resolved)


def _start_reading(adbc_sqlite: Any, path: str, primary: _Connection, parallel: int, open_reader: Any, opened: list[Any]) -> None:
    """Start the read transaction of ``primary`` and of up to ``parallel - 1`` more
    connections on one snapshot (while a write lock keeps every writer from committing)."""
    lock = None
    if parallel > 1:
        lock = adbc_sqlite.connect(path, autocommit=True)
        opened.append(lock)
        _run(lock, "PRAGMA busy_timeout=0")
        try:
            _run(lock, "BEGIN IMMEDIATE")
        except Exception:  # a writer is writing: read on one connection, do not wait
            lock = None
    if lock is not None:
        for _ in range(parallel - 1):
            primary.siblings.append(open_reader())
            opened.append(primary.siblings[-1])
    for connection in (primary.adbc, *primary.siblings):
        _run(connection, "SELECT count(*) FROM sqlite_master")  # the read transaction starts here
    if lock is not None:
        _run(lock, "ROLLBACK")


def _run(connection: Any, sql: str) -> None:
    cursor = connection.cursor()
    try:
        cursor.execute(sql)
        if cursor.description is not None:
            cursor.fetchall()
    finally:
        cursor.close()


def parallel_readers(connection: Connection) -> int:
    """How many connections of the same snapshot :func:`fetch_arrow_parallel` can use."""
    driver = connection.connection.driver_connection
    return 1 + len(driver.siblings) if isinstance(driver, _Connection) else 1


def fetch_arrow_parallel(connection: Connection, queries: list[Any]) -> list[pa.Table]:
    """:func:`fetch_arrow` for several queries at once, each on its own connection of the
    same snapshot (at most :func:`parallel_readers` queries)."""
    driver = connection.connection.driver_connection
    readers = [driver.adbc, *driver.siblings]
    if len(queries) > len(readers):
        raise ValueError(f"{len(queries)} queries for {len(readers)} connections")
    if len(queries) == 1:
        return [fetch_arrow(connection, queries[0])]
    from concurrent.futures import ThreadPoolExecutor

    # The driver reads into Arrow without holding the interpreter lock: the queries
    # run side by side on separate cores.
    with ThreadPoolExecutor(max_workers=len(queries)) as pool:
        futures = [pool.submit(_fetch, reader, query, connection.dialect) for reader, query in zip(readers, queries)]
        return [future.result() for future in futures]


def is_arrow(connection: Connection) -> bool:
    """Whether ``connection`` came from :func:`arrow_read`."""
    return isinstance(connection.connection.driver_connection, _Connection)


def bound_values(compiled: Any, dialect: Any) -> list[object]:
    """The positional values of a compiled statement, processed by their types."""
    out = []
    for name in compiled.positiontup or []:
        raw = compiled.params[name]
        process = compiled.binds[name].type.bind_processor(dialect)
        out.append(process(raw) if process is not None else raw)
    return out


def fetch_arrow(connection: Connection, query: Any) -> pa.Table:
    """The rows of ``query`` as an Arrow table, on a connection from :func:`arrow_read`.

    The caller makes sure no column holds NULL (or only NULL) in a way the driver's type
    inference from the first batch would get wrong.
    """
    return _fetch(connection.connection.driver_connection.adbc, query, connection.dialect)


def _fetch(adbc: Any, query: Any, dialect: Any) -> pa.Table:
    compiled = query.compile(dialect=dialect, compile_kwargs={"render_postcompile": True})
    cursor = adbc.cursor()
    try:
        values = bound_values(compiled, dialect)
        cursor.execute(str(compiled), values if values else None)
        return cursor.fetch_arrow_table()
    finally:
        cursor.close()


# Below this many rows psycopg's rows are as quick as a second connection.
_POSTGRES_ARROW_ROWS = 50_000


def fetch_postgres_arrow(connection: Connection, queries: list[Any], rows: int) -> list[pa.Table] | None:
    """The rows of each of ``queries`` as an Arrow table through the ADBC PostgreSQL
    driver (binary COPY into Arrow), each on a connection of its own, side by side, all
    reading the snapshot of ``connection``'s transaction; ``None`` when not worth it (fewer
    than about 50 000 ``rows`` expected) or not possible (driver missing, the server
    refusing more connections): the caller then reads the rows through ``connection``.

    The other connections import the first one's snapshot (``pg_export_snapshot`` and
    ``SET TRANSACTION SNAPSHOT``, PostgreSQL manual 9.27.5), so they see exactly what the
    queries before them saw when ``connection`` is in a repeatable-read transaction.
    """
    if rows < _POSTGRES_ARROW_ROWS or connection.dialect.name != "postgresql":
        return None
    try:
        import adbc_driver_postgresql.dbapi as adbc_postgres
        from sqlalchemy.dialects.postgresql import asyncpg
    except ImportError:
        return None
    from sqlalchemy import text

    # A hot standby cannot export snapshots (and a failed statement would spoil the
    # caller's transaction; a savepoint is no way out: subtransactions cannot export).
    if connection.execute(text("SELECT pg_is_in_recovery()")).scalar():
        return None
    snapshot = connection.execute(text("SELECT pg_export_snapshot()")).scalar()
    address = connection.engine.url.set(drivername="postgresql").render_as_string(hide_password=False)
    readers: list[Any] = []
    try:
        for _ in queries:
            readers.append(adbc_postgres.connect(address, autocommit=True))
    except Exception:  # e.g. no connection slot left: the rows path still works
        for reader in readers:
            reader.close()
        return None
    # The driver binds numbered parameters ($1, $2, ...): compile for a dialect that writes them.
    dialect = asyncpg.dialect()

    def read(reader: Any, query: Any) -> pa.Table:
        compiled = query.compile(dialect=dialect, compile_kwargs={"render_postcompile": True})
        cursor = reader.cursor()
        try:
            cursor.execute("BEGIN ISOLATION LEVEL REPEATABLE READ READ ONLY")
            cursor.execute(f"SET TRANSACTION SNAPSHOT '{snapshot}'")  # an id the server just gave
            # Compiling a plan for the one large read costs more than it saves (~1 s for
            # a million shots). Forcing hash joins was tried and dropped: faster for a
            # million shots (5.7 s -> 3.6 s), but a filter on a measurement then scans
            # every month of it (81 600 shots: 0.25 s -> 1.2 s, growing with the years).
            for setting in ("jit = off", "work_mem = '64MB'"):
                cursor.execute(f"SET LOCAL {setting}")
            values = bound_values(compiled, dialect)
            cursor.execute(str(compiled), values if values else None)
            table = cursor.fetch_arrow_table()
            cursor.execute("COMMIT")
            return table
        finally:
            cursor.close()

    try:
        if len(queries) == 1:
            return [read(readers[0], queries[0])]
        from concurrent.futures import ThreadPoolExecutor

        # Each server process runs its part of the join on a core of its own.
        with ThreadPoolExecutor(max_workers=len(queries)) as pool:
            return [future.result() for future in [pool.submit(read, reader, query) for reader, query in zip(readers, queries)]]
    finally:
        for reader in readers:
            reader.close()
