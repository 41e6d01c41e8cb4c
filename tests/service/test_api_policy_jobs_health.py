"""HTTP tests of the policy export, solve jobs, liveness and readiness, and of what every
problem response shares (RFC 9457 members, the request id, 404 and 405 for unknown routes)."""

from __future__ import annotations

import csv
import io
import json
import re
from collections.abc import Callable
from datetime import datetime
from typing import Any

import numpy as np
import pytest
from fastapi.testclient import TestClient
from numpy.testing import assert_allclose, assert_array_equal
from sqlalchemy import Engine
from threadpoolctl import threadpool_limits

from service.api.health import RUN_HEADER
from service.db.migrate import downgrade
from service.errors import DatabaseNotMigratedError
from service.main import create_app
from service.settings import Settings
from solver import NetworkSpec, PolicyResult, solve_network
from tests.service.api_support import (
    assert_problem,
    create_network,
    demo_document,
    open_client,
    pointers,
    run_worker,
    sqlite_only,
    weekly_document,
)

DEMO_SPEC = NetworkSpec.model_validate(demo_document())
# Worker and test solve the same model; only the order of floating-point sums may differ.
RTOL, ATOL = 1e-9, 1e-7


def expected_columns(spec: NetworkSpec) -> list[str]:
    lanes = [f"{lane.from_}->{lane.to}" for lane in spec.lanes]
    return [*spec.location_ids, *lanes, "value"]


def assert_rows_match(rows: list[list[float]], result: PolicyResult) -> None:
    """One row per closing stock in row-major order: stock, units per lane, value."""
    table = np.array(rows, dtype=np.float64)
    n_locations = len(result.capacities)
    assert table.shape == (result.n_states, n_locations + len(result.lanes) + 1)
    stocks = np.array(list(np.ndindex(*result.shape)), dtype=np.float64)
    assert_array_equal(table[:, :n_locations], stocks)
    assert_array_equal(table[:, n_locations:-1], result.policy_flows()[0])
    assert_allclose(table[:, -1], result.values[0], rtol=RTOL, atol=ATOL)


def parse_csv(text: str, version: int = 1) -> tuple[list[str], list[list[float]]]:
    """The header and rows after the leading version and criterion columns, which every row
    carries (checked here); cells as numbers."""
    header, *rows = list(csv.reader(io.StringIO(text)))
    assert header[:2] == ["version", "criterion"]
    assert {row[0] for row in rows} == {str(version)}
    assert len({row[1] for row in rows}) == 1
    return header[2:], [[float(cell) for cell in row[2:]] for row in rows]


# -- policy export -----------------------------------------------------------------------------


def test_export_before_the_solve_is_503(client: TestClient) -> None:
    network_id = create_network(client)["id"]
    for params in ({}, {"format": "csv"}):
        response = client.get(f"/v1/networks/{network_id}/policy", params=params)
        assert_problem(response, 503, "policy-not-ready")
        assert int(response.headers["Retry-After"]) > 0
    # Never solved for average: no job will make it, so no Retry-After.
    response = client.get(f"/v1/networks/{network_id}/policy", params={"criterion": "average"})
    assert_problem(response, 409, "policy-not-solved")


def test_csv_export_carries_version_and_criterion_on_every_row(
    client: TestClient, engine: Engine
) -> None:
    document = demo_document(criteria=["discounted", "average"])
    network_id = create_network(client, document)["id"]
    changed = demo_document()
    changed["locations"][1]["capacity"] = 8
    put = client.put(f"/v1/networks/{network_id}", json=changed, headers={"If-Match": '"1"'})
    assert put.status_code == 200
    run_worker(engine)
    text = client.get(
        f"/v1/networks/{network_id}/policy", params={"format": "csv", "criterion": "average"}
    ).text
    rows = list(csv.DictReader(io.StringIO(text)))
    assert rows and {(row["version"], row["criterion"]) for row in rows} == {("2", "average")}


