"""Monthly partitions of the shot-level tables on PostgreSQL; SQLite's layout unchanged.

Sources of the checks: the PostgreSQL 15 manual for the system catalogues read here
(pg_partitioned_table: partstrat 'r' is range partitioning; pg_inherits; pg_locks) and for
the lock levels (5.11.2.2 "Partition Maintenance": ATTACH PARTITION takes SHARE UPDATE
EXCLUSIVE on the parent, CREATE TABLE .. PARTITION OF takes ACCESS EXCLUSIVE). Expected
row counts per month are counted in the tests from the times the tests write.
"""

from __future__ import annotations

import datetime as dt
import os
import subprocess
import sys
import threading
import time
from collections import Counter

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from conftest import shot_table, write_table
from sqlalchemy import inspect, text

import runlog
import runlog.ingest
from runlog.store import bulk, migrate, partitions
from runlog.store.engine import make_engine
from runlog.store.partitions import SHOT_TABLES, SPARSE_MONTH_SHOTS, ensure_months, ensure_partitions, month_start, partition_name, year_partition_name
from runlog.store.schema import Base

UTC = dt.timezone.utc



def _rows(engine, sql: str, **params) -> list[tuple]:
    with engine.connect() as connection:
        return [tuple(row) for row in connection.execute(text(sql), params)]


def _per_partition(engine, table: str) -> dict[str, int]:
    return dict(_rows(engine, f"SELECT tableoid::regclass::text, count(*) FROM {table} GROUP BY 1"))


def _months_of(path) -> Counter:
    """Shots per partition name, counted from the file's own times."""
    times = pq.read_table(path, columns=["time"])["time"].to_pylist()
    return Counter(partition_name("shots", t) for t in times)


# --- names and months (pure) -------------------------------------------------------------


def test_partition_names_follow_the_utc_calendar_month():
    assert partition_name("shots", dt.date(2025, 3, 17)) == "shots_y2025m03"
    assert partition_name("occupancy", dt.datetime(2025, 12, 31, 23, 0, tzinfo=UTC)) == "occupancy_y2025m12"
    # 23:30 on 31 March at UTC-1 is already April in UTC.
    late = dt.datetime(2026, 3, 31, 23, 30, tzinfo=dt.timezone(dt.timedelta(hours=-1)))
    assert month_start(late) == dt.date(2026, 4, 1)
    with pytest.raises(ValueError):
        month_start(dt.datetime(2026, 3, 1))
    with pytest.raises(ValueError):
        partition_name("runs", dt.date(2026, 3, 1))


# --- PostgreSQL layout ---------------------------------------------------------------------


def test_three_shot_tables_are_partitioned_by_range_of_time_and_measurements_are_one_table(pg_url):
    with runlog.open(pg_url) as catalogue:
        rows = _rows(
            catalogue.engine,
            "SELECT c.relname, p.partstrat, a.attname FROM pg_partitioned_table p "
            "JOIN pg_class c ON c.oid = p.partrelid "
            "JOIN pg_attribute a ON a.attrelid = p.partrelid AND a.attnum = p.partattrs[0] ORDER BY c.relname",
        )
        # The monitors' raw values are partitioned by their own time too (runlog.monitors).
        assert sorted(rows) == sorted((table, "r", "time") for table in (*SHOT_TABLES, "monitor_values"))
        tables = [*SHOT_TABLES, "shot_measurements"]
        keys = dict(_rows(catalogue.engine, "SELECT conrelid::regclass::text, pg_get_constraintdef(oid) FROM pg_constraint WHERE contype = 'p' AND conrelid::regclass::text = ANY(:t)", t=tables))
        assert keys == {
            "shots": 'PRIMARY KEY (id, "time")',
            "shot_parameters": 'PRIMARY KEY (shot_id, parameter_id, "time")',
            "shot_measurements": "PRIMARY KEY (shot_id)",
            "occupancy": 'PRIMARY KEY (shot_id, image_id, "time")',
        }
        # shot_measurements: a plain table ('r'), no time of its own (revision 0017).
        assert _rows(catalogue.engine, "SELECT relkind FROM pg_class WHERE oid = 'shot_measurements'::regclass") == [("r",)]
        assert _rows(catalogue.engine, "SELECT count(*) FROM pg_attribute WHERE attrelid = 'shot_measurements'::regclass AND attname = 'time'") == [(0,)]
        foreign = _rows(catalogue.engine, "SELECT conrelid::regclass::text, pg_get_constraintdef(oid) FROM pg_constraint WHERE contype = 'f' AND conrelid::regclass::text = ANY(:t)", t=tables)
        assert foreign == [("shots", "FOREIGN KEY (run_id) REFERENCES runs(id) ON DELETE CASCADE")]
        # A fresh catalogue has no month yet, and never a DEFAULT partition.
        assert _rows(catalogue.engine, "SELECT count(*) FROM pg_inherits")[0][0] == 0


