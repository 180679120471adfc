"""Measurement columns made ahead of their names (runlog.store.measurement_columns): on
PostgreSQL in blocks of 64, so that a new name within a block changes no month partition;
on SQLite one column a name, as before. Every reader finds each value; revision 0015
upgrades a catalogue with every value kept. Both backends."""

from __future__ import annotations

import datetime as dt

import numpy as np
import pyarrow.parquet as pq
import pytest
from sqlalchemy import inspect, text

import runlog
from conftest import shot_table, write_table
from runlog.store import migrate
from runlog.store.engine import make_engine
from runlog.store.measurement_columns import BLOCK, columns_to_make, present_columns

UTC = dt.timezone.utc
MONTHS = [dt.datetime(2025, month, 3, 9, 0, tzinfo=UTC) for month in (1, 4, 7, 10)]


def _columns(engine) -> list[int]:
    with engine.connect() as connection:
        return sorted(present_columns(connection))


def _partition_widths(engine) -> dict[str, int]:
    """Columns of shot_measurements and of each of its month partitions (PostgreSQL)."""
    with engine.connect() as connection:
        rows = connection.execute(
            text(
                "SELECT c.relname, c.relnatts FROM pg_class c WHERE c.oid = to_regclass('shot_measurements') "
                "OR c.oid IN (SELECT inhrelid FROM pg_inherits WHERE inhparent = to_regclass('shot_measurements'))"
            )
        ).all()
    return dict(rows)


def _named(catalogue) -> dict[str, int]:
    with catalogue.engine.connect() as connection:
        return dict(connection.execute(text("SELECT name, id FROM measurements")).all())


# --- blocks (pure) ------------------------------------------------------------------------


def test_a_new_id_makes_the_missing_columns_of_its_block():
    assert columns_to_make([1], set(), 64, 1500) == list(range(1, 65))
    assert columns_to_make([5, 6], set(range(1, 65)), 64, 1500) == []
    assert columns_to_make([65], set(range(1, 65)), 64, 1500) == list(range(65, 129))
    # A block never passes the limit; an id past it (a rolled-back name's) gets its own column.
    assert columns_to_make([1490], set(range(1, 1473)), 64, 1500) == list(range(1473, 1501))
    assert columns_to_make([1502], set(range(1, 1501)), 64, 1500) == [1502]
    # SQLite: one column a name.
    assert columns_to_make([3, 7], {1, 2}, 1, 1500) == [3, 7]


# --- what ingest makes --------------------------------------------------------------------


def test_new_names_within_a_block_change_no_partition(catalogue, tmp_path):
    postgres = catalogue.engine.dialect.name == "postgresql"
    files = [write_table(tmp_path / f"month{k}.parquet", shot_table({f"r{k}": 6}, start=start, seed=k)) for k, start in enumerate(MONTHS)]
    assert [r.status for r in catalogue.ingest(files)] == ["ingested"] * len(MONTHS)
    assert _columns(catalogue.engine) == (list(range(1, BLOCK + 1)) if postgres else [1])
    widths = _partition_widths(catalogue.engine) if postgres else None
    if postgres:
        # One plain table, not one per month, however many months the shots fill (0017).
        assert list(widths) == ["shot_measurements"]
    # 62 new names, one file each, in the months already stored: no table changes.
    for k in range(62):
        extra = {f"m.probe_{k:02d}": np.full(3, float(k))}
        path = write_table(tmp_path / f"probe{k}.parquet", shot_table({f"p{k}": 3}, start=MONTHS[k % len(MONTHS)] + dt.timedelta(hours=1), seed=k, extra=extra))
        assert catalogue.ingest(path)[0].status == "ingested"
    named = _named(catalogue)
    assert len(named) == 63 and max(named.values()) == 63
    if postgres:
        assert _partition_widths(catalogue.engine) == widths
        assert _columns(catalogue.engine) == list(range(1, BLOCK + 1))
    else:
        assert _columns(catalogue.engine) == list(range(1, 64))
    # Names 64 and 65: the second crosses into the next block, made whole in one change.
    extra = {"m.probe_x": np.full(3, 1.5), "m.probe_y": np.full(3, 2.5)}
    path = write_table(tmp_path / "two.parquet", shot_table({"two": 3}, start=MONTHS[0] + dt.timedelta(hours=2), extra=extra))
    assert catalogue.ingest(path)[0].status == "ingested"
    if postgres:
        assert _columns(catalogue.engine) == list(range(1, 2 * BLOCK + 1))
        assert set(_partition_widths(catalogue.engine).values()) == {width + BLOCK for width in set(widths.values())}
    else:
        assert _columns(catalogue.engine) == list(range(1, 66))
    # Every reader finds each value in its own column.
    assert catalogue.shots("p17")["m.probe_17"].tolist() == [17.0] * 3
    assert catalogue.shots("two")[["m.probe_x", "m.probe_y"]].values.tolist() == [[1.5, 2.5]] * 3
    assert catalogue.shots("r1")["m.atom_number"].notna().all() and "m.probe_17" not in catalogue.shots("r1")
    chosen = catalogue.select("m.probe_y > 2 or m.probe_40 = 40")
    assert sorted(set(chosen["run"])) == ["p40", "two"]
    assert chosen.loc[chosen["run"] == "p40", "m.probe_40"].tolist() == [40.0] * 3
    out = catalogue.export("m.probe_y > 2", tmp_path / "export")
    shots = pq.read_table(tmp_path / "export" / "shots.parquet").to_pandas()
    assert out.shots == 3 and shots["m.probe_y"].tolist() == [2.5] * 3


