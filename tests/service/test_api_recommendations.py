"""HTTP tests of recommendations, one at a time and in batches: not ready before the solve, equal
to the in-process solver after it, stale while a newer version waits, and a problem (never a
500) for every kind of bad input."""

from __future__ import annotations

import itertools
import logging
from datetime import date, datetime, timedelta
from typing import Any
from zoneinfo import ZoneInfo

import numpy as np
import pytest
from fastapi.testclient import TestClient
from numpy.testing import assert_allclose
from sqlalchemy import Engine

import service.serving
from service.api import recommendations as recommendations_module
from service.moves import relays_of, transfers_of
from solver import NetworkSpec, PolicyResult, solve_network
from solver.priced import solve_priced
from solver.priced_result import PricedOptions
from solver.spec import WEEKDAYS as WEEK
from tests.service.api_support import (
    assert_problem,
    create_network,
    demo_document,
    expected_transfers,
    open_client,
    pointers,
    run_worker,
    sqlite_only,
    stock_of,
    weekly_document,
)

DEMO_SPEC = NetworkSpec.model_validate(demo_document())
# Worker and test solve the same model; only the order of floating-point sums may differ.
RTOL, ATOL = 1e-9, 1e-7


def solved_demo(client: TestClient, engine: Engine) -> int:
    """A demo network with both criteria solved; its id."""
    network_id: int = create_network(client, demo_document(criteria=["discounted", "average"]))[
        "id"
    ]
    assert run_worker(engine) == 2
    return network_id


def assert_matches_solver(
    body: dict[str, Any], spec: NetworkSpec, result: PolicyResult, vector: list[int]
) -> None:
    """The API's answer is the solver's recommendation from the same stock."""
    expected = result.recommend(vector)
    assert body["criterion"] == result.criterion
    assert body["stock"] == stock_of(spec, vector)
    assert body["transfers"] == expected_transfers(result, expected)
    assert body["stock_after_transfers"] == stock_of(spec, list(expected.post_move_stock))
    assert_allclose(
        [
            body["transfer_cost"],
            body["expected_value"],
            body["value_without_transfers"],
            body["gain_from_transfers"],
        ],
        [
            expected.transfer_cost,
            expected.expected_value,
            expected.value_without_transfers,
            expected.gain_from_transfers,
        ],
        rtol=RTOL,
        atol=ATOL,
    )
    if body["transfers"]:
        assert body["gain_from_transfers"] > 0
    else:
        assert body["gain_from_transfers"] == 0
        assert body["stock_after_transfers"] == body["stock"]
    if result.criterion == "average":
        assert result.gain is not None
        assert_allclose(body["profit_per_day"], result.gain, rtol=RTOL)
    else:
        assert body["profit_per_day"] is None


def recommend(client: TestClient, network_id: int, stock: Any, criterion: str | None = None) -> Any:
    body: dict[str, Any] = {"stock": stock}
    if criterion is not None:
        body["criterion"] = criterion
    return client.post(f"/v1/networks/{network_id}/recommendation", json=body)


# -- single recommendations --------------------------------------------------------------------


def test_not_ready_before_the_solve(client: TestClient) -> None:
    network_id = create_network(client)["id"]
    stock = {"riverside": 13, "hilltop": 1}
    queued = recommend(client, network_id, stock)
    problem = assert_problem(queued, 503, "policy-not-ready")
    assert problem["job_state"] == "queued"
    # RFC 9110, section 10.2.3: Retry-After as delay-seconds.
    assert int(queued.headers["Retry-After"]) > 0
    # No job will ever solve the average policy: a conflict naming the criteria in use, and no
    # Retry-After (waiting would not help).
    response = recommend(client, network_id, stock, "average")
    unrequested = assert_problem(response, 409, "policy-not-solved")
    assert "Retry-After" not in response.headers
    assert unrequested["job_state"] is None
    assert unrequested["criteria"] == ["discounted"]
    assert "average" in unrequested["detail"]


