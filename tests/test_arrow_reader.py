"""The Arrow read path (ADBC on SQLite): the same tables as the row path, one snapshot
per read, and the guard that keeps the two SQLite libraries of the process off the same
file at once. The store tests run on SQLite and PostgreSQL; PostgreSQL has no Arrow
path, so there they check that the ordinary read is used and is one snapshot as well.
"""

from __future__ import annotations

import datetime as dt
import subprocess
import sys
import threading
import time

import pytest
from sqlalchemy import func, select

import runlog
from conftest import T0, shot_table, write_table
from runlog import selection as selection_module
from runlog.selection import select_on, select_table
from runlog.store import arrow_reader
from runlog.store import schema as s
from runlog.store.arrow_reader import arrow_read, fetch_arrow, fetch_arrow_parallel, is_arrow, parallel_readers
from runlog.store.engine import hold_for_adbc, release_from_adbc, sqlite_path
from runlog.errors import StoreError
from test_filters import lab  # noqa: F401 - the module-scoped catalogue of the filter tests

FILTERS = [
    None,
    "shot >= 0",
    "beam = 'horizontal'",
    "flag = true",
    "wait between 100 us and 0.5 ms",
    "signal > 0 or atom_number < 5",
    "not beam in ('vertical', 'x') and date >= '2026-03-01'",
]


@pytest.mark.parametrize("where", FILTERS)
def test_both_read_paths_give_the_same_table(lab, where, monkeypatch):  # noqa: F811 - fixture imported above
    catalogue = lab
    if catalogue.engine.dialect.name == "postgresql":
        # The ADBC PostgreSQL read (more connections, same snapshot, split by runs as a
        # large read is) against psycopg's rows.
        monkeypatch.setattr(arrow_reader, "_POSTGRES_ARROW_ROWS", 0)
        monkeypatch.setattr(selection_module, "_SPLIT_SHOTS", 1)
        monkeypatch.setattr(selection_module, "PARALLEL_READS", 3)
        used = []

        def through_adbc(connection, queries, rows):
            tables = arrow_reader.fetch_postgres_arrow(connection, queries, rows)
            used.append(None if tables is None else len(tables))
            return tables

        monkeypatch.setattr(selection_module, "fetch_postgres_arrow", through_adbc)
        with catalogue.engine.connect().execution_options(isolation_level="REPEATABLE READ") as connection:
            arrow = select_on(connection, where, shot_ids=True)
        assert len(used) == 1 and used[0] is not None and used[0] >= 2  # through ADBC, split
        monkeypatch.setattr(selection_module, "_SPLIT_SHOTS", 200_000)
        monkeypatch.setattr(arrow_reader, "_POSTGRES_ARROW_ROWS", 10**12)
    else:
        with arrow_read(catalogue.engine) as fast:
            assert fast is not None and is_arrow(fast)
            arrow = select_on(fast, where, shot_ids=True)
    with catalogue.engine.connect() as connection:
        assert not is_arrow(connection)
        rows = select_on(connection, where, shot_ids=True)
    assert arrow.table.num_rows > 0
    assert arrow.table.equals(rows.table, check_metadata=True)
    assert (arrow.shot_ids == rows.shot_ids).all() and (arrow.run_ids == rows.run_ids).all()
    assert arrow.units == rows.units


def _ingest_in_another_process(url: str, path) -> None:
    code = "import sys, runlog; c = runlog.open(sys.argv[1]); r = c.ingest([sys.argv[2]]); assert r[0].status == 'ingested', r; c.close()"
    subprocess.run([sys.executable, "-c", code, url, str(path)], check=True, timeout=120)


def test_one_read_is_one_snapshot(db_url, tmp_path, monkeypatch):
    with runlog.open(db_url) as catalogue:
        first = write_table(tmp_path / "first.parquet", shot_table({"r1": 20}, seed=1))
        catalogue.ingest([first])
        later = write_table(tmp_path / "later.parquet", shot_table({"r2": 30}, seed=2, start=T0 + dt.timedelta(hours=2)))
        count = select(func.count()).select_from(s.Shot.__table__)
        engine = catalogue.engine
        with arrow_read(engine) as fast:
            if fast is not None:
                assert fetch_arrow(fast, count).column(0)[0].as_py() == 20
                # Another process commits while this read transaction is open; the
                # read goes on seeing the catalogue as it was.
                _ingest_in_another_process(db_url, later)
                assert fetch_arrow(fast, count).column(0)[0].as_py() == 20
                assert select_on(fast, None).table.num_rows == 20
        if fast is None:
            assert engine.dialect.name == "postgresql"
            monkeypatch.setattr(arrow_reader, "_POSTGRES_ARROW_ROWS", 0)  # the large-read path, on a few shots
            with engine.connect().execution_options(isolation_level="REPEATABLE READ") as connection:
                assert connection.execute(count).scalar() == 20
                _ingest_in_another_process(db_url, later)
                assert connection.execute(count).scalar() == 20
                assert select_on(connection, None).table.num_rows == 20
        assert select_table(catalogue, None).table.num_rows == 50


