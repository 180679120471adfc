"""Monitor tables: the contract's refusals, ingest on both backends, idempotency, rollups,
and SIGKILL mid-ingest leaving nothing half-written."""

from __future__ import annotations

import datetime as dt
import os
import signal
import subprocess
import sys
import time

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from sqlalchemy import func, select, text

import runlog
from runlog.config import Mapping
from runlog.monitors.contract import is_monitor_table, read_monitor_table
from runlog.store.schema import IngestLogEntry, Monitor, MonitorFile, MonitorRollup, MonitorValue

T0 = dt.datetime(2026, 3, 2, 9, 0, tzinfo=dt.timezone.utc)


def _wide(path, n=120, start=T0, step_s=10, seed=0, apparatus="bench-a"):
    rng = np.random.default_rng(seed)
    table = pa.table(
        {
            "time": pa.array([start + dt.timedelta(seconds=step_s * i) for i in range(n)], pa.timestamp("us", tz="UTC")),
            "apparatus": [apparatus] * n,
            "room_temp[degC]": 22.0 + 0.1 * rng.standard_normal(n),
            "laser_power[mW]": 120.0 + rng.standard_normal(n),
        }
    )
    pq.write_table(table, path)
    return path


def _long_csv(path, rows):
    lines = ["time,monitor,value,unit"] + [",".join(map(str, row)) for row in rows]
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return path


def _values(catalogue, name):
    with catalogue.engine.connect() as connection:
        monitor_id = connection.execute(select(Monitor.id).where(Monitor.name == name)).scalar_one()
        rows = connection.execute(select(MonitorValue.time, MonitorValue.value).where(MonitorValue.monitor_id == monitor_id).order_by(MonitorValue.time)).all()
    return [(t, v) for t, v in rows]


def _counts(catalogue):
    with catalogue.engine.connect() as connection:
        return tuple(connection.execute(select(func.count()).select_from(table)).scalar_one() for table in (Monitor, MonitorValue, MonitorRollup, MonitorFile))


# --- the contract --------------------------------------------------------------------


def test_contract_tells_monitor_tables_from_shot_tables(tmp_path):
    from conftest import shot_table

    shots = tmp_path / "shots.parquet"
    pq.write_table(shot_table(), shots)
    assert not is_monitor_table(shots)
    assert is_monitor_table(_wide(tmp_path / "log.parquet"))
    assert is_monitor_table(_long_csv(tmp_path / "log.csv", [("2026-03-02T09:00:00Z", "room_temp", 22.1, "degC")]))
    # A folder rule in runlog.toml decides instead of the columns.
    assert not is_monitor_table(tmp_path / "log.parquet", Mapping(monitor_files=("slow/*",)))
    assert is_monitor_table(shots, Mapping(monitor_files=("*shots.parquet",)))


def test_long_and_wide_forms_read_the_same_series(tmp_path):
    wide = read_monitor_table(_wide(tmp_path / "w.parquet", n=3))
    assert wide.form == "wide" and [(s.name, s.unit, s.values.size) for s in wide.series] == [("room_temp", "degC", 3), ("laser_power", "mW", 3)]
    rows = [("2026-03-02T10:00:00+01:00", "room_temp", 22.5, "degC"), ("2026-03-02T09:00:10Z", "room_temp", 295.75, "K")]
    long = read_monitor_table(_long_csv(tmp_path / "l.csv", rows), apparatus="bench-a")
    (series,) = long.series
    assert series.unit == "degC" and series.apparatus == "bench-a"
    assert series.time_us.tolist() == [int(T0.timestamp() * 1e6), int(T0.timestamp() * 1e6) + 10_000_000]
    assert series.values == pytest.approx([22.5, 22.6])  # 295.75 K = 22.6 degC (SI definition of the kelvin scale)


