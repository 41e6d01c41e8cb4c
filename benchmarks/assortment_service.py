"""The service's part of the assortment benchmark (benchmarks/assortment.py runs these sections):
items created, solved and closed through the HTTP API and real worker processes.

Scenario of our own: a hardware chain of 4 stores (quay, mill, abbey, fort) on a ring road, lanes
both ways between neighbours (8 lanes, 2 units of an item per lane a night), and N items (5,000;
1,000 with --quick) drawn from D distinct parameter sets (250; 60 with --quick): capacities 4 to
7 per store, margins 6 to 18, Poisson or negative binomial demand, Poisson replenishment. Items
with identical numbers share one specification, so a full assortment queues D solves, not N:
the deduplication shows in the solve figures.

Sections:

* create: the items as one CSV upload (POST /v1/assortments/{id}/items), items per second;
* solve: `stockrelay worker --until-idle` processes (1, then 2) against SQLite and, when a
  server answers at 127.0.0.1:5432, PostgreSQL (a scratch database of its own): solve jobs and
  items made ready per second, wall clock from the first worker's start to the last one's exit
  (start-up included);
* closing: the four stores' closing reports; the last report plans every item and keeps the
  pick lists: seconds from the last report's request to its answer, with the decoded policies
  not yet cached (first night) and cached (a correction of one count, which plans the night
  again), and the four pick lists read;
* bulk_recommendations: POST /v1/assortments/{id}/recommendations for every item at once,
  item-locations per second (median of 5, policies cached).

Everything runs in this process (FastAPI's TestClient, the app on a scratch database) except the
workers, which are real processes.
"""

from __future__ import annotations

import os
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

import numpy as np
from fastapi.testclient import TestClient

from service.auth import create_key
from service.db.keys import get_or_create_tenant
from service.db.migrate import upgrade
from service.db.session import make_engine, make_session_factory
from service.main import create_app
from service.settings import Settings

__all__ = ["LOCATIONS", "run_service_sections"]

ROOT = Path(__file__).resolve().parents[1]
LOCATIONS = ("quay", "mill", "abbey", "fort")
POSTGRES_ADMIN = "postgresql+psycopg://postgres@127.0.0.1:5432/postgres"
BENCH_DATABASE = "stockrelay_bench"
DAY = "2026-11-30"


def layout() -> dict[str, Any]:
    lanes = []
    for k, here in enumerate(LOCATIONS):
        there = LOCATIONS[(k + 1) % len(LOCATIONS)]
        cost = round(0.7 + 0.2 * k, 2)
        lanes += [
            {"from": here, "to": there, "unit_cost": cost, "max_units": 2},
            {"from": there, "to": here, "unit_cost": cost, "max_units": 2},
        ]
    return {
        "name": "ring-road hardware",
        "locations": [{"id": i} for i in LOCATIONS],
        "lanes": lanes,
    }


def items_csv(items: int, distinct: int, seed: int = 0) -> tuple[str, list[list[int]]]:
    """The items as CSV, and each item's capacities (in LOCATIONS order)."""
    rng = np.random.default_rng(seed)
    sets = []
    for _ in range(distinct):
        rows = []
        for location in LOCATIONS:
            capacity = int(rng.integers(4, 8))
            mean = round(float(rng.uniform(0.04, 0.25) * capacity), 2)
            variance = round(mean * 1.8, 2) if rng.random() < 0.4 else ""
            supply = round(mean * float(rng.uniform(0.6, 1.4)), 2)
            margin = round(float(rng.uniform(6, 18)), 1)
            rows.append((location, capacity, margin, mean, variance, supply))
        sets.append(rows)
    lines = [
        "item,location,capacity,unit_margin,holding_cost,demand_mean,demand_variance,"
        "replenishment_mean"
    ]
    capacities = []
    for k in range(items):
        chosen = sets[k % distinct]
        capacities.append([row[1] for row in chosen])
        for location, capacity, margin, mean, variance, supply in chosen:
            lines.append(
                f"ITEM-{k:05d},{location},{capacity},{margin},0.05,{mean},{variance},{supply}"
            )
    return "\n".join(lines) + "\n", capacities


