"""Engines: a PostgreSQL connection that died while idle in the pool is replaced before use, so
a request after a server restart or a dropped connection does not fail; a connection used
moments ago is trusted without a round trip."""

from __future__ import annotations

from collections.abc import Iterator

import pytest
from sqlalchemy import Engine, text
from sqlalchemy.exc import OperationalError

from service.db import session as session_module
from service.db.session import make_engine


@pytest.fixture
def engines(postgres_url: str) -> Iterator[tuple[Engine, Engine]]:
    """An engine with one pooled connection, and another to end that connection's backend."""
    engine = make_engine(postgres_url, pool_size=1)
    admin = make_engine(postgres_url, pool_size=1)
    yield engine, admin
    engine.dispose()
    admin.dispose()


def backend_pid(engine: Engine) -> int:
    with engine.connect() as connection:
        pid: int = connection.execute(text("SELECT pg_backend_pid()")).scalar_one()
        return pid


def terminate(admin: Engine, pid: int) -> None:
    """End a backend from the server side, as a restart or a dropped connection would."""
    with admin.connect() as connection:
        connection.execute(text("SELECT pg_terminate_backend(:pid)"), {"pid": pid})


def test_a_connection_killed_while_idle_is_replaced_before_use(
    engines: tuple[Engine, Engine], monkeypatch: pytest.MonkeyPatch
) -> None:
    monkeypatch.setattr(session_module, "PING_AFTER_IDLE_SECONDS", 0.0)
    engine, admin = engines
    victim = backend_pid(engine)
    terminate(admin, victim)
    assert backend_pid(engine) != victim


def test_a_recently_used_connection_is_not_pinged_and_a_failure_clears_the_pool(
    engines: tuple[Engine, Engine], monkeypatch: pytest.MonkeyPatch
) -> None:
    # Within the idle threshold no ping is spent: a connection killed meanwhile fails its one
    # request (the API answers 503), and the pool then replaces it for the next.
    monkeypatch.setattr(session_module, "PING_AFTER_IDLE_SECONDS", 3600.0)
    engine, admin = engines
    victim = backend_pid(engine)
    terminate(admin, victim)
    with pytest.raises(OperationalError), engine.connect() as connection:
        connection.execute(text("SELECT 1"))
    assert backend_pid(engine) != victim
