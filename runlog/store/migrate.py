"""Schema migrations: bring a catalogue to our head revision, or move it to another one.

Alembic is imported only here, so that opening an up-to-date catalogue stays fast.
"""

from __future__ import annotations

import re
from importlib import resources

from sqlalchemy.engine import Engine

from runlog.errors import StoreError

from runlog.store.partitions import SHOT_TABLES, partition_shot_tables
from runlog.store.schema import MEASUREMENT_COLUMN_PREFIX

__all__ = ["alembic_config", "upgrade", "downgrade", "head_revision", "include_object", "create_or_upgrade"]


# What the PostgreSQL partitioned layout (runlog.store.partitions) has instead of the
# models' SQLite layout: the children's partition key column, shots' unique key with the
# partition key, no foreign keys from the children, and one table per month.
_CHILDREN = frozenset(SHOT_TABLES[1:])
_PARTITION = re.compile(rf"({'|'.join(SHOT_TABLES)})_y\d{{4}}m\d{{2}}")


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
    """Create the schema or upgrade it to ``revision``; a no-op when already there."""
    _run(engine, "upgrade", revision)


def downgrade(engine: Engine, revision: str) -> None:
    """Move the schema down to ``revision`` (``base`` drops everything runlog made)."""
    _run(engine, "downgrade", revision)


def create_or_upgrade(engine: Engine) -> None:
    """Bring the catalogue to head: an empty database is created from the models and
    stamped (Alembic's recipe for building a database from scratch, no scripts to run),
    any other is upgraded through the migration history. On PostgreSQL the shot-level
    tables are then partitioned by month by the same code migration 0004 runs.

    ``tests/test_migrations.py`` keeps the two paths equal: models match migrations.
    """
    from sqlalchemy import Column, MetaData, PrimaryKeyConstraint, String, Table, inspect

    from runlog.store.schema import SCHEMA_REVISION, Base

    with engine.connect().execution_options(sqlite_begin="IMMEDIATE") as connection:
        with connection.begin():
            if not inspect(connection).get_table_names():
                Base.metadata.create_all(connection)
                partition_shot_tables(connection)
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