@sqlite_only
def test_answers_equal_the_in_process_solver_at_random_stocks(
    client: TestClient, engine: Engine
) -> None:
    network_id = solved_demo(client, engine)
    rng = np.random.default_rng(20261202)
    capacities = [location.capacity for location in DEMO_SPEC.locations]
    stocks = [[int(rng.integers(0, c + 1)) for c in capacities] for _ in range(50)]
    # The corners too: empty and full everywhere.
    stocks += [[0 for _ in capacities], list(capacities)]
    for criterion in ("discounted", "average"):
        result = solve_network(DEMO_SPEC, criterion=criterion)
        moved = 0
        for vector in stocks:
            response = recommend(client, network_id, stock_of(DEMO_SPEC, vector), criterion)
            assert response.status_code == 200, response.text
            body = response.json()
            assert (body["network_id"], body["version"], body["stale"]) == (network_id, 1, False)
            assert_matches_solver(body, DEMO_SPEC, result, vector)
            moved += bool(body["transfers"])
        # The sample exercises both answers: some stocks move units, some do not.
        assert 0 < moved < len(stocks), (criterion, moved)


def test_default_criterion_is_discounted(client: TestClient, engine: Engine) -> None:
    network_id = solved_demo(client, engine)
    body = recommend(client, network_id, {"hilltop": 0, "riverside": 14}).json()
    assert body["criterion"] == "discounted"
    assert_matches_solver(body, DEMO_SPEC, solve_network(DEMO_SPEC), [14, 0])


def test_older_version_answers_as_stale_until_the_new_one_is_solved(
    client: TestClient, engine: Engine
) -> None:
    network_id = create_network(client)["id"]
    run_worker(engine)
    bigger = demo_document()
    bigger["locations"][1]["capacity"] = 12
    bigger["lanes"][0]["unit_cost"] = 3.1
    put = client.put(f"/v1/networks/{network_id}", json=bigger, headers={"If-Match": '"1"'})
    assert put.status_code == 200
    bigger_spec = NetworkSpec.model_validate(bigger)

    vector = [12, 1]
    stale = recommend(client, network_id, stock_of(DEMO_SPEC, vector))
    assert stale.status_code == 200
    body = stale.json()
    assert (body["version"], body["stale"]) == (1, True)
    assert "planned with version 1's policy while version 2 is being solved" in body["notes"][0]
    assert_matches_solver(body, DEMO_SPEC, solve_network(DEMO_SPEC), vector)
    # The stale policy still judges stock by its own version's capacities.
    too_many = assert_problem(recommend(client, network_id, {"riverside": 2, "hilltop": 11}), 422)
    assert pointers(too_many) == ["/stock/hilltop"]

    run_worker(engine)
    fresh = recommend(client, network_id, stock_of(bigger_spec, vector)).json()
    assert (fresh["version"], fresh["stale"]) == (2, False)
    assert not any("planned with version" in note for note in fresh["notes"])
    assert_matches_solver(fresh, bigger_spec, solve_network(bigger_spec), vector)
    fits_now = recommend(client, network_id, {"riverside": 2, "hilltop": 11})
    assert fits_now.status_code == 200


BAD_REQUESTS: list[tuple[str, dict[str, Any], str, list[str]]] = [
    (
        "above capacity",
        {"stock": {"riverside": 15, "hilltop": 0}},
        "invalid-stock",
        ["/stock/riverside"],
    ),
    (
        "negative units",
        {"stock": {"riverside": 3, "hilltop": -1}},
        "invalid-stock",
        ["/stock/hilltop"],
    ),
    (
        "unknown location",
        {"stock": {"riverside": 3, "hilltop": 1, "harbour": 2}},
        "invalid-stock",
        ["/stock/harbour"],
    ),
    ("missing location", {"stock": {"riverside": 3}}, "invalid-stock", ["/stock/hilltop"]),
    (
        "several stock problems",
        {"stock": {"riverside": 99, "harbour": 1}},
        "invalid-stock",
        ["/stock/harbour", "/stock/hilltop", "/stock/riverside"],
    ),
    (
        "fractional units",
        {"stock": {"riverside": 2.5, "hilltop": 1}},
        "invalid-input",
        ["/stock/riverside"],
    ),
    (
        "units as a string",
        {"stock": {"riverside": 2, "hilltop": "3"}},
        "invalid-input",
        ["/stock/hilltop"],
    ),
    (
        "units as a boolean",
        {"stock": {"riverside": True, "hilltop": 1}},
        "invalid-input",
        ["/stock/riverside"],
    ),
    (
        "no units",
        {"stock": {"riverside": None, "hilltop": 1}},
        "invalid-input",
        ["/stock/riverside"],
    ),
    ("stock not an object", {"stock": [3, 1]}, "invalid-input", ["/stock"]),
    ("missing stock", {"criterion": "average"}, "invalid-input", ["/stock"]),
    (
        "unknown criterion",
        {"stock": {"riverside": 3, "hilltop": 1}, "criterion": "cheapest"},
        "invalid-input",
        ["/criterion"],
    ),
    (
        "unknown member",
        {"stock": {"riverside": 3, "hilltop": 1}, "date": "2026-12-01"},
        "invalid-input",
        ["/date"],
    ),
]


