"""The automatic daily log: complete files go in once, growing files wait, bad files are quarantined."""

from __future__ import annotations

import os
import subprocess
import sys

from conftest import shot_table, write_table

from runlog.watch import Watcher


def test_stable_files_go_in_once_and_bad_ones_are_quarantined(catalogue, tmp_path):
    folder = tmp_path / "export"
    folder.mkdir()
    watcher = Watcher(folder, catalogue.ingest)
    good = write_table(folder / "a.parquet", shot_table({"r1": 5}))
    (folder / "bad.parquet").write_text("not parquet")
    assert watcher.poll() == []  # first sight: not yet known to be stable
    results = {os.path.basename(r.file): r.status for r in watcher.poll()}
    assert results == {"a.parquet": "ingested", "bad.parquet": "refused"}
    assert not (folder / "bad.parquet").exists()
    reason = (folder / "quarantine" / "bad.parquet.reason.txt").read_text()
    assert "bad.parquet: not a readable Parquet file" in reason
    assert watcher.poll() == []  # nothing new
    assert good.exists()

    restarted = Watcher(folder, catalogue.ingest)
    restarted.poll()
    assert restarted.poll() == []  # the state file remembers a.parquet
    assert catalogue.counts()["shots"] == 5


def test_a_growing_file_is_not_read_until_it_stops_changing(catalogue, tmp_path):
    folder = tmp_path / "export"
    folder.mkdir()
    watcher = Watcher(folder, catalogue.ingest)
    path = folder / "grow.parquet"
    full = (tmp_path / "full.parquet")
    write_table(full, shot_table({"r1": 50}))
    data = full.read_bytes()
    path.write_bytes(data[: len(data) // 3])
    assert watcher.poll() == []
    path.write_bytes(data[: 2 * len(data) // 3])  # still being written
    assert watcher.poll() == []
    path.write_bytes(data)
    assert watcher.poll() == []
    [result] = watcher.poll()
    assert result.status == "ingested" and result.shots == 50
    assert not (folder / "quarantine").exists()


def test_a_file_deleted_before_it_is_read_is_skipped(catalogue, tmp_path):
    folder = tmp_path / "export"
    folder.mkdir()
    watcher = Watcher(folder, catalogue.ingest)
    path = write_table(folder / "gone.parquet", shot_table({"r1": 3}))
    watcher.poll()
    path.unlink()
    assert watcher.poll() == []
    assert catalogue.counts()["runs"] == 0


def test_watch_command_runs_and_logs(db_url, tmp_path):
    folder = tmp_path / "export"
    folder.mkdir()
    write_table(folder / "a.parquet", shot_table({"r1": 4}))
    write_table(folder / "b.parquet", shot_table({"r2": 3}).drop_columns(["shot"]))
    done = subprocess.run(
        [sys.executable, "-m", "runlog", "--db", db_url, "watch", str(folder), "--interval", "0.2", "--stop-after", "1.5"],
        capture_output=True, text=True, timeout=60,
    )
    assert done.returncode == 0, done.stderr
    log = (folder / "runlog-watch.log").read_text()
    assert "ingested a.parquet: r1 (4 shots)" in log
    # The terminal gets one line for each file taken or refused, not only the log file.
    files = [line.split(" ", 1)[1] for line in done.stdout.splitlines() if "a.parquet" in line or "b.parquet" in line]
    assert files == ["ingested a.parquet: r1 (4 shots)", f"refused b.parquet: {folder / 'b.parquet'} (column 'shot'): required column is missing"]


def _change_during_write(monkeypatch, change):
    """Run ``change()`` once, in the middle of the next ingest (after the file was checked,
    before its rows are written)."""
    import runlog.ingest as ingest_module

    real = ingest_module._write_runs
    done = []

    def write_runs(*args, **kwargs):
        if not done:
            done.append(True)
            change()
        return real(*args, **kwargs)

    monkeypatch.setattr(ingest_module, "_write_runs", write_runs)


def test_a_file_that_grows_while_being_read_is_refused_whole_then_taken_when_complete(catalogue, tmp_path, monkeypatch):
    folder = tmp_path / "export"
    folder.mkdir()
    path = write_table(folder / "grow.parquet", shot_table({"r1": 20}))
    complete = write_table(tmp_path / "complete.parquet", shot_table({"r1": 20, "r2": 15}))
    _change_during_write(monkeypatch, lambda: path.write_bytes(complete.read_bytes()))
    [result] = catalogue.ingest([path])
    assert result.status == "refused" and "changed while being read" in result.reason
    assert catalogue.counts()["shots"] == 0  # nothing of either version was written
    # The watcher looks again once the file is stable, and takes the complete file once.
    watcher = Watcher(folder, catalogue.ingest)
    assert watcher.poll() == []
    [result] = watcher.poll()
    assert result.status == "ingested" and result.shots == 35
    assert catalogue.counts()["shots"] == 35
    assert not (folder / "quarantine").exists()


def test_a_file_deleted_while_being_read_is_refused_with_nothing_written(catalogue, tmp_path, monkeypatch):
    folder = tmp_path / "export"
    folder.mkdir()
    path = write_table(folder / "gone.parquet", shot_table({"r1": 12}))
    watcher = Watcher(folder, catalogue.ingest)
    assert watcher.poll() == []  # first sight; stable on the next poll
    _change_during_write(monkeypatch, path.unlink)
    assert watcher.poll() == []  # disappeared while being read: nothing to report, nothing kept
    assert catalogue.counts()["shots"] == 0
    log = catalogue.ingest_log()
    assert list(log["status"]) == ["refused"] and "disappeared while being read" in log["reason"].iloc[0]
    assert not (folder / "quarantine").exists()


def test_watch_judges_drift_after_each_ingest_and_records_each_alarm_once(catalogue, tmp_path):
    # Twelve lab days of our own invention: fill fraction 0.5, then 0.3 from day 9 on.
    import datetime as dt

    import numpy as np
    import pyarrow as pa

    from conftest import T0

    folder = tmp_path / "export"
    folder.mkdir()
    seen: list[list] = []
    recorded: list[dict] = []

    def judge(results):
        seen.append(results)
        recorded.extend(catalogue.new_alarms())

    watcher = Watcher(folder, catalogue.ingest, after_ingest=judge)
    rng = np.random.default_rng(12)
    for day in range(12):
        fill = 0.5 if day < 9 else 0.3
        load = rng.random((40, 16)) < fill
        table = shot_table({f"d{day}-a": 20, f"d{day}-b": 20}, start=T0 + dt.timedelta(days=day), seed=day, extra={"occ.load": pa.array(list(load), pa.list_(pa.bool_()))})
        write_table(folder / f"day{day:02d}.parquet", table)
    watcher.poll()
    assert len(watcher.poll()) == 12 and len(seen) == 1
    fill_alarms = [a for a in recorded if a["quantity"] == "fill_fraction"]
    assert [(a["reason"], a["date"]) for a in fill_alarms] == [("limit", (T0 + dt.timedelta(days=9)).date().isoformat())]
    assert watcher.poll() == [] and len(seen) == 1  # nothing new, nothing judged again
    assert catalogue.new_alarms() == []  # found again, not recorded again
    assert len([a for a in catalogue.alarms() if a["quantity"] == "fill_fraction"]) == 1