def test_ensure_months_creates_each_month_once_with_its_bounds(pg_url):
    with runlog.open(pg_url) as catalogue:
        engine = catalogue.engine
        with engine.begin() as connection:
            created = ensure_months(connection, dt.date(2025, 11, 20), dt.datetime(2026, 2, 1, tzinfo=UTC))
            again = ensure_months(connection, dt.date(2025, 11, 1), dt.date(2026, 2, 28))
        months = ["y2025m11", "y2025m12", "y2026m01", "y2026m02"]
        assert created == [f"{table}_{month}" for month in months for table in SHOT_TABLES]
        assert again == []
        bounds = dict(_rows(engine, "SELECT c.relname, pg_get_expr(c.relpartbound, c.oid) FROM pg_class c WHERE c.relispartition AND c.relname LIKE 'shots_y%'"))
        assert bounds["shots_y2025m12"] == "FOR VALUES FROM ('2025-12-01 00:00:00+00') TO ('2026-01-01 00:00:00+00')"
        assert bounds["shots_y2026m02"] == "FOR VALUES FROM ('2026-02-01 00:00:00+00') TO ('2026-03-01 00:00:00+00')"


def test_an_ingest_over_three_months_fills_three_partitions(pg_url, tmp_path):
    # 60 shots 2 s apart from 23:59:00 on 31 January: 30 in January, 30 in February; a
    # second run in March.
    path = tmp_path / "three-months.parquet"
    table = shot_table({"r1": 60}, start=dt.datetime(2026, 1, 31, 23, 59, tzinfo=UTC), seed=3)
    write_table(path, table)
    later = write_table(tmp_path / "march.parquet", shot_table({"r2": 25}, start=dt.datetime(2026, 3, 10, tzinfo=UTC), seed=4))
    expected = _months_of(path) + _months_of(later)
    assert expected == {"shots_y2026m01": 30, "shots_y2026m02": 30, "shots_y2026m03": 25}
    with runlog.open(pg_url) as catalogue:
        assert [r.status for r in catalogue.ingest([path, later])] == ["ingested", "ingested"]
        engine = catalogue.engine
        for name in SHOT_TABLES:
            # Every shot has each per-shot row: 'p.wait' is scanned, one measurement, and
            # two occupancy images.
            per_shot = 2 if name == "occupancy" else 1
            assert _per_partition(engine, name) == {f"{name}_{key[6:]}": count * per_shot for key, count in expected.items()}
            if name != "shots":
                # Each child row sits in its shot's month: its time is its shot's time.
                assert _rows(engine, f"SELECT count(*) FROM {name} c JOIN shots s ON s.id = c.shot_id AND s.time = c.time")[0][0] == sum(expected.values()) * per_shot
        shots = catalogue.shots("r1")
        assert list(shots["shot"]) == list(range(60))
        assert list(shots["m.atom_number"]) == table["m.atom_number"].to_pylist()
        assert np.array_equal(catalogue.occupancy("r1", "load"), np.array(table["occ.load"].to_pylist()))