def test_bad_requests_are_422_with_a_pointer_per_problem(
    client: TestClient, engine: Engine
) -> None:
    network_id = solved_demo(client, engine)
    for case, body, slug, expected in BAD_REQUESTS:
        response = client.post(f"/v1/networks/{network_id}/recommendation", json=body)
        assert response.status_code == 422, (case, response.status_code, response.text)
        problem = assert_problem(response, 422, slug)
        assert sorted(pointers(problem)) == expected, case
    not_json = client.post(
        f"/v1/networks/{network_id}/recommendation",
        content=b"riverside=3",
        headers={"Content-Type": "application/json"},
    )
    assert_problem(not_json, 422, "invalid-input")


@sqlite_only
def test_weekly_network_answers_for_the_night_after_the_business_date(
    client: TestClient, engine: Engine
) -> None:
    document = weekly_document(timezone="Pacific/Auckland")
    network_id = create_network(client, document)["id"]
    run_worker(engine)
    expected = solve_network(NetworkSpec.model_validate(document))
    stock = {"riverside": 13, "hilltop": 1}
    url = f"/v1/networks/{network_id}/recommendation"
    answers = {}
    # 2026-11-30 was a Monday (proleptic Gregorian calendar, as Python's datetime.date).
    for offset in range(7):
        day = date(2026, 11, 30) + timedelta(days=offset)
        body = client.post(url, json={"stock": stock, "business_date": day.isoformat()}).json()
        assert (body["business_date"], body["night"]) == (day.isoformat(), WEEK[offset])
        wanted = expected.recommend([13, 1], phase=expected.phase_of(day.weekday()))
        assert body["transfers"] == expected_transfers(expected, wanted)
        assert body["expected_value"] == pytest.approx(wanted.expected_value, rel=1e-9)
        answers[WEEK[offset]] = body["transfers"]
    # Sunday night the lanes are closed; the weekday really changes the answer.
    assert answers["sun"] == []
    assert len({str(a) for a in answers.values()}) > 1

    # Without a date: today where the stores are (Auckland), not on the server's clock.
    today = datetime.now(ZoneInfo("Pacific/Auckland")).date()
    body = client.post(url, json={"stock": stock}).json()
    assert body["business_date"] in {today.isoformat(), (today + timedelta(days=1)).isoformat()}
    assert body["night"] == WEEK[date.fromisoformat(body["business_date"]).weekday()]

    items = [
        {"network_id": network_id, "stock": stock, "business_date": "2026-12-06"},
        {"network_id": network_id, "stock": stock, "business_date": "2026-12-31x"},
    ]
    outcome = client.post("/v1/recommendations/batch", json={"items": items}).json()["items"]
    assert (outcome[0]["result"]["night"], outcome[0]["result"]["transfers"]) == ("sun", [])
    assert pointers(outcome[1]["problem"]) == ["/items/1/business_date"]


def test_stationary_network_ignores_the_business_date(client: TestClient, engine: Engine) -> None:
    network_id = solved_demo(client, engine)
    stock = {"riverside": 13, "hilltop": 1}
    plain = recommend(client, network_id, stock).json()
    assert (plain["business_date"], plain["night"]) == (None, None)
    dated = client.post(
        f"/v1/networks/{network_id}/recommendation",
        json={"stock": stock, "business_date": "2026-12-05"},
    ).json()
    assert (dated["business_date"], dated["night"]) == ("2026-12-05", "sat")
    assert dated["transfers"] == plain["transfers"]


