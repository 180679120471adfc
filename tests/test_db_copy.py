"""Copying a whole catalogue between stores (``runlog db copy``, runlog.store.copy).

The reference of every check is the source catalogue itself: a copy must hold the same
rows and give the same answers (common practice, no published source). PostgreSQL facts
relied on: ``setval(seq, n, false)`` makes ``n`` the next value (PostgreSQL 15 manual,
9.17 "Sequence Manipulation Functions"); a REPEATABLE READ transaction sees one snapshot
taken at its first statement (13.2.2 "Repeatable Read Isolation Level"). Expected rows per
month partition are counted here from the times the tests write.
"""

from __future__ import annotations

import datetime as dt
import json
import sqlite3
import subprocess
import sys
from collections import Counter
from contextlib import contextmanager
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pytest
from conftest import _fresh_postgres_database, run_main, shot_table, write_table
from pandas.testing import assert_frame_equal
from sqlalchemy import Column, Float, MetaData, Table, inspect, select, text
from sqlalchemy.engine import make_url

import runlog
from runlog import Figure
from runlog.errors import SchemaVersionError, StoreError
from runlog.selection import select_shots
from runlog.store import copy as copy_module
from runlog.store.copy import copy_catalogue
from runlog.store.engine import make_engine, redact
from runlog.store.partitions import SPARSE_MONTH_SHOTS, partition_name, year_partition_name
from runlog.store.schema import SCHEMA_REVISION, Base

UTC = dt.timezone.utc
SITES = 16


# --- a lab's catalogue, built through ingest -----------------------------------------------


def _loading_table() -> pa.Table:
    """Twelve runs of the loading sequence, five days apart from 10 January to 6 March;
    the fill fraction drops from 0.5 to 0.15 after the eighth (a change drift finds)."""
    parts = []
    for k in range(12):
        start = dt.datetime(2026, 1, 10, 8, 0, tzinfo=UTC) + dt.timedelta(days=5 * k)
        table = shot_table({f"d{k + 1:02d}": 10}, start=start, seed=k + 1, sites=SITES)
        rng = np.random.default_rng(100 + k)
        load = rng.random((10, SITES)) < (0.5 if k < 8 else 0.15)
        survive = load & (rng.random((10, SITES)) < 0.9)
        for name, values in (("occ.load", load), ("occ.survive", survive)):
            table = table.set_column(table.schema.get_field_index(name), name, pa.array(list(values), pa.list_(pa.bool_())))
        parts.append(table)
    return pa.concat_tables(parts)


def _ramsey_table() -> pa.Table:
    """One run of another apparatus across midnight UTC from March into April, with text
    and boolean parameters scanned, an empty text parameter, a measurement with missing
    values, tags, an operator and notes."""
    n = 10
    contrast = np.linspace(0.9, 0.5, n)
    contrast[[2, 5]] = np.nan
    extra = {
        "p.mode": ["a", "b"] * 5,
        "p.shutter": pa.array([True, False] * 5),
        "p.label": [""] * n,
        "m.contrast": contrast,
        "operator": ["ada"] * n,
        "notes": ["first 'quoted', \"twice\"\nsecond line"] * n,
        "tags": ["calibration,night"] * n,
    }
    start = dt.datetime(2026, 3, 31, 23, 59, 50, tzinfo=UTC)
    return shot_table({"ramsey-1": n}, apparatus="bench-b", sequence="ramsey", start=start, sites=9, seed=7, extra=extra)


def _fill(url: str, folder: Path) -> None:
    """A catalogue with every table in use: runs over three months (and into a fourth),
    occupancy, scanned parameters, measurements, counting and fitted figures, rollups, the
    lab time zone, annotations, an acknowledged alarm and a refused file."""
    folder.mkdir(parents=True, exist_ok=True)
    files = [
        write_table(folder / "loading.parquet", _loading_table()),
        write_table(folder / "ramsey.parquet", _ramsey_table()),
        write_table(folder / "refused.parquet", shot_table().drop_columns(["shot"])),
    ]
    with runlog.open(url) as catalogue:
        catalogue.set_lab_timezone("Europe/Berlin")
        assert [r.status for r in catalogue.ingest(files)] == ["ingested", "ingested", "refused"]
        catalogue.annotate("realigned lattice beam", run="d09")
        alarms = catalogue.check_drift()
        assert alarms, "the fill fraction step should raise an alarm"
        catalogue.acknowledge(alarms[0]["id"], "lattice beam realigned")
        catalogue.save_figures("ramsey-1", "fringe", [Figure("contrast", 0.71, stderr=0.03, ci_low=0.65, ci_high=0.77, method="test fit")])


