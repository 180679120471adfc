"""SIGKILL at any moment of `runlog ingest` leaves every run absent or whole; a re-run completes.

The kill lands at spread-out moments of a real subprocess (start-up, reading, writing,
committing), and once deliberately inside the open write transaction.
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time

import pytest
from conftest import shot_table
from sqlalchemy import func, select

import runlog
from runlog.store.schema import Run, Shot

RUNS = {f"r{i}": 400 for i in range(3)}


def _files(make_file):
    return [make_file(f"f{i}.parquet", shot_table({f"{key}-{i}": n for key, n in RUNS.items()}, seed=i, sites=64)) for i in range(4)]


def _state(url):
    with runlog.open(url) as catalogue:
        with catalogue.engine.connect() as connection:
            per_run = dict(connection.execute(select(Run.key, Run.shot_count)).all())
            stored = dict(connection.execute(select(Run.key, func.count(Shot.id)).join(Shot, Shot.run_id == Run.id).group_by(Run.key)).all())
        shots = {key: catalogue.shots(key).drop(columns=["run"]).to_dict("list") for key in sorted(per_run)}
    return per_run, stored, shots


def _ingest(url, files, env=None):
    command = [sys.executable, "-m", "runlog", "--db", url, "ingest", "--json", *map(str, files)]
    return subprocess.Popen(command, env={**os.environ, **(env or {})}, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)


@pytest.mark.slow
def test_sigkill_leaves_runs_absent_or_whole_and_a_rerun_completes(db_url, make_file, tmp_path):
    files = _files(make_file)
    clean_url = f"sqlite:///{tmp_path / 'clean.sqlite'}"
    assert _ingest(clean_url, files).wait() == 0
    clean = _state(clean_url)

    # Delays spread over the life of the process; the last one kills inside the open transaction.
    for delay, env in [(0.3, None), (0.9, None), (1.3, None), (1.7, None), (2.5, None), (1.5, {"RUNLOG_TEST_PAUSE_BEFORE_COMMIT": "5"})]:
        process = _ingest(db_url, files, env)
        time.sleep(delay)
        process.send_signal(signal.SIGKILL)
        process.wait()
        per_run, stored, _ = _state(db_url)
        for key, count in per_run.items():
            assert stored.get(key, 0) == count == RUNS[key.split("-")[0]], f"run {key} is partial after a kill at {delay} s"

    assert _ingest(db_url, files).wait() == 0
    assert _state(db_url) == clean
