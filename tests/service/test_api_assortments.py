"""Assortments over HTTP: a layout shared by many items, bulk item uploads (CSV, JSON lines,
JSON), all or nothing, and items solved as networks of their own.

The data are scenarios of our own (three hardware stores sharing their power tools)."""

from __future__ import annotations

import json
from typing import Any

import pytest
from fastapi.testclient import TestClient
from sqlalchemy import Engine, func, select

from service.db.session import make_session_factory
from service.db.tables import Network, NetworkVersion, SolveJob
from tests.service.api_support import assert_problem, pointers, run_worker, sqlite_only

LAYOUT: dict[str, Any] = {
    "name": "tools-east",
    "timezone": "Europe/Berlin",
    "locations": [{"id": "harbour"}, {"id": "old-town"}, {"id": "ring-road"}],
    "lanes": [
        {"from": "harbour", "to": "old-town", "unit_cost": 1.2, "max_units": 3},
        {"from": "old-town", "to": "harbour", "unit_cost": 1.2, "max_units": 3},
        {"from": "old-town", "to": "ring-road", "unit_cost": 0.9, "max_units": 2},
        {"from": "ring-road", "to": "old-town", "unit_cost": 0.9, "max_units": 2},
    ],
}
HEADER = (
    "item,location,capacity,unit_margin,holding_cost,demand_mean,demand_variance,replenishment_mean"
)


def _csv_rows(code: str, margin: float, capacity: int = 5) -> list[str]:
    return [
        f"{code},harbour,{capacity},{margin},0.1,1.2,2.0,1.0",
        f"{code},old-town,{capacity},{margin},0.1,0.8,,0.9",
        f"{code},ring-road,{capacity},{margin},0.1,1.0,,0.7",
    ]


def _create(client: TestClient, **extra: Any) -> int:
    response = client.post("/v1/assortments", json={**LAYOUT, **extra})
    assert response.status_code == 201, response.text
    assert response.headers["location"] == f"/v1/assortments/{response.json()['id']}"
    return int(response.json()["id"])


def _upload_csv(client: TestClient, assortment: int, lines: list[str]) -> Any:
    return client.post(
        f"/v1/assortments/{assortment}/items",
        content="\n".join([HEADER, *lines]) + "\n",
        headers={"content-type": "text/csv"},
    )


def _counts(engine: Engine) -> tuple[int, int, int]:
    with make_session_factory(engine)() as session:
        return (
            session.scalar(select(func.count()).select_from(Network)) or 0,
            session.scalar(select(func.count()).select_from(NetworkVersion)) or 0,
            session.scalar(select(func.count()).select_from(SolveJob)) or 0,
        )


def test_items_from_csv_share_policies_by_their_numbers(client: TestClient, engine: Engine) -> None:
    assortment = _create(client)
    lines = _csv_rows("DRL-18V", 30.0) + _csv_rows("SAW-CIRC", 30.0) + _csv_rows("GRD-125", 22.5)
    response = _upload_csv(client, assortment, lines)
    assert response.status_code == 200, response.text
    body = response.json()
    assert (body["received"], body["created"], body["updated"], body["unchanged"]) == (3, 3, 0, 0)
    # Two items have identical numbers: one specification, one solve, for both.
    assert body["specifications"] == 2
    assert body["jobs_queued"] == 2
    state = client.get(f"/v1/assortments/{assortment}").json()["states"]
    assert state == {"items": 3, "ready": 0, "waiting": 3, "failed": 0, "specifications": 2}
    run_worker(engine)
    state = client.get(f"/v1/assortments/{assortment}").json()["states"]
    assert state["ready"] == 3

    items = client.get(f"/v1/assortments/{assortment}/items").json()["items"]
    assert [item["item"] for item in items] == ["DRL-18V", "GRD-125", "SAW-CIRC"]
    drill = items[0]
    # The item is a network of its own: the single-network routes answer for it.
    network = client.get(f"/v1/networks/{drill['network_id']}").json()
    assert network["name"] == "tools-east/DRL-18V"
    spec = client.get(f"/v1/networks/{drill['network_id']}/versions").json()[0]["spec"]
    harbour = spec["locations"][0]
    assert harbour["demand"] == {"dist": "negative_binomial", "mean": 1.2, "variance": 2.0}
    assert spec["locations"][1]["demand"] == {"dist": "poisson", "mean": 0.8}
    assert len(spec["lanes"]) == 4
    recommendation = client.post(
        f"/v1/networks/{drill['network_id']}/recommendation",
        json={"stock": {"harbour": 5, "old-town": 0, "ring-road": 2}},
    )
    assert recommendation.status_code == 200
    # Items stay out of the list of networks, and change only through their assortment.
    assert client.get("/v1/networks").json() == []
    put = client.put(f"/v1/networks/{drill['network_id']}", json=spec, headers={"if-match": '"1"'})
    assert_problem(put, 409)


