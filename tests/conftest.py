"""Database fixtures: every database test runs on SQLite and on PostgreSQL.

PostgreSQL is the server at 127.0.0.1:5432 (trust auth, database `test`, user `postgres` unless
STOCKRELAY_TEST_PG_USER says otherwise); each test gets a fresh database created from there and
dropped afterwards. When no server answers, the PostgreSQL variants are skipped with the reason.
"""

from __future__ import annotations

import os
import uuid
from collections.abc import Iterator

import pytest
from sqlalchemy import Engine, create_engine, text
from sqlalchemy.orm import Session, sessionmaker

from service.db.migrate import upgrade
from service.db.session import make_engine, make_session_factory

PG_HOST = "127.0.0.1:5432"
PG_USER = os.environ.get("STOCKRELAY_TEST_PG_USER", "postgres")
PG_ADMIN_URL = f"postgresql+psycopg://{PG_USER}@{PG_HOST}/test"

_pg_error: str | None = None
_pg_checked = False


def postgres_unavailable() -> str | None:
    """None when the test server answers, else why not (checked once per session)."""
    global _pg_checked, _pg_error
    if not _pg_checked:
        _pg_checked = True
        engine = create_engine(PG_ADMIN_URL, connect_args={"connect_timeout": 3})
        try:
            with engine.connect() as connection:
                connection.execute(text("SELECT 1"))
        except Exception as exc:
            _pg_error = f"PostgreSQL not reachable at {PG_HOST} (database test): {exc}"
        finally:
            engine.dispose()
    return _pg_error


def _fresh_postgres_database() -> tuple[str, str]:
    name = f"stockrelay_test_{uuid.uuid4().hex[:12]}"
    admin = create_engine(PG_ADMIN_URL, isolation_level="AUTOCOMMIT")
    with admin.connect() as connection:
        connection.execute(text(f'CREATE DATABASE "{name}"'))
    admin.dispose()
    return name, f"postgresql+psycopg://{PG_USER}@{PG_HOST}/{name}"


def _drop_postgres_database(name: str) -> None:
    admin = create_engine(PG_ADMIN_URL, isolation_level="AUTOCOMMIT")
    with admin.connect() as connection:
        connection.execute(text(f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)'))
    admin.dispose()


@pytest.fixture(params=["sqlite", "postgresql"])
def database_url(
    request: pytest.FixtureRequest, tmp_path_factory: pytest.TempPathFactory
) -> Iterator[str]:
    """An empty database: a new SQLite file, or a new PostgreSQL database."""
    if request.param == "sqlite":
        yield f"sqlite:///{tmp_path_factory.mktemp('db') / 'stockrelay.db'}"
        return
    yield from _postgres_database()


@pytest.fixture
def postgres_url() -> Iterator[str]:
    """An empty PostgreSQL database, for tests of concurrency that SQLite cannot show."""
    yield from _postgres_database()


def _postgres_database() -> Iterator[str]:
    """A fresh PostgreSQL database for one test, dropped after it; skips when no server."""
    reason = postgres_unavailable()
    if reason is not None:
        pytest.skip(reason)
    name, url = _fresh_postgres_database()
    try:
        yield url
    finally:
        _drop_postgres_database(name)


@pytest.fixture
def engine(database_url: str) -> Iterator[Engine]:
    """A migrated database."""
    engine = make_engine(database_url)
    upgrade(engine)
    yield engine
    engine.dispose()


@pytest.fixture
def sessions(engine: Engine) -> sessionmaker[Session]:
    return make_session_factory(engine)
