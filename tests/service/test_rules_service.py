"""Dispatch costs, floors and handling limits through the service: recommendations, stored
policies, export, pictures, calibration's proposals, what-if overrides and simulations.

Outside references: the recommendations and exports are checked against the in-process solver,
which tests/solver/test_rules.py checks against quantecon's DiscreteDP; the rules themselves
are read from the specification here, not from the solver; the simulated cost of a floor is
checked against the exact long-run gains from the solver (Monte Carlo against an exact value).
"""

from __future__ import annotations

import itertools
from datetime import date, timedelta
from typing import Any

import numpy as np
import pytest
from fastapi.testclient import TestClient
from sqlalchemy import Engine

from service.analysis import run_simulation
from service.analysis_requests import SimulationRequest
from service.codec import decode_policy, encode_policy
from service.pictures import choose_plane, net_inflow_grid
from solver import NetworkSpec, PolicyResult, SizeLimits, solve_network
from tests.service.api_support import (
    assert_problem,
    create_network,
    demo_document,
    expected_transfers,
    pointers,
    run_worker,
    sqlite_only,
)


def ruled_document(**changes: Any) -> dict[str, Any]:
    """The demo network with cheap lanes (so the optimal policy feeds Hilltop from Riverside),
    a floor of 4 kits at Riverside, a van's fixed cost on the lane to Hilltop and an unpacking
    limit of 2 kits a night at Hilltop: a scenario of our own."""
    document = demo_document(**changes)
    riverside, hilltop = document["locations"]
    riverside["keep_at_least"] = 4
    hilltop["max_units_in"] = 2
    for lane in document["lanes"]:
        lane["unit_cost"] = 1.0
    document["lanes"][0]["dispatch_cost"] = 3.0
    return document


RULED = NetworkSpec.model_validate(ruled_document())


def assert_within_rules(spec: NetworkSpec, stock: tuple[int, ...], flows: tuple[int, ...]) -> None:
    """The flows obey the specification's floors and handling limits (single-phase network)."""
    ids = spec.location_ids
    sent, received = [0] * len(ids), [0] * len(ids)
    for units, lane in zip(flows, spec.lanes, strict=True):
        sent[ids.index(lane.from_)] += units
        received[ids.index(lane.to)] += units
    for i, loc in enumerate(spec.locations):
        after = stock[i] - sent[i] + received[i]
        assert 0 <= after <= loc.capacity
        if sent[i]:
            assert after >= loc.keep_at_least_on(0)
        for limit, units in (
            (loc.max_units_out_on(0), sent[i]),
            (loc.max_units_in_on(0), received[i]),
        ):
            if limit is not None:
                assert units <= limit


@pytest.fixture(scope="module")
def ruled_result() -> PolicyResult:
    return solve_network(RULED)


@sqlite_only
def test_recommendations_keep_the_rules_and_charge_the_dispatch(
    client: TestClient, engine: Engine, ruled_result: PolicyResult
) -> None:
    network = create_network(client, ruled_document())
    run_worker(engine)
    dispatched = 0
    for stock in itertools.product(range(15), range(10)):
        body = {"stock": dict(zip(RULED.location_ids, stock, strict=True))}
        response = client.post(f"/v1/networks/{network['id']}/recommendation", json=body)
        assert response.status_code == 200, response.text
        got = response.json()
        expected = ruled_result.recommend(stock)
        assert got["transfers"] == expected_transfers(ruled_result, expected)
        assert_within_rules(RULED, stock, expected.flows)
        # The rule of the specification: units x unit cost, plus the van once if it drives.
        units = expected.flows[0] + expected.flows[1]
        van = 3.0 if expected.flows[0] > 0 else 0.0
        assert got["transfer_cost"] == pytest.approx(1.0 * units + van, abs=1e-12)
        dispatched += expected.flows[0] > 0
    assert dispatched > 0  # the van's cost was charged somewhere


def test_stored_policies_keep_dispatch_costs_and_floors(ruled_result: PolicyResult) -> None:
    encoded = encode_policy(ruled_result)
    decoded = decode_policy(encoded.arrays, encoded.layout, encoded.checksum, encoded.meta)
    assert np.array_equal(decoded.dispatch_costs, ruled_result.dispatch_costs)
    assert np.array_equal(decoded.floors, ruled_result.floors)
    assert decoded.floors.tolist() == [[4, 0]] and decoded.dispatch_costs.tolist() == [3.0, 0.0]
    for stock in itertools.product(range(15), range(10)):
        assert decoded.recommend(stock, n_alternatives=20) == ruled_result.recommend(
            stock, n_alternatives=20
        )