def test_a_repeat_changes_nothing_and_a_change_makes_a_version(
    client: TestClient, engine: Engine
) -> None:
    assortment = _create(client)
    lines = _csv_rows("DRL-18V", 30.0) + _csv_rows("GRD-125", 22.5)
    assert _upload_csv(client, assortment, lines).status_code == 200
    before = _counts(engine)
    again = _upload_csv(client, assortment, lines).json()
    assert (again["created"], again["updated"], again["unchanged"], again["jobs_queued"]) == (
        0,
        0,
        2,
        0,
    )
    assert _counts(engine) == before
    changed = _csv_rows("DRL-18V", 31.0) + _csv_rows("GRD-125", 22.5)
    body = _upload_csv(client, assortment, changed).json()
    assert (body["updated"], body["unchanged"], body["jobs_queued"]) == (1, 1, 1)
    items = client.get(f"/v1/assortments/{assortment}/items").json()["items"]
    assert {item["item"]: item["version"] for item in items} == {"DRL-18V": 2, "GRD-125": 1}


@sqlite_only
def test_bad_rows_are_reported_by_line_and_nothing_is_stored(
    client: TestClient, engine: Engine
) -> None:
    assortment = _create(client)
    before = _counts(engine)
    lines = [
        *_csv_rows("DRL-18V", 30.0),
        "SAW-CIRC,harbour,5,30,0.1,1.2,,1.0",
        "SAW-CIRC,old-town,-3,30,0.1,0.8,,0.9",  # line 6: negative capacity
        "SAW-CIRC,ring-road,5,30,0.1,1.0,,0.7",
        "GRD-125,harbour,5,22.5,0.1,1.2,0.5,1.0",  # line 8: variance below the mean
        "GRD-125,old-town,5,22.5,0.1,0.8,,0.9",
        "GRD-125,ring-road,5,22.5,0.1,1.0,,0.7",
        "NAIL-GUN,harbour,5,22.5,0.1,1.2,,1.0",  # an item missing two locations (line 11)
        "NAIL-GUN,attic,5,22.5,0.1,1.2,,1.0",
    ]
    response = _upload_csv(client, assortment, lines)
    assert_problem(response, 422)
    found = pointers(response.json())
    assert "/line/6/capacity" in found
    assert "/line/8/demand_variance" in found
    assert "/line/11" in found
    assert "line" in response.json()["detail"]
    assert _counts(engine) == before

    header = client.post(
        f"/v1/assortments/{assortment}/items",
        content="item,location,capacity\nX,harbour,3\n",
        headers={"content-type": "text/csv"},
    )
    assert_problem(header, 422)
    assert pointers(header.json()) == ["/line/1", "/line/1", "/line/1"]
    assert _counts(engine) == before


