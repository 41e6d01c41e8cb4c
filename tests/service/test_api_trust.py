"""Keys, tenants, scopes, limits, idempotent writes and the audit log."""

from __future__ import annotations

import importlib
import json
import logging
import pkgutil
from typing import Any

import pytest
from fastapi import APIRouter
from fastapi.dependencies.models import Dependant
from fastapi.routing import APIRoute
from sqlalchemy import Engine

import service.api
from service.api.deps import Require
from service.auth import revoke_key
from service.db.session import make_session_factory
from service.ratelimit import RateLimiter
from tests.service.api_support import (
    assert_problem,
    create_network,
    demo_document,
    make_key,
    open_client,
    run_worker,
    sqlite_only,
)

STOCK = {"riverside": 13, "hilltop": 1}
# A replayed answer names the request that produced it (its X-Request-ID).
REPLAY_HEADER = "stockrelay-replay-of"


def bearer(key: str) -> dict[str, str]:
    return {"Authorization": f"Bearer {key}"}


# Every route of another tenant's network, with the request that would succeed for its owner.
ROUTES: list[tuple[str, str, dict[str, Any] | None]] = [
    ("GET", "/v1/networks/{id}", None),
    ("GET", "/v1/networks/{id}/versions", None),
    ("PUT", "/v1/networks/{id}", demo_document(discount=0.99)),
    ("POST", "/v1/networks/{id}/recommendation", {"stock": STOCK}),
    ("GET", "/v1/networks/{id}/policy", None),
    (
        "PUT",
        "/v1/networks/{id}/locations/riverside/closing-stock",
        {"business_date": "2026-12-02", "units": 3},
    ),
    ("GET", "/v1/networks/{id}/locations/riverside/instructions?business_date=2026-12-02", None),
    ("GET", "/v1/jobs/{job}", None),
    ("DELETE", "/v1/networks/{id}", None),
]


def test_tenants_see_nothing_of_each_other(engine: Engine) -> None:
    with open_client(engine) as client:
        created = create_network(client)
        run_worker(engine)
        other = bearer(make_key(engine, tenant="sporting goods"))
        for method, path, body in ROUTES:
            url = path.format(id=created["id"], job=created["jobs"][0]["id"])
            headers = {**other, "If-Match": '"1"'}
            response = client.request(method, url, json=body, headers=headers)
            problem = assert_problem(response, 404, "not-found")
            missing = client.request(
                method, path.format(id=999_999, job=999_999), json=body, headers=headers
            )
            # Indistinguishable from a network that does not exist.
            assert assert_problem(missing, 404, "not-found")["title"] == problem["title"]
        assert client.get("/v1/networks", headers=other).json() == []
        assert client.get("/v1/jobs", headers=other).json() == []
        batch = client.post(
            "/v1/recommendations/batch",
            json={"items": [{"network_id": created["id"], "stock": STOCK}]},
            headers=other,
        ).json()
        assert batch["items"][0]["problem"]["status"] == 404
        # The owner still sees everything, untouched.
        assert client.get(f"/v1/networks/{created['id']}").json()["archived"] is False


@sqlite_only
@pytest.mark.parametrize(
    ("headers", "detail"),
    [
        ({}, "Bearer"),
        ({"Authorization": "Basic abc"}, "Bearer"),
        ({"Authorization": "Bearer sr_0000000000_nope"}, "not valid"),
        ({"Authorization": "Bearer garbage"}, "not valid"),
    ],
)
def test_requests_without_a_valid_key_get_401(
    engine: Engine, headers: dict[str, str], detail: str
) -> None:
    with open_client(engine) as client:
        client.headers.pop("Authorization")
        response = client.get("/v1/networks", headers=headers)
        problem = assert_problem(response, 401, "unauthorized")
        assert detail in problem["detail"]
        assert response.headers["www-authenticate"].startswith("Bearer")
        # Liveness and readiness need no key.
        assert client.get("/healthz").status_code == 200
        assert client.get("/readyz").status_code == 200


