"""Monitor ingest and overlay speed.

1. Ingest of a 1 M-row monitor file (one monitor at 1 Hz, long form, Parquet) into a fresh
   SQLite catalogue — values, minute/hour/lab-day rollups, ingest log, one transaction —
   against the named peer: pandas ``DataFrame.to_sql`` of the same rows (time, monitor,
   value) into a fresh SQLite file, measured in the same run. Target: ratio <= 0.5.
2. An overlay query (``Catalogue.monitor_series``) for a year of one monitor at 1 Hz
   (31.5 M values, ingested month by month), answered from the rollups. Target: < 0.3 s.
3. A filter by the monitor's name (``room_temp > 21.08 degC``: each shot's as-of value,
   runlog.filters) over the 1 M-row monitor of 1. and 100 000 shots in the same span,
   selected with ``select_shots``, against the named peer: pandas ``merge_asof`` of the
   same shots and monitor rows read from their Parquet files, then the same comparison,
   measured in the same run (the peer holds everything in memory; runlog reads a catalogue).
   With ``--postgres SERVER_URL`` also on a fresh database of that server. Also printed:
   every shot with the monitor's column (``select_shots(..., monitors=["room_temp"])``).

    python benchmarks/monitors.py [--year-days 365] [--postgres SERVER_URL]
"""

from __future__ import annotations

import argparse
import datetime as dt
import tempfile
import time
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
from sqlalchemy import create_engine

import runlog

START = dt.datetime(2026, 1, 1, tzinfo=dt.timezone.utc)


def _file(path: Path, first_second: int, rows: int, seed: int) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    base = int(START.timestamp()) * 1_000_000
    times = base + (first_second + np.arange(rows, dtype=np.int64)) * 1_000_000
    values = 21.0 + 0.05 * rng.standard_normal(rows)
    table = pa.table({"time": pa.array(times, pa.int64()).cast(pa.timestamp("us", tz="UTC")), "monitor": pa.array(["room_temp"] * rows).dictionary_encode(), "value": values, "unit": pa.array(["degC"] * rows).dictionary_encode()})
    pq.write_table(table, path)
    return table.to_pandas()


def _shots(path: Path, span_seconds: int, count: int, per_run: int = 100) -> None:
    """``count`` shots evenly over ``span_seconds`` from START, ``per_run`` per run."""
    base = int(START.timestamp()) * 1_000_000
    times = base + (np.linspace(0, span_seconds - 1, count).astype(np.int64)) * 1_000_000
    index = np.arange(count)
    table = pa.table(
        {
            "run": pa.array([f"r{i // per_run:05d}" for i in index]),
            "apparatus": pa.array(["bench"] * count).dictionary_encode(),
            "sequence": pa.array(["loading"] * count).dictionary_encode(),
            "shot": pa.array(index % per_run, pa.int64()),
            "time": pa.array(times, pa.int64()).cast(pa.timestamp("us", tz="UTC")),
            "p.wait[us]": (index % per_run).astype(float),
        }
    )
    pq.write_table(table, path)


def _filter_timing(url: str, folder: Path, label: str, threshold: float) -> tuple[float, int]:
    from runlog.selection import select_shots

    with runlog.open(url) as catalogue:
        if not catalogue.runs().shape[0]:
            for name in ("log.parquet", "shots.parquet"):
                (result,) = catalogue.ingest(folder / name, apparatus="bench")
                assert result.status == "ingested", result.reason
        timings = []
        for _ in range(3):
            tick = time.perf_counter()
            found = select_shots(catalogue, f"room_temp > {threshold} degC")
            timings.append(time.perf_counter() - tick)
        tick = time.perf_counter()
        column = select_shots(catalogue, None, monitors=["room_temp"])
        took = time.perf_counter() - tick
    print(f"  runlog {label}: {len(found):,} shots in {min(timings):.2f} s (best of 3); every shot with its monitor.room_temp column: {len(column):,} shots in {took:.2f} s")
    return min(timings), len(found)


