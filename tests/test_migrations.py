"""Models and migrations agree, the history has one head, and upgrade/downgrade keep rows."""

from __future__ import annotations

import hashlib
from pathlib import Path

import pytest
from conftest import run_main
from alembic.autogenerate import compare_metadata
from alembic.migration import MigrationContext
from alembic.script import ScriptDirectory
from sqlalchemy import func, select

import runlog
from runlog.errors import SchemaVersionError
from runlog.store import migrate
from runlog.store.engine import current_revision, make_engine
from runlog.store.schema import SCHEMA_REVISION, Base, Run


def test_single_head_equal_to_the_code_revision():
    script = ScriptDirectory.from_config(migrate.alembic_config())
    assert len(script.get_heads()) == 1
    assert migrate.head_revision() == SCHEMA_REVISION


def test_models_match_migrations(db_url):
    engine = make_engine(db_url)
    migrate.upgrade(engine)
    with engine.connect() as connection:
        context = MigrationContext.configure(connection, opts={"compare_type": True, "include_object": migrate.include_object})
        assert compare_metadata(context, Base.metadata) == []
    engine.dispose()


def test_init_is_idempotent(db_url):
    engine = make_engine(db_url)
    migrate.upgrade(engine)
    migrate.upgrade(engine)
    assert current_revision(engine) == SCHEMA_REVISION
    engine.dispose()


def test_round_trip_keeps_rows(db_url, make_file):
    engine = make_engine(db_url)
    migrate.upgrade(engine)  # through the scripts, not the from-scratch path
    engine.dispose()
    with runlog.open(db_url) as catalogue:
        catalogue.ingest(make_file(runs={"r1": 4}))
        before = catalogue.run("r1").as_dict()
        engine = catalogue.engine
        migrate.downgrade(engine, "0001")
        assert current_revision(engine) == "0001"
        with engine.connect() as connection:
            assert connection.execute(select(func.count()).select_from(Run)).scalar_one() == 1
        migrate.upgrade(engine)
        assert current_revision(engine) == SCHEMA_REVISION
        after = catalogue.run("r1").as_dict()
        # Rows survive the round trip; figures computed from the counts return with a re-derive.
        assert {k: v for k, v in after.items() if k != "figures"} == {k: v for k, v in before.items() if k != "figures"}
        assert catalogue.ingest(make_file(runs={"r2": 3}, seed=2))[0].status == "ingested"


def test_opening_a_catalogue_at_an_older_revision_asks_for_init(db_url):
    engine = make_engine(db_url)
    migrate.upgrade(engine, "0002")
    engine.dispose()
    with pytest.raises(SchemaVersionError) as caught:
        runlog.open(db_url)
    assert str(caught.value).endswith(f"is at schema revision 0002, this runlog needs {SCHEMA_REVISION}: run 'runlog init' to upgrade")


def test_a_catalogue_at_a_revision_outside_the_history_is_refused_not_upgraded(db_url, capsys):
    engine = make_engine(db_url)
    migrate.upgrade(engine)
    with engine.begin() as connection:
        connection.exec_driver_sql("UPDATE alembic_version SET version_num = '0000'")
    message = "is at schema revision 0000, which is not in this runlog's migration history (a newer runlog, or one whose history was edited); it was not upgraded"
    with pytest.raises(SchemaVersionError) as caught:
        runlog.open(db_url)
    assert str(caught.value).endswith(message)
    code, out, err = run_main(capsys, "--db", db_url, "init")
    assert code == 1 and out == "" and err.strip().endswith(message) and len(err.strip().splitlines()) == 1
    assert current_revision(engine) == "0000"
    engine.dispose()


def test_a_catalogue_made_by_an_edited_revision_is_refused_not_upgraded(db_url, capsys):
    # Revision 0001 was once edited after release: its first version made measurement_values
    # where the released one makes shot_measurements and run_measurements. A catalogue of
    # that first version says "0001" but is not what the shipped 0001 makes.
    engine = make_engine(db_url)
    migrate.upgrade(engine, "0001")
    with engine.begin() as connection:
        connection.exec_driver_sql("DROP TABLE shot_measurements")
        connection.exec_driver_sql("DROP TABLE run_measurements")
        connection.exec_driver_sql("CREATE TABLE measurement_values (shot_id BIGINT NOT NULL REFERENCES shots (id), measurement_id INTEGER NOT NULL, value FLOAT NOT NULL)")
    code, out, err = run_main(capsys, "--db", db_url, "init")
    assert code == 1 and out == ""
    assert err.strip().endswith(
        "is at schema revision 0001, but its tables are not the ones revision 0001 makes "
        "(unexpected table measurement_values; missing table run_measurements, shot_measurements); it was not upgraded"
    )
    assert current_revision(engine) == "0001"
    with engine.connect() as connection:
        assert connection.exec_driver_sql("SELECT count(*) FROM measurement_values").scalar_one() == 0
    engine.dispose()


