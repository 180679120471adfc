"""Writers and readers: a reader can neither take nor hold the writer's lock, and a reader
idle in an open transaction delays an ingest that adds a measurement column by seconds —
the ingest then lands or refuses that file in one line — never forever. On both backends
(the reader role exists on PostgreSQL only)."""

from __future__ import annotations

import threading
import time
import uuid

import numpy as np
import pytest
from sqlalchemy import create_engine, text
from sqlalchemy.engine import make_url

import runlog
from conftest import shot_table, write_table
from runlog.store import bulk

# The advisory lock key runlog's writers took before the writer lock was a row lock.
OLD_ADVISORY_KEY = 0x72756E6C6F67
BOUND_S = 90


def _ingest_in_background(catalogue, path):
    outcome: dict[str, object] = {}

    def work() -> None:
        started = time.monotonic()
        try:
            outcome["results"] = catalogue.ingest(path)
        except BaseException as error:  # noqa: BLE001 - the test reports it
            outcome["error"] = error
        outcome["seconds"] = time.monotonic() - started

    thread = threading.Thread(target=work, daemon=True)
    thread.start()
    return thread, outcome


def _reader_url(catalogue, db_url: str) -> str:
    role = "reader_" + uuid.uuid4().hex[:8]
    catalogue.grant_reader(role)
    return make_url(db_url).set(username=role).render_as_string(hide_password=False)


def test_an_idle_reader_cannot_stop_an_ingest_that_adds_a_measurement(catalogue, db_url, tmp_path, monkeypatch):
    monkeypatch.setattr(bulk, "DDL_LOCK_TIMEOUT_S", 1)  # the design's bound, shortened for the test
    catalogue.ingest(write_table(tmp_path / "first.parquet", shot_table({"r1": 4})))
    postgres = catalogue.engine.dialect.name == "postgresql"
    reader_engine = create_engine(_reader_url(catalogue, db_url)) if postgres else create_engine(db_url)
    reader = reader_engine.connect()
    # The first file's one name made the first block of measurement columns on PostgreSQL
    # (runlog.store.measurement_columns): a second name is a catalogue row; the 65th name
    # needs a new block, a change of the table (names are made 50 at a time: the third file's
    # last 14 reach into the second block).
    within = write_table(tmp_path / "second.parquet", shot_table({"r2": 4}, extra={"m.new_signal": np.ones(4)}))
    past = write_table(tmp_path / "third.parquet", shot_table({"r3": 4}, extra={f"m.signal_{k:02d}": np.full(4, float(k)) for k in range(64)}))
    try:
        if postgres:
            # What a reader could do before: hold runlog's old advisory writer lock ...
            reader.execute(text("SELECT pg_advisory_lock(:k)"), {"k": OLD_ADVISORY_KEY})
            reader.commit()
        # ... and sit idle in an open transaction that has read the measurements.
        reader.execute(text("SELECT count(*) FROM shot_measurements")).all()
        results = []
        # SQLite makes a column per name (no blocks): the second file is the case there.
        for path in (within, past) if postgres else (within,):
            thread, outcome = _ingest_in_background(catalogue, path)
            thread.join(BOUND_S)
            assert not thread.is_alive(), f"ingest still waiting after {BOUND_S} s"
            assert "error" not in outcome, outcome.get("error")
            results += outcome["results"]
            took = outcome["seconds"]
        second, *third = results
        # A name within a block changes no table: the idle reader is no obstacle.
        assert second.status == "ingested", second.reason
        if postgres:
            [third] = third
            # A new block needs the table to itself: refused as busy, naming who holds it.
            assert third.status == "refused" and third.cause == "busy" and not third.files_fault, third.reason
            assert "adding 14 measurement name(s)" in third.reason and "pid" in third.reason and "idle in transaction" in third.reason
            assert "\n" not in third.reason and took < BOUND_S
    finally:
        reader.rollback()
        reader.close()
        reader_engine.dispose()
    # Once the reader is gone the refused file lands.
    [again] = catalogue.ingest(past)
    assert again.status == "ingested", again.reason
    assert catalogue.shots("r2")["m.new_signal"].tolist() == [1.0] * 4
    assert catalogue.shots("r3")["m.signal_63"].tolist() == [63.0] * 4


def test_an_ingest_is_not_held_up_by_the_old_advisory_lock(catalogue, db_url, tmp_path):
    catalogue.ingest(write_table(tmp_path / "first.parquet", shot_table({"r1": 4})))
    if catalogue.engine.dialect.name != "postgresql":
        pytest.skip("advisory locks and roles are PostgreSQL's")
    reader_engine = create_engine(_reader_url(catalogue, db_url))
    with reader_engine.connect() as reader:
        reader.execute(text("SELECT pg_advisory_lock(:k)"), {"k": OLD_ADVISORY_KEY})
        reader.execute(text("SELECT 1")).all()  # and an open transaction
        thread, outcome = _ingest_in_background(catalogue, write_table(tmp_path / "second.parquet", shot_table({"r2": 4})))
        thread.join(BOUND_S)
        assert not thread.is_alive() and [r.status for r in outcome["results"]] == ["ingested"]
    reader_engine.dispose()


def test_the_reader_role_cannot_take_the_writer_lock(catalogue, db_url):
    if catalogue.engine.dialect.name != "postgresql":
        pytest.skip("roles are PostgreSQL's")
    reader_engine = create_engine(_reader_url(catalogue, db_url))
    try:
        with reader_engine.connect() as reader:
            with pytest.raises(Exception) as refused:
                bulk.take_writer_lock(reader)
            assert "permission denied" in str(refused.value)
    finally:
        reader_engine.dispose()