# --- upgrade from the revision before 0015 --------------------------------------------------

PREVIOUS = "0016"


def _values(engine) -> list[tuple]:
    """Every shot's measured values, by measurement name: what the upgrade must keep."""
    with engine.connect() as connection:
        named = sorted(connection.execute(text("SELECT name, id FROM measurements")).all())
        listed = ", ".join(f"m_{mid}" for _, mid in named)
        return [tuple(row) for row in connection.execute(text(f"SELECT s.id, {listed} FROM shots s JOIN shot_measurements sm ON sm.shot_id = s.id ORDER BY s.id"))]


def test_upgrade_from_the_previous_revision_keeps_every_measured_value_and_pinned_export(db_url, tmp_path):
    postgres = db_url.startswith("postgresql")
    rng = np.random.default_rng(7)
    files = []
    for k, start in enumerate(MONTHS):
        values = rng.normal(5.0, 1.0, 8)
        values[k] = np.nan  # a missing value stays missing
        extra = {"m.fluorescence": values, f"m.only_{k}": np.arange(8.0) + k}
        files.append(write_table(tmp_path / f"m{k}.parquet", shot_table({f"r{k}": 8}, start=start, seed=k, extra=extra)))
    with runlog.open(db_url) as catalogue:
        assert [r.status for r in catalogue.ingest(files)] == ["ingested"] * len(files)
        catalogue.pin("all", "m.fluorescence > 0")
        first = catalogue.export(None, tmp_path / "then", pin="all")
        shots_then = {key: catalogue.shots(key) for key in ("r0", "r3")}
    engine = make_engine(db_url)
    migrate.downgrade(engine, PREVIOUS)
    # Before 0015 a name's column is made with the name: nothing ahead of them.
    with engine.connect() as connection:
        ids = sorted(connection.execute(text("SELECT id FROM measurements")).scalars())
    assert _columns(engine) == ids == list(range(1, 7))
    before = _values(engine)
    assert len(before) == 32 and sum(v is None for row in before for v in row[1:]) == 4 + 32 * 4 - 32
    if postgres:
        # Below 0017 the measured values are partitioned by month again, like the shots.
        months = {name for name in inspect(engine).get_table_names() if name.startswith("shot_measurements_y")}
        assert len(months) == len(MONTHS)
    migrate.upgrade(engine)
    assert _values(engine) == before
    assert _columns(engine) == (list(range(1, BLOCK + 1)) if postgres else ids)
    # One plain table at head (revision 0017).
    assert not {name for name in inspect(engine).get_table_names() if name.startswith("shot_measurements_y")}
    engine.dispose()
    with runlog.open(db_url) as catalogue:
        for key, frame in shots_then.items():
            assert catalogue.shots(key).equals(frame)
        again = catalogue.export(None, tmp_path / "now", pin="all")
        assert again.data == first.data
        for name in first.data:
            assert (tmp_path / "then" / name).read_bytes() == (tmp_path / "now" / name).read_bytes()
        # A new name after the upgrade lands in a column made ahead (PostgreSQL) or its own.
        path = write_table(tmp_path / "late.parquet", shot_table({"late": 3}, start=MONTHS[1] + dt.timedelta(days=1), extra={"m.late_signal": [1.0, 2.0, 3.0]}))
        assert catalogue.ingest(path)[0].status == "ingested"
        assert catalogue.shots("late")["m.late_signal"].tolist() == [1.0, 2.0, 3.0]
        assert _named(catalogue)["late_signal"] == 7