def test_a_shot_index_already_stored_is_refused_even_in_another_month(pg_url, tmp_path):
    # PostgreSQL's unique key is (run, shot, time); the refusal comes from ingest's query.
    with runlog.open(pg_url) as catalogue:
        catalogue.ingest(write_table(tmp_path / "a.parquet", shot_table({"r1": 10})))
        clash = write_table(tmp_path / "b.parquet", shot_table({"r1": 3}, first_shot=5, start=dt.datetime(2026, 4, 2, tzinfo=UTC), seed=2))
        [result] = catalogue.ingest(clash)
        assert result.status == "refused"
        assert result.reason == f"{clash} (column 'shot', row 0): shot index 5 of run 'r1' is already in the catalogue"
        assert catalogue.counts()["shots"] == 10


def test_a_constant_broken_later_is_backfilled_with_the_shot_times(pg_url, tmp_path):
    # The second file also brings a new measurement: its column is added to the parent
    # after June's partitions were made, and reaches every month.
    with runlog.open(pg_url) as catalogue:
        catalogue.ingest(write_table(tmp_path / "a.parquet", shot_table({"r1": 4}, start=dt.datetime(2026, 5, 31, 23, 59, 56, tzinfo=UTC))))
        other = shot_table({"r1": 3}, first_shot=4, start=dt.datetime(2026, 6, 3, tzinfo=UTC), extra={"p.depth[uK]": np.full(3, 75.0), "m.fluorescence": [1.5, 2.5, 3.5]})
        assert catalogue.ingest(write_table(tmp_path / "b.parquet", other))[0].status == "ingested"
        shots = catalogue.shots("r1")
        assert list(shots["p.depth"]) == [60.0] * 4 + [75.0] * 3
        assert shots["m.fluorescence"].tolist()[4:] == [1.5, 2.5, 3.5] and shots["m.fluorescence"].iloc[:4].isna().all()
        depth = _rows(catalogue.engine, "SELECT sp.tableoid::regclass::text, count(*) FROM shot_parameters sp JOIN parameters p ON p.id = sp.parameter_id WHERE p.name = 'depth' GROUP BY 1 ORDER BY 1")
        assert depth == [("shot_parameters_y2026m05", 2), ("shot_parameters_y2026m06", 5)]


# --- sparse years ----------------------------------------------------------------------------


def _at_times(key: str, times: list[dt.datetime], seed: int = 1, **kwargs):
    """A shot table of one run whose shots are at ``times``."""
    table = shot_table({key: len(times)}, seed=seed, **kwargs)
    return table.set_column(table.schema.get_field_index("time"), "time", pa.array(times, pa.timestamp("us", tz="UTC")))


def _shot_partitions(engine) -> list[str]:
    return sorted(name for (name,) in _rows(engine, "SELECT inhrelid::regclass::text FROM pg_inherits WHERE inhparent::regclass::text = ANY(:t)", t=list(SHOT_TABLES)))