def test_csv_and_json_exports_equal_the_solver(client: TestClient, engine: Engine) -> None:
    network_id = create_network(client)["id"]
    run_worker(engine)
    result = solve_network(DEMO_SPEC)
    path = f"/v1/networks/{network_id}/policy"

    as_csv = client.get(path, params={"format": "csv"})
    assert as_csv.status_code == 200
    assert as_csv.headers["content-type"].startswith("text/csv")
    assert as_csv.headers["X-Policy-Version"] == "1"
    assert as_csv.headers["Content-Disposition"] == (
        f'attachment; filename="network-{network_id}-policy.csv"'
    )
    header, rows = parse_csv(as_csv.text)
    assert header == expected_columns(DEMO_SPEC)
    assert len(rows) == result.n_states
    assert_rows_match(rows, result)

    as_json = client.get(path)  # JSON is the default
    assert as_json.status_code == 200
    assert as_json.headers["content-type"] == "application/json"
    assert as_json.headers["Content-Disposition"].endswith('policy.json"')
    document = as_json.json()
    assert {key: document[key] for key in ("network_id", "version", "criterion")} == {
        "network_id": network_id,
        "version": 1,
        "criterion": "discounted",
    }
    assert document["profit_per_day"] is None
    assert document["columns"] == header
    assert document["rows"] == rows


@sqlite_only
def test_exports_of_many_states_span_chunks_intact(client: TestClient, engine: Engine) -> None:
    # More than one streamed chunk of rows (4,096), with both criteria.
    document = demo_document(name="Large stockrooms", criteria=["discounted", "average"])
    document["locations"][0]["capacity"] = 70
    document["locations"][1]["capacity"] = 60
    spec = NetworkSpec.model_validate({k: v for k, v in document.items() if k != "criteria"})
    network_id = create_network(client, document)["id"]
    run_worker(engine)
    path = f"/v1/networks/{network_id}/policy"
    for criterion in ("discounted", "average"):
        result = solve_network(spec, criterion=criterion)
        assert result.n_states > 4096
        header, rows = parse_csv(
            client.get(path, params={"format": "csv", "criterion": criterion}).text
        )
        assert header == expected_columns(spec)
        assert_rows_match(rows, result)
        parsed = json.loads(client.get(path, params={"criterion": criterion}).text)
        assert parsed["criterion"] == criterion
        assert parsed["rows"] == rows
        if criterion == "average":
            assert result.gain is not None
            assert_allclose(parsed["profit_per_day"], result.gain, rtol=RTOL)


@sqlite_only
def test_weekly_policy_exports_one_table_per_weekday(client: TestClient, engine: Engine) -> None:
    document = weekly_document()
    spec = NetworkSpec.model_validate({k: v for k, v in document.items() if k != "criteria"})
    network_id = create_network(client, document)["id"]
    run_worker(engine)
    result = solve_network(spec)
    path = f"/v1/networks/{network_id}/policy"
    header, *rows = list(csv.reader(io.StringIO(client.get(path, params={"format": "csv"}).text)))
    header, rows = header[2:], [row[2:] for row in rows]
    assert header == ["weekday", *expected_columns(spec)]
    assert len(rows) == 7 * result.n_states
    weekdays = ["mon", "tue", "wed", "thu", "fri", "sat", "sun"]
    assert [row[0] for row in rows] == [day for day in weekdays for _ in range(result.n_states)]
    for phase in range(7):
        block = rows[phase * result.n_states : (phase + 1) * result.n_states]
        table = np.array([[float(cell) for cell in row[1:]] for row in block])
        assert_array_equal(table[:, 2:-1], result.policy_flows()[phase])
        assert_allclose(table[:, -1], result.values[phase], rtol=RTOL, atol=ATOL)
    assert not result.policy_flows()[6].any()  # both lanes closed on Sunday night
    as_json = client.get(path).json()
    assert as_json["columns"] == header
    assert as_json["rows"] == [[row[0], *(float(c) for c in row[1:])] for row in rows]


@sqlite_only
def test_unknown_export_format_or_criterion_is_422(client: TestClient, engine: Engine) -> None:
    network_id = create_network(client)["id"]
    run_worker(engine)
    path = f"/v1/networks/{network_id}/policy"
    xml = assert_problem(client.get(path, params={"format": "xml"}), 422, "invalid-input")
    assert pointers(xml) == ["query:/format"]
    odd = assert_problem(client.get(path, params={"criterion": "fastest"}), 422, "invalid-input")
    assert pointers(odd) == ["query:/criterion"]