@sqlite_only
def test_json_lines_and_json_documents(client: TestClient, engine: Engine) -> None:
    assortment = _create(client, truck_capacity_unit="volume")

    def item(code: str, margin: float, **extra: Any) -> dict[str, Any]:
        law = {"dist": "poisson", "mean": 1.0}
        return {
            "item": code,
            "locations": {
                loc: {"capacity": 4, "unit_margin": margin, "demand": law, "replenishment": law}
                for loc in ("harbour", "old-town", "ring-road")
            },
            **extra,
        }

    lines = "\n".join(
        json.dumps(doc)
        for doc in (
            item("DRL-18V", 30.0, unit_volume=0.3),
            item("GRD-125", 20.0, lane_limits={"harbour>old-town": 1}),
        )
    )
    response = client.post(
        f"/v1/assortments/{assortment}/items",
        content=lines,
        headers={"content-type": "application/x-ndjson"},
    )
    assert response.status_code == 200, response.text
    items = client.get(f"/v1/assortments/{assortment}/items").json()["items"]
    grinder = next(i for i in items if i["item"] == "GRD-125")
    spec = client.get(f"/v1/networks/{grinder['network_id']}/versions").json()[0]["spec"]
    lanes = {(lane["from"], lane["to"]): lane["max_units"] for lane in spec["lanes"]}
    # The item's own limit on one lane, the layout's on the others.
    assert lanes == {
        ("harbour", "old-town"): 1,
        ("old-town", "harbour"): 3,
        ("old-town", "ring-road"): 2,
        ("ring-road", "old-town"): 2,
    }

    bad = client.post(
        f"/v1/assortments/{assortment}/items",
        content=json.dumps(item("A", 1.0)) + "\n{not json\n" + json.dumps(item("B", -1.0)),
        headers={"content-type": "application/x-ndjson"},
    )
    assert_problem(bad, 422)
    assert pointers(bad.json()) == [
        "/line/2",
        "/line/3/locations/harbour/unit_margin",
        "/line/3/locations/old-town/unit_margin",
        "/line/3/locations/ring-road/unit_margin",
    ]
    document = client.post(
        f"/v1/assortments/{assortment}/items",
        json={"items": [item("C", 5.0), item("C", 6.0)]},
    )
    assert_problem(document, 422)
    assert pointers(document.json()) == ["/items/1/item"]
    unknown_lane = client.post(
        f"/v1/assortments/{assortment}/items",
        json={"items": [item("D", 5.0, lane_limits={"harbour>ring-road": 1})]},
    )
    assert_problem(unknown_lane, 422)
    assert "unknown lane" in unknown_lane.json()["errors"][0]["detail"]


@sqlite_only
def test_layout_problems_and_media(client: TestClient) -> None:
    bad = client.post(
        "/v1/assortments",
        json={
            **LAYOUT,
            "lanes": [{"from": "harbour", "to": "attic", "unit_cost": 1, "max_units": 1}],
        },
    )
    assert_problem(bad, 422)
    assortment = _create(client)
    assert_problem(client.post("/v1/assortments", json=LAYOUT), 409)
    media = client.post(
        f"/v1/assortments/{assortment}/items", content=b"x", headers={"content-type": "text/plain"}
    )
    assert_problem(media, 415)
    assert_problem(client.get("/v1/assortments/999"), 404)


@sqlite_only
def test_uploads_beyond_the_request_limit_are_streamed(engine: Engine) -> None:
    from tests.service.api_support import open_client

    # Request bodies are capped at 2 KiB here, uploads at 64 KiB: an upload of 40 items
    # (about 6 KiB) passes, a larger one is refused with 413.
    with open_client(engine, max_body_bytes=2048, max_upload_bytes=65_536) as client:
        assortment = _create(client)
        lines = [row for k in range(40) for row in _csv_rows(f"ITEM-{k:03d}", 10.0 + k)]
        assert _upload_csv(client, assortment, lines).json()["created"] == 40
        many = [row for k in range(1500) for row in _csv_rows(f"BIG-{k:04d}", 10.0 + k)]
        assert_problem(_upload_csv(client, assortment, many), 413)


# -- closing reports and pick lists ----------------------------------------------------------

DAY = "2026-11-30"  # a Monday


