"""Schema migrations: bring a catalogue to our head revision, or move it to another one.

Alembic is imported only here, so that opening an up-to-date catalogue stays fast.
"""

from __future__ import annotations

from importlib import resources

from sqlalchemy.engine import Engine

from runlog.store.schema import MEASUREMENT_COLUMN_PREFIX

__all__ = ["alembic_config", "upgrade", "downgrade", "head_revision", "include_object"]


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
        config.attributes["connection"] = connection
        getattr(command, command_name)(config, revision)
        connection.commit()


def upgrade(engine: Engine, revision: str = "head") -> None:
    """Create the schema or upgrade it to ``revision``; a no-op when already there."""
    _run(engine, "upgrade", revision)


def downgrade(engine: Engine, revision: str) -> None:
    """Move the schema down to ``revision`` (``base`` drops everything runlog made)."""
    _run(engine, "downgrade", revision)