def test_a_second_writer_waits_for_the_first(catalogue, tmp_path, monkeypatch):
    # Writers queue on the lock (bounded by WRITER_WAIT_S), they do not refuse each other.
    if catalogue.engine.dialect.name != "postgresql":
        pytest.skip("SQLite's writers queue on BEGIN IMMEDIATE (tests/test_concurrency.py)")
    holder = catalogue.engine.connect()
    transaction = holder.begin()
    bulk.take_writer_lock(holder)
    thread, outcome = _ingest_in_background(catalogue, write_table(tmp_path / "a.parquet", shot_table({"r1": 3})))
    time.sleep(1.5)
    assert thread.is_alive()  # waiting for the lock, not refused
    transaction.rollback()
    holder.close()
    thread.join(BOUND_S)
    assert [r.status for r in outcome["results"]] == ["ingested"]


def test_a_writer_that_waits_too_long_is_refused_as_busy(catalogue, tmp_path, monkeypatch):
    if catalogue.engine.dialect.name != "postgresql":
        pytest.skip("the writer lock is PostgreSQL's")
    monkeypatch.setattr(bulk, "WRITER_WAIT_S", 1)
    holder = catalogue.engine.connect()
    transaction = holder.begin()
    bulk.take_writer_lock(holder)
    try:
        [result] = catalogue.ingest(write_table(tmp_path / "a.parquet", shot_table({"r1": 3})))
    finally:
        transaction.rollback()
        holder.close()
    assert result.status == "refused" and result.cause == "busy" and "\n" not in result.reason
    assert "lock timeout" in result.reason


def _partition_rows(engine) -> dict[str, int]:
    """Each partition's catalogue row version (pg_class.xmin): any DDL on it changes it."""
    with engine.connect() as connection:
        return dict(connection.execute(text("SELECT relname, xmin::text::bigint FROM pg_class WHERE relispartition")).all())


def test_a_new_block_of_measurement_columns_changes_no_partition_and_waits_for_no_reader_of_a_months_shots(catalogue, db_url, tmp_path, monkeypatch):
    # Two years of months; then a reader sits idle in a transaction that has read one
    # month's shots, per-shot parameters and occupancy. The file's 64 new names open the
    # second block of measurement columns on PostgreSQL: since revision 0017 that is one
    # change of the one plain shot_measurements table, and no month partition is touched.
    # (A reader of measured values still holds that table: the first test of this file.)
    monkeypatch.setattr(bulk, "DDL_LOCK_TIMEOUT_S", 1)  # a wait would be refused, not hidden
    import datetime as dt

    months = [dt.datetime(2024 + k // 12, k % 12 + 1, 10, 8, tzinfo=dt.timezone.utc) for k in range(24)]
    files = [write_table(tmp_path / f"month{k:02d}.parquet", shot_table({f"r{k:02d}": 3}, start=start, seed=k)) for k, start in enumerate(months)]
    assert [r.status for r in catalogue.ingest(files)] == ["ingested"] * len(files)
    postgres = catalogue.engine.dialect.name == "postgresql"
    if postgres:
        with catalogue.engine.connect() as connection:
            assert connection.execute(text("SELECT count(*) FROM pg_inherits WHERE inhparent = 'shots'::regclass")).scalar_one() == len(months)
            assert connection.execute(text("SELECT count(*) FROM pg_inherits WHERE inhparent = 'shot_measurements'::regclass")).scalar_one() == 0
    reader_engine = create_engine(_reader_url(catalogue, db_url)) if postgres else create_engine(db_url)
    if postgres:
        before = _partition_rows(catalogue.engine)  # after the grant, which changes every table's row
    reader = reader_engine.connect()
    names = write_table(tmp_path / "names.parquet", shot_table({"names": 4}, start=months[5] + dt.timedelta(hours=2), extra={f"m.signal_{k:02d}": np.full(4, float(k)) for k in range(64)}))
    try:
        span = {"a": months[5].replace(day=1, hour=0), "b": months[6].replace(day=1, hour=0)}
        reader.execute(text("SELECT count(*) FROM shots WHERE time >= :a AND time < :b"), span).all()
        reader.execute(text("SELECT count(*) FROM shot_parameters WHERE time >= :a AND time < :b" if postgres else "SELECT count(*) FROM shot_parameters"), span).all()
        reader.execute(text("SELECT count(*) FROM occupancy WHERE time >= :a AND time < :b" if postgres else "SELECT count(*) FROM occupancy"), span).all()
        thread, outcome = _ingest_in_background(catalogue, names)
        thread.join(BOUND_S)
        assert not thread.is_alive(), f"ingest still waiting after {BOUND_S} s"
        assert "error" not in outcome, outcome.get("error")
        [result] = outcome["results"]
        assert result.status == "ingested", result.reason
    finally:
        reader.rollback()
        reader.close()
        reader_engine.dispose()
    if postgres:
        with catalogue.engine.connect() as connection:
            made = {name for (name,) in connection.execute(text("SELECT attname FROM pg_attribute WHERE attrelid = 'shot_measurements'::regclass AND attname LIKE 'm\\_%'"))}
        assert made == {f"m_{k}" for k in range(1, 129)}  # the second block is there
        # No DDL on any partition: every partition's catalogue row is the one it was.
        assert _partition_rows(catalogue.engine) == before
    assert catalogue.shots("names")["m.signal_63"].tolist() == [63.0] * 4
