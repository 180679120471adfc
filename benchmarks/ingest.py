"""Ingest speed: `runlog ingest` against the naive peer `pandas.read_parquet(f).to_sql(...)`.

One 300 000-shot file (20 runs, one scanned and five constant parameters, six per-shot
measurements), whole-process wall time of each, alternating, median of three runs, and
the peak resident memory of each process. Both write a fresh SQLite file, or, with
``--postgres SERVER_URL``, a fresh database on that PostgreSQL server (the peer then writes
through SQLAlchemy and psycopg, pandas' own way). Run:

    python benchmarks/ingest.py [--shots 300000] [--repeat 3] [--postgres URL]
"""

from __future__ import annotations

import argparse
import datetime as dt
import os
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

PEER_POSTGRES = (
    "import sys, pandas as pd, sqlalchemy; "
    "frame = pd.read_parquet(sys.argv[1]); "
    "engine = sqlalchemy.create_engine(sys.argv[2]); "
    "frame.to_sql('shots', engine, index=False)"
)

PEER = (
    "import sqlite3, sys, pandas as pd; "
    "frame = pd.read_parquet(sys.argv[1]); "
    "connection = sqlite3.connect(sys.argv[2]); "
    "frame.to_sql('shots', connection, index=False); connection.commit()"
)


def make_file(path: Path, shots: int, runs: int = 20, seed: int = 1) -> None:
    rng = np.random.default_rng(seed)
    per_run = shots // runs
    start = dt.datetime(2026, 5, 1, tzinfo=dt.timezone.utc)
    index = np.arange(shots)
    table = pa.table(
        {
            "run": pa.array([f"run-{i // per_run:03d}" for i in index]).dictionary_encode(),
            "apparatus": pa.array(["bench"] * shots).dictionary_encode(),
            "sequence": pa.array(["ramsey"] * shots).dictionary_encode(),
            "shot": pa.array(index % per_run, pa.int64()),
            "time": pa.array(index.astype("int64") * 1_000_000 + int(start.timestamp() * 1e6), pa.int64()).cast(pa.timestamp("us", tz="UTC")),
            "p.wait[us]": (index % 50) * 20.0,
            "p.lattice_depth[uK]": np.full(shots, 70.0),
            "p.load_time[ms]": np.full(shots, 300.0),
            "p.imaging_exposure[ms]": np.full(shots, 20.0),
            "p.mw_power[mW]": np.full(shots, 12.5),
            "p.bias_field[G]": np.full(shots, 3.2),
            **{f"m.signal_{k}": rng.random(shots) for k in range(6)},
        }
    )
    pq.write_table(table, path)


def timed(command: list[str]) -> tuple[float, float]:
    """Wall seconds and peak RSS (MiB) of one whole process."""
    tick = time.perf_counter()
    process = subprocess.Popen(command, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
    _, status, usage = os.wait4(process.pid, 0)
    took = time.perf_counter() - tick
    if os.waitstatus_to_exitcode(status) != 0:
        raise SystemExit(f"failed: {' '.join(command)}\n{process.stderr.read().decode()}")
    return took, usage.ru_maxrss / 1024


def _postgres_databases(server: str):
    """``fresh(name)`` gives the URL of a new, empty database on ``server`` (dropping one of
    that name first); ``fresh(None)`` drops every database it made."""
    from sqlalchemy import create_engine, text
    from sqlalchemy.engine import make_url

    admin = create_engine(server, isolation_level="AUTOCOMMIT")
    made: list[str] = []

    def fresh(name: str | None) -> str:
        with admin.connect() as connection:
            for old in made if name is None else [name]:
                connection.execute(text(f'DROP DATABASE IF EXISTS "{old}"'))
            if name is None:
                return ""
            connection.execute(text(f'CREATE DATABASE "{name}"'))
        made.append(name)
        return make_url(server).set(database=name).render_as_string(hide_password=False)

    return fresh


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--shots", type=int, default=300_000)
    parser.add_argument("--repeat", type=int, default=3)
    parser.add_argument("--postgres", metavar="URL", help="a PostgreSQL server to write fresh databases on, instead of SQLite files")
    args = parser.parse_args()
    fresh = _postgres_databases(args.postgres) if args.postgres else None
    with tempfile.TemporaryDirectory() as folder:
        folder = Path(folder)
        source = folder / "shots.parquet"
        make_file(source, args.shots)
        ours, peer, ours_rss, peer_rss = [], [], [], []
        for attempt in range(args.repeat):
            for name in ("ours", "peer"):
                url = fresh(f"runlog_bench_{name}_{attempt}") if fresh else f"sqlite:///{folder / f'{name}-{attempt}.sqlite'}"
                if name == "ours":
                    took, rss = timed([sys.executable, "-m", "runlog", "--db", url, "ingest", "--json", str(source)])
                    ours.append(took)
                    ours_rss.append(rss)
                else:
                    peer_command = [sys.executable, "-c", PEER_POSTGRES, str(source), url] if fresh else [sys.executable, "-c", PEER, str(source), url.removeprefix("sqlite:///")]
                    took, rss = timed(peer_command)
                    peer.append(took)
                    peer_rss.append(rss)
        if fresh:
            fresh(None)
        ours_s, peer_s = statistics.median(ours), statistics.median(peer)
        print(f"catalogue: {'PostgreSQL' if fresh else 'SQLite'}")
        print(f"file: {args.shots} shots, 20 runs, 1 scanned + 5 constant parameters, 6 measurements ({source.stat().st_size / 2**20:.1f} MiB)")
        print(f"runlog ingest (whole process):           median {ours_s:.2f} s  {[round(t, 2) for t in ours]}  peak RSS {max(ours_rss):.0f} MiB")
        print(f"pandas read_parquet + to_sql (peer):     median {peer_s:.2f} s  {[round(t, 2) for t in peer]}  peak RSS {max(peer_rss):.0f} MiB")
        print(f"ratio runlog / peer: {ours_s / peer_s:.2f}  (issue target <= 1.0; product target <= 0.5)")


if __name__ == "__main__":
    main()
