"""Drift query speed: a year of a busy apparatus (10 M shots), from the daily rollups
against the same daily fill fraction computed from the raw shots' occupancy.

Builds (or reuses) a synthetic catalogue through the real ingest path: 365 days, one
apparatus, ~27 400 shots a day in runs of 200 shots with a 6x6 loading and survival
image, fill fraction near 0.5 with a step mid-year. Then times, median of 7,
``Catalogue.drift("fill_fraction")`` (rollups) and, median of 3, the raw computation
(every loading image's bits, unpacked and counted per lab day), checks that both give
the same daily values, and prints the ratio. Run:

    python benchmarks/drift.py [--db URL] [--shots 10000000] [--rebuild]
"""

from __future__ import annotations

import argparse
import datetime as dt
import statistics
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
from sqlalchemy import text

import runlog

DAYS = 365
SHOTS_PER_RUN = 200
SITES = 36


def day_table(day: int, shots_per_day: int, rng: np.random.Generator) -> pa.Table:
    date = dt.date(2025, 1, 1) + dt.timedelta(days=day)
    runs = max(1, shots_per_day // SHOTS_PER_RUN)
    n = runs * SHOTS_PER_RUN
    fill = 0.5 if day < DAYS // 2 else 0.45
    loaded = rng.random((n, SITES)) < fill
    kept = loaded & (rng.random((n, SITES)) < 0.93)
    start = int(dt.datetime(date.year, date.month, date.day, 6, tzinfo=dt.timezone.utc).timestamp() * 1e6)
    index = np.arange(n)
    flat = pa.array(loaded.ravel())
    flat_kept = pa.array(kept.ravel())
    offsets = pa.array(np.arange(0, n * SITES + 1, SITES, dtype=np.int32))
    return pa.table(
        {
            "run": pa.array([f"{date:%Y%m%d}-{i // SHOTS_PER_RUN:03d}" for i in index]).dictionary_encode(),
            "apparatus": pa.array(["busy"] * n).dictionary_encode(),
            "sequence": pa.array(["loading"] * n).dictionary_encode(),
            "shot": pa.array(index % SHOTS_PER_RUN, pa.int64()),
            "time": pa.array(start + index * 2_000_000, pa.int64()).cast(pa.timestamp("us", tz="UTC")),
            "p.lattice_depth[uK]": np.full(n, 70.0),
            "p.load_time[ms]": np.full(n, 300.0),
            "m.atom_number": loaded.sum(axis=1).astype(float),
            "occ.load": pa.ListArray.from_arrays(offsets, flat),
            "occ.survive": pa.ListArray.from_arrays(offsets, flat_kept),
        }
    )


def build(catalogue, shots: int) -> None:
    rng = np.random.default_rng(42)
    per_day = shots // DAYS
    tick = time.perf_counter()
    with tempfile.TemporaryDirectory() as folder:
        for day in range(DAYS):
            path = Path(folder) / f"day-{day:03d}.parquet"
            pq.write_table(day_table(day, per_day, rng), path)
            [result] = catalogue.ingest(path)
            if result.status != "ingested":
                raise SystemExit(f"ingest failed: {result.reason}")
            path.unlink()
            if day % 30 == 0:
                print(f"  built day {day}: {catalogue.counts()['shots']} shots, {time.perf_counter() - tick:.0f} s", file=sys.stderr)


def raw_daily_fill(catalogue) -> dict[dt.date, float]:
    """The peer: daily fill fraction straight from every loading image's packed bits."""
    query = text(
        "SELECT r.day, o.bits FROM occupancy o JOIN images i ON i.id = o.image_id "
        "JOIN runs r ON r.id = i.run_id JOIN apparatus a ON a.id = r.apparatus_id "
        "WHERE a.name = 'busy' AND i.role = 'loading' ORDER BY r.day"
    )
    totals: dict[object, list[int]] = {}
    with catalogue.engine.connect() as connection:
        result = connection.execution_options(stream_results=True).execute(query)
        while chunk := result.fetchmany(200_000):
            days = [row[0] for row in chunk]
            packed = np.frombuffer(b"".join(bytes(row[1]) for row in chunk), dtype=np.uint8).reshape(len(chunk), -1)
            counts = np.unpackbits(packed, axis=1, count=SITES).sum(axis=1)
            for day in sorted(set(days)):
                mask = np.fromiter((d == day for d in days), bool, len(days))
                entry = totals.setdefault(day, [0, 0])
                entry[0] += int(counts[mask].sum())
                entry[1] += int(mask.sum()) * SITES
    return {(d if isinstance(d, dt.date) else dt.date.fromisoformat(str(d))): s / t for d, (s, t) in totals.items()}


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--db", default=f"sqlite:///{Path(tempfile.gettempdir()) / 'runlog-bench-drift.sqlite'}")
    parser.add_argument("--shots", type=int, default=10_000_000)
    parser.add_argument("--rebuild", action="store_true")
    args = parser.parse_args()
    catalogue = runlog.open(args.db)
    have = catalogue.counts()["shots"]
    # The builder makes whole runs of SHOTS_PER_RUN shots a day, so 10 M asks for 9.93 M.
    expected = DAYS * max(1, args.shots // DAYS // SHOTS_PER_RUN) * SHOTS_PER_RUN
    if args.rebuild or have < expected:
        if have:
            raise SystemExit(f"{catalogue.url} already holds {have} shots; give an empty --db or delete it")
        print(f"building {args.shots} shots into {catalogue.url} ...", file=sys.stderr)
        build(catalogue, args.shots)
    counts = catalogue.counts()
    rollup_times = []
    for _ in range(7):
        tick = time.perf_counter()
        drift = catalogue.drift("fill_fraction", apparatus="busy", record_alarms=False)
        rollup_times.append(time.perf_counter() - tick)
    raw_times = []
    for _ in range(3):
        tick = time.perf_counter()
        raw = raw_daily_fill(catalogue)
        raw_times.append(time.perf_counter() - tick)
    worst = max(abs(raw[p.date] - p.value) for p in drift.points)
    rollup_s, raw_s = statistics.median(rollup_times), statistics.median(raw_times)
    print(f"catalogue: {catalogue.url}: {counts['runs']} runs, {counts['shots']} shots, {len(drift.points)} days")
    print(f"drift query from rollups: median {rollup_s * 1000:.1f} ms  {[round(t * 1000, 1) for t in rollup_times]}  (target < 200 ms)")
    print(f"same from raw shots (peer): median {raw_s:.2f} s  {[round(t, 2) for t in raw_times]}")
    print(f"ratio rollups / raw: {rollup_s / raw_s:.5f}   largest daily difference: {worst:.2e}")
    print(f"changes found: {[(c.date.isoformat(), round(c.before, 4), round(c.after, 4)) for c in drift.changes]}")
    catalogue.close()


if __name__ == "__main__":
    main()
