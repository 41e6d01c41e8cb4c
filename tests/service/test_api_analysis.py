"""Simulations and what-if comparisons over HTTP: jobs through the worker, reports checked
against the solver, seeds that repeat, the solve queue left as it was, and every refusal."""

from __future__ import annotations

from typing import Any

import numpy as np
import pytest
from fastapi.testclient import TestClient
from sqlalchemy import Engine

from solver import NetworkSpec, solve_network
from tests.service.api_support import (
    assert_problem,
    create_network,
    demo_document,
    make_key,
    open_client,
    pointers,
    run_worker,
    sqlite_only,
)

BASELINES = ("do_nothing", "balance_cover")


def demo_spec(**changes: Any) -> NetworkSpec:
    return NetworkSpec.model_validate(demo_document(**changes))


def simulate(client: TestClient, network_id: int, **body: Any) -> Any:
    response = client.post(f"/v1/networks/{network_id}/simulations", json=body)
    assert response.status_code == 202, response.text
    job = response.json()
    assert response.headers["Location"] == f"/v1/networks/{network_id}/simulations/{job['id']}"
    return job


def report_of(client: TestClient, network_id: int, job_id: int) -> Any:
    response = client.get(f"/v1/networks/{network_id}/simulations/{job_id}")
    assert response.status_code == 200, response.text
    job = response.json()
    assert job["state"] == "done", job
    return job["report"]


def by_name(report: Any) -> dict[str, Any]:
    return {policy["name"]: policy for policy in report["policies"]}


def what_if(client: TestClient, network_id: int, overrides: Any, **body: Any) -> Any:
    response = client.post(
        f"/v1/networks/{network_id}/what-if", json={"overrides": overrides, **body}
    )
    assert response.status_code == 200, response.text
    return response.json()


# -- simulations -------------------------------------------------------------------------------


def test_simulation_reports_the_solver_gain_within_its_interval(
    client: TestClient, engine: Engine
) -> None:
    network = create_network(client, demo_document(criteria=["average"]))
    assert run_worker(engine) == 1  # the average solve, stored before the simulation runs

    job = simulate(client, network["id"], criterion="average", seed=20261201)
    assert (job["state"], job["report"], job["version"]) == ("queued", None, 1)
    assert job["request"]["seed"] == 20261201
    assert run_worker(engine) == 1
    report = report_of(client, network["id"], job["id"])

    assert report["optimal_source"] == "stored"
    assert (report["days"], report["replications"], report["warmup_days"]) == (365, 200, 30)
    assert report["start_stock"] == {"riverside": 7, "hilltop": 4}
    policies = by_name(report)
    assert list(policies) == ["optimal", *BASELINES]
    # Independent of the report: the long-run profit per day of the optimal policy, solved here.
    gain = solve_network(demo_spec(), criterion="average").gain
    assert gain is not None
    optimal = policies["optimal"]["profit_per_day"]
    assert optimal["low"] <= gain <= optimal["high"]
    assert policies["optimal"]["difference_to_optimal"] is None
    for name in BASELINES:
        difference = policies[name]["difference_to_optimal"]
        # No rule beats the optimal policy beyond the interval of the paired difference.
        assert difference["low"] <= 0.0, (name, difference)
        assert 0.0 <= policies[name]["fill_rate"]["mean"] <= 1.0
    assert policies["do_nothing"]["units_moved_per_night"] == {"mean": 0.0, "low": 0.0, "high": 0.0}
    assert policies["balance_cover"]["units_moved_per_night"]["mean"] > 0.0


@sqlite_only
def test_a_seed_repeats_its_report_and_an_absent_one_is_chosen_and_echoed(
    client: TestClient, engine: Engine
) -> None:
    network = create_network(client)
    body = {"criterion": "discounted", "days": 120, "replications": 40, "warmup_days": 5}
    chosen = simulate(client, network["id"], **body)
    seed = chosen["request"]["seed"]
    assert isinstance(seed, int)
    again = simulate(client, network["id"], **body, seed=seed)
    other = simulate(client, network["id"], **body, seed=seed + 1)
    # The discounted solve queued with the network first, then the three simulations.
    assert run_worker(engine) == 4

    reports = [report_of(client, network["id"], job["id"]) for job in (chosen, again, other)]
    assert reports[0] == reports[1]
    assert reports[0]["seed"] == seed
    assert by_name(reports[2])["optimal"] != by_name(reports[0])["optimal"]


