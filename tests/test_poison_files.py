"""Files that once stopped the lab: each is refused on its own — recorded in the ingest
log, quarantined by ``watch`` — and the good files around it land. The contract checks the
limits of both backends up front, so SQLite and PostgreSQL refuse the same files."""

from __future__ import annotations

import datetime as dt
import logging
import os

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from conftest import T0, shot_table, write_table
from runlog.config import load_config
from runlog.contract import MAX_MEASUREMENTS_PER_FILE, MAX_SHOT, MAX_TEXT_BYTES
from runlog.errors import ConfigError
from runlog.times import DEFAULT_TIME_WINDOW, TimeWindow
from runlog.watch import Watcher

UTC = dt.timezone.utc


def _with_times(table: pa.Table, times: pa.Array) -> pa.Table:
    return table.set_column(table.schema.get_field_index("time"), "time", times)


def _far_future() -> pa.Table:
    # A corrupted page: microseconds of the year 20000.
    us = int((dt.datetime(9999, 1, 1, tzinfo=UTC) - dt.datetime(1970, 1, 1, tzinfo=UTC)).total_seconds() * 1e6) * 2
    return _with_times(shot_table({"p1": 3}), pa.array([us] * 3, pa.int64()).cast(pa.timestamp("us", tz="UTC")))


def _last_day() -> pa.Table:
    return _with_times(shot_table({"p1": 3}), pa.array([dt.datetime(9999, 12, 31, 23, 0, tzinfo=UTC)] * 3, pa.timestamp("us", tz="UTC")))


def _epoch_zero() -> pa.Table:  # a clock that was never set
    return _with_times(shot_table({"p1": 3}), pa.array([0, 1, 2], pa.int64()).cast(pa.timestamp("us", tz="UTC")))


def _milliseconds_overflow() -> pa.Table:  # milliseconds that no count of microseconds holds
    return _with_times(shot_table({"p1": 3}), pa.array([2**62] * 3, pa.int64()).cast(pa.timestamp("ms", tz="UTC")))


def _text_parameter(value: str) -> pa.Table:
    return shot_table({"p1": 3}, extra={"p.beam": [value] * 3})