@sqlite_only
def test_read_keys_read_and_write_keys_write(engine: Engine) -> None:
    with open_client(engine) as client:
        created = create_network(client)
        run_worker(engine)
        reader = bearer(make_key(engine, scope="read"))
        assert client.get("/v1/networks", headers=reader).status_code == 200
        answer = client.post(
            f"/v1/networks/{created['id']}/recommendation", json={"stock": STOCK}, headers=reader
        )
        assert answer.status_code == 200
        for method, path in (("POST", "/v1/networks"), ("DELETE", f"/v1/networks/{created['id']}")):
            response = client.request(method, path, json=demo_document(name="x"), headers=reader)
            assert "write scope" in assert_problem(response, 403, "forbidden")["detail"]
        admin = bearer(make_key(engine, scope="admin"))
        assert (
            client.post("/v1/networks", json=demo_document(name="y"), headers=admin).status_code
            == 201
        )


@sqlite_only
def test_a_revoked_key_stops_working(engine: Engine) -> None:
    with open_client(engine, key_cache_seconds=0) as client:
        key = make_key(engine)
        assert client.get("/v1/networks", headers=bearer(key)).status_code == 200
        with make_session_factory(engine).begin() as session:
            assert revoke_key(session, key)
        assert_problem(client.get("/v1/networks", headers=bearer(key)), 401, "unauthorized")


@sqlite_only
def test_rate_limit_answers_429_with_retry_after(engine: Engine) -> None:
    with open_client(engine, rate_limit_per_second=0.5, rate_limit_burst=3) as client:
        statuses = [client.get("/v1/networks").status_code for _ in range(4)]
        assert statuses == [200, 200, 200, 429]
        response = client.get("/v1/networks")
        assert_problem(response, 429, "rate-limited")
        assert int(response.headers["retry-after"]) >= 1
        # Another key has its own budget.
        assert client.get("/v1/networks", headers=bearer(make_key(engine))).status_code == 200


@sqlite_only
def test_oversized_bodies_get_413(engine: Engine) -> None:
    with open_client(engine, max_body_bytes=2048) as client:
        document = demo_document()
        document["locations"][0]["demand"] = {"dist": "pmf", "p": [1 / 400] * 400}
        response = client.post("/v1/networks", json=document)
        problem = assert_problem(response, 413, "body-too-large")
        assert problem["limit"] == 2048
        assert client.get("/v1/networks").json() == []


def test_idempotent_create_replays_and_refuses_a_different_body(engine: Engine) -> None:
    with open_client(engine) as client:
        first = client.post("/v1/networks", json=demo_document(), headers={"Idempotency-Key": "a1"})
        again = client.post("/v1/networks", json=demo_document(), headers={"Idempotency-Key": "a1"})
        assert first.status_code == again.status_code == 201
        assert again.json() == first.json()
        assert again.headers[REPLAY_HEADER] == first.request.headers["X-Request-ID"]
        assert again.headers["X-Request-ID"] != first.headers["X-Request-ID"]
        assert REPLAY_HEADER not in first.headers
        assert len(client.get("/v1/networks").json()) == 1
        changed = client.post(
            "/v1/networks", json=demo_document(discount=0.9), headers={"Idempotency-Key": "a1"}
        )
        assert_problem(changed, 422, "idempotency-key-reused")
        # Records belong to an API key: another tenant's key with the same Idempotency-Key runs
        # its own request, and so does another key of the same tenant (here: the name is taken).
        other = {**bearer(make_key(engine, tenant="other")), "Idempotency-Key": "a1"}
        assert client.post("/v1/networks", json=demo_document(), headers=other).status_code == 201
        colleague = {**bearer(make_key(engine)), "Idempotency-Key": "a1"}
        taken = client.post("/v1/networks", json=demo_document(), headers=colleague)
        assert_problem(taken, 409, "conflict")


