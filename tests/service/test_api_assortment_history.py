"""An assortment's sales history in one upload, and the calibration of every item as one run of
chunk jobs, over HTTP with the worker run in-process.

The data are scenarios of our own (three hardware stores sharing their power tools); the
histories come from a seeded generator of Poisson counts.
"""

from __future__ import annotations

import json
from datetime import UTC, date, datetime, timedelta
from typing import Any

import numpy as np
import pytest
from fastapi.testclient import TestClient
from numpy.testing import assert_allclose
from sqlalchemy import Engine, func, select

from service import assortment_history
from service.db.session import make_session_factory
from service.db.tables import ClosingCount, NetworkVersion, SalesDay, SolveJob
from service.serving import business_date_now
from service.settings import Settings
from service.vocabulary import JobKind
from tests.service.api_support import (
    assert_problem,
    make_key,
    open_client,
    pointers,
    run_worker,
    sqlite_only,
)
from tests.service.test_metrics import Samples, scrape
from tests.service.test_status_page import basic

LOCATIONS = ("harbour", "old-town", "ring-road")
LAYOUT: dict[str, Any] = {
    "name": "tools-west",
    "timezone": "Europe/Berlin",
    "locations": [{"id": location} for location in LOCATIONS],
    "lanes": [
        {"from": "harbour", "to": "old-town", "unit_cost": 1.2, "max_units": 2},
        {"from": "old-town", "to": "harbour", "unit_cost": 1.2, "max_units": 2},
        {"from": "old-town", "to": "ring-road", "unit_cost": 0.9, "max_units": 2},
        {"from": "ring-road", "to": "old-town", "unit_cost": 0.9, "max_units": 2},
    ],
}
ITEM_HEADER = "item,location,capacity,unit_margin,holding_cost,demand_mean,replenishment_mean"
HISTORY_HEADER = "date,item,location,units_sold,stock_at_open,units_received"
FIRST_DAY = date(2026, 6, 1)


def _code(k: int) -> str:
    return f"TL-{k:04d}"


def _assortment(client: TestClient, n_items: int) -> tuple[int, dict[str, int]]:
    """A new assortment with `n_items` items of identical numbers (one specification); the
    items' network ids by code."""
    response = client.post("/v1/assortments", json=LAYOUT)
    assert response.status_code == 201, response.text
    assortment = int(response.json()["id"])
    lines = [ITEM_HEADER] + [
        f"{_code(k)},{location},4,20,0.1,1.0,1.0" for k in range(n_items) for location in LOCATIONS
    ]
    response = client.post(
        f"/v1/assortments/{assortment}/items",
        content="\n".join(lines) + "\n",
        headers={"content-type": "text/csv"},
    )
    assert response.status_code == 200, response.text
    page = client.get(f"/v1/assortments/{assortment}/items", params={"limit": 5000}).json()
    return assortment, {item["item"]: item["network_id"] for item in page["items"]}


def _history(
    rng: np.random.Generator, codes: list[str], days: int
) -> tuple[list[str], dict[tuple[str, str], tuple[float, float]]]:
    """CSV lines (header first) of Poisson sales and receipts with stock enough never to sell
    out, and the (demand, replenishment) means each item and location was drawn with."""
    lines = [HISTORY_HEADER]
    means = {}
    for code in codes:
        for location in LOCATIONS:
            demand, receipts = rng.uniform(0.5, 3.0), rng.uniform(0.3, 2.5)
            means[(code, location)] = (demand, receipts)
            sold = rng.poisson(demand, days)
            received = rng.poisson(receipts, days)
            for d in range(days):
                day = FIRST_DAY + timedelta(days=d)
                at_open = int(sold[d]) + 5 + d % 3
                lines.append(f"{day},{code},{location},{sold[d]},{at_open},{received[d]}")
    return lines, means


def _post_csv(client: TestClient, assortment: int, lines: list[str]) -> Any:
    return client.post(
        f"/v1/assortments/{assortment}/history",
        content="\n".join(lines) + "\n",
        headers={"content-type": "text/csv"},
    )


def _rows(engine: Engine) -> int:
    with make_session_factory(engine)() as session:
        return session.scalar(select(func.count()).select_from(SalesDay)) or 0


