"""Schema migrations: bring a catalogue to our head revision, or move it to another one.

Alembic is imported only here, so that opening an up-to-date catalogue stays fast.
"""

from __future__ import annotations

from importlib import resources

from sqlalchemy.engine import Engine

from runlog.errors import SchemaVersionError, StoreError

from runlog.store.measurement_columns import make_first_block
from runlog.store.partitions import PARTITION_NAME, SHOT_TABLES, measurements_out_of_partitions, partition_monitor_values, partition_shot_tables
from runlog.store.schema import MEASUREMENT_COLUMN_PREFIX

__all__ = ["alembic_config", "upgrade", "check_history", "known_revisions", "downgrade", "head_revision", "include_object", "create_or_upgrade"]


# What the PostgreSQL partitioned layout (runlog.store.partitions) has instead of the
# models' SQLite layout: the children's partition key column, shots' unique key with the
# partition key, no foreign keys from the children, and one table per month.
# ``shot_measurements`` is one of them before revision 0017 (with a time) and has no
# foreign key since (shots' key holds its time there).
_CHILDREN = frozenset((*SHOT_TABLES[1:], "shot_measurements"))
_PARTITION = PARTITION_NAME


def include_object(obj, name, type_, reflected, compare_to) -> bool:
    """Alembic filter: what the models and migrations need not agree on.

    Measurement columns of ``shot_measurements`` are data, added by ingest. On PostgreSQL
    the shot-level tables are partitioned by month (``runlog.store.partitions``): their
    month partitions, the children's ``time`` column, the unique key of ``shots`` and the
    children's foreign keys differ from the models by design, so they are not compared
    (on SQLite they are the models' own: ``tests/test_partitions.py`` checks that layout).
    """
    if type_ == "column" and reflected and obj.table.name == "shot_measurements" and str(name).startswith(MEASUREMENT_COLUMN_PREFIX):
        return False
    if type_ == "table" and reflected and _PARTITION.fullmatch(str(name)):
        return False
    if type_ == "column" and reflected and obj.table.name in _CHILDREN and name == "time":
        return False
    if type_ == "unique_constraint" and obj.table.name == "shots" and {c.name for c in obj.columns} in ({"run_id", "shot"}, {"run_id", "shot", "time"}):
        return False
    if type_ == "foreign_key_constraint" and not reflected and obj.table.name in _CHILDREN:
        return False
    return True


def alembic_config(engine: Engine | None = None):
    """An Alembic ``Config`` pointing at the migrations shipped with the package."""
    from alembic.config import Config

    config = Config()
    config.set_main_option("script_location", str(resources.files("runlog._migrations")))
    if engine is not None:
        config.set_main_option("sqlalchemy.url", engine.url.render_as_string(hide_password=False).replace("%", "%%"))
    return config


def head_revision() -> str:
    """The single head of the shipped migration history."""
    from alembic.script import ScriptDirectory

    return ScriptDirectory.from_config(alembic_config()).get_current_head()


def _run(engine: Engine, command_name: str, revision: str) -> None:
    from alembic import command

    config = alembic_config(engine)
    with engine.connect().execution_options(sqlite_begin="IMMEDIATE") as connection:
        sqlite = engine.dialect.name == "sqlite"
        if sqlite:
            # Batch migrations rebuild a table by copy, drop and rename; with foreign keys
            # on, dropping the old table would cascade-delete every child row. The pragma
            # only takes effect outside a transaction, hence the raw driver connection.
            connection.connection.driver_connection.execute("PRAGMA foreign_keys=OFF")
        try:
            config.attributes["connection"] = connection
            getattr(command, command_name)(config, revision)
            if sqlite:
                broken = connection.exec_driver_sql("PRAGMA foreign_key_check").fetchall()
                if broken:
                    connection.rollback()
                    raise StoreError(f"migration to {revision} would break foreign keys: {broken[:3]}")
            connection.commit()
        finally:
            if sqlite:
                connection.connection.driver_connection.execute("PRAGMA foreign_keys=ON")


def upgrade(engine: Engine, revision: str = "head") -> None:
    """Create the schema or upgrade it to ``revision``; a no-op when already there.

    A catalogue whose recorded revision is not in the shipped history, or whose tables are
    not what the shipped scripts make at that revision (a catalogue made by an edited
    revision file), is refused with :class:`SchemaVersionError` and left as it was:
    running later scripts over a layout they were not written for leaves a catalogue that
    says "upgraded" and cannot be read.
    """
    check_history(engine)
    _run(engine, "upgrade", revision)


#: Why a catalogue at a revision outside the shipped history is refused.
UNKNOWN_REVISION = "which is not in this runlog's migration history (a newer runlog, or one whose history was edited)"