def _assortment_with_items(
    client: TestClient, engine: Engine, n_items: int, **layout: Any
) -> tuple[int, list[str]]:
    assortment = _create(client, **layout)
    codes = [f"TOOL-{k:03d}" for k in range(n_items)]
    lines = [row for k, code in enumerate(codes) for row in _csv_rows(code, 10.0 + k % 7)]
    assert _upload_csv(client, assortment, lines).status_code == 200
    run_worker(engine)
    return assortment, codes


def _stocks(codes: list[str], seed: int = 7) -> dict[str, dict[str, int]]:
    import numpy as np

    rng = np.random.default_rng(seed)
    locations = ("harbour", "old-town", "ring-road")
    return {loc: {code: int(rng.integers(0, 6)) for code in codes} for loc in locations}


def _report(
    client: TestClient, assortment: int, location: str, counts: dict[str, int], **params: Any
) -> Any:
    return client.put(
        f"/v1/assortments/{assortment}/locations/{location}/closing-report",
        params={"business_date": DAY, **params},
        json={"counts": counts},
    )


def _moves(pick: dict[str, Any]) -> set[tuple[str, str, str, int]]:
    """(item, from, to, units) of a location's pick list."""
    here = pick["location"]
    found = set()
    for line in pick["lines"]:
        found |= {(line["item"], here, s["to"], s["units"]) for s in line["sends"]}
        found |= {(line["item"], r["from"], here, r["units"]) for r in line["receives"]}
    return found


def _close_night(
    client: TestClient, assortment: int, stocks: dict[str, dict[str, int]]
) -> tuple[set[tuple[str, str, str, int]], dict[str, Any]]:
    """Every location reports its counts; the moves of all pick lists, and the night's summary."""
    for location, counts in stocks.items():
        assert _report(client, assortment, location, counts).status_code == 200
    moves: set[tuple[str, str, str, int]] = set()
    for location in stocks:
        pick = client.get(
            f"/v1/assortments/{assortment}/locations/{location}/pick-list",
            params={"business_date": DAY},
        )
        assert pick.status_code == 200, pick.text
        moves |= _moves(pick.json())
    return moves, pick.json()["summary"]


def test_pick_lists_equal_each_items_own_recommendation(client: TestClient, engine: Engine) -> None:
    assortment, codes = _assortment_with_items(client, engine, 12)
    stocks = _stocks(codes)
    # The CSV form for one location, JSON for the others.
    csv_body = "item,units\n" + "\n".join(f"{c},{u}" for c, u in stocks["harbour"].items())
    first = client.put(
        f"/v1/assortments/{assortment}/locations/harbour/closing-report",
        params={"business_date": DAY},
        content=csv_body,
        headers={"content-type": "text/csv"},
    )
    assert first.status_code == 200, first.text
    assert first.json()["missing_locations"] == ["old-town", "ring-road"]
    assert first.json()["pick_list_revision"] is None
    early = client.get(
        f"/v1/assortments/{assortment}/locations/harbour/pick-list", params={"business_date": DAY}
    )
    assert_problem(early, 409)
    assert early.json()["missing_locations"] == ["old-town", "ring-road"]
    assert _report(client, assortment, "old-town", stocks["old-town"]).status_code == 200
    last = _report(client, assortment, "ring-road", stocks["ring-road"])
    assert last.json()["pick_list_revision"] == 1

    picked: set[tuple[str, str, str, int]] = set()
    for location in ("harbour", "old-town", "ring-road"):
        pick = client.get(
            f"/v1/assortments/{assortment}/locations/{location}/pick-list",
            params={"business_date": DAY},
        )
        assert pick.status_code == 200
        picked |= _moves(pick.json())
    items = client.get(f"/v1/assortments/{assortment}/items").json()["items"]
    expected: set[tuple[str, str, str, int]] = set()
    for item in items:
        stock = {loc: stocks[loc][item["item"]] for loc in stocks}
        single = client.post(
            f"/v1/networks/{item['network_id']}/recommendation", json={"stock": stock}
        ).json()
        expected |= {(item["item"], t["from"], t["to"], t["units"]) for t in single["transfers"]}
    assert picked == expected
    assert expected, "the scenario should move something"

    csv_text = client.get(
        f"/v1/assortments/{assortment}/locations/harbour/pick-list",
        params={"business_date": DAY, "format": "csv"},
    ).text
    rows = csv_text.strip().splitlines()
    assert rows[0].split(",") == [
        "business_date",
        "revision",
        "item",
        "move",
        "counterpart",
        "units",
        "unit_cost",
        "item_gain",
    ]
    assert len(rows) - 1 == sum(1 for m in picked if "harbour" in (m[1], m[2]))


