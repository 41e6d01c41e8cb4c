"""HTTP tests of closing reports and the night's instructions: every location reports, then all
read one plan, equal to the solver's recommendation from the full closing stock, and kept."""

from __future__ import annotations

import itertools
import json
from datetime import UTC, date, datetime, timedelta
from typing import Any

from fastapi.testclient import TestClient
from sqlalchemy import Engine

import service.serving
from service.estimates import law_moments
from solver import NetworkSpec, solve_network
from solver.spec import WEEKDAYS as WEEK
from tests.service.api_support import (
    assert_problem,
    create_network,
    demo_document,
    expected_transfers,
    pointers,
    run_worker,
    sqlite_only,
    stock_of,
    weekly_document,
)
from tests.service.test_api_recommendations import chain_document, relay_stock

DEMO_SPEC = NetworkSpec.model_validate(demo_document())


def today() -> date:
    return datetime.now(UTC).date()


def report(client: TestClient, network_id: int, location: str, day: date, units: Any) -> Any:
    return client.put(
        f"/v1/networks/{network_id}/locations/{location}/closing-stock",
        json={"business_date": day.isoformat(), "units": units},
    )


def instructions(client: TestClient, network_id: int, location: str, day: date | str) -> Any:
    return client.get(
        f"/v1/networks/{network_id}/locations/{location}/instructions",
        params={"business_date": str(day)},
    )


def stock_that_moves() -> list[int]:
    """A closing stock from which the demo policy moves units (found, not assumed)."""
    result = solve_network(DEMO_SPEC)
    capacities = [location.capacity for location in DEMO_SPEC.locations]
    for vector in itertools.product(*(range(c, -1, -1) for c in capacities)):
        if any(result.recommend(list(vector)).flows):
            return list(vector)
    raise AssertionError("the demo policy never moves anything")


def test_reports_shrink_the_missing_list_and_a_repeat_replaces_the_count(
    client: TestClient, engine: Engine
) -> None:
    network_id = create_network(client)["id"]
    run_worker(engine)
    day = today()
    first = report(client, network_id, "riverside", day, 5)
    assert first.status_code == 200
    body = first.json()
    assert (body["network_id"], body["location"], body["units"]) == (network_id, "riverside", 5)
    assert (body["business_date"], body["missing"]) == (day.isoformat(), ["hilltop"])
    waiting = assert_problem(instructions(client, network_id, "riverside", day), 409, "conflict")
    assert waiting["missing"] == ["hilltop"]

    vector = stock_that_moves()
    repeat = report(client, network_id, "riverside", day, vector[0])
    assert repeat.status_code == 200
    assert (repeat.json()["units"], repeat.json()["missing"]) == (vector[0], ["hilltop"])
    last = report(client, network_id, "hilltop", day, vector[1])
    assert last.status_code == 200 and last.json()["missing"] == []

    issued = instructions(client, network_id, "hilltop", day)
    assert issued.status_code == 200
    # The repeat replaced the first count.
    assert issued.json()["stock"] == stock_of(DEMO_SPEC, vector)


def test_every_location_reads_the_same_kept_plan(client: TestClient, engine: Engine) -> None:
    network_id = create_network(client)["id"]
    run_worker(engine)
    day = today()
    vector = stock_that_moves()
    for location, units in stock_of(DEMO_SPEC, vector).items():
        assert report(client, network_id, location, day, units).status_code == 200

    result = solve_network(DEMO_SPEC)
    transfers = expected_transfers(result, result.recommend(vector))
    assert transfers, "stock_that_moves() promised transfers"
    plans = {}
    for location in DEMO_SPEC.location_ids:
        response = instructions(client, network_id, location, day)
        assert response.status_code == 200
        plans[location] = response.json()
        plan = plans[location]
        assert (plan["network_id"], plan["location"], plan["business_date"]) == (
            network_id,
            location,
            day.isoformat(),
        )
        assert (plan["version"], plan["criterion"]) == (1, "discounted")
        assert plan["stock"] == stock_of(DEMO_SPEC, vector)
        assert plan["send"] == [
            {"location": t["to"], "units": t["units"]} for t in transfers if t["from"] == location
        ]
        assert plan["receive"] == [
            {"location": t["from"], "units": t["units"]} for t in transfers if t["to"] == location
        ]
    # What one location sends, the other receives.
    sent = {(origin, m["location"], m["units"]) for origin, p in plans.items() for m in p["send"]}
    received = {
        (m["location"], target, m["units"]) for target, p in plans.items() for m in p["receive"]
    }
    assert sent == received and sent
    assert len({plan["computed_at"] for plan in plans.values()}) == 1

    # Kept: no more counts for that night, and a new version of the network changes nothing.
    late = assert_problem(report(client, network_id, "riverside", day, 0), 409, "conflict")
    assert "issued" in late["detail"]
    changed = demo_document()
    changed["lanes"][0]["unit_cost"] = 0.5
    put = client.put(f"/v1/networks/{network_id}", json=changed, headers={"If-Match": '"1"'})
    assert put.status_code == 200
    run_worker(engine)
    again = instructions(client, network_id, "riverside", day).json()
    assert again == plans["riverside"]