def test_the_export_reads_through_arrow_on_sqlite(db_url, tmp_path, monkeypatch):
    with runlog.open(db_url) as catalogue:
        catalogue.ingest([write_table(tmp_path / "a.parquet", shot_table({"r1": 15, "r2": 5}, seed=4))])
        used = []
        original = selection_module._read_arrow

        def spy(*args, **kwargs):
            used.append("arrow")
            return original(*args, **kwargs)

        monkeypatch.setattr(selection_module, "_read_arrow", spy)
        result = catalogue.export("shot >= 0", tmp_path / "package")
        assert result.shots == 20
        assert used == (["arrow"] if catalogue.engine.dialect.name == "sqlite" else [])


def test_no_arrow_read_while_this_process_has_the_file_open(tmp_path):
    # SQLite only: the guard is about the two SQLite libraries of one process.
    url = f"sqlite:///{tmp_path / 'c.sqlite'}"
    with runlog.open(url) as catalogue:
        catalogue.ingest([write_table(tmp_path / "a.parquet", shot_table({"r1": 10}, seed=5))])
        with catalogue.engine.connect() as connection:
            connection.execute(select(1)).all()
            with arrow_read(catalogue.engine) as fast:
                assert fast is None
            # The selection falls back to the ordinary read meanwhile.
            assert select_table(catalogue, "shot < 4").table.num_rows == 4
        with arrow_read(catalogue.engine) as fast:
            assert fast is not None


def test_python_connections_wait_for_an_adbc_user_of_another_thread(tmp_path):
    url = f"sqlite:///{tmp_path / 'c.sqlite'}"
    with runlog.open(url) as catalogue:
        catalogue.ingest([write_table(tmp_path / "a.parquet", shot_table({"r1": 10}, seed=6))])
        path = str(sqlite_path(catalogue.engine.url).resolve())
        assert hold_for_adbc(path)
        try:
            # The same thread opening the file through Python's SQLite is a bug: refused.
            with pytest.raises(StoreError, match="internal"):
                with catalogue.engine.connect():
                    pass
            opened: list[float] = []

            def reader() -> None:
                with catalogue.engine.connect() as connection:
                    connection.execute(select(1)).all()
                opened.append(time.monotonic())

            thread = threading.Thread(target=reader)
            thread.start()
            time.sleep(0.3)
            assert opened == []  # still waiting
            released = time.monotonic()
        finally:
            release_from_adbc(path)
        thread.join(timeout=10)
        assert opened and opened[0] >= released


def test_parallel_readers_share_one_snapshot(tmp_path):
    # SQLite only: the split read is the SQLite (ADBC) path.
    url = f"sqlite:///{tmp_path / 'c.sqlite'}"
    with runlog.open(url) as catalogue:
        catalogue.ingest([write_table(tmp_path / "a.parquet", shot_table({"r1": 20}, seed=7))])
        later = write_table(tmp_path / "b.parquet", shot_table({"r2": 30}, seed=8, start=T0 + dt.timedelta(hours=2)))
        count = select(func.count()).select_from(s.Shot.__table__)
        with arrow_read(catalogue.engine, parallel=3) as fast:
            assert parallel_readers(fast) == 3
            _ingest_in_another_process(url, later)
            counts = [t.column(0)[0].as_py() for t in fetch_arrow_parallel(fast, [count, count, count])]
            assert counts == [20, 20, 20]
        with arrow_read(catalogue.engine, parallel=2) as fast:
            assert [t.column(0)[0].as_py() for t in fetch_arrow_parallel(fast, [count, count])] == [50, 50]


def test_a_busy_writer_means_one_reader_not_a_wait(tmp_path):
    url = f"sqlite:///{tmp_path / 'c.sqlite'}"
    with runlog.open(url) as catalogue:
        catalogue.ingest([write_table(tmp_path / "a.parquet", shot_table({"r1": 10}, seed=10))])
        path = sqlite_path(catalogue.engine.url)
    # Another process holds the write lock for a while.
    holder = subprocess.Popen(
        [sys.executable, "-c", "import sqlite3, sys, time; c = sqlite3.connect(sys.argv[1], isolation_level=None); c.execute('BEGIN IMMEDIATE'); print('held', flush=True); time.sleep(4); c.execute('ROLLBACK')", str(path)],
        stdout=subprocess.PIPE,
        text=True,
    )
    try:
        assert holder.stdout.readline().strip() == "held"
        with runlog.open(url) as catalogue:
            started = time.monotonic()
            with arrow_read(catalogue.engine, parallel=2) as fast:
                assert parallel_readers(fast) == 1
                assert select_on(fast, None).table.num_rows == 10
            assert time.monotonic() - started < 3
    finally:
        holder.wait(timeout=30)