@sqlite_only
def test_start_stock_and_a_missing_stored_policy(client: TestClient, engine: Engine) -> None:
    network = create_network(client)  # discounted only: the average policy is solved by the job
    job = simulate(
        client,
        network["id"],
        days=30,
        replications=10,
        warmup_days=0,
        seed=5,
        start_stock={"riverside": 14, "hilltop": 0},
    )
    assert run_worker(engine) == 2
    report = report_of(client, network["id"], job["id"])
    assert report["optimal_source"] == "solved"
    assert report["start_stock"] == {"riverside": 14, "hilltop": 0}
    assert report["criterion"] == "average"


def test_simulations_leave_solve_state_and_deduplication_alone(
    client: TestClient, engine: Engine
) -> None:
    network = create_network(client)
    [solve_job] = network["jobs"]
    first = simulate(client, network["id"], criterion="discounted", seed=1, days=10)
    second = simulate(client, network["id"], criterion="discounted", seed=1, days=10)
    simulate(client, network["id"], criterion="average", seed=1, days=10)
    assert len({solve_job["id"], first["id"], second["id"]}) == 3  # two live simulations

    state = client.get(f"/v1/networks/{network['id']}").json()
    assert state["solves"] == [
        {
            "criterion": "discounted",
            "state": "queued",
            "job_id": solve_job["id"],
            "solved_at": None,
            "error": None,
        },
        {
            "criterion": "average",
            "state": "not_requested",
            "job_id": None,
            "solved_at": None,
            "error": None,
        },
    ]
    # The same specification again: the live solve serves it, whatever simulations are queued.
    update = client.put(
        f"/v1/networks/{network['id']}", json=demo_document(), headers={"If-Match": '"1"'}
    )
    assert update.status_code == 200, update.text
    assert update.json()["jobs"] == []
    assert [job["id"] for job in client.get("/v1/jobs").json()] == [solve_job["id"]]
    hint = assert_problem(client.get(f"/v1/jobs/{first['id']}"), 404, "not-found")
    assert f"/v1/networks/{network['id']}/simulations/{first['id']}" in hint["detail"]

    assert run_worker(engine) == 4
    solves = client.get(f"/v1/networks/{network['id']}").json()["solves"]
    assert [(s["criterion"], s["state"]) for s in solves] == [
        ("discounted", "ready"),
        ("average", "not_requested"),
    ]


def test_simulations_of_other_networks_and_tenants_are_not_found(
    client: TestClient, engine: Engine
) -> None:
    network = create_network(client)
    other_network = create_network(client, demo_document(name="Second pair of stores"))
    job = simulate(client, network["id"], seed=1)

    assert_problem(client.get(f"/v1/networks/{other_network['id']}/simulations/{job['id']}"), 404)
    assert_problem(client.get(f"/v1/networks/{network['id']}/what-if/{job['id']}"), 404)
    assert_problem(client.get(f"/v1/networks/{network['id']}/simulations/999999"), 404)
    assert_problem(client.post("/v1/networks/999999/simulations", json={}), 404)
    stranger = {"Authorization": f"Bearer {make_key(engine, tenant='another chain')}"}
    response = client.get(f"/v1/networks/{network['id']}/simulations/{job['id']}", headers=stranger)
    assert_problem(response, 404)
    reader = {"Authorization": f"Bearer {make_key(engine, scope='read')}"}
    response = client.get(f"/v1/networks/{network['id']}/simulations/{job['id']}", headers=reader)
    assert response.status_code == 200


@sqlite_only
def test_read_keys_may_run_simulations_and_what_if_within_the_tenants_cap(engine: Engine) -> None:
    with open_client(engine, analysis_max_live_jobs=1) as client:
        network = create_network(client)
        path = f"/v1/networks/{network['id']}"
        reader = {"Authorization": f"Bearer {make_key(engine, scope='read')}"}
        started = client.post(f"{path}/simulations", json={"days": 5}, headers=reader)
        assert started.status_code == 202, started.text
        # A small what-if is answered at once and counts against no cap.
        overrides = {"overrides": {"locations": {"hilltop": {"capacity": 8}}}}
        answered = client.post(f"{path}/what-if", json=overrides, headers=reader)
        assert answered.status_code == 200, answered.text
        # One job queued: the tenant's cap of one is reached, for write keys too.
        refused = client.post(f"{path}/simulations", json={"days": 5})
        body = assert_problem(refused, 429, "rate-limited")
        assert "at most 1" in body["detail"] and int(refused.headers["Retry-After"]) > 0
        run_worker(engine)
        again = client.post(f"{path}/simulations", json={"days": 5}, headers=reader)
        assert again.status_code == 202
        # Reading keys still change nothing stored: no network write.
        assert_problem(client.delete(path, headers=reader), 403, "forbidden")