@pytest.fixture(scope="module")
def sqlite_source(tmp_path_factory) -> str:
    folder = tmp_path_factory.mktemp("source")
    url = f"sqlite:///{folder / 'lab.sqlite'}"
    _fill(url, folder / "files")
    return url


@pytest.fixture(scope="module")
def postgres_source(request, tmp_path_factory):
    server = request.getfixturevalue("postgres_url")
    url, drop = _fresh_postgres_database(server)
    _fill(url, tmp_path_factory.mktemp("pg-source-files"))
    yield url
    drop()


# --- what a catalogue holds and answers ----------------------------------------------------


def _rows(url: str) -> dict[str, list[tuple]]:
    """Every row of every table of the schema (measurement columns included, the
    PostgreSQL-only partition key of the children left out), in key order, as values."""
    engine = make_engine(url)
    out = {}
    try:
        with engine.connect() as connection:
            for table in Base.metadata.sorted_tables:
                columns = [Column(column.name, column.type) for column in table.columns]
                if table.name == "shot_measurements":
                    # The columns of the catalogue's measurement names (PostgreSQL makes
                    # others ahead of them, empty: runlog.store.measurement_columns).
                    named = {f"m_{mid}" for (mid,) in connection.execute(text("SELECT id FROM measurements"))}
                    found = [c["name"] for c in inspect(connection).get_columns(table.name)]
                    columns += [Column(name, Float) for name in sorted(found) if name in named]
                reading = Table(table.name, MetaData(), *columns)
                key = [reading.c[column.name] for column in table.primary_key.columns]
                out[table.name] = [tuple(row) for row in connection.execute(select(reading).order_by(*key))]
            out["alembic_version"] = [tuple(row) for row in connection.execute(text("SELECT version_num FROM alembic_version"))]
    finally:
        engine.dispose()
    return out


def _same_answers(source_url: str, target_url: str) -> None:
    with runlog.open(source_url, create=False) as a, runlog.open(target_url, create=False) as b:
        assert a.counts() == b.counts()
        assert a.lab_timezone == b.lab_timezone == "Europe/Berlin"
        assert_frame_equal(a.runs(), b.runs())
        for run in a.runs()["run"]:
            assert a.run(run) == b.run(run)
            shots_a, shots_b = a.shots(run), b.shots(run)
            assert_frame_equal(shots_a, shots_b)
            assert shots_a.attrs == shots_b.attrs
            for image in a.run(run).images:
                np.testing.assert_array_equal(a.occupancy(run, image), b.occupancy(run, image))
            for counts_a, counts_b in zip(a.site_counts(run), b.site_counts(run)):
                np.testing.assert_array_equal(counts_a, counts_b)
        assert_frame_equal(a.figures(), b.figures())
        assert_frame_equal(a.parameters(), b.parameters())
        assert_frame_equal(a.annotations(), b.annotations())
        assert_frame_equal(a.ingest_log(), b.ingest_log())
        assert a.alarms(status=None) == b.alarms(status=None)
        for apparatus in ("bench-a", "bench-b"):
            daily_a = a.drift("fill_fraction", apparatus=apparatus, record_alarms=False)
            daily_b = b.drift("fill_fraction", apparatus=apparatus, record_alarms=False)
            points = [(p.date, p.value, p.ci_low, p.ci_high, p.runs, p.shots) for p in daily_a.points]
            assert points == [(p.date, p.value, p.ci_low, p.ci_high, p.runs, p.shots) for p in daily_b.points]
            assert len(points) == (12 if apparatus == "bench-a" else 1)
        for where in (None, "sequence = 'ramsey' and mode = 'b'", "fill_fraction < 0.3", "date between '2026-02-01' and '2026-03-01' and wait > 20 us", "shutter = true and tag = 'night'"):
            chosen_a, chosen_b = select_shots(a, where), select_shots(b, where)
            assert_frame_equal(chosen_a, chosen_b)
            assert len(chosen_a), where