def test_a_sparse_file_over_ten_years_makes_one_partition_a_year(pg_url, tmp_path):
    # One shot a month for ten years (2014-01 .. 2023-12): a month each would be 480 tables.
    times = [dt.datetime(2014, 1, 15, 12, tzinfo=UTC) + dt.timedelta(days=30.44 * k) for k in range(120)]
    assert len({month_start(t) for t in times}) == 120
    path = write_table(tmp_path / "spread.parquet", _at_times("spread", times, extra={"m.signal": np.arange(120.0)}))
    with runlog.open(pg_url) as catalogue:
        assert catalogue.ingest(path)[0].status == "ingested"
        engine = catalogue.engine
        assert _shot_partitions(engine) == sorted(year_partition_name(table, year) for table in SHOT_TABLES for year in range(2014, 2024))
        assert _per_partition(engine, "shots") == {f"shots_y{year}": sum(t.year == year for t in times) for year in range(2014, 2024)}
        # Three tables a year, not four: the measured values are one plain table (revision 0017).
        assert _per_partition(engine, "shot_measurements") == {"shot_measurements": 120}
        shots = catalogue.shots("spread")
        assert shots["m.signal"].tolist() == list(np.arange(120.0))
        assert [t.to_pydatetime() for t in shots["time"]] == times
        # A busy day of a year held whole goes to the year's partition.
        busy = write_table(tmp_path / "busy.parquet", shot_table({"busy": 1500}, start=dt.datetime(2016, 6, 1, 8, tzinfo=UTC), seed=2))
        assert catalogue.ingest(busy)[0].status == "ingested"
        assert _per_partition(engine, "shots")["shots_y2016"] == 12 + 1500
        # A new year gets months as before, and keeps getting months even for a sparse file.
        day = write_table(tmp_path / "day.parquet", shot_table({"day": 10}, start=dt.datetime(2025, 3, 2, tzinfo=UTC), seed=3))
        late = write_table(tmp_path / "late.parquet", _at_times("late", [dt.datetime(2025, month, 9, tzinfo=UTC) for month in (5, 7, 9)], seed=4))
        assert [r.status for r in catalogue.ingest([day, late])] == ["ingested", "ingested"]
        assert {name for name in _shot_partitions(engine) if name.startswith("shots_y2025")} == {"shots_y2025m03", "shots_y2025m05", "shots_y2025m07", "shots_y2025m09"}
        assert catalogue.counts()["shots"] == 120 + 1500 + 10 + 3
        chosen = catalogue.select("m.signal >= 118")
        assert chosen["m.signal"].tolist() == [118.0, 119.0]


def test_year_and_month_partitions_export_the_same_bytes(pg_url, other_pg_url, tmp_path, monkeypatch):
    # The same sparse file into a catalogue of year partitions, one of months (the rule
    # switched off) and SQLite: every filter and export reads the same shots.
    times = [dt.datetime(2015, 2, 10, 8, tzinfo=UTC) + dt.timedelta(days=40 * k, hours=k) for k in range(60)]
    path = write_table(tmp_path / "sparse.parquet", _at_times("sparse", times, extra={"m.signal": np.arange(60.0) / 7}))
    where = "time >= '2016-03-01T00:00' and time < '2019-01-01T00:00' and m.signal > 1"
    exports = {}
    for name, url in (("years", pg_url), ("months", other_pg_url), ("sqlite", f"sqlite:///{tmp_path / 'c.sqlite'}")):
        if name == "months":
            monkeypatch.setattr(partitions, "SPARSE_YEAR_MONTHS", 10**6)
        with runlog.open(url) as catalogue:
            assert catalogue.ingest(path)[0].status == "ingested"
            if name != "sqlite":
                found = set(_per_partition(catalogue.engine, "shots"))
                assert all(len(partition) == len("shots_y2015") for partition in found) == (name == "years"), found
            exports[name] = catalogue.export(where, tmp_path / name)
            assert exports[name].shots == sum(dt.datetime(2016, 3, 1, tzinfo=UTC) <= t < dt.datetime(2019, 1, 1, tzinfo=UTC) and k / 7 > 1 for k, t in enumerate(times))
        monkeypatch.undo()
    assert exports["years"].data == exports["months"].data == exports["sqlite"].data
    for file in exports["years"].data:
        assert (tmp_path / "years" / file).read_bytes() == (tmp_path / "months" / file).read_bytes()