def test_released_revision_files_are_never_edited():
    # Append-only history: migrations/released.sha256 holds the SHA-256 of every revision
    # file on main. A new revision adds its line in the same change; a line is never edited.
    folder = Path(migrate.__file__).resolve().parents[2] / "migrations"
    registry = {}
    for line in (folder / "released.sha256").read_text().splitlines():
        digest, name = line.split()
        registry[name] = digest
    files = sorted(p.name for p in (folder / "versions").glob("*.py") if p.name != "__init__.py")
    assert files == sorted(registry), "every revision file needs its line in migrations/released.sha256 (see DEVELOPERS.md)"
    for name in files:
        digest = hashlib.sha256((folder / "versions" / name).read_bytes()).hexdigest()
        assert digest == registry[name], f"{name} changed after release: add a new revision instead"


def test_a_catalogue_created_from_the_models_equals_the_migrated_one(db_url):
    # runlog.open() builds an empty database from the models and stamps it (Alembic's
    # from-scratch recipe); it must be indistinguishable from one built by the scripts.
    with runlog.open(db_url) as catalogue:
        engine = catalogue.engine
        assert current_revision(engine) == SCHEMA_REVISION
        with engine.connect() as connection:
            context = MigrationContext.configure(connection, opts={"compare_type": True, "include_object": migrate.include_object})
            assert compare_metadata(context, Base.metadata) == []
        migrate.downgrade(engine, "base")
        assert current_revision(engine) is None
        migrate.upgrade(engine)
        assert current_revision(engine) == SCHEMA_REVISION


def test_a_large_file_read_twice_when_over_the_keep_budget(db_url, make_file, monkeypatch):
    import runlog.ingest

    monkeypatch.setattr(runlog.ingest, "KEEP_BYTES", 1)  # nothing kept: pass 2 reads the file again
    monkeypatch.setattr(runlog.ingest, "BATCH_ROWS", 4)
    with runlog.open(db_url) as catalogue:
        [result] = catalogue.ingest(make_file(runs={"r1": 10, "r2": 9}))
        assert (result.status, result.shots) == ("ingested", 19)
        assert list(catalogue.shots("r2")["shot"]) == list(range(9))


def _layout(engine) -> dict[str, object]:
    """Every table's columns, keys, foreign keys, unique constraints and indexes, and on
    PostgreSQL which tables are partitioned and on what (the partitions of months)."""
    from sqlalchemy import inspect, text

    with engine.connect() as connection:
        found = inspect(connection)
        layout: dict[str, object] = {}
        for table in sorted(found.get_table_names()):
            layout[table] = (
                sorted((c["name"], str(c["type"]), c["nullable"]) for c in found.get_columns(table)),  # 0003 appended runs.day
                found.get_pk_constraint(table),
                sorted((fk["name"], tuple(fk["constrained_columns"]), fk["referred_table"], tuple(fk["referred_columns"]), tuple(sorted(fk["options"].items()))) for fk in found.get_foreign_keys(table)),
                sorted((u["name"], tuple(u["column_names"])) for u in found.get_unique_constraints(table)),
                sorted((i["name"], tuple(i["column_names"]), i["unique"]) for i in found.get_indexes(table)),
            )
        if engine.dialect.name == "postgresql":
            layout["partitioned"] = connection.execute(
                text("SELECT c.relname, pg_get_partkeydef(c.oid) FROM pg_partitioned_table p JOIN pg_class c ON c.oid = p.partrelid ORDER BY 1")
            ).all()
    return layout


