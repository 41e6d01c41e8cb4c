"""Engines: a PostgreSQL connection that died while idle in the pool is replaced before use, so
a request after a server restart or a dropped connection does not fail."""

from __future__ import annotations

import pytest
from sqlalchemy import text
from sqlalchemy.exc import OperationalError

from service.db import session as session_module
from service.db.session import make_engine


def test_a_connection_killed_while_idle_is_replaced_before_use(
    postgres_url: str, monkeypatch: pytest.MonkeyPatch
) -> None:
    monkeypatch.setattr(session_module, "PING_AFTER_IDLE_SECONDS", 0.0)
    engine = make_engine(postgres_url, pool_size=1)
    admin = make_engine(postgres_url, pool_size=1)
    try:
        with engine.connect() as connection:
            victim = connection.execute(text("SELECT pg_backend_pid()")).scalar_one()
        # The server ends the pooled connection's backend, as a restart would.
        with admin.connect() as connection:
            connection.execute(text("SELECT pg_terminate_backend(:pid)"), {"pid": victim})
        with engine.connect() as connection:
            now = connection.execute(text("SELECT pg_backend_pid()")).scalar_one()
        assert now != victim
    finally:
        engine.dispose()
        admin.dispose()


def test_a_recently_used_connection_is_not_pinged_and_a_failure_clears_the_pool(
    postgres_url: str, monkeypatch: pytest.MonkeyPatch
) -> None:
    # Within the idle threshold no ping is spent: a connection killed meanwhile fails its one
    # request (the API answers 503), and the pool then replaces it for the next.
    monkeypatch.setattr(session_module, "PING_AFTER_IDLE_SECONDS", 3600.0)
    engine = make_engine(postgres_url, pool_size=1)
    admin = make_engine(postgres_url, pool_size=1)
    try:
        with engine.connect() as connection:
            victim = connection.execute(text("SELECT pg_backend_pid()")).scalar_one()
        with admin.connect() as connection:
            connection.execute(text("SELECT pg_terminate_backend(:pid)"), {"pid": victim})
        with pytest.raises(OperationalError), engine.connect() as connection:
            connection.execute(text("SELECT 1"))
        with engine.connect() as connection:
            assert connection.execute(text("SELECT pg_backend_pid()")).scalar_one() != victim
    finally:
        engine.dispose()
        admin.dispose()