def test_a_network_solved_only_for_average_gets_average_instructions(
    client: TestClient, engine: Engine
) -> None:
    network_id = create_network(client, demo_document(criteria=["average"]))["id"]
    run_worker(engine)
    vector = [DEMO_SPEC.locations[0].capacity, 0]
    day = today()
    for location, units in stock_of(DEMO_SPEC, vector).items():
        assert report(client, network_id, location, day, units).status_code == 200
    response = instructions(client, network_id, "riverside", day)
    assert response.status_code == 200, response.text
    plan = response.json()
    assert plan["criterion"] == "average"
    result = solve_network(DEMO_SPEC, criterion="average")
    transfers = expected_transfers(result, result.recommend(vector))
    assert plan["send"] == [{"location": t["to"], "units": t["units"]} for t in transfers]
    # A recommendation that names no criterion follows the same rule.
    answer = client.post(
        f"/v1/networks/{network_id}/recommendation", json={"stock": stock_of(DEMO_SPEC, vector)}
    )
    assert answer.status_code == 200 and answer.json()["criterion"] == "average"


def test_all_reported_without_a_policy_is_503_and_nothing_is_kept(
    client: TestClient, engine: Engine
) -> None:
    network_id = create_network(client)["id"]
    day = today()
    assert report(client, network_id, "riverside", day, 2).status_code == 200
    assert report(client, network_id, "hilltop", day, 2).status_code == 200
    not_ready = instructions(client, network_id, "riverside", day)
    assert_problem(not_ready, 503, "policy-not-ready")
    assert int(not_ready.headers["Retry-After"]) > 0
    # No plan was kept, so counts may still change.
    vector = stock_that_moves()
    for location, units in stock_of(DEMO_SPEC, vector).items():
        assert report(client, network_id, location, day, units).status_code == 200
    run_worker(engine)
    issued = instructions(client, network_id, "riverside", day)
    assert issued.status_code == 200
    assert issued.json()["stock"] == stock_of(DEMO_SPEC, vector)


def test_unknown_location_is_404(client: TestClient) -> None:
    network_id = create_network(client)["id"]
    day = today()
    put = assert_problem(report(client, network_id, "harbour", day, 1), 404, "not-found")
    assert "harbour" in put["detail"]
    get = assert_problem(instructions(client, network_id, "harbour", day), 404, "not-found")
    assert "harbour" in get["detail"]


@sqlite_only
def test_units_must_be_an_integer_within_capacity(client: TestClient) -> None:
    network_id = create_network(client)["id"]
    day = today()
    for location, units in (("riverside", 15), ("hilltop", 10), ("hilltop", -1)):
        problem = assert_problem(report(client, network_id, location, day, units), 422)
        assert problem["type"].endswith("/invalid-input")
        assert pointers(problem) == ["/units"], (location, units)
        if units > 0:
            # Above capacity: the problem says what to do about it.
            assert "change the network" in problem["detail"]
            assert f"PUT /v1/networks/{network_id}" in problem["detail"]
    for not_integer in (2.5, "3", True, None):
        problem = assert_problem(report(client, network_id, "riverside", day, not_integer), 422)
        assert pointers(problem) == ["/units"], not_integer
    missing = client.put(
        f"/v1/networks/{network_id}/locations/riverside/closing-stock",
        json={"business_date": day.isoformat()},
    )
    assert pointers(assert_problem(missing, 422, "invalid-input")) == ["/units"]
    # Nothing was recorded: both locations are still awaited.
    waiting = assert_problem(instructions(client, network_id, "riverside", day), 409)
    assert waiting["missing"] == ["riverside", "hilltop"]
    # The bounds themselves are accepted.
    assert report(client, network_id, "riverside", day, 14).status_code == 200
    assert report(client, network_id, "hilltop", day, 0).status_code == 200