@sqlite_only
def test_export_and_pictures_of_a_network_with_rules(
    client: TestClient, engine: Engine, ruled_result: PolicyResult
) -> None:
    network = create_network(client, ruled_document())
    run_worker(engine)
    exported = client.get(f"/v1/networks/{network['id']}/policy")
    assert exported.status_code == 200, exported.text
    rows = exported.json()["rows"]
    assert len(rows) == 15 * 10
    for row in rows:
        stock, flows = tuple(int(u) for u in row[:2]), tuple(int(u) for u in row[2:4])
        assert flows == ruled_result.recommend(stock).flows
        assert_within_rules(RULED, stock, flows)

    picture = client.get(f"/v1/networks/{network['id']}/policy.svg")
    assert picture.status_code == 200 and picture.content.startswith(b"<?xml")
    plane = choose_plane(ruled_result, None, None, {})
    grid = net_inflow_grid(ruled_result, plane)
    for (y_units, x_units), units in np.ndenumerate(grid):
        at = {plane.x_id: x_units, plane.y_id: y_units}
        flows = ruled_result.recommend([at[i] for i in RULED.location_ids]).flows
        into_y = sum(
            (u if lane.to == plane.y_id else -u if lane.from_ == plane.y_id else 0)
            for u, lane in zip(flows, RULED.lanes, strict=True)
        )
        assert units == into_y


@sqlite_only
def test_calibration_proposals_keep_the_rules(client: TestClient) -> None:
    network = create_network(client, ruled_document())
    rng = np.random.default_rng(11)
    start = date(2026, 5, 4)
    rows = [
        {
            "date": (start + timedelta(days=day)).isoformat(),
            "location": location,
            "units_sold": min(int(rng.poisson(mean)), 6),
            "stock_at_open": 6,
            "units_received": int(rng.poisson(2.0)),
        }
        for day in range(90)
        for location, mean in (("riverside", 3.0), ("hilltop", 1.2))
    ]
    stored = client.post(f"/v1/networks/{network['id']}/history", json={"rows": rows})
    assert stored.status_code == 200, stored.text
    proposal = client.get(f"/v1/networks/{network['id']}/calibration")
    assert proposal.status_code == 200, proposal.text
    spec = proposal.json()["spec"]
    assert spec["locations"][0]["keep_at_least"] == 4
    assert spec["locations"][1]["max_units_in"] == 2
    assert [lane.get("dispatch_cost", 0.0) for lane in spec["lanes"]] == [3.0, 0.0]


# -- what-if -----------------------------------------------------------------------------------


def what_if(client: TestClient, network_id: int, overrides: Any) -> Any:
    response = client.post(f"/v1/networks/{network_id}/what-if", json={"overrides": overrides})
    assert response.status_code == 200, response.text
    return response.json()


@sqlite_only
def test_what_if_sets_and_removes_the_rules(client: TestClient) -> None:
    network = create_network(client, ruled_document())
    # A higher floor removes moves and adds none, so no stock gains value (a maximum over
    # fewer actions; checked against quantecon in tests/solver/test_rules.py).
    stricter = what_if(client, network["id"], {"locations": {"riverside": {"keep_at_least": 7}}})
    assert stricter["changed_spec"]["locations"][0]["keep_at_least"] == 7
    assert stricter["change"]["mean_value"] <= 1e-6
    assert stricter["moves"]["states_changed"] > 0

    # Without the rules every move of the ruled network is still there, and more.
    freed = what_if(client, network["id"], {"remove_rules": True})
    riverside, hilltop = freed["changed_spec"]["locations"]
    assert "keep_at_least" not in riverside and "max_units_in" not in hilltop
    assert freed["changed_spec"]["lanes"][0]["dispatch_cost"] == 3.0  # costs are not rules
    assert freed["change"]["mean_value"] >= -1e-6

    lifted = what_if(
        client,
        network["id"],
        {
            "locations": {"hilltop": {"max_units_in": None, "max_units_out": 1}},
            "lanes": [{"from": "hilltop", "to": "riverside", "dispatch_cost": 2.5}],
        },
    )
    hilltop = lifted["changed_spec"]["locations"][1]
    assert "max_units_in" not in hilltop and hilltop["max_units_out"] == 1
    assert lifted["changed_spec"]["lanes"][1]["dispatch_cost"] == 2.5

    days = ("mon", "tue", "wed", "thu", "fri", "sat", "sun")
    weekly = {"weekly": dict(zip(days, range(7), strict=True))}
    periodic = what_if(
        client, network["id"], {"locations": {"riverside": {"keep_at_least": weekly}}}
    )
    assert periodic["changed_spec"]["locations"][0]["keep_at_least"] == weekly


