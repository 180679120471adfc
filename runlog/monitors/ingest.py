"""Monitor ingest: one monitor table, checked whole, written in one transaction.

All or nothing per file; a file whose content hash is already in the ingest log is not
read again; a value at a time its monitor already has (from an earlier file) refuses the
file. Values arrive in the unit of their file and are stored in the monitor's unit (the
first one it was ingested in), converted through :mod:`runlog.units`. The rollups
(:mod:`runlog.monitors.rollups`) are updated in the same transaction.
"""

from __future__ import annotations

import datetime as dt
import time
from collections import Counter
from pathlib import Path

import numpy as np
import pyarrow as pa
from sqlalchemy.engine import Engine

from runlog.config import Mapping
from runlog.errors import ContractError
from runlog.ingest import IngestResult, _Catalogue, _log, _month_counts, _times, _unchanged_since, commit_file, hash_file, record_refusal
from runlog.monitors.contract import MonitorSeries, read_monitor_table
from runlog.monitors.rollups import store_rollups, summarise
from runlog.store.bulk import Writer, open_writer
from runlog.store.partitions import MONITOR_TABLES
from runlog.store.rollups import as_datetime, lab_timezone
from runlog.store.schema import to_epoch_us
from runlog.units import conversion

__all__ = ["ingest_monitor_file"]


def _utc(us: int) -> dt.datetime:
    return dt.datetime(1970, 1, 1, tzinfo=dt.timezone.utc) + dt.timedelta(microseconds=int(us))


def _monitor(writer: Writer, ids: _Catalogue, series: MonitorSeries, file: str) -> tuple[int, np.ndarray]:
    """The monitor's id (made on first sight) and the series' values in its stored unit."""
    apparatus_id = ids.apparatus_id(series.apparatus)
    found = writer.rows("SELECT id, unit FROM monitors WHERE apparatus_id = :a AND name = :n", {"a": apparatus_id, "n": series.name})
    if not found:
        writer.execute(
            "INSERT INTO monitors (apparatus_id, name, unit, value_count) VALUES (:a, :n, :u, 0)",
            {"a": apparatus_id, "n": series.name, "u": series.unit},
        )
        found = writer.rows("SELECT id, unit FROM monitors WHERE apparatus_id = :a AND name = :n", {"a": apparatus_id, "n": series.name})
    monitor_id, unit = int(found[0][0]), str(found[0][1])
    if unit == series.unit:
        return monitor_id, series.values
    factors = conversion(series.unit, unit)
    if factors is None:
        raise ContractError(file, f"monitor '{series.name}' is stored in '{unit}'; '{series.unit}' is not the same kind of quantity", column=series.name, row=int(series.rows[0]))
    return monitor_id, series.values * factors[0] + factors[1]


def _refuse_stored_times(writer: Writer, monitor_id: int, series: MonitorSeries, file: str) -> None:
    low, high = int(series.time_us.min()), int(series.time_us.max())
    params = {"m": monitor_id, "a": _utc(low), "b": _utc(high)}
    count = writer.rows("SELECT count(*) FROM monitor_values WHERE monitor_id = :m AND time >= :a AND time <= :b", params)[0][0]
    if not count:
        return
    stored = np.array([v if isinstance(v, (int, np.integer)) else to_epoch_us(as_datetime(v)) for (v,) in writer.rows("SELECT time FROM monitor_values WHERE monitor_id = :m AND time >= :a AND time <= :b", params)], dtype=np.int64)
    clash = np.isin(series.time_us, stored)
    if clash.any():
        row = int(series.rows[clash].min())
        at = _utc(int(series.time_us[series.rows == row][0])).isoformat()
        raise ContractError(file, f"monitor '{series.name}' already has a value at {at} (from an earlier file)", column="time", row=row)


def _write_series(writer: Writer, monitor_id: int, series: MonitorSeries, values: np.ndarray, zone) -> None:
    order = np.argsort(series.time_us, kind="stable")
    time_us, values = series.time_us[order], values[order]
    writer.append(
        "monitor_values",
        pa.table({"monitor_id": pa.array(np.full(time_us.size, monitor_id, dtype=np.int64)), "time": _times(time_us), "value": pa.array(values, pa.float64())}),
    )
    store_rollups(writer, monitor_id, summarise(time_us, values, zone))
    stats = writer.rows("SELECT value_count, first_time, last_time FROM monitors WHERE id = :m", {"m": monitor_id})[0]
    first = min([int(time_us[0])] + ([to_epoch_us(as_datetime(stats[1]))] if stats[1] is not None else []))
    last = max([int(time_us[-1])] + ([to_epoch_us(as_datetime(stats[2]))] if stats[2] is not None else []))
    writer.execute(
        "UPDATE monitors SET value_count = :c, first_time = :f, last_time = :l WHERE id = :m",
        {"c": int(stats[0]) + int(time_us.size), "f": _utc(first), "l": _utc(last), "m": monitor_id},
    )


def ingest_monitor_file(engine: Engine, path: Path, mapping: Mapping | None = None, apparatus: str | None = None) -> IngestResult:
    """Ingest one monitor table in one transaction; a refusal becomes a result, not an exception."""
    mapping = mapping or Mapping()
    started = dt.datetime.now(dt.timezone.utc)
    name = str(path)
    sha, size = "", 0
    read_s = write_s = 0.0
    try:
        before, sha, size = hash_file(path)
        tick = time.perf_counter()
        table = read_monitor_table(path, mapping, apparatus)
        # Values per month: a sparse year gets one partition (runlog.store.partitions).
        months: Counter[dt.date] = Counter()
        for series in table.series:
            months.update(_month_counts(series.time_us))
        read_s = time.perf_counter() - tick
        tick = time.perf_counter()
        writer = open_writer(engine, months, MONITOR_TABLES)
        try:
            names = tuple(sorted({s.name for s in table.series}))
            if writer.rows("SELECT 1 FROM ingest_log WHERE sha256 = :h AND status = 'ingested'", {"h": sha}):
                return IngestResult(name, "already-present", monitors=names, values=table.value_count)
            ids = _Catalogue(writer, name)
            zone = lab_timezone(writer)
            written: list[tuple[int, int]] = []
            for series in table.series:
                monitor_id, values = _monitor(writer, ids, series, name)
                _refuse_stored_times(writer, monitor_id, series, name)
                _write_series(writer, monitor_id, series, values, zone)
                written.append((monitor_id, int(values.size)))
            write_s = time.perf_counter() - tick
            result = IngestResult(name, "ingested", monitors=names, values=table.value_count)
            _unchanged_since(path, before)
            log_id = _log(engine, result, sha, size, started, read_s, write_s, writer)
            for monitor_id, count in written:
                writer.execute("INSERT INTO monitor_files (ingest_id, monitor_id, value_count) VALUES (:i, :m, :c)", {"i": log_id, "m": monitor_id, "c": count})
            commit_file(writer)
            return result
        finally:
            writer.close()
    except Exception as error:  # noqa: BLE001 - any failure of one file is that file's refusal
        return record_refusal(engine, name, error, sha, size, started, read_s, write_s)