def test_corrections_issue_the_next_revision(client: TestClient, engine: Engine) -> None:
    assortment, codes = _assortment_with_items(client, engine, 4)
    stocks = _stocks(codes, seed=3)
    for location, counts in stocks.items():
        assert _report(client, assortment, location, counts).status_code == 200
    url = f"/v1/assortments/{assortment}/locations/harbour/pick-list"
    first = client.get(url, params={"business_date": DAY})
    etag = first.headers["etag"]
    assert (
        client.get(url, params={"business_date": DAY}, headers={"if-none-match": etag}).status_code
        == 304
    )
    changed = {**stocks["harbour"], codes[0]: 5 - stocks["harbour"][codes[0]]}
    refused = _report(client, assortment, "harbour", changed)
    assert_problem(refused, 409)
    corrected = _report(client, assortment, "harbour", changed, correction="true")
    assert corrected.json()["pick_list_revision"] == 2
    assert corrected.json()["corrected"] == 1
    second = client.get(url, params={"business_date": DAY}).json()
    assert second["revision"] == 2
    [note] = second["corrections"]
    assert (note["item"], note["old_units"], note["new_units"]) == (
        codes[0],
        stocks["harbour"][codes[0]],
        changed[codes[0]],
    )
    assert (
        client.get(url, params={"business_date": DAY}, headers={"if-none-match": etag}).status_code
        == 200
    )


@sqlite_only
def test_closing_reports_are_checked_whole(client: TestClient, engine: Engine) -> None:
    assortment, codes = _assortment_with_items(client, engine, 3)
    counts = {code: 2 for code in codes}
    missing = _report(client, assortment, "harbour", {codes[0]: 1})
    assert_problem(missing, 422)
    assert "not counted" in missing.json()["errors"][0]["detail"]
    over = _report(client, assortment, "harbour", {**counts, codes[1]: 6, "NOPE": 1})
    assert_problem(over, 422)
    assert set(pointers(over.json())) == {f"/counts/{codes[1]}", "/counts/NOPE"}
    bad_csv = client.put(
        f"/v1/assortments/{assortment}/locations/harbour/closing-report",
        params={"business_date": DAY},
        content="item,units\nTOOL-000,2\nTOOL-001,two\nTOOL-000,1\n",
        headers={"content-type": "text/csv"},
    )
    assert_problem(bad_csv, 422)
    assert pointers(bad_csv.json()) == ["/line/3/units", "/line/4/item"]
    assert_problem(_report(client, assortment, "attic", counts), 404)
    state = client.get(f"/v1/assortments/{assortment}/closing", params={"business_date": DAY})
    assert state.json()["reported"] == []


def test_shared_trucks_are_never_overloaded(client: TestClient, engine: Engine) -> None:
    # The layout's two busiest lanes carry 3 units a night for all items together.
    lanes = [dict(lane) for lane in LAYOUT["lanes"]]
    for lane in lanes[:2]:
        lane["truck_capacity"] = 3
    assortment, codes = _assortment_with_items(client, engine, 10, lanes=lanes)
    moves, summary = _close_night(client, assortment, _stocks(codes, seed=11))
    for lane in lanes[:2]:
        carried = sum(u for _, a, b, u in moves if (a, b) == (lane["from"], lane["to"]))
        assert carried <= 3
    sharing = summary["sharing"]
    assert sharing["value"] <= sharing["bound"] + 1e-6
    # The trucks bind in this scenario: sharing them costs something.
    assert sharing["sharing_cost"] > 0
    assert max(sharing["lane_load"][:2]) <= 3