def test_history_is_stored_under_each_items_network(client: TestClient, engine: Engine) -> None:
    assortment, networks = _assortment(client, 3)
    lines, _ = _history(np.random.default_rng(7), [_code(0), _code(1)], 10)
    response = _post_csv(client, assortment, lines)
    assert response.status_code == 200, response.text
    assert response.json() == {
        "assortment_id": assortment,
        "received": 60,
        "inserted": 60,
        "replaced": 0,
        "items": 2,
    }
    # The item's own network answers its history, as for any network.
    single = client.get(f"/v1/networks/{networks[_code(1)]}/history").json()
    assert [(row["location"], row["days"]) for row in single["locations"]] == [
        (location, 10) for location in sorted(LOCATIONS)
    ]
    summary = client.get(f"/v1/assortments/{assortment}/history").json()
    assert summary["items"] == 3
    assert summary["items_with_history"] == 2
    assert (summary["rows"], summary["days"]) == (60, 10)
    assert summary["first_date"] == str(FIRST_DAY)
    assert summary["last_date"] == str(FIRST_DAY + timedelta(days=9))
    assert [(loc["location"], loc["rows"]) for loc in summary["locations"]] == [
        (location, 20) for location in sorted(LOCATIONS)
    ]


def test_a_repeated_day_replaces_the_stored_one(client: TestClient, engine: Engine) -> None:
    assortment, networks = _assortment(client, 2)
    first = [HISTORY_HEADER, f"{FIRST_DAY},{_code(0)},harbour,2,6,1"]
    assert _post_csv(client, assortment, first).json()["inserted"] == 1
    again = [
        HISTORY_HEADER,
        f"{FIRST_DAY},{_code(0)},harbour,3,6,0",
        f"{FIRST_DAY},{_code(0)},old-town,1,2,0",
    ]
    body = _post_csv(client, assortment, again).json()
    assert (body["inserted"], body["replaced"]) == (1, 1)
    with make_session_factory(engine)() as session:
        stored = session.execute(
            select(SalesDay.units_sold, SalesDay.units_received).where(
                SalesDay.network_id == networks[_code(0)], SalesDay.location_id == "harbour"
            )
        ).all()
    assert [tuple(row) for row in stored] == [(3, 0)]


def test_bad_rows_are_reported_by_line_and_nothing_is_stored(
    client: TestClient, engine: Engine
) -> None:
    assortment, _ = _assortment(client, 2)
    good = f"{FIRST_DAY},{_code(0)},harbour,2,6,1"
    # Rows that are not rows: refused as they are read.
    unreadable = [
        HISTORY_HEADER,
        good,
        f"{FIRST_DAY},{_code(1)},harbour,two,6,1",  # line 3: not a number
        f"2026-13-01,{_code(1)},old-town,1,6,1",  # 4: no such date
        f"{FIRST_DAY},{_code(1)},ring-road,-1,6,1",  # 5: a negative count
        f"{FIRST_DAY},{_code(1)},ring-road,1,6",  # 6: a field short
    ]
    body = assert_problem(_post_csv(client, assortment, unreadable), 422, "invalid-input")
    assert pointers(body) == ["/line/3/units_sold", "/line/4/date", "/line/5/units_sold", "/line/6"]
    # Rows the assortment refuses.
    lines = [
        HISTORY_HEADER,
        good,  # line 2
        f"{FIRST_DAY},NOPE-1,harbour,2,6,1",  # 3: unknown item
        f"{FIRST_DAY},{_code(1)},attic,2,6,1",  # 4: unknown location
        f"{FIRST_DAY},{_code(1)},old-town,7,6,1",  # 5: more sold than on hand
        f"{date.today() + timedelta(days=3)},{_code(1)},old-town,1,6,1",  # 6: days ahead
        good,  # 7: the same day twice
    ]
    body = assert_problem(_post_csv(client, assortment, lines), 422, "invalid-input")
    assert pointers(body) == [
        "/line/3/item",
        "/line/4/location",
        "/line/5/units_sold",
        "/line/6/date",
        "/line/7",
    ]
    assert "nothing of it stored" in body["detail"]
    assert _rows(engine) == 0
    header = assert_problem(
        _post_csv(client, assortment, ["date,item,location,units_sold,stock", good]), 422
    )
    assert pointers(header) == ["/line/1"] * 3