def _filter_peer(folder: Path, threshold: float) -> tuple[float, int]:
    timings = []
    for _ in range(3):
        tick = time.perf_counter()
        shots = pd.read_parquet(folder / "shots.parquet", columns=["run", "shot", "time"]).sort_values("time")
        log = pd.read_parquet(folder / "log.parquet", columns=["time", "value"]).sort_values("time")
        joined = pd.merge_asof(shots, log, on="time", direction="backward", tolerance=pd.Timedelta(seconds=600))
        found = joined[joined["value"] > threshold]
        timings.append(time.perf_counter() - tick)
    return min(timings), len(found)


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--rows", type=int, default=1_000_000)
    parser.add_argument("--year-days", type=int, default=365)
    parser.add_argument("--filter-shots", type=int, default=100_000)
    parser.add_argument("--postgres", metavar="URL", help="a PostgreSQL server: also time the filter on a fresh database there")
    parser.add_argument("--only-filter", action="store_true", help="skip the ingest and overlay parts")
    options = parser.parse_args()
    with tempfile.TemporaryDirectory(prefix="runlog-bench-monitors-") as folder:
        folder = Path(folder)
        frame = _file(folder / "log.parquet", 0, options.rows, 1)
        _shots(folder / "shots.parquet", options.rows, options.filter_shots)
        threshold = 21.08  # about 5 % of the values (noise 0.05 degC around 21)
        print(f"filter 'room_temp > {threshold} degC' over a {options.rows:,}-row monitor and {options.filter_shots:,} shots:")
        peer, peer_count = _filter_peer(folder, threshold)
        print(f"  peer pandas read_parquet + merge_asof: {peer_count:,} shots in {peer:.2f} s (best of 3)")
        ours, count = _filter_timing(f"sqlite:///{folder / 'filter.sqlite'}", folder, "SQLite", threshold)
        assert count == peer_count, (count, peer_count)
        print(f"  ratio SQLite / peer {ours / peer:.1f}")
        if options.postgres:
            import sys

            sys.path.insert(0, str(Path(__file__).parent))
            from ingest import _postgres_databases

            fresh = _postgres_databases(options.postgres)
            try:
                ours, count = _filter_timing(fresh("runlog_bench_monitor_filter"), folder, "PostgreSQL", threshold)
                assert count == peer_count, (count, peer_count)
                print(f"  ratio PostgreSQL / peer {ours / peer:.1f}")
            finally:
                fresh(None)
        if options.only_filter:
            return
        with runlog.open(f"sqlite:///{folder / 'ours.sqlite'}") as catalogue:
            tick = time.perf_counter()
            (result,) = catalogue.ingest(folder / "log.parquet", apparatus="bench")
            ours = time.perf_counter() - tick
            assert result.status == "ingested", result.reason
        peer_engine = create_engine(f"sqlite:///{folder / 'peer.sqlite'}")
        rows = frame[["time", "monitor", "value"]].astype({"monitor": str})
        tick = time.perf_counter()
        rows.to_sql("monitor_values", peer_engine, index=False)
        peer = time.perf_counter() - tick
        peer_engine.dispose()
        print(f"ingest {options.rows:,} monitor rows: runlog {ours:.2f} s, pandas to_sql {peer:.2f} s, ratio {ours / peer:.2f} (target <= 0.5)")

        day = 86_400
        with runlog.open(f"sqlite:///{folder / 'year.sqlite'}") as catalogue:
            tick = time.perf_counter()
            for month, first in enumerate(range(0, options.year_days * day, 30 * day)):
                count = min(30 * day, options.year_days * day - first)
                path = folder / f"month{month:02d}.parquet"
                _file(path, first, count, 10 + month)
                (result,) = catalogue.ingest(path, apparatus="bench")
                assert result.status == "ingested", result.reason
                path.unlink()
            loading = time.perf_counter() - tick
            timings = []
            for _ in range(5):
                tick = time.perf_counter()
                series = catalogue.monitor_series("room_temp", max_points=10_000)
                timings.append(time.perf_counter() - tick)
            print(
                f"overlay of {options.year_days} days of 1 Hz ({options.year_days * day:,} values, loaded in {loading:.0f} s): "
                f"{len(series)} {series.attrs['resolution']} points in {min(timings) * 1000:.0f} ms (best of 5; target < 300 ms)"
            )


if __name__ == "__main__":
    main()