def test_trucks_that_do_not_bind_change_nothing(client: TestClient, engine: Engine) -> None:
    lanes = [{**lane, "truck_capacity": 1000} for lane in LAYOUT["lanes"]]
    plain, codes = _assortment_with_items(client, engine, 8)
    trucked, _ = _assortment_with_items(client, engine, 8, name="tools-west", lanes=lanes)
    stocks = _stocks(codes, seed=5)
    found = []
    for assortment in (plain, trucked):
        for location, counts in stocks.items():
            assert _report(client, assortment, location, counts).status_code == 200
        found.append(
            {
                location: _moves(
                    client.get(
                        f"/v1/assortments/{assortment}/locations/{location}/pick-list",
                        params={"business_date": DAY},
                    ).json()
                )
                for location in stocks
            }
        )
    assert found[0] == found[1]
    assert any(found[0].values())


def test_bulk_recommendations_answer_like_single_items(client: TestClient, engine: Engine) -> None:
    assortment, codes = _assortment_with_items(client, engine, 9)
    stocks = _stocks(codes, seed=23)
    by_item = {code: {loc: stocks[loc][code] for loc in stocks} for code in codes}
    response = client.post(
        f"/v1/assortments/{assortment}/recommendations",
        json={"stocks": by_item, "business_date": DAY},
    )
    assert response.status_code == 200, response.text
    answers = response.json()["items"]
    assert [a["item"] for a in answers] == codes
    for answer in answers:
        single = client.post(
            f"/v1/networks/{answer['network_id']}/recommendation",
            json={"stock": by_item[answer["item"]]},
        ).json()
        assert answer["transfers"] == [
            {"from": t["from"], "to": t["to"], "units": t["units"]} for t in single["transfers"]
        ]
        assert answer["expected_value"] == pytest.approx(single["expected_value"], abs=0.01)
        assert answer["value_without_transfers"] == pytest.approx(
            single["value_without_transfers"], abs=0.01
        )
    over = client.post(
        f"/v1/assortments/{assortment}/recommendations",
        json={"stocks": {codes[0]: {"harbour": 9, "old-town": 0, "ring-road": 0}}},
    )
    assert_problem(over, 422)
    assert "outside 0..5" in over.json()["detail"]
    unknown = client.post(
        f"/v1/assortments/{assortment}/recommendations",
        json={"stocks": {"NOPE": {"harbour": 1}, codes[1]: {"harbour": 1}}},
    )
    assert_problem(unknown, 422)
    assert pointers(unknown.json()) == ["/stocks/NOPE", f"/stocks/{codes[1]}"]


def test_a_new_layout_composes_every_item_again(client: TestClient, engine: Engine) -> None:
    assortment = _create(client)
    # The drill keeps the layout's lane limits; the grinder lowers one for itself.
    lines = _csv_rows("DRL-18V", 30.0) + [
        row + ",harbour>old-town:1" for row in _csv_rows("GRD-125", 22.5)
    ]
    header = HEADER + ",lane_limits"
    drill = [row + "," for row in lines[:3]]
    upload = client.post(
        f"/v1/assortments/{assortment}/items",
        content="\n".join([header, *drill, *lines[3:]]) + "\n",
        headers={"content-type": "text/csv"},
    )
    assert upload.status_code == 200, upload.text
    etag = client.get(f"/v1/assortments/{assortment}").headers["etag"]
    assert etag == '"1"'
    dearer = {
        **LAYOUT,
        "lanes": [{**lane, "unit_cost": lane["unit_cost"] + 0.5} for lane in LAYOUT["lanes"]],
    }
    assert_problem(client.put(f"/v1/assortments/{assortment}", json=dearer), 428)
    assert_problem(
        client.put(f"/v1/assortments/{assortment}", json=dearer, headers={"if-match": '"7"'}),
        412,
    )
    renamed = {**dearer, "name": "tools-north"}
    assert_problem(
        client.put(f"/v1/assortments/{assortment}", json=renamed, headers={"if-match": etag}),
        422,
    )
    response = client.put(f"/v1/assortments/{assortment}", json=dearer, headers={"if-match": etag})
    assert response.status_code == 200, response.text
    assert response.headers["etag"] == '"2"'
    assert (response.json()["updated"], response.json()["unchanged"]) == (2, 0)
    items = client.get(f"/v1/assortments/{assortment}/items").json()["items"]
    for item in items:
        assert item["version"] == 2
        spec = client.get(f"/v1/networks/{item['network_id']}/versions").json()[0]["spec"]
        assert [lane["unit_cost"] for lane in spec["lanes"]] == [1.7, 1.7, 1.4, 1.4]
        limits = [lane["max_units"] for lane in spec["lanes"]]
        assert limits == ([1, 3, 2, 2] if item["item"] == "GRD-125" else [3, 3, 2, 2])
        # The item's own numbers are kept.
        assert spec["locations"][0]["demand"] == {
            "dist": "negative_binomial",
            "mean": 1.2,
            "variance": 2.0,
        }
    again = client.put(
        f"/v1/assortments/{assortment}", json=dearer, headers={"if-match": '"2"'}
    ).json()
    assert (again["updated"], again["unchanged"], again["jobs_queued"]) == (0, 2, 0)