def test_a_year_with_a_busy_month_keeps_its_months(pg_url, tmp_path):
    busy = [dt.datetime(2019, 2, 1, tzinfo=UTC) + dt.timedelta(seconds=k) for k in range(SPARSE_MONTH_SHOTS)]
    times = [dt.datetime(2019, 1, 10, tzinfo=UTC), *busy, dt.datetime(2019, 3, 10, tzinfo=UTC)]
    path = write_table(tmp_path / "three.parquet", _at_times("three", times))
    with runlog.open(pg_url) as catalogue:
        assert catalogue.ingest(path)[0].status == "ingested"
        assert _per_partition(catalogue.engine, "shots") == {"shots_y2019m01": 1, "shots_y2019m02": SPARSE_MONTH_SHOTS, "shots_y2019m03": 1}


def test_months_inside_a_year_partition_are_not_made_again(pg_url):
    engine = make_engine(pg_url)
    try:
        migrate.create_or_upgrade(engine)
        with engine.begin() as connection:
            made = ensure_partitions(connection, {dt.date(2017, m, 1): 2 for m in (2, 5, 11)})
            assert made == [year_partition_name(table, 2017) for table in SHOT_TABLES]
            # Counts not known (a monitor file, or a caller that does not say): months.
            assert ensure_partitions(connection, {dt.date(2018, m, 1): None for m in (2, 5, 11)}) == [partition_name(t, dt.date(2018, m, 1)) for m in (2, 5, 11) for t in SHOT_TABLES]
            assert ensure_months(connection, dt.date(2017, 1, 1), dt.date(2017, 12, 1)) == []
            assert ensure_partitions(connection, {dt.date(2017, 4, 1): 5000}) == []
        bounds = dict(_rows(engine, "SELECT c.relname, pg_get_expr(c.relpartbound, c.oid) FROM pg_class c WHERE c.relname = 'shots_y2017'"))
        assert bounds["shots_y2017"] == "FOR VALUES FROM ('2017-01-01 00:00:00+00') TO ('2018-01-01 00:00:00+00')"
    finally:
        engine.dispose()


# --- upgrade from 0003 ------------------------------------------------------------------------


def _snapshot(engine) -> dict[str, list[tuple]]:
    """Every row of the four tables, without the partition key the upgrade adds to children
    or the measurement columns made ahead of any name (revision 0015), which hold nothing."""
    out = {}
    with engine.connect() as connection:
        named = {f"m_{mid}" for (mid,) in connection.execute(text("SELECT id FROM measurements"))}
        for name in (*SHOT_TABLES, "shot_measurements"):
            columns = [c["name"] for c in inspect(connection).get_columns(name) if not (c["name"] == "time" and name != "shots") and not (c["name"].startswith("m_") and c["name"] not in named)]
            listed = ", ".join(f'"{c}"' for c in sorted(columns))
            keys = {"shots": "id", "shot_parameters": "shot_id, parameter_id", "shot_measurements": "shot_id", "occupancy": "shot_id, image_id"}[name]
            out[name] = [tuple(row) for row in connection.execute(text(f"SELECT {listed} FROM {name} ORDER BY {keys}"))]
    return out