@sqlite_only
def test_a_failed_first_attempt_is_not_replayed_as_success(engine: Engine) -> None:
    with open_client(engine) as client:
        bad = demo_document(discount=2.0)
        first = client.post("/v1/networks", json=bad, headers={"Idempotency-Key": "k"})
        assert_problem(first, 422, "invalid-input")
        again = client.post("/v1/networks", json=bad, headers={"Idempotency-Key": "k"})
        assert again.status_code == 422
        assert again.headers[REPLAY_HEADER] == first.headers["X-Request-ID"]


@sqlite_only
def test_idempotency_keys_expire(engine: Engine) -> None:
    with open_client(engine, idempotency_seconds=0.000001) as client:
        client.post("/v1/networks", json=demo_document(), headers={"Idempotency-Key": "x"})
        second = client.post("/v1/networks", json=demo_document(), headers={"Idempotency-Key": "x"})
        # Expired: the request runs again (and meets the name already taken).
        assert_problem(second, 409, "conflict")


@sqlite_only
def test_each_recommendation_is_audited_without_the_key(
    engine: Engine, caplog: pytest.LogCaptureFixture
) -> None:
    with open_client(engine) as client:
        created = create_network(client)
        run_worker(engine)
        key = client.headers["Authorization"].removeprefix("Bearer ")
        with caplog.at_level(logging.INFO, logger="stockrelay.audit"):
            response = client.post(
                f"/v1/networks/{created['id']}/recommendation",
                json={"stock": STOCK},
                headers={"X-Request-ID": "audit-1"},
            )
        assert response.status_code == 200
        [record] = [r for r in caplog.records if r.name == "stockrelay.audit"]
        line = json.loads(record.getMessage())
        assert line["request_id"] == "audit-1"
        assert line["tenant"] == "test"
        assert (line["network_id"], line["version"]) == (created["id"], 1)
        assert line["latency_ms"] > 0
        assert key not in record.getMessage()
        assert key[:13] not in caplog.text


@sqlite_only
def test_networks_beyond_the_solver_limits_are_refused_with_their_sizes(engine: Engine) -> None:
    # Capacity 8 at both stores: 404 state-transfer pairs with the demo lanes (limits 4 and 3),
    # 489 with both lanes at 8.
    # Exact mode: beyond the exact limits is refused, and the refusal names the priced mode.
    with open_client(engine, max_states=100, max_pairs=450) as client:
        large = client.post("/v1/networks", json=demo_document(mode="exact"))
        problem = assert_problem(large, 422, "network-too-large")
        assert problem["states"] == 15 * 10 and problem["pairs"] is None
        assert "150 stock states" in problem["detail"] and "100" in problem["detail"]
        assert "mode 'priced'" in problem["detail"]
        assert client.get("/v1/networks").json() == []

        small = demo_document(mode="exact")
        for location in small["locations"]:
            location["capacity"] = 8
        created = create_network(client, small)  # 81 states: fits
        lanes = demo_document()["lanes"]
        for lane in lanes:
            lane["max_units"] = 8
        busy = {**small, "lanes": lanes}
        del busy["mode"]  # kept from the network
        update = client.put(f"/v1/networks/{created['id']}", json=busy, headers={"If-Match": '"1"'})
        problem = assert_problem(update, 422, "network-too-large")
        assert problem["pairs"] == 489 and "450 pairs" in problem["detail"]
        assert client.get(f"/v1/networks/{created['id']}").json()["version"] == 1


def _checks_keys(dependant: Dependant) -> bool:
    return any(isinstance(sub.call, Require) or _checks_keys(sub) for sub in dependant.dependencies)


def test_every_write_under_v1_checks_the_key_before_a_replay() -> None:
    # The Idempotency middleware replays only once Require has passed; a POST or PUT without
    # it would run again on every repeat.
    routers = [
        importlib.import_module(f"service.api.{module.name}").__dict__.get("router")
        for module in pkgutil.iter_modules(service.api.__path__)
    ]
    writes = [
        route
        for router in routers
        if isinstance(router, APIRouter)
        for route in router.routes
        if isinstance(route, APIRoute)
        and route.path.startswith("/v1/")
        and (route.methods or set()) & {"POST", "PUT"}
    ]
    assert writes
    for route in writes:
        assert _checks_keys(route.dependant), route.path


