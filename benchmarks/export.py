"""Export speed: 1 M of a 10 M-shot catalogue as a Data Package, against DuckDB.

Uses (or builds, with the builder of ``benchmarks/drift.py``) the synthetic catalogue of a
busy apparatus: 365 lab days, ~27 200 shots a day in runs of 200. The filter picks one
apparatus, a parameter range and 37 lab days (~1 M shots):

    apparatus = 'busy' and load_time between 250 ms and 0.35 s
        and date between '2025-03-01' and '2025-04-06'

The peer is DuckDB reading the same shots table from one Parquet file (written once from
the catalogue, every shot, and kept beside the catalogue) and writing the selected rows,
sorted the same way, with ``COPY (SELECT ... WHERE <same predicate> ORDER BY ...) TO``.
Both are timed end to end, median of 3, and the shot counts are checked equal. Run:

    python benchmarks/export.py [--db URL] [--shots 10000000]

If the catalogue is still being built by another process, this waits for it.
"""

from __future__ import annotations

import argparse
import datetime as dt
import importlib.util
import shutil
import statistics
import sys
import tempfile
import time
from pathlib import Path
from zoneinfo import ZoneInfo

import runlog
from runlog.export import export
from runlog.selection import select_arrow, select_table

WHERE = "apparatus = 'busy' and load_time between 250 ms and 0.35 s and date between '2025-03-01' and '2025-04-06'"
FIRST_DAY, LAST_DAY = dt.date(2025, 3, 1), dt.date(2025, 4, 6)


def _drift_builder():
    path = Path(__file__).with_name("drift.py")
    spec = importlib.util.spec_from_file_location("runlog_bench_drift", path)
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def ready_catalogue(url: str, shots: int) -> runlog.Catalogue:
    """The catalogue with at least 99 % of ``shots``: reused, built if empty, or waited for
    while another process builds it (never a second build in parallel)."""
    catalogue = runlog.open(url)
    have = catalogue.counts()["shots"]
    if have == 0:
        print(f"building {shots} shots into {catalogue.url} (benchmarks/drift.py builder) ...", file=sys.stderr)
        _drift_builder().build(catalogue, shots)
        return catalogue
    last, still = have, 0
    while have < shots * 0.99:
        time.sleep(30)
        have = catalogue.counts()["shots"]
        still = still + 1 if have == last else 0
        if still >= 20:
            raise SystemExit(f"{catalogue.url} stopped growing at {have} shots; give an empty --db to build one")
        print(f"  waiting for the catalogue being built: {have} shots", file=sys.stderr)
        last = have
    return catalogue


def peer_parquet(catalogue, path: Path) -> Path:
    """Every shot of the catalogue in one Parquet file, written once (the peer's input)."""
    counts = catalogue.counts()
    marker = path.with_suffix(".shots")
    if path.exists() and marker.exists() and marker.read_text() == str(counts["shots"]):
        return path
    import pyarrow.parquet as pq

    print(f"writing every shot to {path} for the peer (once) ...", file=sys.stderr)
    tick = time.perf_counter()
    pq.write_table(select_arrow(catalogue, None), path, compression="zstd")
    marker.write_text(str(counts["shots"]))
    print(f"  {time.perf_counter() - tick:.0f} s", file=sys.stderr)
    return path


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--db", default=f"sqlite:///{Path(tempfile.gettempdir()) / 'runlog-bench-drift.sqlite'}")
    parser.add_argument("--shots", type=int, default=10_000_000)
    parser.add_argument("--repeat", type=int, default=3)
    args = parser.parse_args()
    import duckdb

    catalogue = ready_catalogue(args.db, args.shots)
    counts = catalogue.counts()
    folder = Path(tempfile.mkdtemp(prefix="runlog-bench-export-"))
    source = peer_parquet(catalogue, Path(tempfile.gettempdir()) / "runlog-bench-export-shots.parquet")

    zone = ZoneInfo(catalogue.lab_timezone)
    low = dt.datetime.combine(FIRST_DAY, dt.time(), zone).astimezone(dt.timezone.utc)
    high = dt.datetime.combine(LAST_DAY + dt.timedelta(days=1), dt.time(), zone).astimezone(dt.timezone.utc)
    peer_sql = (
        f"COPY (SELECT * FROM read_parquet('{source}') WHERE apparatus = 'busy' "
        f"AND \"p.load_time\" BETWEEN 250 AND 350 AND time >= TIMESTAMPTZ '{low.isoformat()}' AND time < TIMESTAMPTZ '{high.isoformat()}' "
        f"ORDER BY apparatus, run, shot) TO '{folder / 'peer.parquet'}' (FORMAT parquet, COMPRESSION zstd)"
    )

    select_times, export_times, peer_times = [], [], []
    result = None
    for _ in range(args.repeat):
        tick = time.perf_counter()
        selected = select_table(catalogue, WHERE).table.num_rows
        select_times.append(time.perf_counter() - tick)
        tick = time.perf_counter()
        result = export(catalogue, WHERE, folder / "package", overwrite=True)
        export_times.append(time.perf_counter() - tick)
        connection = duckdb.connect()
        tick = time.perf_counter()
        connection.execute(peer_sql)
        peer_times.append(time.perf_counter() - tick)
        peer_rows = connection.execute(f"SELECT count(*) FROM read_parquet('{folder / 'peer.parquet'}')").fetchone()[0]
        connection.close()
    assert result is not None
    if not (result.shots == peer_rows == selected):
        raise SystemExit(f"shot counts differ: runlog {result.shots}, selection {selected}, DuckDB {peer_rows}")
    export_s, peer_s, select_s = statistics.median(export_times), statistics.median(peer_times), statistics.median(select_times)
    print(f"catalogue: {catalogue.url}: {counts['runs']} runs, {counts['shots']} shots")
    print(f"filter: {WHERE}")
    print(f"selected: {result.shots} shots in {result.runs} runs")
    print(f"runlog export (Data Package, Parquet): median {export_s:.2f} s  {[round(t, 2) for t in export_times]}")
    print(f"  of which the selection alone: median {select_s:.2f} s  {[round(t, 2) for t in select_times]}")
    print(f"DuckDB COPY from one Parquet file (peer): median {peer_s:.2f} s  {[round(t, 2) for t in peer_times]}")
    print(f"ratio runlog / DuckDB: {export_s / peer_s:.2f}   (target <= 2)")
    shutil.rmtree(folder, ignore_errors=True)
    catalogue.close()


if __name__ == "__main__":
    main()