def _table_counts(url: str) -> dict[str, int]:
    engine = make_engine(url)
    try:
        with engine.connect() as connection:
            return {table.name: connection.execute(text(f"SELECT count(*) FROM {table.name}")).scalar_one() for table in Base.metadata.sorted_tables}
    finally:
        engine.dispose()


def _tables(url: str) -> dict[str, list[str]]:
    """The tables of a database and their columns."""
    engine = make_engine(url)
    try:
        with engine.connect() as connection:
            found = inspect(connection)
            return {name: [column["name"] for column in found.get_columns(name)] for name in found.get_table_names()}
    finally:
        engine.dispose()


def _after_copy_file(folder: Path) -> Path:
    """A later file of the lab: one more run of the loading sequence, in April."""
    start = dt.datetime(2026, 4, 2, 8, 0, tzinfo=UTC)
    return write_table(folder / "after-copy.parquet", shot_table({"after-copy": 10}, start=start, seed=99, sites=SITES))


def _later_ingest_goes_on(url: str, folder: Path, copied: dict[str, int]) -> None:
    """New rows get ids after the copied ones (PostgreSQL: the sequences were moved)."""
    with runlog.open(url, create=False) as catalogue:
        [result] = catalogue.ingest(_after_copy_file(folder))
        assert result.status == "ingested", result.reason
        note = catalogue.annotate("after the move", run="after-copy")
        assert note == copied["annotations"] + 1
        assert catalogue.counts() == {"apparatus": 2, "runs": copied["runs"] + 1, "shots": copied["shots"] + 10}
        assert catalogue.shots("after-copy")["shot"].tolist() == list(range(10))
    found = _rows(url)
    assert [row[0] for row in found["runs"]] == list(range(1, copied["runs"] + 2))
    assert [row[0] for row in found["shots"]] == list(range(1, copied["shots"] + 11))
    assert [row[0] for row in found["ingest_log"]] == list(range(1, copied["ingest_log"] + 2))


# --- the copies ----------------------------------------------------------------------------


def test_sqlite_to_postgresql_holds_every_row_and_answers_like_the_source(sqlite_source, pg_url, tmp_path):
    before = _rows(sqlite_source)
    seen: dict[str, list[tuple[int, int]]] = {}
    copied = copy_catalogue(sqlite_source, pg_url, progress=lambda table, done, total: seen.setdefault(table, []).append((done, total)))

    assert copied == _table_counts(sqlite_source)
    # The fill fraction step raises its alarm (how many findings depends on the days' shot-level errors).
    assert copied["shots"] == 130 and copied["alarms"] >= 1 and copied["settings"] == 1
    assert {table: steps[-1] for table, steps in seen.items()} == {table: (rows, rows) for table, rows in copied.items() if rows}
    assert _rows(pg_url) == before == _rows(sqlite_source)
    _same_answers(sqlite_source, pg_url)

    # The partitions hold the shots of their range, counted from the files' times: four
    # months of 2026 with under 1 000 shots each are one partition for the year
    # (runlog.store.partitions, "Sparse years get one partition").
    months = Counter(partition_name("shots", t) for t in _loading_table()["time"].to_pylist() + _ramsey_table()["time"].to_pylist())
    assert sorted(months) == ["shots_y2026m01", "shots_y2026m02", "shots_y2026m03", "shots_y2026m04"]
    assert max(months.values()) < SPARSE_MONTH_SHOTS
    months = Counter({year_partition_name("shots", 2026): sum(months.values())})
    engine = make_engine(pg_url)
    with engine.connect() as connection:
        for table in ("shots", "occupancy"):
            found = dict(connection.execute(text(f"SELECT tableoid::regclass::text, count(*) FROM {table} GROUP BY 1")).all())
            assert found == {name.replace("shots", table, 1): count * (2 if table == "occupancy" else 1) for name, count in months.items()}
        for child in ("shot_parameters", "occupancy"):
            matched = connection.execute(text(f"SELECT count(*) FROM {child} c JOIN shots s ON s.id = c.shot_id AND s.time = c.time")).scalar_one()
            assert matched == copied[child]  # every child row carries its shot's time
        # The measured values are one plain table keyed by shot id (revision 0017), each row a shot's.
        assert connection.execute(text("SELECT count(*) FROM pg_inherits WHERE inhparent = 'shot_measurements'::regclass")).scalar_one() == 0
        assert connection.execute(text("SELECT count(*) FROM shot_measurements c JOIN shots s ON s.id = c.shot_id")).scalar_one() == copied["shot_measurements"]
    engine.dispose()

    _later_ingest_goes_on(pg_url, tmp_path, copied)


