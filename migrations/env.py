"""Alembic environment. Run through `stockrelay migrate` (service.db.migrate), which passes the
database URL from Settings; there is no alembic.ini."""

from __future__ import annotations

from alembic import context
from sqlalchemy import Connection

from service.db import tables  # noqa: F401  (registers the tables on Base.metadata)
from service.db.base import Base
from service.db.session import make_engine

config = context.config
target_metadata = Base.metadata


def _run(connection: Connection) -> None:
    context.configure(
        connection=connection,
        target_metadata=target_metadata,
        render_as_batch=connection.dialect.name == "sqlite",
        compare_type=True,
    )
    with context.begin_transaction():
        context.run_migrations()


def run_migrations_online() -> None:
    connection = config.attributes.get("connection")
    if connection is not None:
        _run(connection)
        return
    engine = make_engine(config.get_main_option("sqlalchemy.url") or "")
    with engine.connect() as connection:
        _run(connection)
    engine.dispose()


if context.is_offline_mode():
    raise SystemExit("stockrelay migrations run online only: use `stockrelay migrate`")
run_migrations_online()