@sqlite_only
def test_the_three_forms_store_the_same_days(client: TestClient, engine: Engine) -> None:
    assortment, _ = _assortment(client, 2)
    lines, _ = _history(np.random.default_rng(3), [_code(0), _code(1)], 4)
    rows = [
        dict(
            zip(
                HISTORY_HEADER.split(","),
                [int(v) if v.isdigit() else v for v in line.split(",")],
                strict=True,
            )
        )
        for line in lines[1:]
    ]
    assert _post_csv(client, assortment, lines).json()["inserted"] == 24
    as_lines = client.post(
        f"/v1/assortments/{assortment}/history",
        content="\n".join(json.dumps(row) for row in rows),
        headers={"content-type": "application/x-ndjson"},
    ).json()
    assert (as_lines["inserted"], as_lines["replaced"]) == (0, 24)
    document = client.post(f"/v1/assortments/{assortment}/history", json={"rows": rows}).json()
    assert (document["inserted"], document["replaced"]) == (0, 24)
    bad = dict(rows[0], units_sold=1.5)
    body = assert_problem(
        client.post(f"/v1/assortments/{assortment}/history", json={"rows": [rows[1], bad]}), 422
    )
    assert pointers(body) == ["/rows/1/units_sold"]
    assert _rows(engine) == 24
    unsupported = client.post(
        f"/v1/assortments/{assortment}/history",
        content="x",
        headers={"content-type": "text/plain"},
    )
    assert_problem(unsupported, 415)
    assert_problem(client.get("/v1/assortments/999/history"), 404)


def _spec_means(spec: dict[str, Any]) -> dict[str, tuple[float, float]]:
    """(demand mean, replenishment mean) per location of a stored specification (a weekly law:
    the mean of its days)."""

    def mean(law: dict[str, Any]) -> float:
        if "weekly" in law:
            return float(np.mean([day["mean"] for day in law["weekly"].values()]))
        return float(law["mean"])

    return {
        loc["id"]: (mean(loc["demand"]), mean(loc["replenishment"])) for loc in spec["locations"]
    }