def _with_solvent(client: TestClient, lanes: list[dict[str, Any]]) -> tuple[int, list[str]]:
    """An assortment of six tools and a solvent with the tools' numbers, but kept off
    harbour -> old-town (its truck may not carry it); the tools' codes."""
    assortment = _create(client, lanes=lanes)
    tools = [f"TOOL-{k:03d}" for k in range(6)]
    rows = [row + "," for code in tools for row in _csv_rows(code, 30.0)]
    rows += [row + ",harbour>old-town:0" for row in _csv_rows("SOLVENT", 30.0)]
    upload = client.post(
        f"/v1/assortments/{assortment}/items",
        content="\n".join([HEADER + ",lane_limits", *rows]) + "\n",
        headers={"content-type": "text/csv"},
    )
    assert upload.status_code == 200, upload.text
    assert upload.json()["specifications"] == 2
    return assortment, tools


def _lanes_of(client: TestClient, network_id: int) -> list[tuple[str, str]]:
    spec = client.get(f"/v1/networks/{network_id}/versions").json()[0]["spec"]
    return [(lane["from"], lane["to"]) for lane in spec["lanes"]]


def test_an_item_kept_off_a_lane_gets_no_pick_list_line_on_it(
    client: TestClient, engine: Engine
) -> None:
    lanes = [dict(lane) for lane in LAYOUT["lanes"]]
    lanes[0]["truck_capacity"] = 4
    assortment, tools = _with_solvent(client, lanes)
    run_worker(engine)
    items = {
        i["item"]: i for i in client.get(f"/v1/assortments/{assortment}/items").json()["items"]
    }
    assert {i["state"] for i in items.values()} == {"ready"}
    network = items["SOLVENT"]["network_id"]
    assert _lanes_of(client, network) == [
        ("old-town", "harbour"),
        ("old-town", "ring-road"),
        ("ring-road", "old-town"),
    ]

    # A full harbour and an empty old town: each tool on its own would send harbour -> old-town.
    stock = {"harbour": 5, "old-town": 0, "ring-road": 3}
    single = client.post(
        f"/v1/networks/{items[tools[0]]['network_id']}/recommendation", json={"stock": stock}
    ).json()
    assert any((t["from"], t["to"]) == ("harbour", "old-town") for t in single["transfers"])
    stocks = {location: {code: units for code in items} for location, units in stock.items()}
    moves, summary = _close_night(client, assortment, stocks)
    solvent = {(a, b, units) for item, a, b, units in moves if item == "SOLVENT"}
    assert solvent, "the solvent still moves, on the lanes it may use"
    assert all((a, b) != ("harbour", "old-town") for a, b, _ in solvent)
    # Its moves are those its own network recommends (no truck binds on its lanes).
    own = client.post(f"/v1/networks/{network}/recommendation", json={"stock": stock}).json()
    assert solvent == {(t["from"], t["to"], t["units"]) for t in own["transfers"]}
    # The tools share the harbour -> old-town truck, up to its capacity.
    carried = sum(u for _, a, b, u in moves if (a, b) == ("harbour", "old-town"))
    assert 0 < carried <= 4
    assert summary["sharing"]["lane_load"][0] == carried

    answer = client.post(
        f"/v1/assortments/{assortment}/recommendations",
        json={"stocks": {code: stock for code in items}, "business_date": DAY},
    )
    assert answer.status_code == 200, answer.text
    by_item = {a["item"]: a for a in answer.json()["items"]}
    assert {(t["from"], t["to"], t["units"]) for t in by_item["SOLVENT"]["transfers"]} == solvent
    on_lane = [
        t["units"]
        for a in by_item.values()
        for t in a["transfers"]
        if (t["from"], t["to"]) == ("harbour", "old-town")
    ]
    assert sum(on_lane) == carried