@sqlite_only
@pytest.mark.parametrize(
    ("body", "expected"),
    [
        ({"days": 0}, ["/days"]),
        ({"replications": 2001, "warmup_days": -1}, ["/replications", "/warmup_days"]),
        ({"seed": -1}, ["/seed"]),
        ({"horizon": 10}, ["/horizon"]),
        ({"criterion": "median"}, ["/criterion"]),
        (
            {"start_stock": {"riverside": 15, "uptown": 1}},
            ["/start_stock/hilltop", "/start_stock/riverside", "/start_stock/uptown"],
        ),
        ({"days": 3650, "replications": 1000}, ["/replications"]),
    ],
)
def test_invalid_simulations_are_422_with_pointers(
    client: TestClient, body: dict[str, Any], expected: list[str]
) -> None:
    network = create_network(client)
    response = client.post(f"/v1/networks/{network['id']}/simulations", json=body)
    problem = assert_problem(response, 422, "invalid-input")
    assert sorted(pointers(problem)) == expected


@sqlite_only
def test_the_simulation_limit_is_named_and_configurable(engine: Engine) -> None:
    with open_client(engine, simulation_max_replication_days=1000) as client:
        network = create_network(client)
        body = {"days": 90, "warmup_days": 10, "replications": 11}
        response = client.post(f"/v1/networks/{network['id']}/simulations", json=body)
        problem = assert_problem(response, 422, "invalid-input")
        assert "1,100 simulated days, over the limit of 1,000" in problem["detail"]
        body["replications"] = 10
        assert (
            client.post(f"/v1/networks/{network['id']}/simulations", json=body).status_code == 202
        )


# -- what-if comparisons -----------------------------------------------------------------------


def one_lane_document() -> dict[str, Any]:
    """The demo network with only the lane from riverside to hilltop."""
    document = demo_document()
    document["lanes"] = document["lanes"][:1]
    return document


@sqlite_only
@pytest.mark.parametrize("criterion", ["discounted", "average"])
def test_adding_a_lane_never_lowers_the_optimal_value(client: TestClient, criterion: str) -> None:
    network = create_network(client, one_lane_document())
    new_lane = {"from": "hilltop", "to": "riverside", "unit_cost": 4.25, "max_units": 3}
    result = what_if(client, network["id"], {"new_lanes": [new_lane]}, criterion=criterion)

    # A fact of the model: the new lane only adds moves (moving nothing along it stays
    # possible), so every policy of the base network is still available and the optimum
    # cannot fall. Tolerance: the solver's error bounds are far below 1e-6 of these values.
    spec = NetworkSpec.model_validate(one_lane_document())
    changed = NetworkSpec.model_validate(result["changed_spec"])
    assert [(lane.from_, lane.to) for lane in changed.lanes] == [
        ("riverside", "hilltop"),
        ("hilltop", "riverside"),
    ]
    base_result = solve_network(spec, criterion=criterion)  # type: ignore[arg-type]
    changed_result = solve_network(changed, criterion=criterion)  # type: ignore[arg-type]
    if criterion == "discounted":
        assert result["change"]["mean_value"] >= -1e-6
        assert result["change"]["value_at_reference"] >= -1e-6
        assert np.all(changed_result.values >= base_result.values - 1e-6)
        np.testing.assert_allclose(
            result["changed"]["mean_value"], changed_result.values.mean(), rtol=1e-12
        )
    else:
        assert result["change"]["profit_per_day"] >= -1e-9
        assert result["changed"]["profit_per_day"] == pytest.approx(changed_result.gain, rel=1e-12)
    assert result["moves"]["comparable"] is True
    assert result["moves"]["states_changed"] > 0  # hilltop now sends stock back at times


@sqlite_only
def test_raising_a_capacity_without_holding_cost_never_lowers_the_value(
    client: TestClient,
) -> None:
    document = demo_document()
    for location in document["locations"]:
        location["holding_cost"] = 0.0
    network = create_network(client, document)
    result = what_if(client, network["id"], {"locations": {"hilltop": {"capacity": 12}}})

    # Why this holds: with the same moves, the larger stockroom's stock is never below the
    # smaller one's (at most 3 units above, the refused deliveries it accepts), so it sells at
    # least as much and loses no more sales; without holding cost, no day earns less, and the
    # optimum with the larger stockroom is at least the value of copying the smaller one's moves.
    # (With a holding cost, deliveries it cannot refuse may cost more than they earn.)
    assert result["base"]["reference_stock"] == result["changed"]["reference_stock"]
    assert result["base"]["reference_stock"] == {"riverside": 7, "hilltop": 4}
    assert result["change"]["value_at_reference"] >= -1e-6
    assert result["moves"] == {
        "comparable": False,
        "states_changed": None,
        "base_states": 150,
        "changed_states": 15 * 13,
        "detail": "the capacities differ, so the stocks do not correspond: 150 stock states "
        "before, 195 after",
    }