def _postgres_url() -> str | None:
    """A scratch PostgreSQL database, created afresh; None when no server answers."""
    from sqlalchemy import create_engine, text

    try:
        admin = create_engine(POSTGRES_ADMIN, isolation_level="AUTOCOMMIT")
        with admin.connect() as connection:
            connection.execute(text(f"DROP DATABASE IF EXISTS {BENCH_DATABASE} WITH (FORCE)"))
            connection.execute(text(f"CREATE DATABASE {BENCH_DATABASE}"))
        admin.dispose()
    except Exception:
        return None
    return POSTGRES_ADMIN.rsplit("/", 1)[0] + f"/{BENCH_DATABASE}"


def _fresh(url: str) -> tuple[str, str]:
    engine = make_engine(url)
    upgrade(engine)
    with make_session_factory(engine).begin() as session:
        key = create_key(session, get_or_create_tenant(session, "bench"), "write")[1]
    engine.dispose()
    return url, key


def _client(url: str, key: str) -> TestClient:
    client = TestClient(create_app(Settings(database_url=url)))
    client.headers["Authorization"] = f"Bearer {key}"
    return client


def _create(client: TestClient, csv_text: str) -> tuple[int, float]:
    created = client.post("/v1/assortments", json=layout())
    assert created.status_code == 201, created.text
    assortment = int(created.json()["id"])
    started = time.perf_counter()
    upload = client.post(
        f"/v1/assortments/{assortment}/items",
        content=csv_text,
        headers={"content-type": "text/csv"},
    )
    seconds = time.perf_counter() - started
    assert upload.status_code == 200, upload.text[:500]
    return assortment, seconds


def _solve(url: str, workers: int) -> dict[str, Any]:
    env = {**os.environ, "STOCKRELAY_DATABASE_URL": url, "OPENBLAS_NUM_THREADS": "1"}
    started = time.perf_counter()
    processes = [
        subprocess.Popen(
            [sys.executable, "-m", "service.cli", "worker", "--until-idle"],
            cwd=ROOT,
            env=env,
            stdout=subprocess.DEVNULL,
            stderr=subprocess.DEVNULL,
        )
        for _ in range(workers)
    ]
    for process in processes:
        process.wait(timeout=3600)
    return {"workers": workers, "seconds": time.perf_counter() - started}


def _state(client: TestClient, assortment: int) -> dict[str, Any]:
    state: dict[str, Any] = client.get(f"/v1/assortments/{assortment}").json()["states"]
    return state


def solve_rows(csv_text: str, items: int, distinct: int) -> list[dict[str, Any]]:
    rows = []
    targets: list[tuple[str, str | None]] = [("sqlite", None), ("postgresql", "pg")]
    for database, marker in targets:
        for workers in (1, 2):
            if marker is None:
                folder = tempfile.mkdtemp(prefix="stockrelay-bench-")
                url = f"sqlite:///{folder}/bench.db"
            else:
                found = _postgres_url()
                if found is None:
                    rows.append({"database": database, "workers": workers, "skipped": "no server"})
                    continue
                url = found
            url, key = _fresh(url)
            with _client(url, key) as client:
                assortment, _ = _create(client, csv_text)
                run = _solve(url, workers)
                state = _state(client, assortment)
            rows.append(
                {
                    "database": database,
                    "workers": workers,
                    "items": items,
                    "specifications": state["specifications"],
                    "ready": state["ready"],
                    "seconds": run["seconds"],
                    "jobs_per_second": state["specifications"] / run["seconds"],
                    "items_per_second": state["ready"] / run["seconds"],
                }
            )
    return rows


def closing_rows(
    client: TestClient, assortment: int, capacities: list[list[int]], seed: int = 1
) -> dict[str, Any]:
    rng = np.random.default_rng(seed)
    caps = np.array(capacities)
    stocks = rng.integers(0, caps + 1)
    codes = [f"ITEM-{k:05d}" for k in range(caps.shape[0])]
    bodies = [
        "item,units\n"
        + "\n".join(f"{c},{int(u)}" for c, u in zip(codes, stocks[:, j], strict=True))
        for j in range(len(LOCATIONS))
    ]

    def report(j: int, **params: str) -> float:
        started = time.perf_counter()
        answer = client.put(
            f"/v1/assortments/{assortment}/locations/{LOCATIONS[j]}/closing-report",
            params={"business_date": DAY, **params},
            content=bodies[j],
            headers={"content-type": "text/csv"},
        )
        assert answer.status_code == 200, answer.text[:500]
        return time.perf_counter() - started

    for j in range(len(LOCATIONS) - 1):
        report(j)
    cold = report(len(LOCATIONS) - 1)
    started = time.perf_counter()
    for location in LOCATIONS:
        pick = client.get(
            f"/v1/assortments/{assortment}/locations/{location}/pick-list",
            params={"business_date": DAY},
        )
        assert pick.status_code == 200
    reads = time.perf_counter() - started
    summary = client.get(f"/v1/assortments/{assortment}/closing", params={"business_date": DAY})
    # A correction of one count plans the whole night again, now with every policy cached.
    stocks[0, 0] = (stocks[0, 0] + 1) % (caps[0, 0] + 1)
    bodies[0] = "item,units\n" + "\n".join(
        f"{c},{int(u)}" for c, u in zip(codes, stocks[:, 0], strict=True)
    )
    warm = report(0, correction="true")
    return {
        "items": len(codes),
        "last_report_seconds_cold": cold,
        "last_report_seconds_warm": warm,
        "pick_lists_read_seconds": reads,
        "units_moved": summary.json()["summary"]["units_moved"],
        "planning_seconds": summary.json()["summary"]["seconds"],
    }


