"""Large reads on PostgreSQL: ``shot_measurements`` as one plain table (revision 0017)
against the month-partitioned table it was before, same catalogue, same run.

Uses (or builds, with the builder of ``benchmarks/drift.py``) a catalogue of ``--shots``
shots of a busy apparatus over 365 lab days on the PostgreSQL database given, and times,
median of ``--repeat``, the selection and the Data Package export of the first 187 lab
days (~1 M shots of 2 M):

    apparatus = 'busy' and date between '2025-01-01' and '2025-07-06'

The peer is the old layout read by the old code: the same catalogue taken down to
revision 0014 (``shot_measurements`` partitioned by month again, each row with its shot's
time: the downgrade of 0017), read by runlog as it was before 0017 (``--old-source``, a
``git archive`` of that commit's ``runlog/`` folder), whose selection joins the measured
values by shot id *and* time within the runs' time span so that the planner reads only
their months. Each side is timed inside a fresh process of its own; the exported
``shots.parquet`` of both must be the same bytes. Order: new, old, new (the catalogue is
taken down and up again in between; both steps are timed and printed). Run:

    git -C REPO archive COMMIT runlog | tar -x -C /tmp/runlog-before-0017
    python benchmarks/measurements_layout.py --db postgresql://... --old-source /tmp/runlog-before-0017 [--shots 2000000]
"""

from __future__ import annotations

import argparse
import hashlib
import importlib.util
import json
import os
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

WHERE = "apparatus = 'busy' and date between '2025-01-01' and '2025-07-06'"


def measure(url: str, folder: Path, repeat: int) -> dict:
    """Selection and export times of ``WHERE`` in this process (whichever runlog it imports)."""
    import runlog
    from runlog.export import export
    from runlog.selection import select_table

    catalogue = runlog.open(url)
    selects, exports, shots = [], [], None
    for _ in range(repeat):
        tick = time.perf_counter()
        rows = select_table(catalogue, WHERE).table.num_rows
        selects.append(time.perf_counter() - tick)
        tick = time.perf_counter()
        result = export(catalogue, WHERE, folder, overwrite=True)
        exports.append(time.perf_counter() - tick)
        assert result.shots == rows, (result.shots, rows)
        shots = rows
    catalogue.close()
    digest = hashlib.sha256((folder / "shots.parquet").read_bytes()).hexdigest()
    return {"select": selects, "export": exports, "shots": shots, "sha256": digest, "runlog": str(Path(runlog.__file__).parent)}


def _in_process(url: str, folder: Path, repeat: int, source: str | None) -> dict:
    env = dict(os.environ)
    if source:
        # Ahead of the editable install (its finder comes after sys.path).
        env["PYTHONPATH"] = source
    done = subprocess.run([sys.executable, __file__, "--db", url, "--measure", str(folder), "--repeat", str(repeat)], env=env, check=True, capture_output=True, text=True)
    return json.loads(done.stdout.strip().splitlines()[-1])


def _drift_builder():
    spec = importlib.util.spec_from_file_location("runlog_bench_drift", Path(__file__).with_name("drift.py"))
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def _layout(engine) -> str:
    from sqlalchemy import text

    with engine.connect() as connection:
        months = connection.execute(text("SELECT count(*) FROM pg_inherits WHERE inhparent = to_regclass('shot_measurements')")).scalar_one()
    return f"{months} month partitions" if months else "one plain table"


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--db", required=True, help="a PostgreSQL catalogue (built when empty)")
    parser.add_argument("--old-source", help="folder holding runlog/ as it was before revision 0017")
    parser.add_argument("--shots", type=int, default=2_000_000)
    parser.add_argument("--repeat", type=int, default=3)
    parser.add_argument("--measure", help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.measure:
        print(json.dumps(measure(args.db, Path(args.measure), args.repeat)))
        return
    if not args.old_source:
        parser.error("--old-source is needed for the peer")

    import runlog
    from runlog.store import migrate
    from runlog.store.engine import make_engine

    with runlog.open(args.db) as catalogue:
        counts = catalogue.counts()
        if counts["shots"] == 0:
            print(f"building {args.shots} shots (benchmarks/drift.py builder) ...", file=sys.stderr)
            tick = time.perf_counter()
            _drift_builder().build(catalogue, args.shots)
            print(f"  built in {time.perf_counter() - tick:.0f} s", file=sys.stderr)
            counts = catalogue.counts()
    engine = make_engine(args.db)
    folder = Path(tempfile.mkdtemp(prefix="runlog-bench-layout-"))
    runs = []
    try:
        runs.append(("plain table (0017), runlog now", _layout(engine), _in_process(args.db, folder / "new1", args.repeat, None)))
        tick = time.perf_counter()
        migrate.downgrade(engine, "0014")
        down = time.perf_counter() - tick
        runs.append(("month partitions (0014), runlog before 0017 (peer)", _layout(engine), _in_process(args.db, folder / "old", args.repeat, args.old_source)))
        tick = time.perf_counter()
        migrate.upgrade(engine)
        up = time.perf_counter() - tick
        runs.append(("plain table (0017), runlog now, again", _layout(engine), _in_process(args.db, folder / "new2", args.repeat, None)))
    finally:
        engine.dispose()
    print(f"catalogue: {counts['shots']} shots in {counts['runs']} runs; filter: {WHERE}")
    print(f"downgrade 0017 -> 0014 (partition the measured values again): {down:.1f} s; upgrade 0014 -> 0017 (one plain table): {up:.1f} s")
    for what, layout, found in runs:
        print(f"{what} [{layout}; {found['runlog']}]: {found['shots']} shots")
        print(f"  selection: median {statistics.median(found['select']):.2f} s {[round(t, 2) for t in found['select']]}")
        print(f"  export:    median {statistics.median(found['export']):.2f} s {[round(t, 2) for t in found['export']]}")
    old = runs[1][2]
    for what, _, found in (runs[0], runs[2]):
        print(
            f"ratio {what} / partitioned peer: selection {statistics.median(found['select']) / statistics.median(old['select']):.2f}, "
            f"export {statistics.median(found['export']) / statistics.median(old['export']):.2f}"
        )
    same = len({found["sha256"] for _, _, found in runs}) == 1 and len({found["shots"] for _, _, found in runs}) == 1
    print(f"shots.parquet of every side the same bytes: {same}")
    if not same:
        raise SystemExit("the exports differ")


if __name__ == "__main__":
    main()