def test_models_and_scripts_give_the_same_layout(db_url, tmp_path, request):
    # A fresh catalogue (models, then on PostgreSQL the month partitioning) and one built by
    # the scripts (0001 .. head) must be the same database, not only agree on the models.
    from conftest import _fresh_postgres_database

    if db_url.startswith("sqlite"):
        other_url, drop = f"sqlite:///{tmp_path / 'scripts.sqlite'}", None
    else:
        other_url, drop = _fresh_postgres_database(request.getfixturevalue("postgres_url"))
    try:
        with runlog.open(db_url) as catalogue:
            fresh = _layout(catalogue.engine)
        engine = make_engine(other_url)
        migrate.upgrade(engine)
        scripted = _layout(engine)
        engine.dispose()
    finally:
        if drop is not None:
            drop()
    assert fresh == scripted
    # Both have the first block of measurement columns on PostgreSQL (revision 0015).
    measured = [name for name, _, _ in fresh["shot_measurements"][0] if name.startswith("m_")]
    assert sorted(measured) == (sorted(f"m_{k}" for k in range(1, 65)) if db_url.startswith("postgresql") else [])
    if db_url.startswith("postgresql"):
        # shot_measurements is one plain table keyed by shot id on both paths (revision 0017).
        assert fresh["partitioned"] == [(table, "RANGE (\"time\")") for table in sorted(("monitor_values", "occupancy", "shot_parameters", "shots"))]
        assert "time" not in [name for name, _, _ in fresh["shot_measurements"][0]]


def test_0007_renames_figures_that_stood_for_two_things(db_url, make_file):
    """Figures stored under the old shared names get the name of their own physics, in the
    figures in force, their records, the daily rollups, alarms and pin filters."""
    import datetime as dt

    from sqlalchemy import insert

    from runlog import Figure
    from runlog.store import schema as s

    with runlog.open(db_url) as catalogue:
        catalogue.ingest(make_file(runs={"ramsey1": 3, "envelope1": 3, "echo1": 3, "fringe1": 3}))
        common = {"stderr": 0.1, "method": "least-squares"}
        # The names an older runlog stored.
        catalogue.save_figures("ramsey1", "coherence", [Figure("coherence_time", 900.0, "us", **common), Figure("contrast_at_zero", 0.9, "", **common), Figure("detuning", 0.002, "MHz", **common), Figure("phase", 0.3, "rad", **common)])
        catalogue.save_figures("envelope1", "coherence", [Figure("coherence_time", 800.0, "us", **common), Figure("contrast_at_zero", 0.8, "", **common)])
        catalogue.save_figures("echo1", "echo", [Figure("t2", 5.0, "ms", **common), Figure("stretch", 1.5, "", **common), Figure("contrast_at_zero", 0.7, "", **common)])
        catalogue.save_figures("fringe1", "fringe", [Figure("contrast", 0.6, "", **common), Figure("phase", 30.0, "deg", **common), Figure("offset", 0.5, "", **common)])
        catalogue.pin("old-filter", "coherence_time > 100 or contrast_at_zero > 0.5")
        engine = catalogue.engine
        with engine.begin() as connection:
            apparatus_id = connection.execute(select(s.Apparatus.id)).scalar_one()
            connection.execute(insert(s.Alarm.__table__).values(apparatus_id=apparatus_id, quantity="coherence_time", sequence="", series_key="", day=dt.date(2026, 3, 2), reason="limit", method="test", detail="", status="open", created_at=dt.datetime(2026, 3, 3, tzinfo=dt.timezone.utc)))
        migrate.downgrade(engine, "0013")  # keeps the old names: they are not the new ones
        migrate.upgrade(engine)
        names = {run: sorted(catalogue.run(run).figures) for run in ("ramsey1", "envelope1", "echo1", "fringe1")}
        assert names["ramsey1"] == ["fill_fraction", "loss", "ramsey_contrast", "ramsey_frequency", "ramsey_phase", "survival", "t2_star"]
        assert names["envelope1"] == ["envelope_contrast", "envelope_time", "fill_fraction", "loss", "survival"]
        assert names["echo1"] == ["echo_contrast", "fill_fraction", "loss", "stretch", "survival", "t2"]
        assert names["fringe1"] == ["contrast", "fill_fraction", "fringe_phase", "loss", "offset", "survival"]
        assert catalogue.run("ramsey1").figures["t2_star"]["value"] == 900.0  # nothing lost
        with engine.connect() as connection:
            records = set(connection.execute(select(s.FigureRecord.name)).scalars())
            rollups = set(connection.execute(select(s.DailyRollup.name)).scalars())
            quantities = set(connection.execute(select(s.Alarm.quantity)).scalars())
            where = connection.execute(select(s.Pin.where_text)).scalar_one()
        old = {"coherence_time", "contrast_at_zero", "detuning", "phase"}
        assert not records & old and {"t2_star", "envelope_time", "echo_contrast", "fringe_phase", "ramsey_frequency"} <= records
        assert not rollups & old and {"t2_star", "envelope_time", "ramsey_phase", "fringe_phase"} <= rollups
        assert quantities == {"t2_star"}
        assert where == "t2_star > 100 or ramsey_contrast > 0.5"
