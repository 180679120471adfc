"""Monitor ingest and overlay speed.

1. Ingest of a 1 M-row monitor file (one monitor at 1 Hz, long form, Parquet) into a fresh
   SQLite catalogue — values, minute/hour/lab-day rollups, ingest log, one transaction —
   against the named peer: pandas ``DataFrame.to_sql`` of the same rows (time, monitor,
   value) into a fresh SQLite file, measured in the same run. Target: ratio <= 0.5.
2. An overlay query (``Catalogue.monitor_series``) for a year of one monitor at 1 Hz
   (31.5 M values, ingested month by month), answered from the rollups. Target: < 0.3 s.

    python benchmarks/monitors.py [--year-days 365]
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


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--rows", type=int, default=1_000_000)
    parser.add_argument("--year-days", type=int, default=365)
    options = parser.parse_args()
    with tempfile.TemporaryDirectory(prefix="runlog-bench-monitors-") as folder:
        folder = Path(folder)
        frame = _file(folder / "log.parquet", 0, options.rows, 1)
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