def test_upgrade_from_0003_keeps_every_row_and_value(pg_url, tmp_path):
    engine = make_engine(pg_url)
    migrate.upgrade(engine)
    files = [
        write_table(tmp_path / "jan.parquet", shot_table({"r1": 40, "r2": 30}, start=dt.datetime(2026, 1, 31, 23, 58, tzinfo=UTC), seed=5)),
        # Continues r1 in April with a changed depth (back-fill) and a second measurement.
        write_table(tmp_path / "apr.parquet", shot_table({"r1": 20}, first_shot=40, start=dt.datetime(2026, 4, 1, tzinfo=UTC), seed=6, extra={"p.depth[uK]": np.full(20, 80.0), "m.fluorescence": np.arange(20.0)})),
    ]
    # A catalogue of revision 0003: today's ingest (which writes analysis versions, 0008),
    # then down to the unpartitioned layout of 0003.
    assert [r.status for r in runlog.ingest.ingest_files(engine, files)] == ["ingested", "ingested"]
    migrate.downgrade(engine, "0003")
    assert not _rows(engine, "SELECT 1 FROM pg_partitioned_table")
    before = _snapshot(engine)
    # Per-shot parameters: 'wait' of all 90 shots, and 'depth' of r1's 60 once April's
    # shots changed it (40 back-filled, 20 new).
    assert {name: len(rows) for name, rows in before.items()} == {"shots": 90, "shot_parameters": 150, "shot_measurements": 90, "occupancy": 180}
    assert sum(c["name"].startswith("m_") for c in inspect(engine).get_columns("shot_measurements")) == 2

    migrate.upgrade(engine)
    assert _snapshot(engine) == before
    expected = _months_of(files[0]) + _months_of(files[1])
    assert _per_partition(engine, "shots") == dict(expected)
    assert _per_partition(engine, "shot_measurements") == {"shot_measurements": 90}
    assert _rows(engine, "SELECT count(*) FROM shot_parameters c JOIN shots s ON s.id = c.shot_id AND s.time = c.time")[0][0] == 150
    engine.dispose()
    with runlog.open(pg_url) as catalogue:
        shots = catalogue.shots("r1")
        assert list(shots["p.depth"]) == [60.0] * 40 + [80.0] * 20
        assert list(shots["m.fluorescence"].iloc[40:]) == list(np.arange(20.0))
        # A new month after the upgrade.
        assert catalogue.ingest(write_table(tmp_path / "may.parquet", shot_table({"r3": 5}, start=dt.datetime(2026, 5, 2, tzinfo=UTC), seed=7)))[0].status == "ingested"
        assert catalogue.counts()["shots"] == 95


# --- concurrency --------------------------------------------------------------------------


def _lock_waiters(engine) -> int:
    # Sessions of this database waiting for a lock: the writers queued on the writer lock.
    return _rows(engine, "SELECT count(*) FROM pg_stat_activity WHERE wait_event_type = 'Lock' AND datname = current_database()")[0][0]


def test_two_writers_that_both_find_a_month_missing_both_succeed(pg_url, tmp_path):
    # Both see the month missing, then queue on the writer lock the test holds; released,
    # the first creates the month and the second finds it there.
    runlog.open(pg_url).close()
    engine = make_engine(pg_url)
    files = [write_table(tmp_path / f"{n}.parquet", shot_table({"r": 50}, apparatus=f"bench-{n}", start=dt.datetime(2026, 7, 1, tzinfo=UTC), seed=n)) for n in range(2)]
    results: dict[int, list] = {}
    with engine.connect() as holder:
        bulk.take_writer_lock(holder)
        threads = [threading.Thread(target=lambda n=n: results.__setitem__(n, runlog.ingest.ingest_files(engine, [files[n]]))) for n in range(2)]
        for thread in threads:
            thread.start()
        deadline = time.monotonic() + 30
        while _lock_waiters(engine) < 2 and time.monotonic() < deadline:
            time.sleep(0.05)
        assert _lock_waiters(engine) == 2
        assert _rows(engine, "SELECT count(*) FROM pg_inherits")[0][0] == 0
        holder.rollback()
    for thread in threads:
        thread.join(60)
    assert [results[n][0].status for n in range(2)] == ["ingested", "ingested"]
    assert sorted(name for (name,) in _rows(engine, "SELECT inhrelid::regclass::text FROM pg_inherits WHERE inhparent::regclass::text = ANY(:t)", t=list(SHOT_TABLES))) == sorted(partition_name(t, dt.date(2026, 7, 1)) for t in SHOT_TABLES)
    assert _rows(engine, "SELECT count(*), count(DISTINCT id) FROM shots")[0] == (100, 100)
    engine.dispose()


