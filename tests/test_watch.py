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
    assert results == {"a.parquet": "ingested", "bad.parquet": "rejected"}
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
    done = subprocess.run(
        [sys.executable, "-m", "runlog", "--db", db_url, "watch", str(folder), "--interval", "0.2", "--stop-after", "1.5"],
        capture_output=True, text=True, timeout=60,
    )
    assert done.returncode == 0, done.stderr
    log = (folder / "runlog-watch.log").read_text()
    assert "ingested a.parquet: r1 (4 shots)" in log