@pytest.mark.parametrize("names", [1, 70])
def test_downgrade_below_0015_drops_only_the_columns_no_name_uses(db_url, tmp_path, names):
    with runlog.open(db_url) as catalogue:
        extra = {f"m.signal_{k:02d}": np.full(4, float(k)) for k in range(names)}
        assert catalogue.ingest(write_table(tmp_path / "a.parquet", shot_table({"r1": 4}, extra=extra)))[0].status == "ingested"
    engine = make_engine(db_url)
    try:
        before = _values(engine)
        migrate.downgrade(engine, PREVIOUS)
        assert _columns(engine) == list(range(1, names + 2))  # atom_number and the signals
        assert _values(engine) == before
    finally:
        engine.dispose()


# --- revision 0017: one plain table on PostgreSQL -------------------------------------------


def test_upgrade_from_0014_makes_one_plain_table_and_keeps_every_value(db_url, tmp_path):
    postgres = db_url.startswith("postgresql")
    rng = np.random.default_rng(17)
    files, expected = [], 0
    for k, start in enumerate(MONTHS):
        values = rng.normal(3.0, 0.5, 6)
        values[k] = np.nan  # a missing value stays missing
        expected += 6 if k == 2 else int((values > 0).sum())  # q2 alone has m.extra_2, all >= 0
        files.append(write_table(tmp_path / f"q{k}.parquet", shot_table({f"q{k}": 6}, start=start, seed=20 + k, extra={"m.fluorescence": values, f"m.extra_{k}": np.arange(6.0) * k})))
    with runlog.open(db_url) as catalogue:
        assert [r.status for r in catalogue.ingest(files)] == ["ingested"] * len(files)
        first = catalogue.export("m.fluorescence > 0 or m.extra_2 >= 0", tmp_path / "then")
        chosen_then = catalogue.select("m.fluorescence > 3")
    # A catalogue at 0014, with the layout of 0004..0016 on PostgreSQL: shot_measurements
    # partitioned by month, each row with its shot's time.
    engine = make_engine(db_url)
    migrate.downgrade(engine, "0014")
    if postgres:
        with engine.connect() as connection:
            assert connection.execute(text("SELECT count(*) FROM pg_inherits WHERE inhparent = 'shot_measurements'::regclass")).scalar_one() == len(MONTHS)
            assert connection.execute(text("SELECT count(*) FROM shot_measurements c JOIN shots s ON s.id = c.shot_id AND s.time = c.time")).scalar_one() == 24
    before = _values(engine)
    assert len(before) == 24 and sum(v is None for row in before for v in row[1:]) == 4 + 24 * 4 - 24
    migrate.upgrade(engine)
    assert _values(engine) == before
    if postgres:
        with engine.connect() as connection:
            assert connection.execute(text("SELECT relkind FROM pg_class WHERE oid = 'shot_measurements'::regclass")).scalar_one() == "r"
            assert connection.execute(text("SELECT count(*) FROM pg_inherits WHERE inhparent = 'shot_measurements'::regclass")).scalar_one() == 0
            assert connection.execute(text("SELECT pg_get_constraintdef(oid) FROM pg_constraint WHERE conrelid = 'shot_measurements'::regclass AND contype = 'p'")).scalar_one() == "PRIMARY KEY (shot_id)"
            assert _columns(engine) == list(range(1, BLOCK + 1))  # the block made ahead is kept
    engine.dispose()
    with runlog.open(db_url) as catalogue:
        again = catalogue.export("m.fluorescence > 0 or m.extra_2 >= 0", tmp_path / "now")
        assert again.shots == first.shots == expected
        for name in first.data:
            assert (tmp_path / "then" / name).read_bytes() == (tmp_path / "now" / name).read_bytes()
        assert catalogue.select("m.fluorescence > 3").equals(chosen_then)