def test_calibrating_every_item_estimates_its_history_and_queues_its_solves(
    client: TestClient, engine: Engine
) -> None:
    n_items, n_days = 200, 120
    assortment, networks = _assortment(client, n_items)
    run_worker(engine)  # the one shared specification
    codes = sorted(networks)
    with_history = codes[:-4]  # four items have no history at all
    lines, drawn = _history(np.random.default_rng(2026), with_history, n_days)
    assert _post_csv(client, assortment, lines).status_code == 200

    started = client.post(f"/v1/assortments/{assortment}/calibration", json={"items_per_chunk": 40})
    assert started.status_code == 202, started.text
    run = started.json()
    assert started.headers["location"] == f"/v1/assortments/{assortment}/calibration/{run['run']}"
    assert (run["state"], run["chunks"], run["chunks_queued"], run["items"]) == (
        "queued",
        5,
        5,
        n_items,
    )
    with make_session_factory(engine)() as session:
        chunks = session.scalars(
            select(SolveJob.params).where(SolveJob.kind == JobKind.CALIBRATE.value)
        ).all()
    # Each chunk names its own items: together every item once.
    named = [code for text in chunks for code in json.loads(text or "{}")["items"]]
    assert sorted(named) == codes

    run_worker(engine)
    done = client.get(f"/v1/assortments/{assortment}/calibration/{run['run']}").json()
    assert (done["state"], done["chunks_done"], done["chunks_failed"]) == ("done", 5, 0)
    assert (done["calibrated"], done["unchanged"], done["skipped"], done["failed"]) == (
        len(with_history),
        0,
        4,
        0,
    )

    items = client.get(f"/v1/assortments/{assortment}/items", params={"limit": 5000}).json()
    by_code = {item["item"]: item for item in items["items"]}
    for code in with_history:
        # A new version, whose solves were queued and run by the worker above.
        assert (by_code[code]["version"], by_code[code]["state"]) == (2, "ready")
    for code in codes[-4:]:
        assert by_code[code]["version"] == 1

    history = np.array([line.split(",") for line in lines[1:]], dtype=object)
    estimated, sample, truth = [], [], []
    hashes = set()
    with make_session_factory(engine)() as session:
        for code in with_history:
            version = session.scalars(
                select(NetworkVersion).where(
                    NetworkVersion.network_id == networks[code], NetworkVersion.number == 2
                )
            ).one()
            assert version.calibrated_at is not None
            hashes.add(version.spec_hash)
            means = _spec_means(json.loads(version.spec_json))
            for location in LOCATIONS:
                mine = history[(history[:, 1] == code) & (history[:, 2] == location)]
                estimated.append(means[location])
                sample.append((mine[:, 3].astype(float).mean(), mine[:, 5].astype(float).mean()))
                truth.append(drawn[(code, location)])
    # One solve queued per new specification (the assortment's one criterion).
    assert done["jobs_queued"] == len(hashes)
    estimated_a, sample_a, truth_a = np.array(estimated), np.array(sample), np.array(truth)
    # No day sold out, so the censored estimate is the uncensored one: the maximum-likelihood
    # mean of Poisson or negative binomial counts is the sample mean (a closed form; a weekly
    # law's days average to it up to the one extra weekday in 120 days).
    assert_allclose(estimated_a, sample_a, rtol=0.02, atol=0.02)
    # And the sample mean of n Poisson(lambda) days is within 4 standard errors sqrt(lambda/n)
    # of lambda for nearly all of 2 x 588 series (normal approximation, from memory).
    errors = np.abs(estimated_a - truth_a) / np.sqrt(truth_a / n_days)
    assert np.mean(errors < 4) > 0.995

    largest = done["largest_changes"]
    assert len(largest) == 20
    assert [c["change"] for c in largest] == sorted((c["change"] for c in largest), reverse=True)
    top = largest[0]
    # The change reported is that of the stored versions: from 1.0 (the upload) to the new mean.
    which = 0 if top["parameter"].startswith("demand") else 1
    assert top["old"] == pytest.approx(1.0)  # Poisson: the variance is the mean
    if top["parameter"].endswith("_mean"):
        row = with_history.index(top["item"]) * len(LOCATIONS) + LOCATIONS.index(top["location"])
        assert top["new"] == pytest.approx(estimated_a[row, which], rel=1e-6)
    assert top["change"] == pytest.approx(abs(top["new"] - top["old"]) / max(abs(top["old"]), 0.05))

    # Calibrating again from the same history changes nothing.
    again = client.post(f"/v1/assortments/{assortment}/calibration").json()
    run_worker(engine)
    second = client.get(f"/v1/assortments/{assortment}/calibration/{again['run']}").json()
    assert (second["calibrated"], second["unchanged"], second["skipped"]) == (
        0,
        len(with_history),
        4,
    )


def test_status_page_and_metrics_show_each_assortment(client: TestClient, engine: Engine) -> None:
    assortment, networks = _assortment(client, 3)
    key = make_key(engine, scope="read")
    tonight = business_date_now(LAYOUT["timezone"], None)
    with make_session_factory(engine).begin() as session:
        # Two items counted at the harbour tonight, one yesterday (which does not count).
        for code, day in ((_code(0), tonight), (_code(1), tonight), (_code(2), FIRST_DAY)):
            session.add(
                ClosingCount(
                    network_id=networks[code], location_id="harbour", business_date=day, units=2
                )
            )
        session.add(
            ClosingCount(
                network_id=networks[_code(0)],
                location_id="old-town",
                business_date=tonight,
                units=1,
            )
        )

    def items(samples: Samples) -> dict[str, float]:
        return {
            state: samples[
                (
                    "stockrelay_assortment_items",
                    frozenset({("assortment", str(assortment)), ("state", state)}),
                )
            ]
            for state in ("ready", "waiting", "failed", "not_requested")
        }

    assert items(scrape(client)) == {"ready": 0, "waiting": 3, "failed": 0, "not_requested": 0}
    page = client.get("/status", headers=basic(key)).text
    row = page.split(f'data-assortment="{assortment}"')[1].split("</tr>")[0]
    assert '<td class="num" data-state="waiting">3</td>' in row
    assert "harbour 2 of 3 · old-town 1 of 3 · ring-road 0 of 3" in row
    assert tonight.isoformat() in row

    run_worker(engine)
    samples = scrape(client)
    assert items(samples) == {"ready": 3, "waiting": 0, "failed": 0, "not_requested": 0}
    locations = {
        state: samples[
            (
                "stockrelay_assortment_closing_locations",
                frozenset({("assortment", str(assortment)), ("state", state)}),
            )
        ]
        for state in ("complete", "partial", "none")
    }
    assert locations == {"complete": 0, "partial": 2, "none": 1}
    page = client.get("/status", headers=basic(key)).text
    assert '<td class="num" data-state="ready">3</td>' in page