@sqlite_only
def test_a_larger_stockroom_can_lower_the_value_when_holding_costs_more(
    client: TestClient,
) -> None:
    # Our own scenario: hilltop pays 20 a day per kit on hand and receives 3 a day on average;
    # with room for 12, it must accept deliveries that cost more to hold than they earn.
    document = demo_document()
    document["locations"][1]["holding_cost"] = 20.0
    document["locations"][1]["replenishment"] = {"dist": "poisson", "mean": 3.0}
    network = create_network(client, document)
    overrides = {"locations": {"hilltop": {"capacity": 12}}}
    result = what_if(client, network["id"], overrides, criterion="average")
    assert result["change"]["profit_per_day"] < 0


@sqlite_only
def test_a_prohibitive_lane_cost_changes_the_moves_the_solver_says(client: TestClient) -> None:
    network = create_network(client)
    overrides = {"lanes": [{"from": "riverside", "to": "hilltop", "unit_cost": 1000.0}]}
    result = what_if(client, network["id"], overrides)

    document = demo_document()
    document["lanes"][0]["unit_cost"] = 1000.0
    base = solve_network(demo_spec())
    changed = solve_network(NetworkSpec.model_validate(document))
    differing = int(np.any(base.policy_flows() != changed.policy_flows(), axis=-1).sum())
    assert differing > 0
    assert result["moves"]["states_changed"] == differing
    assert result["moves"]["comparable"] is True
    assert result["changed"]["value_at_reference"] == pytest.approx(
        float(changed.values[0, changed.state_index([7, 4])]), rel=1e-12
    )
    # Dearer moves cannot raise any policy's value, so neither the optimum's.
    assert result["change"]["value_at_reference"] <= 1e-6
    assert result["network_id"] == network["id"] and result["version"] == 1


@sqlite_only
def test_overrides_keep_each_law_family_and_the_nightly_limit_rules(client: TestClient) -> None:
    network = create_network(client, demo_document(max_units_per_night=5))
    url = f"/v1/networks/{network['id']}/what-if"

    overrides = {
        "locations": {
            "riverside": {"demand_mean": 5.2, "unit_margin": 40.0},
            "hilltop": {"demand_mean": 2.0, "stockout_penalty": 1.0},
        },
        "lanes": [{"from": "hilltop", "to": "riverside", "max_units": 1}],
    }
    changed = what_if(client, network["id"], overrides)["changed_spec"]
    riverside, hilltop = changed["locations"]
    # Negative binomial: the variance-to-mean ratio of the demo (4.1 / 2.6) is kept.
    assert riverside["demand"] == {
        "dist": "negative_binomial",
        "mean": 5.2,
        "variance": pytest.approx(5.2 * 4.1 / 2.6, rel=1e-12),
    }
    assert riverside["unit_margin"] == 40.0
    assert hilltop["demand"] == {"dist": "poisson", "mean": 2.0}
    assert hilltop["stockout_penalty"] == 1.0
    assert changed["lanes"][1]["max_units"] == 1
    assert changed["max_units_per_night"] == 5  # absent: kept

    lifted = client.post(url, json={"overrides": {"max_units_per_night": None}}).json()
    assert lifted["changed_spec"]["max_units_per_night"] is None
    lowered = client.post(url, json={"overrides": {"max_units_per_night": 2}}).json()
    assert lowered["changed_spec"]["max_units_per_night"] == 2


