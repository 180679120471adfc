"""Cost of a new measurement name on PostgreSQL, fresh and with many month partitions.

Each scenario gets a fresh database on the server given. One file is ingested whose shots
fall in ``--months`` different UTC months (130: eleven years of one apparatus), so that the
shot-level tables hold that many partitions, or in one month ("fresh"). Then new names
are added through ingest's own step for them (``runlog.ingest._add_measurements``, ahead
of the data transaction, as ``runlog ingest`` does), one file per name: the 63 names left
in the first block of measurement columns (runlog.store.measurement_columns), then the
name that opens the next block, then a block's worth of names in one file.

Named peers, same run, same databases, per name: the same step making one column for each
name (the design before revision 0015); the name that opens a block with
``shot_measurements`` partitioned by month as before revision 0017 (the table is put back
so by 0017's downgrade, at the end of each scenario); a bare ``ALTER TABLE
shot_measurements ADD COLUMN`` in a transaction of its own on the plain table (0017) and on
the partitioned one, and the same on an unpartitioned table of as many rows. Also
printed: how many partition tables a 120-shot file spread over ten years creates, and, as
its peer in the same run, how many a partition for every month makes. Run:

    python benchmarks/measurement_names.py --postgres URL [--months 130] [--repeat 3]
"""

from __future__ import annotations

import argparse
import datetime as dt
import statistics
import sys
import tempfile
import time
from contextlib import contextmanager
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
from sqlalchemy import text

sys.path.insert(0, str(Path(__file__).resolve().parent))
from ingest import _postgres_databases  # noqa: E402

import runlog  # noqa: E402
from runlog.config import Mapping  # noqa: E402
from runlog.contract import read_layout  # noqa: E402
from runlog.ingest import _add_measurements  # noqa: E402
from runlog.store import measurement_columns, partitions  # noqa: E402
from runlog.store.measurement_columns import BLOCK, present_columns  # noqa: E402

WHAT = (
    "within a block",
    "opening a block",
    "all names of a block in one file",
    "peer: a column per name (before 0015)",
    "peer: opening a block, partitioned (before 0017)",
    "peer: ALTER plain shot_measurements",
    "peer: ALTER partitioned",
    "peer: ALTER unpartitioned",
)
START = dt.datetime(2014, 1, 15, 12, 0, tzinfo=dt.timezone.utc)


def spread_file(path: Path, shots: int, months_apart: float, measurements: list[str], seed: int = 1) -> Path:
    """``shots`` shots of one run, ``months_apart`` months (30.44 days) from one to the next."""
    rng = np.random.default_rng(seed)
    step_us = int(months_apart * 30.44 * 86400 * 1e6)
    times = int(START.timestamp() * 1e6) + np.arange(shots, dtype=np.int64) * step_us
    table = {
        "run": ["spread"] * shots,
        "apparatus": ["bench"] * shots,
        "sequence": ["loading"] * shots,
        "shot": pa.array(np.arange(shots), pa.int64()),
        "time": pa.array(times, pa.int64()).cast(pa.timestamp("us", tz="UTC")),
        "p.depth[uK]": np.full(shots, 60.0),
    }
    table |= {f"m.{name}": rng.random(shots) for name in measurements}
    pq.write_table(pa.table(table), path)
    return path


@contextmanager
def months_kept():
    """Every month its own partitions, as before sparse years got one (runlog.store.partitions)."""
    sparse = partitions.SPARSE_YEAR_MONTHS
    partitions.SPARSE_YEAR_MONTHS = 10**6
    try:
        yield
    finally:
        partitions.SPARSE_YEAR_MONTHS = sparse


def partition_tables(engine) -> int:
    with engine.connect() as connection:
        return int(connection.execute(text("SELECT count(*) FROM pg_class WHERE relispartition AND relkind = 'r'")).scalar_one())


def layout_of(path: Path):
    return read_layout(str(path), pq.ParquetFile(path).schema_arrow, Mapping())


def names_in_files(folder: Path, prefix: str, names: int, per_file: int) -> list:
    """Layouts of files (one shot each) that bring ``names`` new measurement names."""
    layouts = []
    for start in range(0, names, per_file):
        wanted = [f"{prefix}_{k:04d}" for k in range(start, min(names, start + per_file))]
        layouts.append(layout_of(spread_file(folder / f"{prefix}_{start}.parquet", 1, 1, wanted)))
    return layouts


def time_names(engine, layouts) -> float:
    tick = time.perf_counter()
    for layout in layouts:
        _add_measurements(engine, layout)
    return time.perf_counter() - tick


def time_peer(engine, table: str, prefix: str, names: int) -> float:
    """One ``ALTER TABLE .. ADD COLUMN`` per name, each its own transaction."""
    tick = time.perf_counter()
    for k in range(names):
        with engine.begin() as connection:
            connection.exec_driver_sql(f"ALTER TABLE {table} ADD COLUMN {prefix}_{k:04d} DOUBLE PRECISION")
    return time.perf_counter() - tick


