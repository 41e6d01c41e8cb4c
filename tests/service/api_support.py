"""Helpers shared by the HTTP tests: an app on the migrated test database, the worker run
in-process until the queue is empty, the demo network and its variants, and the checks every
problem response must pass (RFC 9457)."""

from __future__ import annotations

import copy
import uuid
from collections.abc import Iterator, Mapping
from contextlib import contextmanager
from typing import Any

import httpx2
import pytest
from fastapi.testclient import TestClient
from sqlalchemy import Engine

from service.auth import Scope, create_key
from service.db.keys import get_or_create_tenant
from service.db.session import make_session_factory
from service.demo import DEMO_NETWORK
from service.main import create_app
from service.problems import PROBLEM_TYPES
from service.settings import Settings
from service.worker import Worker
from solver import NetworkSpec, PolicyResult, Recommendation

__all__ = [
    "PROBLEM_TYPE_BASE",
    "assert_problem",
    "create_network",
    "database_url_of",
    "demo_document",
    "expected_transfers",
    "make_key",
    "open_client",
    "pointers",
    "run_worker",
    "sqlite_only",
    "stock_of",
    "weekly_document",
]

# Problem types are URIs this service answers itself (GET /problems/<slug>).
PROBLEM_TYPE_BASE = "/problems/"
# RFC 9457, section 3.1: the members every problem of this API carries.
PROBLEM_MEMBERS = ("type", "title", "status", "detail", "instance")

# For checks of request handling that the database cannot change, and for the heavier
# comparisons: run on SQLite only (overrides the two-database parametrization of `engine`).
sqlite_only = pytest.mark.parametrize("database_url", ["sqlite"], indirect=True)


def database_url_of(engine: Engine) -> str:
    return engine.url.render_as_string(hide_password=False)


@contextmanager
def open_client(
    engine: Engine, *, raise_server_exceptions: bool = True, **settings: Any
) -> Iterator[TestClient]:
    """The app on `engine`'s database, lifespan entered; every request carries an X-Request-ID
    of its own (unless it sets one) so that problem checks can see it echoed."""
    app = create_app(Settings(database_url=database_url_of(engine), **settings))
    with TestClient(app, raise_server_exceptions=raise_server_exceptions) as client:
        client.event_hooks = {"request": [_tag_request], "response": []}
        client.headers["Authorization"] = f"Bearer {make_key(engine)}"
        yield client


def make_key(engine: Engine, tenant: str = "test", scope: Scope = "write") -> str:
    """A new API key of `tenant` with `scope`."""
    with make_session_factory(engine).begin() as session:
        return create_key(session, get_or_create_tenant(session, tenant), scope)[1]


def _tag_request(request: httpx2.Request) -> None:
    request.headers.setdefault("X-Request-ID", f"test-{uuid.uuid4().hex[:12]}")


def run_worker(engine: Engine, **settings: Any) -> int:
    """Solve every queued job in-process; the number of jobs handled."""
    worker = Worker(
        Settings(database_url=database_url_of(engine), poll_interval=0.01, **settings),
        make_session_factory(engine),
        "api-test",
    )
    return worker.run(until_idle=True)


def demo_document(**changes: Any) -> dict[str, Any]:
    """The demo network as a request body (a deep copy), with top-level `changes`."""
    document = copy.deepcopy(DEMO_NETWORK)
    document.update(changes)
    return document


WEEK = ("mon", "tue", "wed", "thu", "fri", "sat", "sun")


def weekly_document(open_nights: tuple[int, ...] = (0, 1, 2, 3, 4, 5), **changes: Any) -> Any:
    """The demo network with weekday-dependent fields: Riverside busy at weekends, Hilltop
    restocked on Tuesdays and Fridays only, and both lanes running only on `open_nights`
    (0 = Monday night; by default every night but Sunday's). Top-level `changes` as in
    demo_document."""
    document = demo_document(**changes)
    riverside, hilltop = document["locations"]
    riverside["demand"] = {
        "weekly": {
            day: {"dist": "negative_binomial", "mean": mean, "variance": 1.6 * mean}
            for day, mean in zip(WEEK, (1.8, 1.8, 2.0, 2.2, 3.0, 4.2, 3.6), strict=True)
        }
    }
    none = {"dist": "pmf", "p": [1.0]}
    delivery = {"dist": "poisson", "mean": 3.5}
    hilltop["replenishment"] = {
        "weekly": {day: delivery if day in ("tue", "fri") else none for day in WEEK}
    }
    for lane in document["lanes"]:
        limit = lane["max_units"]
        lane["max_units"] = {
            "weekly": {day: limit if d in open_nights else 0 for d, day in enumerate(WEEK)}
        }
    return document


def create_network(client: TestClient, document: Mapping[str, Any] | None = None) -> Any:
    """POST a network (the demo one by default) and return the created body."""
    response = client.post("/v1/networks", json=dict(document or demo_document()))
    assert response.status_code == 201, response.text
    return response.json()


def stock_of(spec: NetworkSpec, vector: list[int]) -> dict[str, int]:
    return dict(zip(spec.location_ids, vector, strict=True))


def expected_transfers(result: PolicyResult, recommendation: Recommendation) -> list[Any]:
    """The transfers of an in-process recommendation, in the API's shape."""
    ids = result.location_ids
    return [
        {
            "from": ids[a],
            "to": ids[b],
            "units": units,
            "unit_cost": float(result.lane_costs[lane]),
            "dispatch_cost": float(result.dispatch_costs[lane]),
        }
        for lane, ((a, b), units) in enumerate(zip(result.lanes, recommendation.flows, strict=True))
        if units > 0
    ]


def assert_problem(response: httpx2.Response, status: int, slug: str | None = None) -> Any:
    """An RFC 9457 problem: media type, the standard members, `instance` the request path, and
    the request's X-Request-ID echoed in the header and the body. Returns the body."""
    assert response.status_code == status, response.text
    # RFC 9457, section 3: problem details are served as application/problem+json.
    assert response.headers["content-type"] == "application/problem+json"
    body = response.json()
    for member in PROBLEM_MEMBERS:
        assert member in body, f"problem lacks {member!r}: {body}"
    assert body["status"] == status
    assert body["instance"] == response.request.url.path
    assert isinstance(body["title"], str) and body["title"]
    assert isinstance(body["detail"], str) and body["detail"]
    if slug is not None:
        assert body["type"] == PROBLEM_TYPE_BASE + slug
    # Every type named is one the service describes at its URI.
    assert body["type"].removeprefix(PROBLEM_TYPE_BASE) in PROBLEM_TYPES, body["type"]
    sent = response.request.headers["X-Request-ID"]
    assert response.headers["X-Request-ID"] == sent
    assert body["request_id"] == sent
    return body


def pointers(problem: Mapping[str, Any]) -> list[str]:
    """The JSON pointers (RFC 6901) named by a validation problem's `errors`."""
    return [error["pointer"] for error in problem["errors"]]