# -- jobs --------------------------------------------------------------------------------------


def test_job_reports_its_solve_after_the_worker(client: TestClient, engine: Engine) -> None:
    created = create_network(client, demo_document(criteria=["discounted", "average"]))
    for job in created["jobs"]:
        before = client.get(f"/v1/jobs/{job['id']}")
        assert before.status_code == 200
        assert before.json() == job
    run_worker(engine)
    for job in created["jobs"]:
        after = client.get(f"/v1/jobs/{job['id']}").json()
        result = solve_network(DEMO_SPEC, criterion=job["criterion"])
        assert (after["id"], after["criterion"], after["version_id"]) == (
            job["id"],
            job["criterion"],
            job["version_id"],
        )
        assert (after["state"], after["attempts"], after["error"]) == ("done", 1, None)
        started = datetime.fromisoformat(after["started_at"])
        finished = datetime.fromisoformat(after["finished_at"])
        assert datetime.fromisoformat(after["created_at"]) <= started <= finished
        assert after["solve_seconds"] > 0
        assert after["iterations"] == result.iterations
        assert_allclose(after["residual"], result.residual, atol=ATOL)


def test_unknown_job_is_404(client: TestClient) -> None:
    create_network(client)
    assert "4242" in assert_problem(client.get("/v1/jobs/4242"), 404, "not-found")["detail"]
    bad = assert_problem(client.get("/v1/jobs/first"), 422, "invalid-input")
    assert pointers(bad) == ["path:/job_id"]


def test_job_list_filters_by_state_and_bounds_its_limit(client: TestClient, engine: Engine) -> None:
    done = create_network(client, demo_document(name="Solved", criteria=["discounted", "average"]))
    run_worker(engine)
    failed = create_network(client, demo_document(name="Refused"))
    run_worker(engine, max_states=10)
    queued = create_network(client, demo_document(name="Waiting"))
    ids = {
        "done": sorted((job["id"] for job in done["jobs"]), reverse=True),
        "failed": [failed["jobs"][0]["id"]],
        "queued": [queued["jobs"][0]["id"]],
    }

    listed = client.get("/v1/jobs")
    assert listed.status_code == 200
    everything = [job["id"] for job in listed.json()]
    assert everything == sorted(everything, reverse=True)  # newest first
    assert sorted(everything) == sorted(i for state_ids in ids.values() for i in state_ids)
    for state, expected in ids.items():
        jobs = client.get("/v1/jobs", params={"state": state}).json()
        assert [job["id"] for job in jobs] == expected, state
        assert {job["state"] for job in jobs} == {state}
    assert client.get("/v1/jobs", params={"state": "running"}).json() == []
    assert [j["id"] for j in client.get("/v1/jobs", params={"limit": 1}).json()] == everything[:1]
    assert len(client.get("/v1/jobs", params={"limit": 1000}).json()) == len(everything)

    for limit in (0, 1001):
        problem = assert_problem(client.get("/v1/jobs", params={"limit": limit}), 422)
        assert pointers(problem) == ["query:/limit"]
    lost = assert_problem(client.get("/v1/jobs", params={"state": "lost"}), 422, "invalid-input")
    assert pointers(lost) == ["query:/state"]


def test_jobs_name_their_network_and_version_number(client: TestClient) -> None:
    first = create_network(client, demo_document(name="First"))
    second = create_network(client, demo_document(name="Second"))
    changed = demo_document(name="Second", discount=0.9)
    response = client.put(f"/v1/networks/{second['id']}", json=changed, headers={"If-Match": '"1"'})
    assert response.status_code == 200, response.text
    [next_job] = response.json()["jobs"]

    listed = {job["id"]: job for job in client.get("/v1/jobs").json()}
    expected = {
        first["jobs"][0]["id"]: (first["id"], 1),
        second["jobs"][0]["id"]: (second["id"], 1),
        next_job["id"]: (second["id"], 2),
    }
    assert {i: (j["network_id"], j["version_number"]) for i, j in listed.items()} == expected
    assert (next_job["network_id"], next_job["version_number"]) == (second["id"], 2)
    one = client.get(f"/v1/jobs/{next_job['id']}").json()
    assert (one["network_id"], one["version_number"]) == (second["id"], 2)
    # The row id of the version stays, and differs from the number once networks share a table.
    assert one["version_id"] == 3