def scenario(url: str, folder: Path, months: int) -> dict[str, float]:
    """Seconds per new name: within a block, opening a block, and the two peers."""
    within = BLOCK - 1  # the catalogue's first name (atom_number) took slot 1 of block 1
    with runlog.open(url) as catalogue:
        engine = catalogue.engine
        base = spread_file(folder / f"base_{months}.parquet", months, 1.0 if months > 1 else 0.0, ["atom_number"])
        # One shot a month stands for a busy month: its partitions are months, as a busy
        # catalogue's are (a sparse file's would be years: runlog.store.partitions).
        with months_kept():
            result = catalogue.ingest(base)[0]
        assert result.status == "ingested", result.reason
        with engine.begin() as connection:
            shot_rows = int(connection.execute(text("SELECT count(*) FROM shots")).scalar_one())
            connection.exec_driver_sql("CREATE TABLE peer_plain (shot_id bigint PRIMARY KEY)")
            connection.exec_driver_sql(f"INSERT INTO peer_plain SELECT g FROM generate_series(1, {shot_rows}) g")
        found = {"partitions": partition_tables(engine)}
        found["within a block"] = time_names(engine, names_in_files(folder, f"in{months}", within, 1)) / within
        found["opening a block"] = time_names(engine, names_in_files(folder, f"open{months}", 1, 1))
        with engine.connect() as connection:
            assert len(present_columns(connection)) == 2 * BLOCK
        found["all names of a block in one file"] = time_names(engine, names_in_files(folder, f"all{months}", BLOCK, BLOCK)) / BLOCK
        # The design before revision 0015, measured the same way: ingest's step making one
        # column for each name, on the partitioned table.
        measurement_columns.BLOCK = 1
        with engine.begin() as connection:  # the next names' ids past every column made ahead
            connection.execute(text("SELECT setval(pg_get_serial_sequence('measurements', 'id'), :k)"), {"k": max(present_columns(connection))})
        try:
            found["peer: a column per name (before 0015)"] = time_names(engine, names_in_files(folder, f"one{months}", within, 1)) / within
        finally:
            measurement_columns.BLOCK = BLOCK
        found["peer: ALTER plain shot_measurements"] = time_peer(engine, "shot_measurements", "peer", within) / within
        found["peer: ALTER unpartitioned"] = time_peer(engine, "peer_plain", "peer", within) / within
        # The layout before revision 0017: shot_measurements partitioned like the shots
        # again (0017's downgrade), and the next name opening a block there.
        with engine.begin() as connection:
            partitions.measurements_into_partitions(connection)
            top = max(present_columns(connection))
            connection.execute(text("SELECT setval(pg_get_serial_sequence('measurements', 'id'), :k)"), {"k": -(-top // BLOCK) * BLOCK})
        found["peer: opening a block, partitioned (before 0017)"] = time_names(engine, names_in_files(folder, f"old{months}", 1, 1))
        found["peer: ALTER partitioned"] = time_peer(engine, "shot_measurements", "peerp", within) / within
    return found


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--postgres", metavar="URL", required=True, help="a PostgreSQL server to make fresh databases on")
    parser.add_argument("--months", type=int, default=130)
    parser.add_argument("--repeat", type=int, default=3)
    args = parser.parse_args()
    fresh = _postgres_databases(args.postgres)
    try:
        with tempfile.TemporaryDirectory() as folder:
            folder = Path(folder)
            spread_path = spread_file(folder / "spread.parquet", 120, 1.0, ["atom_number"])
            with runlog.open(fresh("runlog_bench_spread")) as catalogue:
                catalogue.ingest(spread_path)
                spread = partition_tables(catalogue.engine)
            # The peer: a partition for every month (before the sparse-year rule).
            with months_kept(), runlog.open(fresh("runlog_bench_spread_months")) as catalogue:
                catalogue.ingest(spread_path)
                monthly = partition_tables(catalogue.engine)
            print(f"a 120-shot file over ten years (one shot a month): {spread} partition tables; a partition a month (peer): {monthly}")
            results: dict[int, list[dict[str, float]]] = {1: [], args.months: []}
            for attempt in range(args.repeat):
                for months in results:
                    results[months].append(scenario(fresh(f"runlog_bench_names_{months}_{attempt}"), folder, months))
            for months, runs in results.items():
                print(f"catalogue of {months} month(s): {runs[0]['partitions']} partition tables; seconds per new name, median of {args.repeat}:")
                for what in WHAT:
                    values = [run[what] for run in runs]
                    print(f"  {what}: {statistics.median(values) * 1000:.1f} ms {[round(v * 1000, 1) for v in values]}")
                median = {what: statistics.median(run[what] for run in runs) for what in WHAT}
                before = median["peer: a column per name (before 0015)"]
                amortised = ((BLOCK - 1) * median["within a block"] + median["opening a block"]) / BLOCK
                print(
                    f"  ratio to a column per name (before 0015): within a block {median['within a block'] / before:.2f}, "
                    f"opening a block {median['opening a block'] / before:.1f}, over a whole block {amortised / before:.2f}"
                )
                print(f"  ratio opening a block, plain table / partitioned (before 0017): {median['opening a block'] / median['peer: opening a block, partitioned (before 0017)']:.3f}")
    finally:
        fresh(None)


if __name__ == "__main__":
    main()