@sqlite_only
def test_business_date_must_lie_between_the_day_before_creation_and_tomorrow(
    client: TestClient,
) -> None:
    created = create_network(client)
    network_id = created["id"]
    created_on = datetime.fromisoformat(created["created_at"]).date()
    tomorrow = today() + timedelta(days=1)
    for day in (created_on - timedelta(days=2), tomorrow + timedelta(days=1)):
        put = assert_problem(report(client, network_id, "riverside", day, 3), 422)
        assert pointers(put) == ["/business_date"]
        get = assert_problem(instructions(client, network_id, "riverside", day), 422)
        assert pointers(get) == ["query:/business_date"]
    for day in (created_on - timedelta(days=1), tomorrow):
        assert report(client, network_id, "riverside", day, 3).status_code == 200
    malformed = instructions(client, network_id, "riverside", "next tuesday")
    assert pointers(assert_problem(malformed, 422, "invalid-input")) == ["query:/business_date"]


@sqlite_only
def test_counts_beyond_the_stale_policy_wait_for_the_new_solve(
    client: TestClient, engine: Engine
) -> None:
    network_id = create_network(client)["id"]
    run_worker(engine)
    bigger = demo_document()
    bigger["locations"][1]["capacity"] = 12
    put = client.put(f"/v1/networks/{network_id}", json=bigger, headers={"If-Match": '"1"'})
    assert put.status_code == 200
    day = today()
    assert report(client, network_id, "riverside", day, 3).status_code == 200
    assert report(client, network_id, "hilltop", day, 11).status_code == 200
    assert_problem(instructions(client, network_id, "hilltop", day), 503, "policy-not-ready")
    run_worker(engine)
    issued = instructions(client, network_id, "hilltop", day)
    assert issued.status_code == 200 and issued.json()["version"] == 2


@sqlite_only
def test_weekly_instructions_follow_the_weekday_of_the_business_date(
    client: TestClient, engine: Engine
) -> None:
    # Lanes run only on tonight's weekday: yesterday's counts move nothing, tonight's follow
    # the policy of today's weekday. Whatever today is, a plan computed for the wrong weekday
    # fails one of the two days.
    day = today()
    document = weekly_document(open_nights=(day.weekday(),))
    spec = NetworkSpec.model_validate({k: v for k, v in document.items() if k != "criteria"})
    network_id = create_network(client, document)["id"]
    run_worker(engine)
    result = solve_network(spec)
    phase = result.phase_of(day.weekday())
    vector = next(
        list(v)
        for v in itertools.product(*(range(c + 1) for c in result.capacities))
        if any(result.recommend(list(v), phase=phase).flows)
    )
    for business_date in (day - timedelta(days=1), day):
        for location, units in stock_of(spec, vector).items():
            assert report(client, network_id, location, business_date, units).status_code == 200
    tonight = instructions(client, network_id, "riverside", day).json()
    last_night = instructions(client, network_id, "riverside", day - timedelta(days=1)).json()
    assert (last_night["send"], last_night["receive"]) == ([], [])
    expected = expected_transfers(result, result.recommend(vector, phase=phase))
    moved = [
        {"from": "riverside", "to": m["location"], "units": m["units"]} for m in tonight["send"]
    ] + [
        {"from": m["location"], "to": "riverside", "units": m["units"]} for m in tonight["receive"]
    ]
    assert moved == [{k: t[k] for k in ("from", "to", "units")} for t in expected]