def test_unknown_time_zone_is_refused(client: TestClient) -> None:
    response = client.post("/v1/networks", json=demo_document(timezone="Europe/Atlantis"))
    problem = assert_problem(response, 422, "invalid-input")
    assert pointers(problem) == ["/timezone"]
    assert "Europe/Atlantis" in problem["detail"]


# -- batches -----------------------------------------------------------------------------------


def test_batch_answers_in_order_with_one_problem_per_bad_item(
    client: TestClient, engine: Engine
) -> None:
    network_id = solved_demo(client, engine)
    items: list[Any] = [
        {"network_id": network_id, "stock": {"riverside": 13, "hilltop": 1}},
        {"network_id": 4242, "stock": {"riverside": 13, "hilltop": 1}},
        {"network_id": network_id, "stock": {"riverside": 20, "hilltop": 1}},
        {"network_id": network_id, "stok": {"riverside": 1, "hilltop": 1}},
        {"network_id": network_id, "stock": {"riverside": 1, "hilltop": 2.5}},
        {"network_id": network_id, "stock": {"riverside": 0, "hilltop": 9}, "criterion": "average"},
    ]
    response = client.post("/v1/recommendations/batch", json={"items": items})
    assert response.status_code == 200
    outcomes = response.json()["items"]
    assert len(outcomes) == len(items)
    for outcome in outcomes:
        assert (outcome["result"] is None) != (outcome["problem"] is None), outcome

    discounted = solve_network(DEMO_SPEC)
    assert_matches_solver(outcomes[0]["result"], DEMO_SPEC, discounted, [13, 1])
    # A good item answers exactly as the single endpoint does.
    single = recommend(client, network_id, {"riverside": 13, "hilltop": 1}).json()
    assert outcomes[0]["result"] == single
    assert_matches_solver(
        outcomes[5]["result"], DEMO_SPEC, solve_network(DEMO_SPEC, criterion="average"), [0, 9]
    )

    missing = outcomes[1]["problem"]
    assert (missing["status"], missing["type"], missing["item"]) == (
        404,
        "/problems/not-found",
        1,
    )
    assert "4242" in missing["detail"]
    out_of_range = outcomes[2]["problem"]
    assert (out_of_range["status"], out_of_range["item"]) == (422, 2)
    assert out_of_range["type"].endswith("/invalid-stock")
    assert [e["pointer"].endswith("/stock/riverside") for e in out_of_range["errors"]] == [True]
    malformed = outcomes[3]["problem"]
    assert malformed["status"] == 422 and malformed["type"].endswith("/invalid-input")
    assert sorted(pointers(malformed)) == ["/items/3/stock", "/items/3/stok"]
    fractional = outcomes[4]["problem"]
    assert fractional["status"] == 422
    assert pointers(fractional) == ["/items/4/stock/hilltop"]
    for outcome in outcomes[1:5]:
        assert outcome["problem"]["instance"] == "/v1/recommendations/batch"
        assert outcome["problem"]["request_id"] == response.headers["X-Request-ID"]


@sqlite_only
def test_batch_stock_problems_point_into_their_item(client: TestClient, engine: Engine) -> None:
    network_id = solved_demo(client, engine)
    items = [
        {"network_id": network_id, "stock": {"riverside": 1, "hilltop": 1}},
        {"network_id": network_id, "stock": {"riverside": 1, "hilltop": 1}},
        {"network_id": network_id, "stock": {"riverside": 20, "hilltop": 1}},
    ]
    outcomes = client.post("/v1/recommendations/batch", json={"items": items}).json()["items"]
    assert pointers(outcomes[2]["problem"]) == ["/items/2/stock/riverside"]


@sqlite_only
def test_batch_item_that_is_not_an_object_fails_alone(client: TestClient, engine: Engine) -> None:
    network_id = solved_demo(client, engine)
    items: list[Any] = [{"network_id": network_id, "stock": {"riverside": 1, "hilltop": 1}}, 7]
    response = client.post("/v1/recommendations/batch", json={"items": items})
    assert response.status_code == 200, response.text
    outcomes = response.json()["items"]
    assert outcomes[0]["result"] is not None
    assert outcomes[1]["problem"]["status"] == 422