def test_postgresql_to_sqlite_holds_every_row_and_answers_like_the_source(postgres_source, tmp_path):
    target = f"sqlite:///{tmp_path / 'new folder' / 'lab copy.sqlite'}"
    copied = copy_catalogue(postgres_source, target)

    assert copied == _table_counts(postgres_source)
    assert _rows(target) == _rows(postgres_source)
    _same_answers(postgres_source, target)
    _later_ingest_goes_on(target, tmp_path, copied)


def test_sqlite_to_sqlite_and_round_trips_through_postgresql_are_row_for_row_the_same(sqlite_source, pg_url, other_pg_url, tmp_path):
    plain = f"sqlite:///{tmp_path / 'plain.sqlite'}"
    assert copy_catalogue(sqlite_source, plain) == _table_counts(sqlite_source)
    back = f"sqlite:///{tmp_path / 'back.sqlite'}"
    copy_catalogue(sqlite_source, pg_url)
    copy_catalogue(pg_url, other_pg_url)  # PostgreSQL to PostgreSQL
    copy_catalogue(other_pg_url, back)
    expected = _rows(sqlite_source)
    assert _rows(plain) == expected
    assert _rows(other_pg_url) == expected
    assert _rows(back) == expected


def test_a_sqlite_file_open_elsewhere_in_this_process_is_read_through_python_sqlite(sqlite_source, tmp_path, monkeypatch):
    @contextmanager
    def busy(engine, parallel=1):
        yield None  # what arrow_read gives while this process has the file open

    monkeypatch.setattr(copy_module, "arrow_read", busy)
    target = f"sqlite:///{tmp_path / 'through python.sqlite'}"
    copy_catalogue(sqlite_source, target)
    assert _rows(target) == _rows(sqlite_source)


def test_the_copy_reads_one_snapshot_while_an_ingest_writes(pg_url, tmp_path):
    # An ingest into the source commits while the copy reads (PostgreSQL: another
    # connection of this process); the copy holds the catalogue as it was when it began.
    _fill(pg_url, tmp_path / "files")
    before = _rows(pg_url)
    late = write_table(tmp_path / "late.parquet", shot_table({"late": 5}, start=dt.datetime(2026, 3, 3, 8, 0, tzinfo=UTC), seed=5, sites=SITES))
    written = []

    def ingest_meanwhile(table: str, done: int, total: int) -> None:
        if not written:
            with runlog.open(pg_url, create=False) as catalogue:
                written.extend(catalogue.ingest(late))

    target = f"sqlite:///{tmp_path / 'snapshot.sqlite'}"
    copy_catalogue(pg_url, target, progress=ingest_meanwhile)
    assert [r.status for r in written] == ["ingested"]
    assert _rows(target) == before
    assert _table_counts(pg_url)["shots"] == len(before["shots"]) + 5


def test_a_sqlite_source_is_read_in_one_snapshot_while_another_process_ingests(sqlite_source, tmp_path):
    busy = f"sqlite:///{tmp_path / 'busy.sqlite'}"
    copy_catalogue(sqlite_source, busy)
    before = _rows(busy)
    late = write_table(tmp_path / "late.parquet", shot_table({"late": 5}, start=dt.datetime(2026, 3, 3, 8, 0, tzinfo=UTC), seed=5, sites=SITES))
    done = []

    def ingest_meanwhile(table: str, rows: int, total: int) -> None:
        # Another process: in this one the file is held by the copy's reader.
        if not done:
            script = f"import runlog; c = runlog.open({busy!r}); print(c.ingest({str(late)!r})[0].status)"
            done.append(subprocess.run([sys.executable, "-c", script], capture_output=True, text=True, timeout=60))

    target = f"sqlite:///{tmp_path / 'snapshot.sqlite'}"
    copy_catalogue(busy, target, progress=ingest_meanwhile)
    assert done[0].stdout.strip() == "ingested", done[0].stderr
    assert _rows(target) == before
    assert _table_counts(busy)["shots"] == len(before["shots"]) + 5


