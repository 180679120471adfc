"""Models and migrations agree, the history has one head, and upgrade/downgrade keep rows."""

from __future__ import annotations

import pytest
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


def test_opening_a_catalogue_at_another_revision_is_refused(db_url):
    engine = make_engine(db_url)
    migrate.upgrade(engine)
    with engine.begin() as connection:
        connection.exec_driver_sql("UPDATE alembic_version SET version_num = '0000'")
    engine.dispose()
    with pytest.raises(SchemaVersionError) as caught:
        runlog.open(db_url)
    assert str(caught.value).endswith(f"is at schema revision 0000, this runlog needs {SCHEMA_REVISION}: run 'runlog init' to upgrade")


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
    if db_url.startswith("postgresql"):
        assert fresh["partitioned"] == [(table, "RANGE (\"time\")") for table in sorted(("occupancy", "shot_measurements", "shot_parameters", "shots"))]
