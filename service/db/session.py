"""Engines and sessions. Built by the caller (API lifespan, worker, CLI), never at import."""

from __future__ import annotations

import time
from collections.abc import Iterator
from pathlib import Path
from typing import Any

from sqlalchemy import Engine, create_engine, event
from sqlalchemy.engine import make_url
from sqlalchemy.exc import DisconnectionError
from sqlalchemy.orm import Session, sessionmaker

__all__ = ["make_engine", "make_session_factory", "session_scope"]


def make_engine(url: str, *, pool_size: int = 20) -> Engine:
    """An engine for `url` keeping up to `pool_size` connections open (a request beyond them
    waits for one rather than paying for a new connection). SQLite files get their folder
    created, foreign keys enforced, WAL journaling (readers never block the single writer) and
    a generous busy timeout; PostgreSQL connections that sat idle are checked before use."""
    parsed = make_url(url)
    if parsed.get_backend_name() == "sqlite":
        if parsed.database and parsed.database != ":memory:":
            Path(parsed.database).parent.mkdir(parents=True, exist_ok=True)
        engine = create_engine(
            url, connect_args={"timeout": 30}, pool_size=pool_size, max_overflow=0
        )
        event.listen(engine, "connect", _sqlite_pragmas)
        return engine
    engine = create_engine(url, pool_size=pool_size, max_overflow=0)
    event.listen(engine, "checkin", _note_checkin)
    event.listen(engine, "checkout", _ping_if_idle)
    return engine


# A connection unused for this long is checked before use (the server may have restarted or
# dropped it); a busy one is not, which saves a round trip per request. A connection that breaks
# while busy fails that request (503) and the pool drops every connection older than it.
PING_AFTER_IDLE_SECONDS = 2.0


def _note_checkin(_dbapi_connection: Any, record: Any) -> None:
    record.info["idle_since"] = time.monotonic()


def _ping_if_idle(dbapi_connection: Any, record: Any, _proxy: Any) -> None:
    idle_since = record.info.get("idle_since")
    if idle_since is None or time.monotonic() - idle_since < PING_AFTER_IDLE_SECONDS:
        return
    try:
        cursor = dbapi_connection.cursor()
        cursor.execute("SELECT 1")
        cursor.close()
        dbapi_connection.rollback()
    except Exception as exc:
        # The pool discards this connection and tries another (SQLAlchemy's documented way for a
        # checkout handler to report a dead connection).
        raise DisconnectionError(f"idle connection no longer answers: {exc}") from exc


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