@pytest.mark.parametrize(
    "rows, message",
    [
        ([("2026-03-02T09:00:00", "room_temp", 22.0, "degC")], "l.csv (column 'time', row 0): '2026-03-02T09:00:00' is not an ISO 8601 time with a zone offset (e.g. 2026-03-01T12:00:00+01:00)"),
        ([("2026-03-02T09:00:00Z", "room_temp", 22.0, "degC"), ("2026-03-02T09:00:01Z", "room_temp", "warm", "degC")], "l.csv (column 'value', row 1): 'warm' is not a number"),
        ([("2026-03-02T09:00:00Z", "room_temp", 22.0, "degC"), ("2026-03-02T09:00:01Z", "room_temp", 22.0, "blorps")], "l.csv (column 'unit', row 1): unknown unit 'blorps'"),
        ([("2026-03-02T09:00:00Z", "room_temp", 22.0, "degC"), ("2026-03-02T09:00:01Z", "", 22.0, "degC")], "l.csv (column 'monitor', row 1): empty monitor name"),
        ([("2026-03-02T09:00:00Z", "room_temp", 22.0, "degC"), ("2026-03-02T09:00:01Z", "room_temp", "", "degC")], "l.csv (column 'value', row 1): empty value"),
        ([("2026-03-02T09:00:00Z", "room_temp", 22.0, "degC"), ("2026-03-02T09:00:01Z", "room_temp", "inf", "degC")], "l.csv (column 'value', row 1): value inf is not finite"),
        ([("2026-03-02T09:00:00Z", "room_temp", 22.0, "degC"), ("2026-03-02T09:00:01Z", "room_temp", 1.0, "mW")], "l.csv (column 'unit', row 1): monitor 'room_temp' in 'mW' and in 'degC', which are not the same kind of quantity"),
        # Out of order is fine; the same time twice for one monitor is not (row 2 repeats row 0).
        ([("2026-03-02T09:00:05Z", "room_temp", 22.0, "degC"), ("2026-03-02T09:00:00Z", "room_temp", 22.0, "degC"), ("2026-03-02T09:00:05Z", "room_temp", 22.1, "degC")], "l.csv (column 'time', row 2): monitor 'room_temp' has two values at the same time"),
    ],
)
def test_contract_refuses_with_file_column_and_first_bad_row(tmp_path, rows, message):
    with pytest.raises(runlog.ContractError) as caught:
        read_monitor_table(_long_csv(tmp_path / "l.csv", rows), apparatus="bench-a")
    assert str(caught.value) == f"{tmp_path / message}"


def test_contract_refuses_bad_wide_columns_and_a_missing_apparatus(tmp_path):
    path = tmp_path / "w.parquet"
    pq.write_table(pa.table({"time": pa.array([T0], pa.timestamp("us", tz="UTC")), "room_temp": [22.0]}), path)
    with pytest.raises(runlog.ContractError) as caught:
        read_monitor_table(path, apparatus="bench-a")
    assert str(caught.value) == f"{path} (column 'room_temp'): a wide-form column must be <name>[<unit>] (e.g. room_temp[degC], '[]' for a plain number)"
    pq.write_table(pa.table({"time": pa.array([T0], pa.timestamp("us")), "room_temp[degC]": [22.0]}), path)
    with pytest.raises(runlog.ContractError, match=r"column 'time', row 0\): timestamp has no time zone"):
        read_monitor_table(path, apparatus="bench-a")
    pq.write_table(pa.table({"time": pa.array([T0], pa.timestamp("us", tz="UTC")), "room_temp[degC]": [22.0]}), path)
    with pytest.raises(runlog.ContractError) as caught:
        read_monitor_table(path)
    assert str(caught.value) == f"{path} (column 'apparatus'): no apparatus: add an 'apparatus' column, give --apparatus, or set [defaults] apparatus in runlog.toml"
    assert read_monitor_table(path, Mapping(apparatus="bench-b")).series[0].apparatus == "bench-b"


# --- ingest ----------------------------------------------------------------------------


def test_ingest_stores_values_and_is_idempotent_by_content(catalogue, tmp_path):
    path = _wide(tmp_path / "log.parquet")
    (first,) = catalogue.ingest(path)
    assert (first.status, first.monitors, first.values) == ("ingested", ("laser_power", "room_temp"), 240)
    stored = _counts(catalogue)
    (again,) = catalogue.ingest(path)
    assert again.status == "already-present"
    assert _counts(catalogue) == stored
    values = _values(catalogue, "room_temp")
    expected = pq.read_table(path).to_pandas()
    assert [v for _, v in values] == pytest.approx(expected["room_temp[degC]"].tolist())
    assert values[0][0] == T0


