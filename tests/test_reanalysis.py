"""A new analysis version landing under stress, on SQLite and PostgreSQL: SIGKILL during its
ingest leaves the catalogue as before or as after, never a mix; a reader drifting and
exporting while it lands sees one consistent set of versions in every read."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time

import pyarrow.parquet as pq
import pytest
from sqlalchemy import select
from test_analyses import thresholded

import runlog
from runlog.store.schema import DailyRollup, FigureRow, Run

RUNS = {"r1": 1500, "r2": 1500, "r3": 1000}


def _state(url):
    """Versions (key, analysis, current, withdrawn, shots), figures in force by version,
    rollups, and the survival drift points: everything a half-landed version would break."""
    with runlog.open(url) as catalogue:
        with catalogue.engine.connect() as connection:
            versions = sorted(tuple(r) for r in connection.execute(select(Run.key, Run.analysis, Run.is_current, Run.withdrawn, Run.shot_count)))
            figures = sorted(
                tuple(r) for r in connection.execute(select(Run.key, Run.analysis, FigureRow.name, FigureRow.value, FigureRow.stderr).join(Run, Run.id == FigureRow.run_id))
            )
            rollups = sorted(tuple(r)[1:] for r in connection.execute(select(*DailyRollup.__table__.columns)))
        points = [(p.date, p.value, p.stderr, p.runs, p.shots) for p in catalogue.drift("survival", record_alarms=False).points]
        counts = catalogue.counts()
    return versions, figures, rollups, points, counts


def _ingest(url, path, env=None):
    command = [sys.executable, "-m", "runlog", "--db", url, "ingest", "--json", str(path)]
    return subprocess.Popen(command, env={**os.environ, **(env or {})}, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)


@pytest.fixture
def versions_on_disk(make_file):
    return make_file("v1.parquet", thresholded(RUNS, 0.65)), make_file("v2.parquet", thresholded(RUNS, 0.8, analysis="thr-0.8"))


@pytest.mark.slow
def test_sigkill_during_a_new_version_leaves_the_old_state_or_the_new_one(db_url, versions_on_disk):
    v1, v2 = versions_on_disk
    with runlog.open(db_url) as catalogue:
        catalogue.ingest(v1)
    old = _state(db_url)
    seen = []
    # Kills spread over the process's life; the last ones inside the open write transaction.
    for delay, env in [(0.4, None), (1.0, None), (1.6, None), (2.2, None), (1.2, {"RUNLOG_TEST_PAUSE_BEFORE_COMMIT": "5"}), (2.0, {"RUNLOG_TEST_PAUSE_BEFORE_COMMIT": "5"})]:
        process = _ingest(db_url, v2, env)
        time.sleep(delay)
        process.send_signal(signal.SIGKILL)
        process.wait()
        seen.append(_state(db_url))
        if seen[-1] != old:
            break  # the version landed before the kill: nothing left to interrupt
    assert _ingest(db_url, v2).wait() == 0  # completes, or finds the file already present
    new = _state(db_url)
    assert new != old and {v[1] for v in new[0] if v[2]} == {"thr-0.8"}
    for state in seen:
        assert state in (old, new), "a kill left a mix of the two versions"
    assert any(state == old for state in seen)


def test_a_reader_drifting_and_exporting_during_a_new_version_sees_one_version_set(db_url, versions_on_disk, tmp_path):
    v1, v2 = versions_on_disk
    catalogue = runlog.open(db_url)
    try:
        catalogue.ingest(v1)
        before = catalogue.drift("survival", record_alarms=False).points
        writer = _ingest(db_url, v2, {"RUNLOG_TEST_PAUSE_BEFORE_COMMIT": "3"})
        reads = []
        deadline = time.monotonic() + 90
        while time.monotonic() < deadline:
            points = [(p.date, p.value, p.stderr, p.runs, p.shots) for p in catalogue.drift("survival", record_alarms=False).points]
            out = tmp_path / f"read-{len(reads)}"
            catalogue.export("shot >= 0", out)
            runs = pq.read_table(out / "runs.parquet").to_pylist()
            figures = pq.read_table(out / "figures.parquet").to_pylist()
            reads.append((points, {r["analysis"] for r in runs}, {(f["run"], f["figure"]): f["value"] for f in figures}, sum(r["shots_exported"] for r in runs)))
            if writer.poll() is not None and len(reads) > 1 and reads[-1][1] == {"thr-0.8"}:
                break
        assert writer.wait(timeout=120) == 0, writer.stderr.read()
        after = [(p.date, p.value, p.stderr, p.runs, p.shots) for p in catalogue.drift("survival", record_alarms=False).points]
        expected = {}
        for analysis in ("", "thr-0.8"):
            for key in RUNS:
                for name, figure in catalogue.run(key, analysis=analysis).figures.items():
                    expected.setdefault(analysis, {})[(key, name)] = figure["value"]
    finally:
        catalogue.close()
    old_points = [(p.date, p.value, p.stderr, p.runs, p.shots) for p in before]
    assert {tuple(r[1]) for r in reads} <= {("",), ("thr-0.8",)}, "an export mixed the two versions"
    assert reads[0][1] == {""} and reads[-1][1] == {"thr-0.8"}
    for points, analyses, figures, shots in reads:
        (analysis,) = analyses
        assert figures == expected[analysis]
        assert shots == sum(RUNS.values())
        assert points in (old_points, after)