@sqlite_only
def test_an_item_stays_off_its_lane_in_a_new_layout_and_keeps_one(client: TestClient) -> None:
    lanes = [dict(lane) for lane in LAYOUT["lanes"]]
    assortment, _ = _with_solvent(client, lanes)
    items = client.get(f"/v1/assortments/{assortment}/items").json()["items"]
    network = next(i["network_id"] for i in items if i["item"] == "SOLVENT")
    dearer = {**LAYOUT, "lanes": [{**lane, "unit_cost": lane["unit_cost"] + 0.5} for lane in lanes]}
    updated = client.put(f"/v1/assortments/{assortment}", json=dearer, headers={"if-match": '"1"'})
    assert updated.status_code == 200, updated.text
    assert updated.json()["updated"] == 7
    assert len(_lanes_of(client, network)) == 3
    assert ("harbour", "old-town") not in _lanes_of(client, network)

    only_that_lane = {**LAYOUT, "lanes": lanes[:1]}
    refused = client.put(
        f"/v1/assortments/{assortment}", json=only_that_lane, headers={"if-match": '"2"'}
    )
    assert_problem(refused, 422)
    assert pointers(refused.json()) == ["/items/SOLVENT"]
    assert "at least one lane" in refused.json()["detail"]

    def upload(limits: dict[str, int]) -> Any:
        law = {"dist": "poisson", "mean": 1.0}
        numbers = {"capacity": 4, "unit_margin": 9.0, "demand": law, "replenishment": law}
        locations = dict.fromkeys(("harbour", "old-town", "ring-road"), numbers)
        return client.post(
            f"/v1/assortments/{assortment}/items",
            json={"items": [{"item": "SOLVENT", "locations": locations, "lane_limits": limits}]},
        )

    closed = upload({f"{lane['from']}>{lane['to']}": 0 for lane in lanes})
    assert_problem(closed, 422)
    assert pointers(closed.json()) == ["/items/0"]
    assert "every lane of the layout to 0" in closed.json()["errors"][0]["detail"]
    negative = upload({"harbour>old-town": -1})
    assert_problem(negative, 422)
    assert pointers(negative.json()) == ["/items/0/lane_limits/harbour>old-town"]


@pytest.mark.parametrize("database_url", ["postgresql"], indirect=True)
def test_a_bulk_upload_refreshes_the_planner_statistics(client: TestClient, engine: Engine) -> None:
    # Fresh statistics say the tables are nearly empty: PostgreSQL would then join thousands of
    # items by nested loops (common practice: ANALYZE after a bulk load, as its manual's
    # "Populating a Database" advises, from memory).
    assortment = _create(client)
    lines = [row for k in range(1_200) for row in _csv_rows(f"BULK-{k:04d}", 10.0 + k % 5)]
    assert _upload_csv(client, assortment, lines).status_code == 200
    with engine.connect() as connection:
        tuples = connection.exec_driver_sql(
            "SELECT reltuples FROM pg_class WHERE relname = 'networks'"
        ).scalar_one()
    assert tuples >= 1_200