def test_a_refused_file_writes_nothing_and_a_clash_with_stored_times_is_refused(catalogue, tmp_path):
    catalogue.ingest(_long_csv(tmp_path / "a.csv", [("2026-03-02T09:00:00Z", "room_temp", 22.0, "degC"), ("2026-03-02T09:00:10Z", "room_temp", 22.1, "degC")]), apparatus="bench-a")
    before = _counts(catalogue)
    # A new monitor first (would be written), then a value at a time room_temp already has.
    clash = _long_csv(tmp_path / "b.csv", [("2026-03-02T09:00:00Z", "humidity", 40.0, "percent"), ("2026-03-02T09:00:20Z", "room_temp", 22.2, "degC"), ("2026-03-02T09:00:10Z", "room_temp", 22.3, "degC")])
    (result,) = catalogue.ingest(clash, apparatus="bench-a")
    assert result.status == "refused"
    assert result.reason == f"{clash} (column 'time', row 2): monitor 'room_temp' already has a value at 2026-03-02T09:00:10+00:00 (from an earlier file)"
    assert _counts(catalogue) == before


def test_a_later_file_in_another_unit_is_converted_to_the_stored_unit(catalogue, tmp_path):
    catalogue.ingest(_long_csv(tmp_path / "a.csv", [("2026-03-02T09:00:00Z", "room_temp", 22.0, "degC")]), apparatus="bench-a")
    catalogue.ingest(_long_csv(tmp_path / "b.csv", [("2026-03-02T09:00:10Z", "room_temp", 296.15, "K")]), apparatus="bench-a")
    assert [v for _, v in _values(catalogue, "room_temp")] == pytest.approx([22.0, 23.0])
    (refused,) = catalogue.ingest(_long_csv(tmp_path / "c.csv", [("2026-03-02T09:00:20Z", "room_temp", 1.0, "mW")]), apparatus="bench-a")
    assert refused.reason == f"{tmp_path / 'c.csv'} (column 'room_temp', row 0): monitor 'room_temp' is stored in 'degC'; 'mW' is not the same kind of quantity"


def test_rollups_equal_pandas_resampling_and_merge_across_files(catalogue, tmp_path):
    with catalogue.engine.begin() as connection:
        connection.execute(text("INSERT INTO settings (key, value) VALUES ('lab_timezone', 'Europe/Berlin')"))
    # Two files that split one minute and one lab day between them, rows out of order.
    start = dt.datetime(2026, 3, 2, 22, 30, 15, tzinfo=dt.timezone.utc)
    rng = np.random.default_rng(3)
    times = [start + dt.timedelta(seconds=7 * i) for i in range(1500)]
    values = 20 + rng.standard_normal(1500)
    order = rng.permutation(1500)
    halves = [order[:700], order[700:]]
    for number, rows in enumerate(halves):
        path = tmp_path / f"part{number}.parquet"
        pq.write_table(pa.table({"time": pa.array([times[i] for i in rows], pa.timestamp("us", tz="UTC")), "t[degC]": values[rows]}), path)
        assert catalogue.ingest(path, apparatus="bench-a")[0].status == "ingested"
    series = pd.Series(values, index=pd.DatetimeIndex(times))
    with catalogue.engine.connect() as connection:
        for resolution, grouped in (
            ("minute", series.resample("1min")),
            ("hour", series.resample("1h")),
            ("day", series.tz_convert("Europe/Berlin").resample("1D")),
        ):
            reference = grouped.agg(["count", "sum", "min", "max"])
            reference = reference[reference["count"] > 0]
            rows = connection.execute(select(MonitorRollup.start, MonitorRollup.value_count, MonitorRollup.value_sum, MonitorRollup.minimum, MonitorRollup.maximum).where(MonitorRollup.resolution == resolution).order_by(MonitorRollup.start)).all()
            assert [r[0] for r in rows] == [t.to_pydatetime().astimezone(dt.timezone.utc) for t in reference.index], resolution
            assert [r[1] for r in rows] == reference["count"].tolist()
            assert [r[2] for r in rows] == pytest.approx(reference["sum"].tolist())
            assert [r[3] for r in rows] == reference["min"].tolist()
            assert [r[4] for r in rows] == reference["max"].tolist()


def test_monitor_values_are_partitioned_by_month_on_postgresql(pg_url, tmp_path):
    with runlog.open(pg_url) as catalogue:
        _wide(tmp_path / "a.parquet", n=3, start=dt.datetime(2026, 1, 31, 23, 59, 50, tzinfo=dt.timezone.utc))
        assert catalogue.ingest(tmp_path / "a.parquet")[0].status == "ingested"
        with catalogue.engine.connect() as connection:
            children = connection.execute(text("SELECT inhrelid::regclass::text FROM pg_inherits WHERE inhparent = 'monitor_values'::regclass ORDER BY 1")).scalars().all()
            assert children == ["monitor_values_y2026m01", "monitor_values_y2026m02"]
            assert connection.execute(text("SELECT count(*) FROM monitor_values_y2026m02")).scalar_one() == 2 * 2


