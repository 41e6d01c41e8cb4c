"""The HTTP API as deployed: `stockrelay serve` (uvicorn) and a `stockrelay worker` as real
processes on loopback, on SQLite and on PostgreSQL. A network created over HTTP is solved by the
worker, and the API's recommendations equal the in-process solver's."""

from __future__ import annotations

import subprocess
import sys
from typing import Any, cast

import httpx2
import numpy as np
import pytest

from solver import Criterion, NetworkSpec, PolicyResult, solve_network
from tests.e2e.live import (
    ROOT,
    START_DEADLINE,
    Live,
    api_key,
    demo_document,
    environment,
    free_port,
    migrate,
    wait_until_solved,
)

CRITERIA = ["discounted", "average"]
N_STOCK_LEVELS = 40


def expected_body(spec: NetworkSpec, result: PolicyResult, stock: list[int]) -> dict[str, Any]:
    """What the API must say for `stock`, from the in-process solver."""
    recommendation = result.recommend(stock)
    ids = spec.location_ids
    return {
        "stock": dict(zip(ids, stock, strict=True)),
        "transfers": [
            {
                "from": lane.from_,
                "to": lane.to,
                "units": units,
                "unit_cost": lane.unit_cost,
                "dispatch_cost": lane.dispatch_cost,
            }
            for lane, units in zip(spec.lanes, recommendation.flows, strict=True)
            if units > 0
        ],
        "stock_after_transfers": dict(zip(ids, recommendation.post_move_stock, strict=True)),
        "transfer_cost": recommendation.transfer_cost,
        "expected_value": recommendation.expected_value,
        "value_without_transfers": recommendation.value_without_transfers,
        "gain_from_transfers": recommendation.gain_from_transfers,
        "profit_per_day": result.gain,
    }


def stock_levels(spec: NetworkSpec) -> list[list[int]]:
    """Both corners, then random closing stocks (seeded), N_STOCK_LEVELS in all."""
    capacities = [location.capacity for location in spec.locations]
    rng = np.random.default_rng(20261202)
    levels = [[0] * len(capacities), capacities]
    while len(levels) < N_STOCK_LEVELS:
        levels.append([int(rng.integers(0, c + 1)) for c in capacities])
    return levels


def test_recommendations_over_http_equal_the_in_process_solver(
    database_url: str, live: Live
) -> None:
    migrate(database_url)
    base = live.api(database_url)
    live.worker(database_url)
    document = demo_document()
    spec = NetworkSpec.model_validate(document)

    key = api_key(database_url)
    auth = {"authorization": f"Bearer {key}"}
    with httpx2.Client(base_url=base, timeout=10, headers=auth) as client:
        created = client.post("/v1/networks", json={**document, "criteria": CRITERIA})
        assert created.status_code == 201, created.text
        network_id = created.json()["id"]
        assert created.headers["location"] == f"/v1/networks/{network_id}"
        wait_until_solved(live, client, network_id, CRITERIA)

        for criterion in CRITERIA:
            result = solve_network(spec, criterion=cast(Criterion, criterion))
            # Average-criterion relative values pass through 0: compare against the scale.
            scale = float(np.abs(result.values).max())
            for stock in stock_levels(spec):
                response = client.post(
                    f"/v1/networks/{network_id}/recommendation",
                    json={"stock": dict(zip(spec.location_ids, stock, strict=True)),
                          "criterion": criterion},
                )  # fmt: skip
                assert response.status_code == 200, response.text
                body = response.json()
                expected = expected_body(spec, result, stock)
                assert (body["network_id"], body["criterion"], body["version"]) == (
                    network_id,
                    criterion,
                    1,
                )
                assert body["stale"] is False
                for key in ("stock", "transfers", "stock_after_transfers"):
                    assert body[key] == expected[key], (criterion, stock, key)
                for key in (
                    "transfer_cost",
                    "expected_value",
                    "value_without_transfers",
                    "gain_from_transfers",
                ):
                    np.testing.assert_allclose(
                        body[key], expected[key], rtol=1e-9, atol=1e-9 * scale,
                        err_msg=f"{criterion} {stock} {key}",
                    )  # fmt: skip
                if criterion == "average":
                    assert result.gain is not None
                    np.testing.assert_allclose(body["profit_per_day"], result.gain, rtol=1e-9)
                else:
                    assert body["profit_per_day"] is None


def test_the_server_refuses_an_unmigrated_database_in_one_line(database_url: str) -> None:
    port = free_port()
    completed = subprocess.run(
        [sys.executable, "-m", "service.cli", "serve", "--host", "127.0.0.1", "--port", str(port)],
        cwd=ROOT,
        env=environment(database_url),
        stdin=subprocess.DEVNULL,
        capture_output=True,
        text=True,
        timeout=START_DEADLINE,
    )
    lines = completed.stderr.splitlines()
    assert completed.returncode == 2, completed.stderr
    assert len(lines) == 1, completed.stderr
    assert "stockrelay migrate" in lines[0]
    assert "Uvicorn running" not in completed.stdout + completed.stderr
    with pytest.raises(httpx2.TransportError):
        httpx2.get(f"http://127.0.0.1:{port}/healthz", timeout=2)