def bulk_rows(client: TestClient, assortment: int, capacities: list[list[int]]) -> dict[str, Any]:
    rng = np.random.default_rng(2)
    caps = np.array(capacities)
    stocks = rng.integers(0, caps + 1)
    body = {
        "stocks": {
            f"ITEM-{k:05d}": {loc: int(stocks[k, j]) for j, loc in enumerate(LOCATIONS)}
            for k in range(caps.shape[0])
        },
        "business_date": DAY,
    }
    times = []
    for _ in range(5):
        started = time.perf_counter()
        answer = client.post(f"/v1/assortments/{assortment}/recommendations", json=body)
        times.append(time.perf_counter() - started)
        assert answer.status_code == 200, answer.text[:500]
    seconds = statistics.median(times)
    item_locations = caps.shape[0] * len(LOCATIONS)
    return {
        "items": caps.shape[0],
        "seconds": seconds,
        "item_locations_per_second": item_locations / seconds,
    }


def run_service_sections(quick: bool) -> dict[str, Any]:
    items, distinct = (1_000, 60) if quick else (5_000, 250)
    csv_text, capacities = items_csv(items, distinct)
    folder = tempfile.mkdtemp(prefix="stockrelay-bench-")
    url, key = _fresh(f"sqlite:///{folder}/bench.db")
    with _client(url, key) as client:
        assortment, create_seconds = _create(client, csv_text)
        _solve(url, 1)
        closing = closing_rows(client, assortment, capacities)
        bulk = bulk_rows(client, assortment, capacities)
    return {
        "create": {
            "items": items,
            "distinct": distinct,
            "seconds": create_seconds,
            "items_per_second": items / create_seconds,
        },
        "solve": solve_rows(csv_text, items, distinct),
        "closing": closing,
        "bulk_recommendations": bulk,
    }


def print_service(report: dict[str, Any]) -> None:
    create = report["create"]
    print(
        f"\ncreate: {create['items']:,} items ({create['distinct']} distinct) in "
        f"{create['seconds']:.2f} s, {create['items_per_second']:,.0f} items/s"
    )
    print("\n| database | workers | items | specifications | seconds | jobs/s | items ready/s |")
    print("|---|---:|---:|---:|---:|---:|---:|")
    for row in report["solve"]:
        if "skipped" in row:
            print(f"| {row['database']} | {row['workers']} | skipped: {row['skipped']} | | | | |")
            continue
        print(
            f"| {row['database']} | {row['workers']} | {row['items']:,} | "
            f"{row['specifications']} | {row['seconds']:.1f} | {row['jobs_per_second']:.1f} | "
            f"{row['items_per_second']:.0f} |"
        )
    closing = report["closing"]
    print(
        f"\nclosing, {closing['items']:,} items x {len(LOCATIONS)} stores: last report to pick "
        f"lists {closing['last_report_seconds_cold']:.2f} s (policies not cached), "
        f"{closing['last_report_seconds_warm']:.2f} s (cached); planning alone "
        f"{closing['planning_seconds']:.2f} s; four pick lists read in "
        f"{closing['pick_lists_read_seconds']:.2f} s; {closing['units_moved']} units moved"
    )
    bulk = report["bulk_recommendations"]
    print(
        f"bulk recommendations: {bulk['items']:,} items in {bulk['seconds']:.3f} s, "
        f"{bulk['item_locations_per_second']:,.0f} item-locations/s"
    )


if __name__ == "__main__":
    quick = "--quick" in sys.argv
    result = run_service_sections(quick)
    print_service(result)
