"""Shared fixtures: a fresh catalogue per test on SQLite and on PostgreSQL, tiny shot tables.

The PostgreSQL side uses the server named by ``RUNLOG_TEST_PG_URL`` (`.ci/run` starts
one); without it, the session starts a private server if the binaries are installed.
Under ``CI=true`` a missing server is an error, never a skip.
"""

from __future__ import annotations

import datetime as dt
import os
import tempfile
import uuid
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from sqlalchemy.engine import make_url

import pgserver
from hypothesis import settings as hypothesis_settings

BACKENDS = ["sqlite", "postgresql"]

# Hypothesis runs the same examples on every run and keeps no example database: a failure
# found once is not replayed from a hidden folder, and CI is deterministic. The wider random
# runs are tests of their own (marked slow, each with a fixed seed); RUNLOG_RANDOM=1 makes
# every property test draw fresh random examples, for an exploratory run by hand.
hypothesis_settings.register_profile("runlog", derandomize=True, database=None, print_blob=True)
hypothesis_settings.register_profile("random", derandomize=False, database=None, print_blob=True)
hypothesis_settings.load_profile("random" if os.environ.get("RUNLOG_RANDOM") == "1" else "runlog")


@pytest.fixture(scope="session")
def postgres_url():
    url = os.environ.get("RUNLOG_TEST_PG_URL")
    if url:
        yield url
        return
    if not pgserver.available():
        if os.environ.get("CI") == "true":
            pytest.fail("PostgreSQL server binaries not found and RUNLOG_TEST_PG_URL not set (CI must run the PostgreSQL tests)")
        pytest.skip("no PostgreSQL server available")
    folder = Path(tempfile.mkdtemp(prefix="runlog-pg-"))
    port = 56000 + os.getpid() % 1000
    url = pgserver.start(folder, port)
    yield url
    pgserver.stop(folder)


def _fresh_postgres_database(server_url: str) -> tuple[str, callable]:
    import psycopg

    base = make_url(server_url)
    name = "t_" + uuid.uuid4().hex[:16]
    conninfo = dict(base.query)
    admin = psycopg.connect(host=conninfo.get("host"), port=conninfo.get("port"), user=base.username, dbname=base.database or "postgres", autocommit=True)
    admin.execute(f"CREATE DATABASE {name} TEMPLATE template0")

    def drop() -> None:
        admin.execute(f"DROP DATABASE IF EXISTS {name} WITH (FORCE)")
        admin.close()

    return base.set(database=name).render_as_string(hide_password=False), drop


@pytest.fixture(params=BACKENDS)
def db_url(request, tmp_path):
    """A URL of an empty database, once per backend."""
    if request.param == "sqlite":
        yield f"sqlite:///{tmp_path / 'catalogue.sqlite'}"
        return
    yield from _postgres_database(request)


def _postgres_database(request):
    server = request.getfixturevalue("postgres_url")
    url, drop = _fresh_postgres_database(server)
    yield url
    drop()


@pytest.fixture
def pg_url(request):
    """A URL of an empty database on the private PostgreSQL server (PostgreSQL-only tests)."""
    yield from _postgres_database(request)


@pytest.fixture
def other_pg_url(request):
    """A second empty PostgreSQL database, for tests that need two."""
    yield from _postgres_database(request)


@pytest.fixture
def catalogue(db_url):
    import runlog

    with runlog.open(db_url) as opened:
        yield opened


T0 = dt.datetime(2026, 3, 2, 9, 0, tzinfo=dt.timezone.utc)


def shot_table(
    runs: dict[str, int] | None = None,
    *,
    apparatus: str = "bench-a",
    sequence: str = "loading",
    first_shot: int = 0,
    sites: int = 16,
    seed: int = 1,
    start: dt.datetime = T0,
    extra: dict[str, object] | None = None,
    occupancy: bool = True,
) -> pa.Table:
    """A small contract-v1 table: ``runs`` maps run key -> shot count."""
    runs = runs or {"r1": 10}
    rng = np.random.default_rng(seed)
    keys, shots = [], []
    for key, count in runs.items():
        keys += [key] * count
        shots += list(range(first_shot, first_shot + count))
    n = len(keys)
    columns: dict[str, object] = {
        "run": keys,
        "apparatus": [apparatus] * n,
        "sequence": [sequence] * n,
        "shot": pa.array(shots, pa.int64()),
        "time": pa.array([start + dt.timedelta(seconds=2 * i) for i in range(n)], pa.timestamp("us", tz="UTC")),
        "p.depth[uK]": np.full(n, 60.0),
        "p.wait[us]": np.asarray(shots, dtype=float) * 10.0,
        "p.beam": ["vertical"] * n,
        "m.atom_number": rng.integers(20, 60, n).astype(float),
    }
    if occupancy:
        load = rng.random((n, sites)) < 0.5
        survive = load & (rng.random((n, sites)) < 0.9)
        columns["occ.load"] = pa.array(list(load), pa.list_(pa.bool_()))
        columns["occ.survive"] = pa.array(list(survive), pa.list_(pa.bool_()))
    for name, value in (extra or {}).items():
        columns[name] = value
    return pa.table(columns)


def write_table(path: Path, table: pa.Table) -> Path:
    pq.write_table(table, path)
    return path


@pytest.fixture
def make_file(tmp_path):
    """Write a shot table into the test's folder: ``make_file("a.parquet", **shot_table_args)``."""
    counter = iter(range(10_000))

    def make(name: str | None = None, table: pa.Table | None = None, **kwargs) -> Path:
        name = name or f"file{next(counter)}.parquet"
        return write_table(tmp_path / name, table if table is not None else shot_table(**kwargs))

    return make


def run_main(capsys, *args: str) -> tuple[int, str, str]:
    """``runlog.cli.main`` in-process: (exit code, stdout, stderr)."""
    from runlog.cli import main

    code: int | str | None = 0
    try:
        main(list(args))
    except SystemExit as done:
        code = done.code
    captured = capsys.readouterr()
    return (0 if code is None else code), captured.out, captured.err
