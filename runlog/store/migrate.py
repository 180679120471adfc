"""Schema migrations: bring a catalogue to our head revision, or move it to another one.

Alembic is imported only here, so that opening an up-to-date catalogue stays fast.
"""

from __future__ import annotations

from importlib import resources

from sqlalchemy.engine import Engine

from runlog.errors import StoreError

from runlog.store.schema import MEASUREMENT_COLUMN_PREFIX

__all__ = ["alembic_config", "upgrade", "downgrade", "head_revision", "include_object", "create_or_upgrade"]


def include_object(obj, name, type_, reflected, compare_to) -> bool:
    """Alembic filter: measurement columns of ``shot_measurements`` are data, added by ingest."""
    if type_ == "column" and reflected and obj.table.name == "shot_measurements":
        return not str(name).startswith(MEASUREMENT_COLUMN_PREFIX)
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
    any other is upgraded through the migration history.

    ``tests/test_migrations.py`` keeps the two paths equal: models match migrations.
    """
    from sqlalchemy import Column, MetaData, PrimaryKeyConstraint, String, Table, inspect

    from runlog.store.schema import SCHEMA_REVISION, Base

    with engine.connect().execution_options(sqlite_begin="IMMEDIATE") as connection:
        with connection.begin():
            if not inspect(connection).get_table_names():
                Base.metadata.create_all(connection)
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
