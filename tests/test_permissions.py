"""A catalogue this user cannot write — a read-only SQLite file, PostgreSQL's read-only role —
gives one line naming the cause, in the CLI and in the dashboard's note form: never the
rollback's error, never the SQL and its parameters."""

from __future__ import annotations

import os
import shutil
import subprocess
import sys
import tempfile
import uuid
from pathlib import Path

import pytest
from sqlalchemy.engine import make_url

import runlog
from conftest import run_main, shot_table, write_table

READ_ONLY = "the catalogue is read-only for this user"


def _as_other_user(args: list[str]) -> subprocess.CompletedProcess:
    """``python -m runlog ARGS`` as a user who may not write the catalogue file."""
    if os.geteuid() == 0:  # root writes any file: run as nobody instead
        if shutil.which("setpriv") is None:
            pytest.skip("running as root without setpriv: cannot make a file read-only")
        command = ["setpriv", "--reuid=nobody", "--regid=nogroup", "--clear-groups", sys.executable, "-m", "runlog", *args]
    else:
        command = [sys.executable, "-m", "runlog", *args]
    return subprocess.run(command, capture_output=True, text=True, timeout=120, env={**os.environ, "HOME": "/tmp"})


@pytest.fixture
def read_only_sqlite():
    folder = Path(tempfile.mkdtemp(prefix="runlog-ro-"))
    folder.chmod(0o777)  # the folder stays writable (SQLite's -wal and -shm files); the catalogue not
    url = f"sqlite:///{folder / 'catalogue.sqlite'}"
    with runlog.open(url) as catalogue:
        catalogue.ingest(write_table(folder / "first.parquet", shot_table({"r1": 3})))
    new = write_table(folder / "second.parquet", shot_table({"r2": 3}, seed=2))
    new.chmod(0o644)
    for path in folder.glob("catalogue.sqlite*"):
        path.chmod(0o444)
    yield url, folder, new
    shutil.rmtree(folder, ignore_errors=True)


def test_ingest_into_a_read_only_sqlite_file_names_the_cause(read_only_sqlite):
    url, folder, new = read_only_sqlite
    before = (folder / "catalogue.sqlite").read_bytes()
    done = _as_other_user(["--db", url, "ingest", str(new)])
    lines = (done.stdout + done.stderr).strip().splitlines()
    assert len(lines) == 1, lines
    assert lines[0].startswith(f"refused          {new}: permission denied") and READ_ONLY in lines[0]
    assert "parameter count mismatch" not in lines[0] and "Traceback" not in done.stderr
    assert (folder / "catalogue.sqlite").read_bytes() == before


def test_a_note_on_a_read_only_sqlite_file_names_the_cause(read_only_sqlite):
    url, folder, _ = read_only_sqlite
    done = _as_other_user(["--db", url, "note", "realigned the lattice", "--run", "r1"])
    assert done.returncode == 1 and done.stdout == ""
    assert done.stderr.count("\n") == 1 and READ_ONLY in done.stderr
    assert "INSERT" not in done.stderr and "Traceback" not in done.stderr


def _reader_url(db_url: str) -> str:
    role = "reader_" + uuid.uuid4().hex[:8]
    with runlog.open(db_url) as catalogue:
        catalogue.ingest(write_table(Path(tempfile.mkdtemp()) / "first.parquet", shot_table({"r1": 3})))
        catalogue.check_drift()
        catalogue.grant_reader(role)
    return make_url(db_url).set(username=role).render_as_string(hide_password=False)


def test_the_read_only_role_gets_one_line_in_the_cli(pg_url, capsys, tmp_path):
    reader = _reader_url(pg_url)
    code, out, err = run_main(capsys, "--db", reader, "note", "realigned the lattice", "--run", "r1")
    assert code == 1 and err.count("\n") == 1 and READ_ONLY in err and "permission denied for table" in err
    assert "INSERT" not in err and "Traceback" not in err
    code, out, err = run_main(capsys, "--db", reader, "ingest", str(write_table(tmp_path / "b.parquet", shot_table({"r2": 3}, seed=3))))
    assert out.count("\n") == 1 and out.startswith("refused") and READ_ONLY in out


def test_the_dashboard_note_form_names_the_cause(pg_url, monkeypatch):
    from streamlit.testing.v1 import AppTest

    from runlog.dashboard import APP, URL_VARIABLE

    monkeypatch.setenv(URL_VARIABLE, _reader_url(pg_url))
    at = AppTest.from_file(str(APP), default_timeout=60).run()
    at.switch_page("views/notes.py").run()
    assert not at.exception, at.exception
    at.text_area(key="note-run-text").input("camera saturated")
    at.button(key="note-run-submit").click().run()
    assert not at.exception, [e.message for e in at.exception]
    [error] = at.error
    assert error.value.startswith("permission denied saving this: " + READ_ONLY) and "\n" not in error.value
    assert "INSERT" not in error.value and "%(" not in error.value