SIMPLE_FILTERS = [
    "depth > 62 uK",  # scanned in one run: the general form
    "depth > 62 uK and apparatus = 'west'",
    "wait = 200 us",
    "not wait = 200 us",
    "beam = 'horizontal' or wait < 20 us",
    "wait between 100 us and 0.5 ms and date >= '2026-03-01'",
]


@pytest.mark.parametrize("where", SIMPLE_FILTERS)
def test_deciding_unscanned_parameters_by_run_gives_the_same_shots(lab, where, monkeypatch):  # noqa: F811
    # The selection compiles a comparison on a parameter that no candidate run scans as
    # a whole-run test; the same filter with that shortcut disabled must select the same.
    catalogue = lab
    shortcut = selection_module._exact_condition
    fast = select_table(catalogue, where, shot_ids=True)
    monkeypatch.setattr(selection_module, "_exact_condition", lambda c, compiled, w, scanned, candidates: shortcut(c, compiled, w, scanned | compiled.parameters, candidates))
    general = select_table(catalogue, where, shot_ids=True)
    assert fast.table.equals(general.table) and (fast.shot_ids == general.shot_ids).all()
    assert fast.table.num_rows > 0


def test_the_shortcut_is_taken_when_no_candidate_run_scans_the_parameter(lab, monkeypatch):  # noqa: F811
    taken = []
    shortcut = selection_module._exact_condition

    def watched(connection, compiled, where_text, scanned_here, candidates):
        taken.append(bool(compiled.parameters) and not (compiled.parameters & scanned_here))
        return shortcut(connection, compiled, where_text, scanned_here, candidates)

    monkeypatch.setattr(selection_module, "_exact_condition", watched)
    select_table(lab, "wait = 200 us and beam = 'horizontal'")
    select_table(lab, "wait between 0 us and 1 ms")  # runs scanning wait are candidates
    assert taken == [True, False]


@pytest.mark.parametrize("where", ["shot >= 3", "shot >= 45"])
def test_a_split_read_gives_the_same_rows_as_one_read(tmp_path, monkeypatch, where):
    # With "shot >= 45" the first run-id range holds only runs with fewer than 46 shots:
    # its piece is empty, and an empty result carries no column types of its own.
    url = f"sqlite:///{tmp_path / 'c.sqlite'}"
    sizes = {f"r{i:02d}": 40 + i for i in range(12)}
    with runlog.open(url) as catalogue:
        catalogue.ingest([write_table(tmp_path / "a.parquet", shot_table(sizes, seed=9))])
        whole = select_table(catalogue, where, shot_ids=True)
        monkeypatch.setattr(selection_module, "_SPLIT_SHOTS", 1)
        with arrow_read(catalogue.engine, parallel=3) as fast:
            assert parallel_readers(fast) == 3
            split = select_on(fast, where, shot_ids=True)
        assert split.table.equals(whole.table, check_metadata=True)
        assert (split.shot_ids == whole.shot_ids).all()
        lowest = int(where.split(">=")[1])
        assert split.table.num_rows == sum(max(0, size - lowest) for size in sizes.values())


def test_rows_come_out_slice_by_slice_in_order(monkeypatch):
    # The cursor under SQLAlchemy converts Arrow results to rows a slice at a time; every
    # way of fetching must hand out each row once, in order, across slice boundaries.
    import adbc_driver_sqlite.dbapi as adbc_sqlite

    monkeypatch.setattr(arrow_reader._Cursor, "_SLICE", 7)
    connection = adbc_sqlite.connect(":memory:", autocommit=True)
    try:
        setup = connection.cursor()
        setup.execute("CREATE TABLE t (i INTEGER, x REAL, s TEXT)")
        setup.execute("WITH RECURSIVE n(i) AS (SELECT 0 UNION ALL SELECT i + 1 FROM n WHERE i < 24) INSERT INTO t SELECT i, i * 0.5, NULL FROM n")
        setup.close()
        cursor = arrow_reader._Connection(connection).cursor()
        cursor.execute("SELECT i, x, s FROM t ORDER BY i")
        got = [cursor.fetchone(), *cursor.fetchmany(9), *cursor.fetchmany(3)]
        got += cursor.fetchall()
        assert [row[0] for row in got] == list(range(25))
        assert got[10] == (10, 5.0, None)
        assert cursor.fetchone() is None and cursor.fetchmany(5) == [] and cursor.fetchall() == []
        cursor.execute("PRAGMA user_version = 3")  # no result set
        assert cursor.fetchall() == []
        cursor.close()
    finally:
        connection.close()