POISON = {
    "far-future time": (_far_future, "time", "is outside the plausible window 2000-01-01 to 2100-01-01 UTC"),
    "time on 9999-12-31": (_last_day, "time", "time 9999-12-31T23:00:00+00:00 is outside the plausible window 2000-01-01 to 2100-01-01 UTC"),
    "time at the epoch": (_epoch_zero, "time", "time 1970-01-01T00:00:00+00:00 is outside the plausible window"),
    "milliseconds beyond int64 microseconds": (_milliseconds_overflow, "time", "since 1970 is outside the plausible window"),
    "shot index 2**31": (lambda: shot_table({"p1": 3}, first_shot=2**31), "shot", f"shot index {2**31} is larger than {MAX_SHOT}"),
    "NUL in the run key": (lambda: shot_table({"p\x001": 3}), "run", "text holds a control character (such as NUL, a newline or a terminal escape)"),
    "terminal escape in the run key": (lambda: shot_table({"p1\x1b[2J": 3}), "run", "text holds a control character"),
    "NUL in a text parameter": (lambda: _text_parameter("vert\x00ical"), "p.beam", "text holds a NUL character"),
    "NUL in the notes": (lambda: shot_table({"p1": 3}, extra={"notes": ["fine\x00"] * 3}), "notes", "text holds a NUL character"),
    "text parameter over the index limit": (lambda: _text_parameter(os.urandom(1400).hex()), "p.beam", f"text longer than {MAX_TEXT_BYTES} bytes"),
    "multibyte text over the byte limit": (lambda: _text_parameter("µ" * (MAX_TEXT_BYTES // 2 + 1)), "p.beam", f"text longer than {MAX_TEXT_BYTES} bytes"),
    "power-tower unit": (lambda: shot_table({"p1": 3}, extra={"p.x[9**9**9]": np.ones(3)}), "p.x[9**9**9]", "'9**9**9' is not a unit"),
    "NUL in a column name": (lambda: shot_table({"p1": 3}, extra={"m.n\x00": np.ones(3)}), None, "column name holds a control character"),
    "too many measurement columns": (
        lambda: shot_table({"p1": 3}, extra={f"m.q{i}": np.ones(3) for i in range(MAX_MEASUREMENTS_PER_FILE)}),  # and m.atom_number
        None,
        f"{MAX_MEASUREMENTS_PER_FILE + 1} measurement columns, more than the {MAX_MEASUREMENTS_PER_FILE} one file may have",
    ),
}


@pytest.mark.parametrize("kind", list(POISON))
def test_a_poison_file_is_refused_and_the_files_around_it_land(catalogue, tmp_path, kind):
    make, column, reason = POISON[kind]
    good = write_table(tmp_path / "a.parquet", shot_table({"g1": 4}, seed=1))
    poison = write_table(tmp_path / "b.parquet", make())
    later = write_table(tmp_path / "c.parquet", shot_table({"g2": 5}, seed=2, start=T0 + dt.timedelta(hours=1)))
    results = catalogue.ingest([good, poison, later])
    assert [r.status for r in results] == ["ingested", "refused", "ingested"], results[1].reason
    refusal = results[1]
    assert refusal.cause == "contract"
    assert refusal.reason.startswith(f"{poison}") and reason in refusal.reason and "\n" not in refusal.reason
    if column is not None:
        assert f"column '{column}'" in refusal.reason
    assert catalogue.counts()["shots"] == 9
    assert sorted(catalogue.runs()["run"]) == ["g1", "g2"]
    log = catalogue.ingest_log()
    assert list(log["status"]) == ["ingested", "refused", "ingested"]
    assert "\x00" not in log["reason"][1]


def test_the_widest_file_the_contract_passes_is_stored(catalogue, tmp_path):
    # The per-file limit is what a PostgreSQL row of shot_measurements holds, every value set.
    table = shot_table({"wide": 2}, extra={f"m.q{i}": np.full(2, float(i)) for i in range(MAX_MEASUREMENTS_PER_FILE - 1)})
    [result] = catalogue.ingest(write_table(tmp_path / "wide.parquet", table))
    assert result.status == "ingested", result.reason
    shots = catalogue.shots("wide")
    assert shots[f"m.q{MAX_MEASUREMENTS_PER_FILE - 2}"].tolist() == [MAX_MEASUREMENTS_PER_FILE - 2.0] * 2


def test_the_catalogue_refuses_a_measurement_name_beyond_its_limit(catalogue, tmp_path, monkeypatch):
    import runlog.ingest as ingest

    monkeypatch.setattr(ingest, "MAX_MEASUREMENTS", 2)  # the real limit, 1500, needs 1500 columns
    first = write_table(tmp_path / "a.parquet", shot_table({"a": 2}, extra={"m.second": np.ones(2)}))
    third = write_table(tmp_path / "b.parquet", shot_table({"b": 2}, extra={"m.third": np.ones(2)}))
    known = write_table(tmp_path / "c.parquet", shot_table({"c": 2}, extra={"m.second": np.ones(2)}))
    results = catalogue.ingest([first, third, known])
    assert [r.status for r in results] == ["ingested", "refused", "ingested"]
    assert results[1].reason == f"{third} (column 'm.third'): the catalogue already holds 2 measurement names, the most it can (each is a column of the store): a new one cannot be added"


def test_any_failure_while_writing_a_file_is_that_files_refusal(catalogue, tmp_path, monkeypatch):
    import runlog.ingest as ingest

    real = ingest._write_shots
    calls = []

    def failing(writer, path, *args):
        calls.append(path.name)
        if path.name == "b.parquet":
            writer.execute("INSERT INTO apparatus (name) VALUES (:n)", {"n": "half-written"})
            raise OverflowError("date value out of range")
        return real(writer, path, *args)

    monkeypatch.setattr(ingest, "_write_shots", failing)
    files = [write_table(tmp_path / f"{name}.parquet", shot_table({name: 3}, seed=i, start=T0 + dt.timedelta(hours=i))) for i, name in enumerate("abc")]
    results = catalogue.ingest(files)
    assert [r.status for r in results] == ["ingested", "refused", "ingested"]
    assert results[1].reason == f"{files[1]}: could not be stored (OverflowError: date value out of range)"
    assert results[1].cause == "data" and results[1].files_fault
    with catalogue.engine.connect() as connection:
        assert "half-written" not in connection.exec_driver_sql("SELECT name FROM apparatus").scalars().all()
    assert catalogue.counts()["shots"] == 6
    assert list(catalogue.ingest_log()["status"]) == ["ingested", "refused", "ingested"]


def test_a_driver_error_is_one_line_without_sql(catalogue, tmp_path, monkeypatch):
    import runlog.ingest as ingest

    def failing(writer, *args):
        writer.execute("SELECT no_such_column FROM shots WHERE id = :secret_parameter", {"secret_parameter": 12345})

    monkeypatch.setattr(ingest, "_write_shots", failing)
    [result] = catalogue.ingest(write_table(tmp_path / "a.parquet", shot_table({"a": 2})))
    assert result.status == "refused" and result.cause == "data"
    assert "no_such_column" in result.reason and "SELECT" not in result.reason and "12345" not in result.reason and "\n" not in result.reason


def test_the_time_window_is_configurable(catalogue, tmp_path):
    config = tmp_path / "runlog.toml"
    config.write_text("[time_window]\nearliest = 1990-01-01\nlatest = 2030-06-01T12:00:00Z\n")
    mapping = load_config(config)
    assert mapping.time_window == TimeWindow(dt.date(1990, 1, 1), dt.datetime(2030, 6, 1, 12, tzinfo=UTC))
    old = write_table(tmp_path / "old.parquet", shot_table({"old": 3}, start=dt.datetime(1995, 5, 1, tzinfo=UTC)))
    late = write_table(tmp_path / "late.parquet", shot_table({"late": 3}, start=dt.datetime(2031, 1, 1, tzinfo=UTC)))
    assert [r.status for r in catalogue.ingest([old])] == ["refused"]  # the default window
    results = catalogue.ingest([old, late], config=config)
    assert [r.status for r in results] == ["ingested", "refused"]
    assert results[1].reason == f"{late} (column 'time', row 0): time 2031-01-01T00:00:00+00:00 is outside the plausible window 1990-01-01 to 2030-06-01T12:00:00+00:00 UTC (set [time_window] in runlog.toml if it is right)"


@pytest.mark.parametrize(
    "text, message",
    [
        ("earliest = 2100-01-01\n", "[time_window]: the time window is empty: earliest 2100-01-01 is not before latest 2100-01-01"),
        ("latest = 9999-12-31\n", "[time_window]: the time window must lie within 1900-01-01 and 2262-01-01"),
        ("first = 2001-01-01\n", "[time_window]: unknown key 'first' (known: earliest, latest)"),
        ("earliest = 'soon'\n", "[time_window]: earliest 'soon' is not an ISO date or time such as 2000-01-01"),
    ],
)
def test_a_bad_time_window_is_a_config_error(tmp_path, text, message):
    config = tmp_path / "runlog.toml"
    config.write_text("[time_window]\n" + text)
    with pytest.raises(ConfigError) as caught:
        load_config(config)
    assert str(caught.value) == f"{config}: {message}"


def test_the_default_window():
    assert DEFAULT_TIME_WINDOW.describe() == "2000-01-01 to 2100-01-01 UTC"
    assert DEFAULT_TIME_WINDOW.contains(T0) and not DEFAULT_TIME_WINDOW.contains(dt.datetime(2100, 1, 1, tzinfo=UTC))
    assert DEFAULT_TIME_WINDOW.outside(np.array([DEFAULT_TIME_WINDOW.earliest_us - 1, DEFAULT_TIME_WINDOW.earliest_us, DEFAULT_TIME_WINDOW.latest_us])).tolist() == [True, False, True]


def test_watch_quarantines_poison_files_and_keeps_going(catalogue, tmp_path, caplog):
    folder = tmp_path / "export"
    folder.mkdir()
    write_table(folder / "a_good.parquet", shot_table({"g1": 4}, seed=1))
    write_table(folder / "b_future.parquet", _far_future())
    write_table(folder / "c_nul.parquet", _text_parameter("a\x00b"))
    write_table(folder / "d_shot.parquet", shot_table({"p2": 2}, first_shot=2**31))
    write_table(folder / "e_good.parquet", shot_table({"g2": 5}, seed=2, start=T0 + dt.timedelta(hours=1)))
    write_table(folder / "f\nrefused fake.parquet", _last_day())
    write_table(folder / "h_unit.parquet", shot_table({"p3": 2}, extra={"p.x[9**9**9]": np.ones(2)}))
    watcher = Watcher(folder, catalogue.ingest)
    with caplog.at_level(logging.INFO, logger="runlog.watch"):
        assert watcher.poll() == []
        results = {os.path.basename(r.file): r.status for r in watcher.poll()}
    assert results == {"a_good.parquet": "ingested", "b_future.parquet": "refused", "c_nul.parquet": "refused", "d_shot.parquet": "refused", "e_good.parquet": "ingested", "f\nrefused fake.parquet": "refused", "h_unit.parquet": "refused"}
    assert sorted(p.name for p in folder.glob("*.parquet")) == ["a_good.parquet", "e_good.parquet"]
    quarantined = sorted(p.name for p in (folder / "quarantine").iterdir())
    assert "b_future.parquet" in quarantined and "b_future.parquet.reason.txt" in quarantined
    assert "outside the plausible window" in (folder / "quarantine" / "b_future.parquet.reason.txt").read_text()
    assert sorted(catalogue.runs()["run"]) == ["g1", "g2"]
    # A file name with a newline does not forge a line of the watch log.
    assert not any(message.startswith("refused fake") for record in caplog.records for message in record.getMessage().splitlines()[1:])
    assert all("\n" not in record.getMessage() for record in caplog.records)
    # The next good file still lands.
    write_table(folder / "g_good.parquet", shot_table({"g3": 2}, seed=3, start=T0 + dt.timedelta(hours=2)))
    watcher.poll()
    assert [os.path.basename(r.file) for r in watcher.poll()] == ["g_good.parquet"]


def test_watch_leaves_a_file_the_catalogue_could_not_take_for_later(catalogue, tmp_path):
    from dataclasses import replace

    folder = tmp_path / "export"
    folder.mkdir()
    write_table(folder / "a.parquet", shot_table({"g1": 4}))
    busy = [True]

    def ingest(paths):
        if busy[0]:
            [result] = catalogue.ingest(paths)
            return [replace(result, status="refused", reason="the catalogue stayed busy", cause="busy", runs=(), shots=0)]
        return catalogue.ingest(paths)

    watcher = Watcher(folder, ingest)
    watcher.poll()
    assert [r.cause for r in watcher.poll()] == ["busy"]
    assert (folder / "a.parquet").exists() and not (folder / "quarantine").exists()
    busy[0] = False
    assert [r.status for r in watcher.poll()] in (["ingested"], ["already-present"])
    assert (folder / "a.parquet").exists()


def test_watch_survives_an_ingest_that_raises(tmp_path, caplog):
    folder = tmp_path / "export"
    folder.mkdir()
    write_table(folder / "a.parquet", shot_table({"g1": 4}))

    def ingest(paths):
        raise RuntimeError("connection to server at postgresql://lab:hunter2@db/runlog failed")

    watcher = Watcher(folder, ingest)
    with caplog.at_level(logging.WARNING, logger="runlog.watch"):
        watcher.poll()
        assert watcher.poll() == []
    assert (folder / "a.parquet").exists()
    assert any("will try again" in r.getMessage() for r in caplog.records)
    assert not any("hunter2" in r.getMessage() for r in caplog.records)