def test_instructions_mark_a_relay_with_its_net_change(client: TestClient, engine: Engine) -> None:
    document = chain_document()
    spec = NetworkSpec.model_validate(document)
    network_id = create_network(client, document)["id"]
    run_worker(engine)
    vector = relay_stock(spec)
    day = today()
    for location, units in stock_of(spec, vector).items():
        assert report(client, network_id, location, day, units).status_code == 200
    plans = {loc: instructions(client, network_id, loc, day).json() for loc in spec.location_ids}
    assert [loc for loc, plan in plans.items() if plan["relay"]] == ["middle"]
    middle = plans["middle"]
    received = sum(m["units"] for m in middle["receive"])
    sent = sum(m["units"] for m in middle["send"])
    assert received > 0 and sent > 0 and middle["net_change"] == received - sent
    assert "no lane from depot to far" in middle["relay_explanation"]
    assert plans["depot"]["net_change"] == -plans["depot"]["send"][0]["units"]
    assert plans["depot"]["relay_explanation"] is None


def counts_with_other_moves(vector: list[int]) -> list[int]:
    """`vector` with Hilltop's count changed so that the demo policy moves something else
    (found by the in-process solver, not assumed)."""
    result = solve_network(DEMO_SPEC)
    before = result.recommend(vector).flows
    for units in range(DEMO_SPEC.locations[1].capacity + 1):
        if result.recommend([vector[0], units]).flows != before:
            return [vector[0], units]
    raise AssertionError("no other Hilltop count changes the moves")


def test_a_corrected_count_reissues_the_instructions_as_the_next_revision(
    client: TestClient, engine: Engine, caplog: Any
) -> None:
    network_id = create_network(client)["id"]
    run_worker(engine)
    day = today()
    vector = stock_that_moves()
    for location, units in stock_of(DEMO_SPEC, vector).items():
        assert report(client, network_id, location, day, units).status_code == 200
    first = instructions(client, network_id, "riverside", day)
    assert first.json()["revision"] == 1 and first.json()["corrections"] == []
    tag = first.headers["ETag"]
    # RFC 9110, section 13.1.2: If-None-Match with the current tag answers 304.
    unchanged = client.get(
        f"/v1/networks/{network_id}/locations/riverside/instructions",
        params={"business_date": str(day)},
        headers={"If-None-Match": tag},
    )
    assert unchanged.status_code == 304 and unchanged.headers["ETag"] == tag

    corrected = counts_with_other_moves(vector)
    refused = assert_problem(report(client, network_id, "hilltop", day, corrected[1]), 409)
    assert '"correction": true' in refused["detail"]
    caplog.set_level("INFO", logger="stockrelay.audit")
    response = client.put(
        f"/v1/networks/{network_id}/locations/hilltop/closing-stock",
        json={"business_date": day.isoformat(), "units": corrected[1], "correction": True},
    )
    assert response.status_code == 200, response.text
    assert response.json()["revision"] == 2

    again = instructions(client, network_id, "riverside", day)
    assert again.headers["ETag"] != tag
    plan = again.json()
    result = solve_network(DEMO_SPEC)
    transfers = expected_transfers(result, result.recommend(corrected))
    assert plan["send"] == [
        {"location": t["to"], "units": t["units"]} for t in transfers if t["from"] == "riverside"
    ]
    assert (plan["revision"], plan["moves_changed_in_revision"]) == (2, 2)
    assert plan["stock"] == stock_of(DEMO_SPEC, corrected)
    key_prefix = client.headers["Authorization"].removeprefix("Bearer sr_").split("_")[0]
    [correction] = plan["corrections"]
    assert {k: v for k, v in correction.items() if k != "corrected_at"} == {
        "location": "hilltop",
        "old_units": vector[1],
        "new_units": corrected[1],
        "revision": 2,
        "key_prefix": key_prefix,
    }
    [line] = [r.getMessage() for r in caplog.records if "closing_correction" in r.getMessage()]
    logged = json.loads(line)
    assert (logged["old_units"], logged["new_units"], logged["key_prefix"]) == (
        vector[1],
        corrected[1],
        key_prefix,
    )
    # The old tag no longer matches; the same count again makes no new revision.
    stale_tag = client.get(
        f"/v1/networks/{network_id}/locations/riverside/instructions",
        params={"business_date": str(day)},
        headers={"If-None-Match": tag},
    )
    assert stale_tag.status_code == 200
    same = client.put(
        f"/v1/networks/{network_id}/locations/hilltop/closing-stock",
        json={"business_date": day.isoformat(), "units": corrected[1], "correction": True},
    )
    assert same.json()["revision"] == 2
    assert len(instructions(client, network_id, "hilltop", day).json()["corrections"]) == 1


