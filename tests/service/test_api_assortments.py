"""Assortments over HTTP: a layout shared by many items, bulk item uploads (CSV, JSON lines,
JSON), all or nothing, and items solved as networks of their own.

The data are scenarios of our own (three hardware stores sharing their power tools)."""

from __future__ import annotations

import json
from typing import Any

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
            item("GRD-125", 20.0, lane_limits={"old-town>ring-road": 0, "harbour>old-town": 1}),
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
    # The item's own limits: one lane closed to it, one lowered, the others the layout's.
    assert lanes == {
        ("harbour", "old-town"): 1,
        ("old-town", "harbour"): 3,
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
