"""Schema migrations with Alembic: upgrade, downgrade, and the start-up check."""

from __future__ import annotations

from pathlib import Path

from alembic import command
from alembic.config import Config
from alembic.runtime.migration import MigrationContext
from alembic.script import ScriptDirectory
from sqlalchemy import Engine

from service.errors import DatabaseNotMigratedError

__all__ = [
    "alembic_config",
    "current_revision",
    "downgrade",
    "head_revision",
    "require_migrated",
    "upgrade",
]

MIGRATIONS = Path(__file__).resolve().parents[2] / "migrations"


def alembic_config(engine: Engine) -> Config:
    config = Config()
    config.set_main_option("script_location", str(MIGRATIONS))
    config.set_main_option("sqlalchemy.url", engine.url.render_as_string(hide_password=False))
    return config


def upgrade(engine: Engine, revision: str = "head") -> None:
    with engine.begin() as connection:
        config = alembic_config(engine)
        config.attributes["connection"] = connection
        command.upgrade(config, revision)


def downgrade(engine: Engine, revision: str) -> None:
    with engine.begin() as connection:
        config = alembic_config(engine)
        config.attributes["connection"] = connection
        command.downgrade(config, revision)


def head_revision(engine: Engine) -> str | None:
    return ScriptDirectory.from_config(alembic_config(engine)).get_current_head()


def current_revision(engine: Engine) -> str | None:
    with engine.connect() as connection:
        return MigrationContext.configure(connection).get_current_revision()


def require_migrated(engine: Engine) -> None:
    """Refuse to run against a database whose schema is behind (or ahead of) this code."""
    current, head = current_revision(engine), head_revision(engine)
    if current != head:
        where = engine.url.render_as_string(hide_password=True)
        raise DatabaseNotMigratedError(
            f"database {where} is at schema revision {current or 'none (empty)'}, this "
            f"stockrelay needs {head}: run `stockrelay migrate` first"
        )