def known_revisions() -> list[str]:
    """Every revision of the shipped history, oldest first."""
    from alembic.script import ScriptDirectory

    return [script.revision for script in reversed(list(ScriptDirectory.from_config(alembic_config()).walk_revisions()))]


def check_history(engine: Engine) -> None:
    """Refuse a catalogue at a revision we do not ship, or whose layout is not that
    revision's; an empty database and one at head pass without a look at its tables."""
    from runlog.store.engine import current_revision, redact
    from runlog.store.schema import SCHEMA_REVISION

    found = current_revision(engine)
    if found is None or found == SCHEMA_REVISION:
        return
    shown = redact(engine.url)
    if found not in known_revisions():
        raise SchemaVersionError(shown, found, SCHEMA_REVISION, UNKNOWN_REVISION)
    expected = _scripted_layout(found)
    actual = _table_columns(engine)
    if actual != expected:
        raise SchemaVersionError(shown, found, SCHEMA_REVISION, f"but its tables are not the ones revision {found} makes ({_difference(expected, actual)})")


def _table_columns(engine: Engine) -> dict[str, frozenset[str]]:
    """Tables and their columns, without what is data or the PostgreSQL layout by design
    (measurement columns, month partitions, the children's partition key)."""
    from sqlalchemy import inspect

    with engine.connect() as connection:
        found = inspect(connection)
        layout = {}
        for table in found.get_table_names():
            if _PARTITION.fullmatch(table):
                continue
            names = {c["name"] for c in found.get_columns(table)}
            if table == "shot_measurements":
                names = {n for n in names if not n.startswith(MEASUREMENT_COLUMN_PREFIX)}
            if table in _CHILDREN and engine.dialect.name == "postgresql":
                names.discard("time")
            layout[table] = frozenset(names)
    return layout


_layouts: dict[str, dict[str, frozenset[str]]] = {}


def _scripted_layout(revision: str) -> dict[str, frozenset[str]]:
    """The tables the shipped scripts make at ``revision``, built once in a scratch SQLite file."""
    if revision not in _layouts:
        import tempfile
        from pathlib import Path

        from runlog.store.engine import make_engine

        with tempfile.TemporaryDirectory(prefix="runlog-history-") as folder:
            scratch = make_engine(f"sqlite:///{Path(folder) / 'scripts.sqlite'}")
            try:
                _run(scratch, "upgrade", revision)
                _layouts[revision] = _table_columns(scratch)
            finally:
                scratch.dispose()
    return _layouts[revision]


def _difference(expected: dict[str, frozenset[str]], actual: dict[str, frozenset[str]]) -> str:
    parts = []
    if extra := sorted(set(actual) - set(expected)):
        parts.append("unexpected table " + ", ".join(extra))
    if missing := sorted(set(expected) - set(actual)):
        parts.append("missing table " + ", ".join(missing))
    for table in sorted(set(expected) & set(actual)):
        if extra := sorted(actual[table] - expected[table]):
            parts.append(f"unexpected column {table}." + f", {table}.".join(extra))
        if missing := sorted(expected[table] - actual[table]):
            parts.append(f"missing column {table}." + f", {table}.".join(missing))
    return "; ".join(parts)


def downgrade(engine: Engine, revision: str) -> None:
    """Move the schema down to ``revision`` (``base`` drops everything runlog made)."""
    _run(engine, "downgrade", revision)


def create_or_upgrade(engine: Engine) -> None:
    """Bring the catalogue to head: an empty database is created from the models and
    stamped (Alembic's recipe for building a database from scratch, no scripts to run),
    any other is upgraded through the migration history. On PostgreSQL the shot-level
    tables are then partitioned by month by the same code migration 0004 runs,
    ``shot_measurements`` is taken out again as migration 0017 does, and the first block of
    measurement columns is made, as migration 0015 does.

    ``tests/test_migrations.py`` keeps the two paths equal: models match migrations.
    """
    from sqlalchemy import Column, MetaData, PrimaryKeyConstraint, String, Table, inspect

    from runlog.store.schema import SCHEMA_REVISION, Base

    with engine.connect().execution_options(sqlite_begin="IMMEDIATE") as connection:
        with connection.begin():
            if not inspect(connection).get_table_names():
                Base.metadata.create_all(connection)
                partition_shot_tables(connection)
                measurements_out_of_partitions(connection)
                partition_monitor_values(connection)
                make_first_block(connection)
                # The same version table Alembic itself would create.
                version = Table(
                    "alembic_version",
                    MetaData(),
                    Column("version_num", String(32), nullable=False),
                    PrimaryKeyConstraint("version_num", name="alembic_version_pkc"),
                )
                version.create(connection)
                connection.execute(version.insert().values(version_num=SCHEMA_REVISION))
                return
    upgrade(engine)