@sqlite_only
def test_calibration_runs_refuse_what_they_cannot_do(client: TestClient, engine: Engine) -> None:
    empty = client.post("/v1/assortments", json={**LAYOUT, "name": "tools-empty"}).json()["id"]
    assert_problem(client.post(f"/v1/assortments/{empty}/calibration"), 409, "conflict")
    assortment, _ = _assortment(client, 2)
    body = assert_problem(
        client.post(f"/v1/assortments/{assortment}/calibration", json={"items_per_chunk": 0}),
        422,
    )
    assert pointers(body) == ["/items_per_chunk"]
    run = client.post(f"/v1/assortments/{assortment}/calibration").json()["run"]
    # A run belongs to its assortment; a chunk's job is read through its run.
    assert_problem(client.get(f"/v1/assortments/{empty}/calibration/{run}"), 404)
    assert_problem(client.get(f"/v1/assortments/{assortment}/calibration/{run + 1}"), 404)
    job = assert_problem(client.get(f"/v1/jobs/{run}"), 404)
    assert f"/v1/assortments/{assortment}/calibration/{run}" in job["detail"]
    reader = make_key(engine, scope="read")
    refused = client.post(
        f"/v1/assortments/{assortment}/calibration",
        headers={"Authorization": f"Bearer {reader}"},
    )
    assert_problem(refused, 403)


def test_an_item_changed_while_estimated_keeps_its_new_numbers(
    client: TestClient, engine: Engine
) -> None:
    assortment, networks = _assortment(client, 3)
    lines, _ = _history(np.random.default_rng(11), sorted(networks), 60)
    assert _post_csv(client, assortment, lines).status_code == 200
    run = client.post(f"/v1/assortments/{assortment}/calibration").json()["run"]
    factory = make_session_factory(engine)
    with factory() as session:
        params = json.loads(session.get_one(SolveJob, run).params or "{}")
        estimates = assortment_history.estimate_chunk(session, 1, params, Settings().size_limits)
    assert sorted(estimates.versions) == sorted(networks)
    # Meanwhile an upload gives the first item new numbers (its version 2).
    changed = [ITEM_HEADER] + [f"{_code(0)},{location},4,25,0.1,1.0,1.0" for location in LOCATIONS]
    response = client.post(
        f"/v1/assortments/{assortment}/items",
        content="\n".join(changed) + "\n",
        headers={"content-type": "text/csv"},
    )
    assert response.json()["updated"] == 1
    with factory.begin() as session:
        report = assortment_history.apply_chunk(session, 1, estimates, datetime.now(UTC))
    assert (report["calibrated"], report["failed"]) == (2, 1)
    assert report["failures"][0]["item"] == _code(0)
    items = client.get(f"/v1/assortments/{assortment}/items").json()["items"]
    assert [(item["item"], item["version"]) for item in items] == [
        (_code(0), 2),  # the upload's version, not overwritten by the estimates
        (_code(1), 2),
        (_code(2), 2),
    ]
    with factory() as session:
        first = session.scalars(
            select(NetworkVersion).where(
                NetworkVersion.network_id == networks[_code(0)], NetworkVersion.number == 2
            )
        ).one()
    assert first.calibrated_at is None
    assert json.loads(first.spec_json)["locations"][0]["unit_margin"] == 25


@sqlite_only
def test_an_upload_past_the_limit_is_refused_whole(engine: Engine) -> None:
    with open_client(engine, max_upload_bytes=4096) as small:
        assortment, networks = _assortment(small, 2)
        lines, _ = _history(np.random.default_rng(5), sorted(networks), 40)
        assert len("\n".join(lines)) > 4096
        assert_problem(_post_csv(small, assortment, lines), 413, "body-too-large")
        assert _rows(engine) == 0
        assert _post_csv(small, assortment, lines[:20]).status_code == 200