# -- health ------------------------------------------------------------------------------------


def test_live_and_ready_on_a_migrated_database(client: TestClient) -> None:
    live = client.get("/healthz")
    assert (live.status_code, live.json()) == (200, {"status": "ok"})
    ready = client.get("/readyz")
    assert (ready.status_code, ready.json()) == (200, {"status": "ready"})


def test_not_ready_once_the_schema_is_behind(client: TestClient, engine: Engine) -> None:
    downgrade(engine, "-1")
    behind = assert_problem(client.get("/readyz"), 503, "not-ready")
    assert "migrate" in behind["detail"]
    downgrade(engine, "base")
    empty = client.get("/readyz")
    assert "empty" in assert_problem(empty, 503, "not-ready")["detail"]
    assert int(empty.headers["Retry-After"]) > 0
    # Liveness does not depend on the database.
    assert client.get("/healthz").status_code == 200


def test_readiness_carries_the_run_token_only_when_one_is_set(
    client: TestClient, engine: Engine
) -> None:
    # `stockrelay run` tells its own API from another server on the port by this header.
    assert RUN_HEADER not in client.get("/readyz").headers
    with open_client(engine, run_token="this-run") as tagged:
        assert tagged.get("/readyz").headers[RUN_HEADER] == "this-run"
        downgrade(engine, "-1")
        behind = tagged.get("/readyz")
        assert (behind.status_code, behind.headers[RUN_HEADER]) == (503, "this-run")


def test_app_refuses_to_start_on_an_unmigrated_database(database_url: str) -> None:
    app = create_app(Settings(database_url=database_url))
    with pytest.raises(DatabaseNotMigratedError, match="stockrelay migrate"), TestClient(app):
        pass


@sqlite_only
@pytest.mark.parametrize(("threads", "expected"), [({}, 1), ({"blas_threads": 3}, 3)])
def test_the_api_process_uses_the_configured_blas_threads(
    database_url: str,
    engine: Engine,
    threads: dict[str, Any],
    expected: int,
    blas_threads: Callable[[], set[int]],
) -> None:
    threadpool_limits(limits=2, user_api="blas")  # as a 2-core machine starts
    with TestClient(create_app(Settings(database_url=database_url, **threads))):
        assert blas_threads() == {expected}


# -- what every problem shares -----------------------------------------------------------------


@sqlite_only
def test_unknown_routes_and_methods_are_problems(client: TestClient) -> None:
    assert_problem(client.get("/v1/warehouses"), 404, "not-found")
    wrong_method = assert_problem(client.patch("/v1/networks"), 405, "method-not-allowed")
    assert wrong_method["detail"]
    # RFC 9110, section 15.5.6: a 405 response carries Allow. Starlette lists the methods of
    # the first route on the path only (POST here, not GET as well), so check a subset.
    allowed = {m.strip() for m in client.patch("/v1/networks").headers["Allow"].split(",")}
    assert allowed and allowed <= {"GET", "POST"}


@sqlite_only
def test_request_id_is_made_up_when_absent_and_bounded_when_sent(client: TestClient) -> None:
    bare = TestClient(client.app)  # no hook: sends no X-Request-ID
    response = bare.get("/v1/warehouses")
    generated = response.headers["X-Request-ID"]
    assert re.fullmatch(r"[0-9a-f]{32}", generated)
    assert response.json()["request_id"] == generated
    other = bare.get("/v1/warehouses").headers["X-Request-ID"]
    assert other != generated
    long_id = "x" * 500
    echoed = client.get("/healthz", headers={"X-Request-ID": long_id}).headers["X-Request-ID"]
    assert echoed == long_id[:100]