@sqlite_only
@pytest.mark.parametrize(
    ("overrides", "expected", "named"),
    [
        (
            {"locations": {"uptown": {"capacity": 3}}},
            ["/overrides/locations/uptown"],
            "unknown location 'uptown'",
        ),
        (
            {"lanes": [{"from": "riverside", "to": "uptown", "unit_cost": 1.0}]},
            ["/overrides/lanes/0"],
            "no lane 'riverside' -> 'uptown'",
        ),
        (
            {"remove_lanes": [{"from": "uptown", "to": "hilltop"}]},
            ["/overrides/remove_lanes/0"],
            "no lane 'uptown' -> 'hilltop'",
        ),
        (
            {"locations": {"hilltop": {"demand_mean": 3.0}, "riverside": {"demand_mean": 0.0}}},
            ["/overrides/locations/riverside/demand_mean"],
            "negative binomial",
        ),
        (
            {"new_lanes": [{"from": "hilltop", "to": "uptown", "unit_cost": 1, "max_units": 2}]},
            ["/overrides/new_lanes/0/to"],
            "unknown location 'uptown'",
        ),
        (
            {"new_lanes": [{"from": "hilltop", "to": "riverside", "unit_cost": 1, "max_units": 2}]},
            ["/overrides/new_lanes/0"],
            "duplicate lane",
        ),
        (
            {
                "remove_lanes": [
                    {"from": "riverside", "to": "hilltop"},
                    {"from": "hilltop", "to": "riverside"},
                ]
            },
            ["/overrides/remove_lanes"],
            "at least 1",
        ),
        (
            {"locations": {"hilltop": {"capacity": 0}}},
            ["/overrides/locations/hilltop/capacity"],
            "greater than or equal to 1",
        ),
        (
            {"locations": {"hilltop": {"colour": "red"}}},
            ["/overrides/locations/hilltop/colour"],
            "Extra inputs",
        ),
        ({"max_units_per_night": 0}, ["/overrides/max_units_per_night"], "greater than"),
        # Amounts so large that the expected profit overflows: refused, never a 500.
        (
            {"locations": {"hilltop": {"holding_cost": 1e308}}},
            ["/overrides"],
            "the changed network cannot be solved",
        ),
        (
            {"lanes": [{"from": "riverside", "to": "hilltop", "unit_cost": 1e308}]},
            ["/overrides"],
            "too large to compute with",
        ),
    ],
)
def test_invalid_overrides_are_422_naming_what_is_wrong(
    client: TestClient, overrides: dict[str, Any], expected: list[str], named: str
) -> None:
    network = create_network(client)
    response = client.post(f"/v1/networks/{network['id']}/what-if", json={"overrides": overrides})
    problem = assert_problem(response, 422, "invalid-input")
    assert pointers(problem) == expected
    assert named in problem["detail"]


@sqlite_only
def test_an_explicit_demand_distribution_cannot_be_rescaled(client: TestClient) -> None:
    document = demo_document()
    document["locations"][1]["demand"] = {"dist": "pmf", "p": [0.2, 0.5, 0.3]}
    network = create_network(client, document)
    overrides = {"locations": {"hilltop": {"demand_mean": 2.0}}}
    response = client.post(f"/v1/networks/{network['id']}/what-if", json={"overrides": overrides})
    problem = assert_problem(response, 422, "invalid-input")
    assert pointers(problem) == ["/overrides/locations/hilltop/demand_mean"]
    assert "explicit distribution" in problem["detail"]


@sqlite_only
def test_a_changed_network_over_the_size_limit_is_422_with_its_sizes(engine: Engine) -> None:
    with open_client(engine, max_states=200) as client:
        network = create_network(client, demo_document(mode="exact"))
        overrides = {"locations": {"hilltop": {"capacity": 20}}}
        response = client.post(
            f"/v1/networks/{network['id']}/what-if", json={"overrides": overrides}
        )
        problem = assert_problem(response, 422, "network-too-large")
        assert problem["states"] == 15 * 21


def test_large_what_if_comparisons_are_queued_and_done_by_the_worker(
    client: TestClient, engine: Engine
) -> None:
    network = create_network(client)
    overrides = {"lanes": [{"from": "riverside", "to": "hilltop", "unit_cost": 1000.0}]}
    at_once = what_if(client, network["id"], overrides)

    with open_client(engine, what_if_sync_max_states=100) as queueing:
        response = queueing.post(
            f"/v1/networks/{network['id']}/what-if", json={"overrides": overrides}
        )
        assert response.status_code == 202, response.text
        job = response.json()
        location = f"/v1/networks/{network['id']}/what-if/{job['id']}"
        assert response.headers["Location"] == location
        assert (job["state"], job["result"], job["criterion"]) == ("queued", None, "discounted")

        assert run_worker(engine) == 2  # the network's solve and the comparison
        done = queueing.get(location).json()
    assert done["state"] == "done" and done["error"] is None
    assert done["seconds"] > 0
    result = done["result"]
    assert (result["moves"], result["changed_spec"]) == (at_once["moves"], at_once["changed_spec"])
    for side in ("base", "changed", "change"):
        for key, value in at_once[side].items():
            # Solved in two processes' worth of BLAS settings: equal to rounding.
            close = isinstance(value, float) and value
            assert result[side][key] == (pytest.approx(value, rel=1e-9) if close else value)
