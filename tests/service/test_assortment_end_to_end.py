"""A whole assortment's night, end to end on SQLite and PostgreSQL: 1,000 items from one CSV,
their sales history in one upload, every item calibrated by the workers, every location's
closing report, and each location's pick list checked line by line against what each item's
own network recommends for the same stock (the single-network read path, a separate code path
from the bulk planning).

The data are scenarios of our own: three hardware stores and 1,000 items whose history comes
from a seeded generator of Poisson counts.
"""

from __future__ import annotations

from datetime import date, timedelta
from typing import Any

import numpy as np
from fastapi.testclient import TestClient
from sqlalchemy import Engine

from tests.service.api_support import run_worker

LOCATIONS = ("harbour", "old-town", "ring-road")
LAYOUT: dict[str, Any] = {
    "name": "hardware-ring",
    "locations": [{"id": location} for location in LOCATIONS],
    "lanes": [
        {"from": "harbour", "to": "old-town", "unit_cost": 0.8, "max_units": 2},
        {"from": "old-town", "to": "harbour", "unit_cost": 0.8, "max_units": 2},
        {"from": "old-town", "to": "ring-road", "unit_cost": 0.6, "max_units": 2},
        {"from": "ring-road", "to": "old-town", "unit_cost": 0.6, "max_units": 2},
    ],
}
ITEMS = 1_000
DAYS = 21
CAPACITY = 4
NIGHT = "2026-11-30"


def _items_csv() -> str:
    lines = ["item,location,capacity,unit_margin,holding_cost,demand_mean,replenishment_mean"]
    for k in range(ITEMS):
        margin = 8 + k % 9
        for location in LOCATIONS:
            lines.append(f"IT-{k:04d},{location},{CAPACITY},{margin},0.1,1.0,1.0")
    return "\n".join(lines) + "\n"


def _history_csv(rng: np.random.Generator) -> str:
    """Poisson sales with stock enough never to sell out; a few demand levels per store, so
    that estimates differ between items and stores."""
    lines = ["date,item,location,units_sold,stock_at_open,units_received"]
    first = date(2026, 9, 1)
    for k in range(ITEMS):
        for j, location in enumerate(LOCATIONS):
            demand = (0.3, 0.8, 1.6)[(k + j) % 3]
            sold = rng.poisson(demand, DAYS)
            received = rng.poisson(0.9, DAYS)
            for d in range(DAYS):
                lines.append(
                    f"{first + timedelta(days=d)},IT-{k:04d},{location},{sold[d]},"
                    f"{sold[d] + 2},{received[d]}"
                )
    return "\n".join(lines) + "\n"


def test_an_assortment_from_csv_to_pick_lists(client: TestClient, engine: Engine) -> None:
    rng = np.random.default_rng(16)
    created = client.post("/v1/assortments", json=LAYOUT)
    assert created.status_code == 201, created.text
    assortment = created.json()["id"]
    base = f"/v1/assortments/{assortment}"

    items = client.post(f"{base}/items", content=_items_csv(), headers={"content-type": "text/csv"})
    assert items.status_code == 200, items.text
    assert (items.json()["created"], items.json()["specifications"]) == (ITEMS, 9)

    history = client.post(
        f"{base}/history", content=_history_csv(rng), headers={"content-type": "text/csv"}
    )
    assert history.status_code == 200, history.text
    assert history.json()["inserted"] == ITEMS * len(LOCATIONS) * DAYS

    run = client.post(f"{base}/calibration", json={"items_per_chunk": 250})
    assert run.status_code == 202, run.text
    run_worker(engine)
    done = client.get(f"{base}/calibration/{run.json()['run']}").json()
    assert (done["state"], done["calibrated"], done["failed"]) == ("done", ITEMS, 0)
    states = client.get(base).json()["states"]
    assert states["ready"] == ITEMS, states

    stocks = rng.integers(0, CAPACITY + 1, size=(ITEMS, len(LOCATIONS)))
    for j, location in enumerate(LOCATIONS):
        report = "item,units\n" + "\n".join(f"IT-{k:04d},{int(stocks[k, j])}" for k in range(ITEMS))
        answer = client.put(
            f"{base}/locations/{location}/closing-report",
            params={"business_date": NIGHT},
            content=report,
            headers={"content-type": "text/csv"},
        )
        assert answer.status_code == 200, answer.text
    assert answer.json()["pick_list_revision"] == 1

    picked: set[tuple[str, str, str, int]] = set()
    for location in LOCATIONS:
        pick = client.get(
            f"{base}/locations/{location}/pick-list", params={"business_date": NIGHT}
        ).json()
        for line in pick["lines"]:
            picked |= {(line["item"], location, s["to"], s["units"]) for s in line["sends"]}
            picked |= {(line["item"], r["from"], location, r["units"]) for r in line["receives"]}

    networks = {
        item["item"]: item["network_id"]
        for item in client.get(f"{base}/items", params={"limit": 5_000}).json()["items"]
    }
    codes = sorted(networks)
    batch = client.post(
        "/v1/recommendations/batch",
        json={
            "items": [
                {
                    "network_id": networks[code],
                    "stock": {
                        loc: int(stocks[int(code[3:]), j]) for j, loc in enumerate(LOCATIONS)
                    },
                    "business_date": NIGHT,
                }
                for code in codes
            ]
        },
    )
    assert batch.status_code == 200, batch.text
    expected: set[tuple[str, str, str, int]] = set()
    for code, outcome in zip(codes, batch.json()["items"], strict=True):
        result = outcome["result"]
        assert result is not None, outcome
        # Every item is answered from its calibrated version.
        assert result["version"] == 2
        expected |= {(code, t["from"], t["to"], t["units"]) for t in result["transfers"]}
    assert picked == expected
    assert len(expected) > ITEMS // 10, "the night should move a good share of the items"