def _history(day: str) -> dict[str, Any]:
    return {
        "rows": [
            {
                "date": day,
                "location": "riverside",
                "units_sold": 2,
                "stock_at_open": 5,
                "units_received": 0,
            }
        ]
    }


@sqlite_only
def test_a_read_key_never_gets_a_write_keys_stored_answer(engine: Engine) -> None:
    with open_client(engine) as client:
        created = create_network(client)
        url = f"/v1/networks/{created['id']}/history"
        first = client.post(url, json=_history("2026-11-30"), headers={"Idempotency-Key": "k-123"})
        assert first.status_code == 200, first.text
        reader = {**bearer(make_key(engine, scope="read")), "Idempotency-Key": "k-123"}
        refused = client.post(url, json=_history("2026-11-30"), headers=reader)
        assert "write scope" in assert_problem(refused, 403, "forbidden")["detail"]


@sqlite_only
def test_a_refusal_is_not_kept_and_the_key_that_may_write_runs(engine: Engine) -> None:
    with open_client(engine) as client:
        created = create_network(client)
        url = f"/v1/networks/{created['id']}/history"
        reader = {**bearer(make_key(engine, scope="read")), "Idempotency-Key": "k-456"}
        assert_problem(client.post(url, json=_history("2026-12-01"), headers=reader), 403)
        writer = {"Idempotency-Key": "k-456"}
        stored = client.post(url, json=_history("2026-12-01"), headers=writer)
        assert stored.status_code == 200, stored.text
        assert stored.json()["inserted"] == 1
        [riverside] = client.get(url).json()["locations"]
        assert (riverside["location"], riverside["days"]) == ("riverside", 1)


class _Clock:
    def __init__(self) -> None:
        self.now = 0.0

    def __call__(self) -> float:
        return self.now


@sqlite_only
def test_rate_limits_apply_before_replays_and_a_429_is_not_kept(engine: Engine) -> None:
    with open_client(engine) as client:
        clock = _Clock()
        client.app.state.rate_limiter = RateLimiter(1.0, 1, clock=clock)  # type: ignore[attr-defined]
        key = {"Idempotency-Key": "n-1"}
        assert client.post("/v1/networks", json=demo_document(), headers=key).status_code == 201
        # Over the limit: the repeat is refused, not replayed.
        assert_problem(client.post("/v1/networks", json=demo_document(), headers=key), 429)
        clock.now += 1.0
        replayed = client.post("/v1/networks", json=demo_document(), headers=key)
        assert replayed.status_code == 201 and REPLAY_HEADER in replayed.headers

        # A write refused with 429 is not kept: the retry runs.
        other = {"Idempotency-Key": "n-2"}
        body = demo_document(name="second")
        assert_problem(client.post("/v1/networks", json=body, headers=other), 429)
        clock.now += 1.0
        retried = client.post("/v1/networks", json=body, headers=other)
        assert retried.status_code == 201, retried.text
        assert REPLAY_HEADER not in retried.headers
        clock.now += 1.0
        assert len(client.get("/v1/networks").json()) == 2


@sqlite_only
def test_problem_types_are_served_by_the_service_without_a_key(engine: Engine) -> None:
    with open_client(engine) as client:
        client.headers.pop("Authorization")
        problem = assert_problem(client.get("/v1/networks"), 401, "unauthorized")
        # RFC 9457, section 3.1.1: `type` is a URI reference, resolved against the request's.
        described = client.get(problem["type"])
        assert described.status_code == 200
        assert described.json()["type"] == problem["type"]
        assert described.json()["title"] == problem["title"]
        assert "Authorization" in described.json()["description"]
        listed = client.get("/problems").json()
        assert len(listed) > 20
        for entry in listed:
            assert entry["type"].startswith("/problems/")
            assert client.get(entry["type"]).json() == entry
        assert_problem(client.get("/problems/no-such-thing"), 404, "not-found")