@sqlite_only
def test_batch_size_is_one_to_a_thousand_items(client: TestClient, engine: Engine) -> None:
    network_id = solved_demo(client, engine)
    capacities = [location.capacity for location in DEMO_SPEC.locations]
    vectors = [[i % (capacities[0] + 1), (i // 7) % (capacities[1] + 1)] for i in range(1000)]
    items = [{"network_id": network_id, "stock": stock_of(DEMO_SPEC, v)} for v in vectors]
    full = client.post("/v1/recommendations/batch", json={"items": items})
    assert full.status_code == 200
    outcomes = full.json()["items"]
    assert len(outcomes) == 1000
    result = solve_network(DEMO_SPEC)
    for index in (0, 1, 499, 998, 999):
        assert outcomes[index]["result"]["stock"] == stock_of(DEMO_SPEC, vectors[index])
        assert_matches_solver(outcomes[index]["result"], DEMO_SPEC, result, vectors[index])

    too_many = client.post("/v1/recommendations/batch", json={"items": [*items, items[0]]})
    assert pointers(assert_problem(too_many, 422, "invalid-input")) == ["/items"]
    empty = client.post("/v1/recommendations/batch", json={"items": []})
    assert pointers(assert_problem(empty, 422, "invalid-input")) == ["/items"]
    absent = client.post("/v1/recommendations/batch", json={})
    assert pointers(assert_problem(absent, 422, "invalid-input")) == ["/items"]


# -- server errors -----------------------------------------------------------------------------


def test_server_error_is_a_500_problem_quoting_the_logged_request_id(
    engine: Engine, monkeypatch: pytest.MonkeyPatch, caplog: pytest.LogCaptureFixture
) -> None:
    def broken(*_args: Any, **_kwargs: Any) -> Any:
        raise RuntimeError("the view fell over")

    with open_client(engine, raise_server_exceptions=False) as client:
        network_id = solved_demo(client, engine)
        # The router's own reference: it imported the name from service.api.views.
        monkeypatch.setattr(recommendations_module, "recommendation_out", broken)
        with caplog.at_level(logging.ERROR):
            response = client.post(
                f"/v1/networks/{network_id}/recommendation",
                json={"stock": {"riverside": 13, "hilltop": 1}},
                headers={"X-Request-ID": "till-7-closing"},
            )
    problem = assert_problem(response, 500, "internal-error")
    assert response.headers["X-Request-ID"] == "till-7-closing"
    assert "till-7-closing" in problem["detail"]
    assert "fell over" not in problem["detail"]  # internals stay in the log
    logged = [r for r in caplog.records if "till-7-closing" in r.getMessage()]
    assert logged and logged[0].levelno == logging.ERROR
    assert logged[0].exc_info is not None and "fell over" in str(logged[0].exc_info[1])


def test_batch_item_that_fails_unexpectedly_is_a_500_problem_of_its_own(
    client: TestClient,
    engine: Engine,
    monkeypatch: pytest.MonkeyPatch,
    caplog: pytest.LogCaptureFixture,
) -> None:
    network_id = solved_demo(client, engine)
    real = service.serving.recommend

    def fails_for_empty_hilltop(
        session: Any, cache: Any, network: Any, stock: Any, *rest: Any, **named: Any
    ) -> Any:
        if stock.get("hilltop") == 0:
            raise RuntimeError("disk on fire")
        return real(session, cache, network, stock, *rest, **named)

    monkeypatch.setattr(recommendations_module, "recommend", fails_for_empty_hilltop)
    items = [
        {"network_id": network_id, "stock": {"riverside": 4, "hilltop": 0}},
        {"network_id": network_id, "stock": {"riverside": 4, "hilltop": 2}},
    ]
    with caplog.at_level(logging.ERROR):
        response = client.post(
            "/v1/recommendations/batch", json={"items": items}, headers={"X-Request-ID": "b-42"}
        )
    assert response.status_code == 200
    failed, answered = response.json()["items"]
    assert (failed["problem"]["status"], failed["problem"]["item"]) == (500, 0)
    assert failed["problem"]["type"].endswith("/internal-error")
    assert "disk on fire" not in failed["problem"]["detail"]
    assert_matches_solver(answered["result"], DEMO_SPEC, solve_network(DEMO_SPEC), [4, 2])
    assert any("b-42" in r.getMessage() and r.exc_info for r in caplog.records)


# -- relays ------------------------------------------------------------------------------------


def chain_document() -> dict[str, Any]:
    """Three stores of our own in a line: a depot feeds a middle store, which feeds a busy far
    store; there is no lane from the depot to the far store."""

    def store(location: str, capacity: int, mean: float) -> dict[str, Any]:
        return {
            "id": location,
            "capacity": capacity,
            "unit_margin": 10.0,
            "holding_cost": 0.2,
            "stockout_penalty": 2.0,
            "demand": {"dist": "poisson", "mean": mean},
            "replenishment": {"dist": "poisson", "mean": 0.5},
        }

    return {
        "name": "Depot, middle and far store",
        "discount": 0.95,
        "locations": [store("depot", 8, 0.3), store("middle", 5, 1.5), store("far", 5, 3.0)],
        "lanes": [
            {"from": "depot", "to": "middle", "unit_cost": 0.5, "max_units": 3},
            {"from": "middle", "to": "far", "unit_cost": 0.5, "max_units": 3},
        ],
    }


def relay_stock(spec: NetworkSpec) -> list[int]:
    """A closing stock from which the middle store both receives and sends (found by the
    in-process solver, not assumed)."""
    result = solve_network(spec)
    for vector in itertools.product(*(range(loc.capacity + 1) for loc in spec.locations)):
        flows = result.recommend(list(vector)).flows
        if flows[0] > 0 and flows[1] > 0:
            return list(vector)
    raise AssertionError("the chain policy never relays")


def test_a_location_that_receives_and_sends_is_marked_as_a_relay(
    client: TestClient, engine: Engine
) -> None:
    document = chain_document()
    spec = NetworkSpec.model_validate(document)
    network_id = create_network(client, document)["id"]
    run_worker(engine)
    vector = relay_stock(spec)
    flows = solve_network(spec).recommend(vector).flows
    body = recommend(client, network_id, stock_of(spec, vector)).json()
    (relay,) = body["relays"]
    assert (relay["location"], relay["receives"], relay["sends"]) == ("middle", flows[0], flows[1])
    assert relay["net_change"] == flows[0] - flows[1]
    assert body["stock_after_transfers"]["middle"] == vector[1] + relay["net_change"]
    assert "no lane from depot to far" in relay["explanation"]
    # Nothing relays from a stock where no location sends and receives.
    quiet = recommend(client, network_id, {"depot": 0, "middle": 0, "far": 0}).json()
    assert quiet["relays"] == []


@pytest.mark.parametrize(
    ("direct", "reason"),
    [
        ({"unit_cost": 3.0, "max_units": 1}, "costs 3 a unit, more than 1 through middle"),
        ({"unit_cost": 0.9, "max_units": 1}, "the direct lane depot -> far is full tonight"),
    ],
)
def test_a_relay_beside_a_direct_lane_says_why_the_lane_is_not_used_alone(
    direct: dict[str, Any], reason: str
) -> None:
    document = chain_document()
    document["lanes"].append({"from": "depot", "to": "far", **direct})
    spec = NetworkSpec.model_validate(document)
    result = solve_network(spec)
    found = []
    for vector in itertools.product(*(range(loc.capacity + 1) for loc in spec.locations)):
        flows = result.recommend(list(vector)).flows
        for relay in relays_of(result, transfers_of(result, flows), 0):
            if reason in relay.explanation:
                found.append(flows)
    assert found, f"no relay explained by {reason!r}"
    # The reason holds for the moves themselves (lane 2 is the direct lane of the document).
    for flows in found:
        assert flows[0] > 0 and flows[1] > 0
        if "full" in reason:
            assert flows[2] == direct["max_units"]
        else:
            assert direct["unit_cost"] > 0.5 + 0.5


def test_a_full_direct_lane_is_full_by_tonights_limit(client: TestClient, engine: Engine) -> None:
    """The direct lane carries at most 1 unit on Monday nights and 3 on every other night: a
    relay on a Monday night says the lane is full at 1, in the solver's moves and over HTTP."""
    limits = dict.fromkeys(WEEK, 3) | {"mon": 1}
    document = chain_document()
    document["lanes"].append(
        {"from": "depot", "to": "far", "unit_cost": 0.9, "max_units": {"weekly": limits}}
    )
    spec = NetworkSpec.model_validate(document)
    result = solve_network(spec)
    full = []
    for phase, day in enumerate(WEEK):
        for vector in itertools.product(*(range(loc.capacity + 1) for loc in spec.locations)):
            flows = result.recommend(list(vector), phase=phase).flows
            for relay in relays_of(result, transfers_of(result, flows), phase):
                if "the direct lane depot -> far is full tonight" in relay.explanation:
                    assert f"(at most {limits[day]})" in relay.explanation
                    assert flows[2] == limits[day]
                    full.append((day, list(vector)))
    monday = [vector for day, vector in full if day == "mon"]
    assert monday, "no Monday relay beside the full direct lane"
    network_id = create_network(client, document)["id"]
    run_worker(engine)
    body = client.post(
        f"/v1/networks/{network_id}/recommendation",
        json={"stock": stock_of(spec, monday[0]), "business_date": "2026-11-30"},
    ).json()
    assert body["night"] == "mon"
    (relay,) = body["relays"]
    assert "the direct lane depot -> far is full tonight (at most 1)" in relay["explanation"]


def test_a_recommendation_notes_what_the_closing_instructions_note(
    client: TestClient, engine: Engine
) -> None:
    """From the same stock on the same night, a recommendation carries the notes the closing
    instructions carry, word for word: parameters entered by hand, and each sender that keeps
    less than its expected demand for tomorrow (the in-process solver finds such a stock)."""
    document = chain_document()
    spec = NetworkSpec.model_validate(document)
    network_id = create_network(client, document)["id"]
    run_worker(engine)
    result = solve_network(spec)
    # Closing counts are taken for dates near the server's (service.closing).
    day = datetime.now(ZoneInfo("UTC")).date()
    means = [location["demand"]["mean"] for location in document["locations"]]

    def leaves_a_sender_short(vector: list[int]) -> bool:
        chosen = result.recommend(vector)
        return any(
            units > 0 and chosen.post_move_stock[a] < means[a]
            for (a, _), units in zip(result.lanes, chosen.flows, strict=True)
        )

    stocks = [list(v) for v in itertools.product(*(range(c.capacity + 1) for c in spec.locations))]
    short = next(v for v in stocks if leaves_a_sender_short(v))
    stock = stock_of(spec, short)
    body = client.post(
        f"/v1/networks/{network_id}/recommendation",
        json={"stock": stock, "business_date": day.isoformat()},
    ).json()
    assert any("not estimated from sales history" in note for note in body["notes"])
    assert any(" sends " in note and "below its expected demand" in note for note in body["notes"])
    for location, units in stock.items():
        put = client.put(
            f"/v1/networks/{network_id}/locations/{location}/closing-stock",
            json={"business_date": day.isoformat(), "units": units},
        )
        assert put.status_code == 200
    closing = client.get(
        f"/v1/networks/{network_id}/locations/depot/instructions",
        params={"business_date": day.isoformat()},
    ).json()
    assert body["notes"] == closing["notes"]
    # Nothing moves from an empty network: only the note on the parameters.
    quiet = recommend(client, network_id, dict.fromkeys(stock, 0)).json()
    assert quiet["transfers"] == [] and len(quiet["notes"]) == 1


@pytest.mark.parametrize("method", ["exact", "priced"])
def test_either_method_judges_a_full_direct_lane_by_the_nights_limit(method: str) -> None:
    """The same moves (one unit over each lane) fill the direct lane on a Monday night, when it
    carries at most 1, and not on a Tuesday night, when it carries 3."""
    document = chain_document()
    limits = dict.fromkeys(WEEK, 3) | {"mon": 1}
    document["lanes"].append(
        {"from": "depot", "to": "far", "unit_cost": 0.9, "max_units": {"weekly": limits}}
    )
    spec = NetworkSpec.model_validate(document)
    result = (
        solve_network(spec)
        if method == "exact"
        else solve_priced(spec, options=PricedOptions(replications=8, target_half_width=0.01))
    )
    transfers = transfers_of(result, (1, 1, 1))
    (monday,) = relays_of(result, transfers, result.phase_of(0))
    assert "the direct lane depot -> far is full tonight (at most 1)" in monday.explanation
    (tuesday,) = relays_of(result, transfers, result.phase_of(1))
    assert "full tonight" not in tuesday.explanation
