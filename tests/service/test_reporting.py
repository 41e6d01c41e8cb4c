"""service.db.reporting: the solve state of every network in a constant number of statements,
shared by GET /v1/networks, the status page and the metrics."""

from __future__ import annotations

from collections.abc import Callable, Iterator
from contextlib import contextmanager
from typing import Any

from fastapi.testclient import TestClient
from sqlalchemy import Engine, event, update

from service.db.session import make_session_factory
from service.db.tables import SolveJob
from tests.service.api_support import create_network, demo_document, open_client, run_worker


@contextmanager
def statements(engine: Engine) -> Iterator[list[str]]:
    """The SQL statements `engine` sends to the database inside the block."""
    sent: list[str] = []

    def count(_conn: Any, _cursor: Any, statement: str, *_args: Any) -> None:
        sent.append(statement)

    event.listen(engine, "before_cursor_execute", count)
    try:
        yield sent
    finally:
        event.remove(engine, "before_cursor_execute", count)


def statements_of(client: TestClient, call: Callable[[], Any]) -> int:
    engine: Engine = client.app.state.engine  # type: ignore[attr-defined]
    with statements(engine) as sent:
        call()
    return len(sent)


def add_networks(client: TestClient, first: int, count: int) -> list[dict[str, Any]]:
    """`count` new networks asking for both criteria (the POST answers)."""
    return [
        create_network(
            client, demo_document(name=f"Drill kits {n}", criteria=["discounted", "average"])
        )
        for n in range(first, first + count)
    ]


def test_listing_costs_the_same_statements_for_two_and_twelve_networks(engine: Engine) -> None:
    with open_client(engine) as client:
        solved = add_networks(client, 0, 2)
        run_worker(engine)
        listed = client.get("/v1/networks")
        assert listed.status_code == 200
        # The status page's heatmap decodes the first network's policy once, into the cache.
        assert client.get("/status").status_code == 200
        few = statements_of(client, lambda: client.get("/v1/networks"))
        status_few = statements_of(client, lambda: client.get("/status"))

        more = add_networks(client, 2, 10)
        with make_session_factory(engine).begin() as session:
            session.execute(
                update(SolveJob)
                .where(SolveJob.id.in_([job["id"] for body in more[:3] for job in body["jobs"]]))
                .values(state="failed", error="refused")
            )
        many_response = client.get("/v1/networks")
        many = statements_of(client, lambda: client.get("/v1/networks"))
        status_many = statements_of(client, lambda: client.get("/status"))

    assert few == many, f"{few} statements for 2 networks, {many} for 12"
    assert status_few == status_many
    states = {
        body["id"]: {s["criterion"]: s["state"] for s in body["solves"]}
        for body in many_response.json()
    }
    assert len(states) == 12
    both = ("discounted", "average")
    assert all(states[n["id"]] == dict.fromkeys(both, "ready") for n in solved)
    assert all(states[n["id"]] == dict.fromkeys(both, "failed") for n in more[:3])
    assert all(states[n["id"]] == dict.fromkeys(both, "queued") for n in more[3:])