def test_instructions_note_uncalibrated_parameters_and_a_sender_left_short(
    client: TestClient, engine: Engine
) -> None:
    document = chain_document()
    spec = NetworkSpec.model_validate(document)
    network_id = create_network(client, document)["id"]
    run_worker(engine)
    day = today()
    result = solve_network(spec)
    tomorrow = (day + timedelta(days=1)).weekday()
    means = [law_moments(location.demand_on(tomorrow))[0] for location in spec.locations]

    def short_senders(vector: list[int]) -> list[str]:
        recommendation = result.recommend(vector)
        sent = [0] * len(means)
        for (a, _), units in zip(result.lanes, recommendation.flows, strict=True):
            sent[a] += units
        return [
            spec.locations[i].id
            for i in range(len(means))
            if sent[i] > 0 and recommendation.post_move_stock[i] < means[i]
        ]

    # Stocks where the policy leaves a sender below tomorrow's mean demand, and where it
    # moves without doing so (found by the in-process solver).
    stocks = [list(v) for v in itertools.product(*(range(c.capacity + 1) for c in spec.locations))]
    short = next(v for v in stocks if short_senders(v))
    enough = next(v for v in stocks if any(result.recommend(v).flows) and not short_senders(v))
    for offset, vector in enumerate((short, enough)):
        night = day - timedelta(days=offset)
        for location, units in stock_of(spec, vector).items():
            assert report(client, network_id, location, night, units).status_code == 200
        notes = instructions(client, network_id, "depot", night).json()["notes"]
        assert any("not estimated from sales history" in note for note in notes)
        flagged = sorted(n.split(" sends ")[0] for n in notes if " sends " in n)
        assert flagged == sorted(short_senders(vector)), (vector, notes)


def test_counts_before_the_closing_cutoff_belong_to_the_previous_business_date(
    client: TestClient, engine: Engine, monkeypatch: Any
) -> None:
    document = weekly_document(timezone="UTC", closing_cutoff="04:00")
    created = create_network(client, document)
    assert created["closing_cutoff"] == "04:00"
    network_id = created["id"]
    run_worker(engine)
    day = today()
    yesterday = day - timedelta(days=1)

    def at(hour: int, minute: int) -> None:
        moment = datetime(day.year, day.month, day.day, hour, minute, tzinfo=UTC)
        monkeypatch.setattr(service.serving, "utc_now", lambda: moment)

    at(2, 30)  # after midnight, before the cut-off: still yesterday's close
    reported = client.put(
        f"/v1/networks/{network_id}/locations/riverside/closing-stock", json={"units": 4}
    )
    assert reported.status_code == 200, reported.text
    assert reported.json()["business_date"] == yesterday.isoformat()
    waiting = client.get(f"/v1/networks/{network_id}/locations/hilltop/instructions")
    assert assert_problem(waiting, 409)["missing"] == ["hilltop"]
    assert yesterday.isoformat() in waiting.json()["detail"]
    answer = client.post(
        f"/v1/networks/{network_id}/recommendation",
        json={"stock": {"riverside": 4, "hilltop": 2}},
    ).json()
    assert (answer["business_date"], answer["night"]) == (
        yesterday.isoformat(),
        WEEK[yesterday.weekday()],
    )
    # Pictures of a weekly policy default to the same night, not to Monday.
    picture = client.get(f"/v1/networks/{network_id}/policy.svg")
    assert f"{WEEK[yesterday.weekday()]} night" in picture.text

    at(4, 0)  # from the cut-off on: today's business date
    reported = client.put(
        f"/v1/networks/{network_id}/locations/riverside/closing-stock", json={"units": 5}
    )
    assert reported.json()["business_date"] == day.isoformat()
    picture = client.get(f"/v1/networks/{network_id}/policy.svg")
    assert f"{WEEK[day.weekday()]} night" in picture.text