def test_two_processes_ingest_the_same_new_months_at_once(pg_url, tmp_path):
    # Two apparatus, each a file for August and one for September, neither month there yet.
    runlog.open(pg_url).close()
    folders = []
    for n in range(2):
        folder = tmp_path / f"apparatus-{n}"
        folder.mkdir()
        for month in (8, 9):
            write_table(folder / f"m{month}.parquet", shot_table({f"m{month}-a": 200, f"m{month}-b": 150}, apparatus=f"bench-{n}", start=dt.datetime(2026, month, 1, tzinfo=UTC), seed=10 * n + month))
        folders.append(folder)
    processes = [
        subprocess.Popen([sys.executable, "-m", "runlog", "--db", pg_url, "ingest", "--json", str(folder)], stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, env={**os.environ})
        for folder in folders
    ]
    for process in processes:
        out, err = process.communicate(timeout=120)
        assert process.returncode == 0, err
        assert out.count('"ingested"') == 2, out
    engine = make_engine(pg_url)
    assert _rows(engine, "SELECT count(*), count(DISTINCT id), count(DISTINCT (run_id, shot)) FROM shots")[0] == (1400, 1400, 1400)
    for name in SHOT_TABLES:
        per_shot = 2 if name == "occupancy" else 1
        assert _per_partition(engine, name) == {partition_name(name, dt.date(2026, m, 1)): 700 * per_shot for m in (8, 9)}
    engine.dispose()
    with runlog.open(pg_url) as catalogue:
        for n in range(2):
            assert list(catalogue.shots("m9-a", apparatus=f"bench-{n}")["shot"]) == list(range(200))


def test_a_reader_in_an_open_transaction_does_not_hold_up_a_new_month(pg_url, tmp_path):
    # CREATE TABLE .. PARTITION OF would wait for this reader's ACCESS SHARE locks; attaching
    # does not (PostgreSQL 15 manual, 5.11.2.2).
    with runlog.open(pg_url) as catalogue:
        catalogue.ingest(write_table(tmp_path / "a.parquet", shot_table({"r1": 10})))
        path = write_table(tmp_path / "b.parquet", shot_table({"r2": 10}, start=dt.datetime(2026, 11, 5, tzinfo=UTC), seed=2))
        results = []
        with catalogue.engine.connect() as reader:
            for name in SHOT_TABLES:
                reader.execute(text(f"SELECT count(*) FROM {name}"))
            writer = threading.Thread(target=lambda: results.extend(catalogue.ingest(path)))
            writer.start()
            writer.join(30)
            finished = not writer.is_alive()
            reader.rollback()
        writer.join(60)
        assert finished, "the ingest of a new month waited for a reader"
        assert results[0].status == "ingested"
        assert catalogue.counts()["shots"] == 20


# --- SQLite ----------------------------------------------------------------------------------


def test_the_sqlite_layout_is_the_models(tmp_path):
    url = f"sqlite:///{tmp_path / 'catalogue.sqlite'}"
    with runlog.open(url) as catalogue:
        catalogue.ingest(write_table(tmp_path / "a.parquet", shot_table({"r1": 10}, start=dt.datetime(2026, 1, 31, 23, 59, 50, tzinfo=UTC))))
        engine = catalogue.engine
        with engine.connect() as connection:
            found = inspect(connection)
            assert sorted(found.get_table_names()) == sorted([*Base.metadata.tables, "alembic_version"])  # no month tables
            for name in SHOT_TABLES:
                model = Base.metadata.tables[name]
                columns = [c["name"] for c in found.get_columns(name)]
                expected = [c.name for c in model.columns]
                assert columns[: len(expected)] == expected
                assert found.get_pk_constraint(name)["constrained_columns"] == [c.name for c in model.primary_key]
                assert sorted(fk["referred_table"] for fk in found.get_foreign_keys(name)) == sorted(fk.referred_table.name for fk in model.foreign_key_constraints)
            assert "time" not in [c["name"] for c in found.get_columns("shot_parameters")]
            assert [u["column_names"] for u in found.get_unique_constraints("shots")] == [["run_id", "shot"]]
            rows = connection.exec_driver_sql("SELECT count(*) FROM shots").scalar_one()
        assert rows == 10