def test_an_empty_catalogue_copies_to_an_empty_catalogue(pg_url, tmp_path):
    empty = f"sqlite:///{tmp_path / 'empty.sqlite'}"
    with runlog.open(empty):
        pass
    assert copy_catalogue(empty, pg_url) == {table.name: 0 for table in Base.metadata.sorted_tables}
    with runlog.open(pg_url, create=False) as catalogue:
        assert catalogue.counts() == {"apparatus": 0, "runs": 0, "shots": 0}


# --- refusals ------------------------------------------------------------------------------


def _with_password(url: str) -> str:
    # The test server trusts local connections: the password is never asked for, but
    # must never be shown either.
    return make_url(url).set(password="s3cret").render_as_string(hide_password=False)


def test_a_target_that_holds_rows_is_refused_and_left_unchanged(sqlite_source, pg_url, tmp_path):
    target = _with_password(pg_url)
    with runlog.open(target) as catalogue:
        catalogue.set_lab_timezone("Europe/Paris")
        catalogue.ingest(write_table(tmp_path / "there.parquet", shot_table({"there": 3})))
    before, tables = _rows(target), _tables(target)
    with pytest.raises(StoreError) as refused:
        copy_catalogue(sqlite_source, target)
    shown = redact(target)
    assert ":***@" in shown
    assert str(refused.value) == (
        f"target catalogue {shown} is not empty: it holds 1 row in apparatus, 1 row in ingest_log, 1 row in measurements, "
        "3 rows in parameters, 1 row in settings, 3 rows in daily_rollups, 1 row in runs, 1 row in sequence_series, 3 rows in series_rollups, "
        "3 rows in figure_records, 2 rows in images, 1 row in run_files, 1 row in run_measurements, 3 rows in run_parameters, 3 rows in run_settings, 3 rows in shots, 2 rows in site_counts, 3 rows in figures, "
        "6 rows in occupancy, 3 rows in shot_measurements, 3 rows in shot_parameters; copy into an empty database or a new catalogue; nothing was copied"
    )
    assert "s3cret" not in str(refused.value)
    assert _rows(target) == before and _tables(target) == tables


def test_other_targets_that_are_refused(sqlite_source, tmp_path):
    foreign = tmp_path / "foreign.sqlite"
    with sqlite3.connect(foreign) as connection:
        connection.execute("CREATE TABLE samples (id INTEGER PRIMARY KEY)")
    with pytest.raises(StoreError, match=r"^target sqlite:///.*foreign.sqlite is not empty and not a runlog catalogue: it holds the tables samples; nothing was copied$"):
        copy_catalogue(sqlite_source, f"sqlite:///{foreign}")

    older = f"sqlite:///{tmp_path / 'older.sqlite'}"
    with runlog.open(older):
        pass
    with sqlite3.connect(tmp_path / "older.sqlite") as connection:
        connection.execute("UPDATE alembic_version SET version_num = '0003'")
    with pytest.raises(SchemaVersionError) as refused:
        copy_catalogue(sqlite_source, older)
    assert str(refused.value) == f"catalogue {older} is at schema revision 0003, this runlog needs {SCHEMA_REVISION}: run 'runlog init' to upgrade"

    with pytest.raises(StoreError, match="not an in-memory one"):
        copy_catalogue(sqlite_source, "sqlite://")
    source_file = Path(make_url(sqlite_source).database)
    with pytest.raises(StoreError, match=r"^source and target are the same catalogue"):
        copy_catalogue(sqlite_source, f"sqlite:///{source_file.parent}/./{source_file.name}")


def test_the_source_must_exist_and_be_at_our_schema_revision(sqlite_source, tmp_path):
    target_file = tmp_path / "target.sqlite"
    target = f"sqlite:///{target_file}"
    missing = f"sqlite:///{tmp_path / 'nowhere' / 'lab.sqlite'}"
    with pytest.raises(StoreError) as refused:
        copy_catalogue(missing, target)
    assert str(refused.value) == f"no catalogue at {missing}: the file does not exist"
    assert not (tmp_path / "nowhere").exists()

    old_file = tmp_path / "old.sqlite"
    copy_catalogue(sqlite_source, f"sqlite:///{old_file}")
    with sqlite3.connect(old_file) as connection:
        connection.execute("UPDATE alembic_version SET version_num = '0003'")
    with pytest.raises(SchemaVersionError) as refused:
        copy_catalogue(f"sqlite:///{old_file}", target)
    assert str(refused.value) == f"catalogue sqlite:///{old_file} is at schema revision 0003, this runlog needs {SCHEMA_REVISION}: run 'runlog init' to upgrade"
    assert not target_file.exists()


