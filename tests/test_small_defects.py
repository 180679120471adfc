"""The small defects of the adversarial test: long IN lists, commas in run keys, terminal
escapes in run keys, a file changed under the reader with its size and time put back.
On SQLite and PostgreSQL."""

from __future__ import annotations

import datetime as dt
import json
import os

import numpy as np
import pytest

from conftest import T0, run_main, shot_table, write_table

MANY = 995


def _list(values) -> str:
    return ",".join(values)


def test_long_in_lists_are_answered(catalogue, tmp_path):
    # As long as the filter's 2000 characters allow: 995 one-digit values.
    catalogue.ingest(write_table(tmp_path / "a.parquet", shot_table({"r1": 40}, extra={"m.signal": np.arange(40.0) % 10})))
    digits = _list(str(i % 10) for i in range(MANY))
    cases = {
        f"shot in ({digits})": 10,
        f"shot not in ({_list(str(i % 10) for i in range(MANY - 2))})": 30,
        f"p.wait in ({_list(str(i % 10) for i in range(MANY - 2))})": 1,  # wait = 10 * shot: only shot 0
        f"m.signal in ({_list(str(i % 10) for i in range(MANY - 2))})": 40,
        f"run in ({_list(repr(chr(97 + i % 26)) for i in range(480))},'r1')": 40,
        f"date in ({_list(repr((dt.date(2026, 1, 1) + dt.timedelta(days=i)).isoformat()) for i in range(140))})": 40,
    }
    for where, expected in cases.items():
        assert len(where) <= 2000, where[:30]
        assert len(catalogue.select(where)) == expected, where[:30]


def test_a_run_key_with_a_comma_keeps_its_file_in_the_export_provenance(catalogue, tmp_path):
    from runlog.export import export

    path = write_table(tmp_path / "a.parquet", shot_table({"scan,detuning": 5, "plain": 4}))
    catalogue.ingest(path)
    export(catalogue, "shot >= 0", tmp_path / "package")
    manifest = json.loads((tmp_path / "package" / "datapackage.json").read_text())
    [source] = manifest["provenance"]["source_files"]
    assert source["file"] == str(path) and source["runs"] == ["plain", "scan,detuning"]


def test_terminal_escapes_in_stored_run_keys_are_shown_not_obeyed(catalogue, db_url, tmp_path, capsys):
    # A key written before the contract refused control characters.
    catalogue.ingest(write_table(tmp_path / "a.parquet", shot_table({"clean": 3})))
    with catalogue.engine.begin() as connection:
        connection.exec_driver_sql("UPDATE runs SET key = 'evil\x1b[2J\x1b]0;owned\x07' WHERE key = 'clean'")
    code, out, err = run_main(capsys, "--db", db_url, "runs")
    assert code == 0, err
    assert "\x1b" not in out and "\x07" not in out and "evil\\x1b[2J" in out


def test_a_file_changed_while_read_with_size_and_time_put_back_is_refused(catalogue, tmp_path, monkeypatch):
    import runlog.ingest as ingest

    path = write_table(tmp_path / "a.parquet", shot_table({"r1": 6}))
    other = write_table(tmp_path / "b.parquet", shot_table({"r1": 6}, seed=9))
    assert path.stat().st_size == other.stat().st_size
    real = ingest.file_sha256

    def hash_then_swap(target):
        digest = real(target)
        # Someone rewrites the file after it was hashed, then restores its size and mtime.
        stat = target.stat()
        target.write_bytes(other.read_bytes())
        os.utime(target, ns=(stat.st_atime_ns, stat.st_mtime_ns))
        return digest

    monkeypatch.setattr(ingest, "file_sha256", hash_then_swap)
    [result] = catalogue.ingest(path)
    assert result.status == "refused" and "changed while being read" in result.reason
    assert catalogue.counts()["shots"] == 0
