"""A read-only PostgreSQL role for the dashboard: it reads everything, writes nothing."""

from __future__ import annotations

import pytest
from sqlalchemy.engine import make_url

import runlog
from runlog import StoreError
from runlog.selection import select_shots
from runlog.store import arrow_reader


def test_grant_reader_on_postgresql_reads_and_cannot_write(db_url, make_file, monkeypatch):
    with runlog.open(db_url) as catalogue:
        catalogue.ingest(make_file(runs={"r1": 5}))
        if catalogue.engine.dialect.name == "sqlite":
            with pytest.raises(StoreError) as caught:
                catalogue.grant_reader("dashboard_reader")
            assert str(caught.value) == "read-only roles need PostgreSQL; on SQLite give readers a copy or file permissions"
            return
        catalogue.grant_reader("dashboard_reader")
        catalogue.grant_reader("dashboard_reader")  # idempotent
        with pytest.raises(ValueError):
            catalogue.grant_reader("Robert'); DROP TABLE shots;--")
    reader_url = make_url(db_url).set(username="dashboard_reader").render_as_string(hide_password=False)
    with runlog.open(reader_url) as reader:
        assert reader.runs()["run"].tolist() == ["r1"]
        assert set(reader.run("r1").figures) == {"fill_fraction", "survival", "loss"}
        assert len(reader.drift("fill_fraction", record_alarms=False).points) == 1
        # A large selection's second connections (ADBC, imported snapshot) work under the role.
        monkeypatch.setattr(arrow_reader, "_POSTGRES_ARROW_ROWS", 0)
        through_adbc = select_shots(reader, "shot >= 0")
        monkeypatch.setattr(arrow_reader, "_POSTGRES_ARROW_ROWS", 10**12)
        assert len(through_adbc) == 5 and through_adbc.equals(select_shots(reader, "shot >= 0"))
        before = reader.counts()
        # Refused in one line naming the cause, not raised: the next file is tried.
        [refused] = reader.ingest(make_file(runs={"r2": 3}, seed=5))
        assert refused.status == "refused" and refused.cause == "permission" and not refused.files_fault
        assert "permission denied" in refused.reason and "\n" not in refused.reason and "SELECT" not in refused.reason
        assert reader.counts() == before


def test_grant_reader_command_takes_the_password_from_the_environment(db_url, monkeypatch):
    from click.testing import CliRunner

    from runlog.cli import cli

    runlog.open(db_url).close()
    monkeypatch.setenv("READER_SECRET", "s3cret-value")
    result = CliRunner().invoke(cli, ["--db", db_url, "db", "grant-reader", "viewer", "--password-env", "READER_SECRET"])
    if make_url(db_url).get_backend_name() == "sqlite":
        assert result.exit_code == 1
        return
    assert result.exit_code == 0, result.output
    assert "s3cret-value" not in result.output
    assert CliRunner().invoke(cli, ["--db", db_url, "db", "grant-reader", "viewer", "--password-env", "NOT_SET_ANYWHERE"]).exit_code == 2
