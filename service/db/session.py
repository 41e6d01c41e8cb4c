"""Engines and sessions. Built by the caller (API lifespan, worker, CLI), never at import."""

from __future__ import annotations

from collections.abc import Iterator
from pathlib import Path
from typing import Any

from sqlalchemy import Engine, create_engine, event
from sqlalchemy.engine import make_url
from sqlalchemy.orm import Session, sessionmaker

__all__ = ["make_engine", "make_session_factory", "session_scope"]


def make_engine(url: str, *, pool_size: int = 20) -> Engine:
    """An engine for `url` keeping up to `pool_size` connections open (a request beyond them
    waits for one rather than paying for a new connection). SQLite files get their folder
    created, foreign keys enforced, WAL journaling (readers never block the single writer) and
    a generous busy timeout."""
    parsed = make_url(url)
    if parsed.get_backend_name() == "sqlite":
        if parsed.database and parsed.database != ":memory:":
            Path(parsed.database).parent.mkdir(parents=True, exist_ok=True)
        engine = create_engine(
            url, connect_args={"timeout": 30}, pool_size=pool_size, max_overflow=0
        )
        event.listen(engine, "connect", _sqlite_pragmas)
        return engine
    return create_engine(url, pool_pre_ping=True, pool_size=pool_size, max_overflow=0)


def _sqlite_pragmas(dbapi_connection: Any, _record: Any) -> None:
    cursor = dbapi_connection.cursor()
    cursor.execute("PRAGMA foreign_keys=ON")
    cursor.execute("PRAGMA journal_mode=WAL")
    cursor.execute("PRAGMA busy_timeout=30000")
    cursor.close()


def make_session_factory(engine: Engine) -> sessionmaker[Session]:
    return sessionmaker(engine, expire_on_commit=False)


def session_scope(factory: sessionmaker[Session]) -> Iterator[Session]:
    """One session per request: committed on success, rolled back on error."""
    with factory.begin() as session:
        yield session
