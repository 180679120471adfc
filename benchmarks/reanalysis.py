"""Re-analysis speed: ingesting a new analysis version of a run against its first ingest,
and the drift query over a catalogue that holds several versions.

1. One 300 000-shot file (one run by default, ``--runs`` to split it; one scanned and two constant
   parameters, two measurements, a 6x6 loading and survival image), and the same shots
   re-thresholded under the analysis version ``thr-2`` (Parquet key-value metadata).
   Peer: the first ingest of the file into a fresh catalogue; ours: the ingest of the new
   version into that catalogue (every shot lands again, as a new version, and becomes
   current). Whole-process wall time of each (``runlog ingest``), median of ``--repeat``.
2. The drift catalogue of ``benchmarks/drift.py`` (its builder, at ``--drift-shots``;
   10 M is the issue's size), then ``--reanalysed-days`` of its lab days re-ingested as
   a new analysis version: ``Catalogue.drift("fill_fraction")`` timed, median of 7,
   before (peer) and after. Run:

    python benchmarks/reanalysis.py [--shots 300000] [--repeat 3] [--drift-shots 2000000] [--drift-db URL]
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

sys.path.insert(0, str(Path(__file__).parent))
import drift as drift_benchmark  # noqa: E402  (the 10 M-shot catalogue builder)
from ingest import _postgres_databases, timed  # noqa: E402

import runlog  # noqa: E402

SITES = 36


def make_versions(folder: Path, shots: int, runs: int = 20, seed: int = 1) -> tuple[Path, Path]:
    """The file under the unnamed first version and re-thresholded as ``thr-2``."""
    rng = np.random.default_rng(seed)
    per_run = shots // runs
    start = dt.datetime(2026, 5, 1, tzinfo=dt.timezone.utc)
    index = np.arange(shots)
    atoms = rng.random((shots, SITES)) < 0.55
    kept = atoms & (rng.random((shots, SITES)) < 0.9)
    # A camera signal per site, thresholded twice: the re-analysis changes some sites.
    first = np.where(atoms, 1.0, 0.3) + rng.normal(0, 0.25, (shots, SITES))
    second = np.where(kept, 1.0, 0.3) + rng.normal(0, 0.25, (shots, SITES))
    offsets = pa.array(np.arange(0, shots * SITES + 1, SITES, dtype=np.int32))
    base = {
        "run": pa.array([f"run-{i // per_run:03d}" for i in index]).dictionary_encode(),
        "apparatus": pa.array(["bench"] * shots).dictionary_encode(),
        "sequence": pa.array(["loading"] * shots).dictionary_encode(),
        "shot": pa.array(index % per_run, pa.int64()),
        "time": pa.array(index.astype("int64") * 1_000_000 + int(start.timestamp() * 1e6), pa.int64()).cast(pa.timestamp("us", tz="UTC")),
        "p.wait[us]": (index % 50) * 20.0,
        "p.lattice_depth[uK]": np.full(shots, 70.0),
        "p.load_time[ms]": np.full(shots, 300.0),
        "m.atom_number": atoms.sum(axis=1).astype(float),
        "m.signal": rng.random(shots),
    }
    paths = []
    for name, threshold, analysis in (("v1", 0.65, None), ("v2", 0.75, "thr-2")):
        table = pa.table(
            {
                **base,
                "occ.load": pa.ListArray.from_arrays(offsets, pa.array((first > threshold).ravel())),
                "occ.survive": pa.ListArray.from_arrays(offsets, pa.array((second > threshold).ravel())),
            }
        )
        if analysis is not None:
            table = table.replace_schema_metadata({b"analysis": analysis.encode()})
        path = folder / f"{name}.parquet"
        pq.write_table(table, path)
        paths.append(path)
    return paths[0], paths[1]


def drift_times(catalogue) -> list[float]:
    times = []
    for _ in range(7):
        tick = time.perf_counter()
        catalogue.drift("fill_fraction", apparatus="busy", record_alarms=False)
        times.append(time.perf_counter() - tick)
    return times


def reanalyse_days(catalogue, days: int, shots: int) -> int:
    """Ingest ``days`` of the drift catalogue's lab days again as version ``thr-2``
    (the builder's files, regenerated with another seed so the occupancy differs)."""
    rng = np.random.default_rng(7)
    per_day = shots // drift_benchmark.DAYS
    landed = 0
    with tempfile.TemporaryDirectory() as folder:
        for day in np.linspace(0, drift_benchmark.DAYS - 1, days).astype(int):
            table = drift_benchmark.day_table(int(day), per_day, rng).replace_schema_metadata({b"analysis": b"thr-2"})
            path = Path(folder) / f"day-{day:03d}.parquet"
            pq.write_table(table, path)
            [result] = catalogue.ingest(path)
            if result.status != "ingested":
                raise SystemExit(f"re-analysis of day {day} failed: {result.reason}")
            landed += result.shots
    return landed


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--shots", type=int, default=300_000)
    parser.add_argument("--repeat", type=int, default=3)
    parser.add_argument("--runs", type=int, default=1, help="runs the shots are split into (1: one 300 000-shot run, the issue's case)")
    parser.add_argument("--drift-shots", type=int, default=2_000_000)
    parser.add_argument("--reanalysed-days", type=int, default=30)
    parser.add_argument("--drift-db", default=None, help="catalogue for part 2 (default: a fresh SQLite file)")
    parser.add_argument("--skip-drift", action="store_true")
    parser.add_argument("--skip-ingest", action="store_true")
    parser.add_argument("--postgres", metavar="URL", help="part 1 on fresh databases of this PostgreSQL server instead of SQLite files")
    args = parser.parse_args()
    if not args.skip_ingest:
        _ingest_part(args)
    if not args.skip_drift:
        _drift_part(args)


def _ingest_part(args) -> None:
    with tempfile.TemporaryDirectory() as folder:
        folder = Path(folder)
        v1, v2 = make_versions(folder, args.shots, runs=args.runs)
        first, again = [], []
        fresh = _postgres_databases(args.postgres) if args.postgres else None
        urls = []
        for attempt in range(args.repeat):
            url = fresh(f"runlog_bench_reanalysis_{attempt}") if fresh else f"sqlite:///{folder / f'catalogue-{attempt}.sqlite'}"
            urls.append(url)
            first.append(timed([sys.executable, "-m", "runlog", "--db", url, "ingest", "--json", str(v1)])[0])
            again.append(timed([sys.executable, "-m", "runlog", "--db", url, "ingest", "--json", str(v2)])[0])
        with runlog.open(urls[0]) as catalogue:
            versions = [(a["analysis"], a["current"], a["shots"]) for a in catalogue.analyses("run-000")]
            assert versions == [("", False, args.shots // args.runs), ("thr-2", True, args.shots // args.runs)], versions
        if fresh:
            fresh(None)
        first_s, again_s = statistics.median(first), statistics.median(again)
        print(f"file: {args.shots} shots in {args.runs} runs, 6x6 loading and survival images, {'PostgreSQL' if fresh else 'SQLite'}, whole process")
        print(f"first ingest (peer):          median {first_s:.2f} s  {[round(t, 2) for t in first]}")
        print(f"new analysis version ingest:  median {again_s:.2f} s  {[round(t, 2) for t in again]}")
        print(f"ratio new version / first ingest: {again_s / first_s:.2f}  (target <= 1.2)")


def _drift_part(args) -> None:
    url = args.drift_db or f"sqlite:///{Path(tempfile.gettempdir()) / f'runlog-bench-reanalysis-{args.drift_shots}.sqlite'}"
    catalogue = runlog.open(url)
    have = catalogue.counts()["shots"]
    if have < args.drift_shots * 0.99:
        if have:
            raise SystemExit(f"{catalogue.url} already holds {have} shots; give an empty --drift-db or delete it")
        print(f"building {args.drift_shots} shots into {catalogue.url} ...", file=sys.stderr)
        drift_benchmark.build(catalogue, args.drift_shots)
    before = drift_times(catalogue)
    if not any(a["analysis"] == "thr-2" for a in catalogue.analyses(catalogue.runs(apparatus="busy")["run"].iloc[0], apparatus="busy")):
        landed = reanalyse_days(catalogue, args.reanalysed_days, args.drift_shots)
        print(f"re-analysed {args.reanalysed_days} lab days: {landed} shots as version thr-2", file=sys.stderr)
    after = drift_times(catalogue)
    counts = catalogue.counts()
    catalogue.close()
    before_s, after_s = statistics.median(before), statistics.median(after)
    print(f"drift catalogue: {url}: {counts['runs']} current runs, {counts['shots']} current shots")
    print(f"drift query, one version per run (peer): median {before_s * 1000:.1f} ms  {[round(t * 1000, 1) for t in before]}")
    print(f"drift query with {args.reanalysed_days} days re-analysed: median {after_s * 1000:.1f} ms  {[round(t * 1000, 1) for t in after]}  (target < 200 ms)")
    print(f"ratio after / before: {after_s / before_s:.2f}")


if __name__ == "__main__":
    main()
