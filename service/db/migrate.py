"""Schema migrations with Alembic: upgrade, downgrade, and the start-up check."""

from __future__ import annotations

from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path

from alembic import command
from alembic.config import Config
from alembic.runtime.migration import MigrationContext
from alembic.script import ScriptDirectory
from sqlalchemy import Connection, Engine

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


@contextmanager
def _migrating(engine: Engine) -> Iterator[Config]:
    """Alembic's configuration on one connection in one transaction.

    SQLite changes a table's constraints by rebuilding it (Alembic's batch mode), and dropping
    the old table fails the foreign keys of the rows that reference it. So, as SQLite's manual
    prescribes for such changes ("Making Other Kinds Of Table Schema Changes", sqlite.org/
    lang_altertable.html), keys are switched off while the revisions run (outside the
    transaction: SQLite ignores the switch inside one), every reference is checked before the
    commit, and the switch is restored."""
    with engine.connect() as connection:
        sqlite = connection.dialect.name == "sqlite"
        if sqlite:
            connection.exec_driver_sql("PRAGMA foreign_keys=OFF")
            connection.commit()
        try:
            with connection.begin():
                config = alembic_config(engine)
                config.attributes["connection"] = connection
                yield config
                if sqlite:
                    _check_references(connection)
        finally:
            if sqlite:
                connection.exec_driver_sql("PRAGMA foreign_keys=ON")
                connection.commit()


def _check_references(connection: Connection) -> None:
    broken = connection.exec_driver_sql("PRAGMA foreign_key_check").fetchall()
    if broken:
        tables = sorted({str(row[0]) for row in broken})
        raise DatabaseNotMigratedError(
            "the migration would leave rows whose references point nowhere "
            f"({len(broken)} in {', '.join(tables)}); nothing was changed"
        )


def upgrade(engine: Engine, revision: str = "head") -> None:
    with _migrating(engine) as config:
        command.upgrade(config, revision)


def downgrade(engine: Engine, revision: str) -> None:
    with _migrating(engine) as config:
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