# --- all or nothing ------------------------------------------------------------------------


class _Broken(Exception):
    pass


def _failing_writer(monkeypatch, table: str, error: type[BaseException]) -> None:
    """The bulk writer fails on its first append to ``table`` (rows of earlier tables are
    in the transaction by then)."""
    real = copy_module.open_writer

    def open_writer(engine, months=(), *tables):
        writer = real(engine, months, *tables)
        append = writer.append

        def failing_append(name, data):
            if name == table:
                raise error("disk on fire")
            append(name, data)

        writer.append = failing_append
        return writer

    monkeypatch.setattr(copy_module, "open_writer", open_writer)


@pytest.mark.parametrize(
    ("target_kind", "error"),
    [
        ("blank postgresql", _Broken),
        ("blank postgresql", KeyboardInterrupt),
        ("empty postgresql catalogue", _Broken),
        ("new sqlite file", _Broken),
        ("new sqlite file", KeyboardInterrupt),
        ("empty sqlite catalogue", _Broken),
    ],
)
def test_a_failure_mid_copy_leaves_the_target_as_it_was(sqlite_source, request, tmp_path, monkeypatch, target_kind, error):
    if "postgresql" in target_kind:
        target = request.getfixturevalue("pg_url")
    else:
        target = f"sqlite:///{tmp_path / 'folder' / 'target.sqlite'}"
    if "empty" in target_kind:
        with runlog.open(target):
            pass  # as runlog init leaves it: a valid target
    before = _rows(target) if "empty" in target_kind else None
    tables = None if target_kind == "new sqlite file" else _tables(target)
    _failing_writer(monkeypatch, "occupancy", error)

    with pytest.raises(StoreError if error is _Broken else KeyboardInterrupt) as failed:
        copy_catalogue(sqlite_source, target)
    if error is _Broken:
        assert str(failed.value) == f"copying {sqlite_source} to {redact(target)} failed while copying occupancy: disk on fire; the target is as it was"

    if target_kind == "new sqlite file":
        assert not (tmp_path / "folder").exists()
    else:
        if tables is not None:
            assert _tables(target) == tables  # no month partitions or measurement columns left behind
        if before is not None:
            assert _rows(target) == before
    if error is _Broken:
        monkeypatch.undo()
        copy_catalogue(sqlite_source, target)  # and the target takes a copy afterwards
        assert _rows(target) == _rows(sqlite_source)


# --- the command ---------------------------------------------------------------------------


def test_the_command_copies_and_prints_the_rows(sqlite_source, pg_url, tmp_path, capsys):
    target = _with_password(pg_url)
    code, out, err = run_main(capsys, "--db", sqlite_source, "db", "copy", "--to", target)
    assert (code, err) == (0, "")
    lines = out.splitlines()
    assert lines[0] == f"copied {sqlite_source} to {redact(target)}: 13 runs, 130 shots"
    assert "s3cret" not in out
    counts = _table_counts(sqlite_source)
    assert lines[1:] == [f"  {table:<20} {rows:>12}" for table, rows in counts.items()]

    second = f"sqlite:///{tmp_path / 'second.sqlite'}"
    code, out, err = run_main(capsys, "db", "copy", "--db", target, "--to", second, "--json")
    assert (code, err) == (0, "")
    assert json.loads(out) == {"source": redact(target), "target": second, "rows": counts}


def test_the_command_refuses_in_one_line(sqlite_source, pg_url, capsys):
    target = _with_password(pg_url)
    assert run_main(capsys, "--db", sqlite_source, "db", "copy", "--to", target)[0] == 0
    code, out, err = run_main(capsys, "--db", sqlite_source, "db", "copy", "--to", target)
    assert code == 1 and out == ""
    assert err.startswith(f"runlog: error: target catalogue {redact(target)} is not empty: it holds 2 rows in apparatus, 3 rows in ingest_log")
    assert err.count("\n") == 1 and "Traceback" not in err and "s3cret" not in err

    code, out, err = run_main(capsys, "--db", sqlite_source, "db", "copy")
    assert code == 2 and "Missing option '--to'" in err