@sqlite_only
@pytest.mark.parametrize(
    ("overrides", "expected", "named"),
    [
        (
            {"locations": {"hilltop": {"keep_at_least": 12}}},
            ["/overrides/locations/hilltop/keep_at_least"],
            "exceeds the capacity (9)",
        ),
        (
            {"locations": {"hilltop": {"max_units_out": -1}}},
            ["/overrides/locations/hilltop/max_units_out"],
            "greater than or equal to 0",
        ),
        (
            {"lanes": [{"from": "riverside", "to": "hilltop", "dispatch_cost": -2}]},
            ["/overrides/lanes/0/dispatch_cost"],
            "greater than or equal to 0",
        ),
    ],
)
def test_invalid_rule_overrides_are_422_with_pointers(
    client: TestClient, overrides: dict[str, Any], expected: list[str], named: str
) -> None:
    network = create_network(client)
    response = client.post(f"/v1/networks/{network['id']}/what-if", json={"overrides": overrides})
    problem = assert_problem(response, 422)
    assert pointers(problem) == expected
    assert named in problem["detail"] or named in str(problem)


# -- simulations -------------------------------------------------------------------------------


@sqlite_only
def test_simulation_reports_what_the_floor_costs_and_protects(
    client: TestClient, engine: Engine
) -> None:
    network = create_network(client, ruled_document(criteria=["average"]))
    run_worker(engine)
    body = {"criterion": "average", "days": 3000, "replications": 40, "warmup_days": 300}
    response = client.post(f"/v1/networks/{network['id']}/simulations", json={**body, "seed": 3})
    assert response.status_code == 202, response.text
    run_worker(engine)
    job = client.get(f"/v1/networks/{network['id']}/simulations/{response.json()['id']}").json()
    assert job["state"] == "done", job
    report = job["report"]
    names = [policy["name"] for policy in report["policies"]]
    assert names == ["optimal", "do_nothing", "balance_cover", "optimal_without_rules"]

    rules = report["rules"]
    cost = rules["profit_per_day_cost"]
    # Reference: the exact long-run profits per day of the two optimal policies (average
    # criterion, solved here), against the Monte Carlo paired difference and its interval.
    with_rules = solve_network(RULED, criterion="average").gain
    without = solve_network(RULED.without_rules(), criterion="average").gain
    assert with_rules is not None and without is not None
    assert without - with_rules > 0.1  # the floor binds in this scenario
    assert cost["low"] <= without - with_rules <= cost["high"]
    # The floor protects Riverside's fill rate and takes from Hilltop's.
    riverside, hilltop = rules["by_location"]["riverside"], rules["by_location"]["hilltop"]
    assert riverside["fill_rate_with_rules"]["low"] > riverside["fill_rate_without_rules"]["high"]
    assert hilltop["fill_rate_with_rules"]["high"] < hilltop["fill_rate_without_rules"]["low"]
    assert (
        riverside["stockout_days_with_rules"]["high"]
        < riverside["stockout_days_without_rules"]["low"]
    )

    # Asked not to compare, or with no rules at all: no comparison.
    plain = client.post(
        f"/v1/networks/{network['id']}/simulations",
        json={**body, "days": 30, "compare_without_rules": False},
    )
    run_worker(engine)
    plain_job = client.get(f"/v1/networks/{network['id']}/simulations/{plain.json()['id']}")
    assert plain_job.json()["report"]["rules"] is None
    assert "optimal_without_rules" not in [
        p["name"] for p in plain_job.json()["report"]["policies"]
    ]


def test_a_simulation_leaves_out_the_unruled_policy_when_the_rules_kept_it_small() -> None:
    document = ruled_document()
    for location in document["locations"]:
        location["max_units_out"] = 0  # no moves at all: one transfer option per stock
    spec = NetworkSpec.model_validate(document)
    limits = SizeLimits(max_pairs=15 * 10)
    request = SimulationRequest(criterion="discounted", days=20, replications=5, seed=1)
    report = run_simulation(spec, request, limits=limits)
    assert [p["name"] for p in report["policies"]] == ["optimal", "do_nothing", "balance_cover"]
    assert report["rules"] is None
    assert any("optimal_without_rules left out" in note for note in report["notes"])