def test_a_sparse_monitor_file_gets_one_partition_a_year_on_postgresql(pg_url, tmp_path):
    # One reading a month for three years: 36 monthly tables before, three yearly ones now.
    start = dt.datetime(2020, 1, 15, tzinfo=dt.timezone.utc)
    _wide(tmp_path / "monthly.parquet", n=36, start=start, step_s=int(30.44 * 86400))
    with runlog.open(pg_url) as catalogue:
        assert catalogue.ingest(tmp_path / "monthly.parquet")[0].status == "ingested"
        with catalogue.engine.connect() as connection:
            children = connection.execute(text("SELECT inhrelid::regclass::text FROM pg_inherits WHERE inhparent = 'monitor_values'::regclass ORDER BY 1")).scalars().all()
        assert children == ["monitor_values_y2020", "monitor_values_y2021", "monitor_values_y2022"]
        expected = pq.read_table(tmp_path / "monthly.parquet")
        stored = _values(catalogue, "room_temp")
        assert [t for t, _ in stored] == expected["time"].to_pylist()
        assert [v for _, v in stored] == expected["room_temp[degC]"].to_pylist()


def test_cli_ingests_a_monitor_folder(db_url, tmp_path):
    from click.testing import CliRunner

    from runlog.cli import cli

    folder = tmp_path / "slow"
    folder.mkdir()
    _wide(folder / "a.parquet")
    _long_csv(folder / "b.csv", [("2026-03-03T09:00:00Z", "water_temp", 18.0, "degC")])
    result = CliRunner().invoke(cli, ["--db", db_url, "ingest", "--apparatus", "bench-a", str(folder)])
    assert result.exit_code == 0, result.output
    assert "240 monitor values, laser_power, room_temp" in result.output
    assert "1 monitor values, water_temp" in result.output


@pytest.mark.slow
def test_sigkill_mid_ingest_leaves_nothing_half_written(db_url, tmp_path):
    path = _wide(tmp_path / "big.parquet", n=200_000, step_s=1)
    command = [sys.executable, "-m", "runlog", "--db", db_url, "ingest", "--json", str(path)]
    with runlog.open(db_url) as catalogue:
        empty = _counts(catalogue)
    for delay, env in [(0.5, {}), (1.2, {}), (2.0, {"RUNLOG_TEST_PAUSE_BEFORE_COMMIT": "5"})]:
        process = subprocess.Popen(command, env={**os.environ, **env}, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
        time.sleep(delay)
        process.send_signal(signal.SIGKILL)
        process.wait()
        with runlog.open(db_url) as catalogue:
            counts = _counts(catalogue)
            with catalogue.engine.connect() as connection:
                logged = connection.execute(select(func.count()).select_from(IngestLogEntry).where(IngestLogEntry.status == "ingested")).scalar_one()
        assert counts == empty or (counts[1] == 400_000 and logged == 1), f"partial after a kill at {delay} s: {counts}"
    assert subprocess.run(command, stdout=subprocess.DEVNULL).returncode == 0
    with runlog.open(db_url) as catalogue:
        assert _counts(catalogue)[1] == 400_000


def test_monitor_series_reads_the_rollups_and_the_list_flags_silent_monitors(catalogue, tmp_path):
    path = _wide(tmp_path / "log.parquet", n=720, step_s=10)  # two hours
    catalogue.ingest(path)
    series = catalogue.monitor_series("room_temp", max_points=200)
    assert series.attrs["resolution"] == "minute" and series.attrs["unit"] == "degC"
    assert series["count"].tolist() == [6] * 120
    expected = pq.read_table(path).to_pandas().set_index("time")["room_temp[degC]"].resample("1min").mean()
    assert series["mean"].tolist() == pytest.approx(expected.tolist())
    assert catalogue.monitor_series("room_temp", max_points=10).attrs["resolution"] == "hour"
    last = T0 + dt.timedelta(seconds=7190)
    listed = {m["name"]: m for m in catalogue.monitors(now=last + dt.timedelta(minutes=30))}
    assert listed["room_temp"]["latest_value"] == pytest.approx(pq.read_table(path)["room_temp[degC]"].to_pylist()[-1])
    assert not listed["room_temp"]["stopped_reporting"]
    assert all(m["stopped_reporting"] for m in catalogue.monitors(now=last + dt.timedelta(hours=2)))
    with pytest.raises(runlog.NotFoundError):
        catalogue.monitor_series("no_such_monitor")
