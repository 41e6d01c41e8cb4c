"""Benchmark of an assortment's history upload and calibration: 1,000 items x 4 stores x 120 days
(480,000 rows) in one CSV upload, on SQLite and PostgreSQL.

Usage: .venv/bin/python benchmarks/assortment_history.py [--items N] [--days N] [--calibrate]
       [--workers N] [--only sqlite|postgresql] [--out PATH]

The app runs in-process (Starlette's TestClient: parsing, checks and storage, no network), on a
fresh SQLite file and a scratch PostgreSQL database (127.0.0.1:5432, trust auth; skipped when no
server answers). The upload is sent twice: the first stores every day, the second replaces
every day. With --calibrate, every item is calibrated by one in-process worker (the run's
chunks one after another), or with --workers N by N `stockrelay worker` processes sharing the
run, and the items per second from the run's start to its last chunk are reported. The
scenario is our own: four hardware stores selling power tools, Poisson sales and receipts from
a seeded generator.
"""

from __future__ import annotations

import argparse
import json
import sys
import tempfile
import time
from collections.abc import Iterator
from contextlib import contextmanager
from datetime import date, timedelta
from pathlib import Path
from typing import Any

import numpy as np
from fastapi.testclient import TestClient

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "benchmarks"))

import api  # noqa: E402  (scratch databases, shared with benchmarks/api.py)
import store  # noqa: E402  (worker processes, shared with benchmarks/store.py)

from service.auth import create_key  # noqa: E402
from service.db.keys import get_or_create_tenant  # noqa: E402
from service.db.migrate import upgrade  # noqa: E402
from service.db.session import make_engine, make_session_factory  # noqa: E402
from service.main import create_app  # noqa: E402
from service.settings import Settings  # noqa: E402
from service.worker import Worker  # noqa: E402

DEFAULT_OUT = ROOT / "benchmarks" / "results" / "assortment_history.json"
STORES = ("harbour", "old-town", "ring-road", "quay")
LAYOUT: dict[str, Any] = {
    "name": "tools-bench",
    "timezone": "Europe/Berlin",
    "locations": [{"id": name} for name in STORES],
    "lanes": [
        {"from": a, "to": b, "unit_cost": 1.0, "max_units": 2}
        for a, b in zip(STORES, STORES[1:] + STORES[:1], strict=True)
    ],
}


def items_csv(n_items: int) -> str:
    lines = ["item,location,capacity,unit_margin,holding_cost,demand_mean,replenishment_mean"]
    lines += [f"PT-{k:05d},{name},3,20,0.1,1.0,1.0" for k in range(n_items) for name in STORES]
    return "\n".join(lines) + "\n"


def history_csv(n_items: int, n_days: int, seed: int) -> str:
    rng = np.random.default_rng(seed)
    first = date(2026, 6, 1)
    days = [str(first + timedelta(days=d)) for d in range(n_days)]
    lines = ["date,item,location,units_sold,stock_at_open,units_received"]
    for k in range(n_items):
        for location in STORES:
            sold = rng.poisson(rng.uniform(0.5, 3.0), n_days)
            received = rng.poisson(rng.uniform(0.3, 2.5), n_days)
            lines += [
                f"{day},PT-{k:05d},{location},{s},{s + 4},{r}"
                for day, s, r in zip(days, sold, received, strict=True)
            ]
    return "\n".join(lines) + "\n"


@contextmanager
def app_on(url: str) -> Iterator[TestClient]:
    engine = make_engine(url)
    upgrade(engine)
    with make_session_factory(engine).begin() as session:
        key = create_key(session, get_or_create_tenant(session, "bench"), "write")[1]
    engine.dispose()
    with TestClient(create_app(Settings(database_url=url))) as client:
        client.headers["Authorization"] = f"Bearer {key}"
        yield client


def measure(
    database: str, url: str, n_items: int, n_days: int, calibrate: bool, workers: int
) -> dict[str, Any]:
    history = history_csv(n_items, n_days, seed=16)
    rows = history.count("\n") - 1
    result: dict[str, Any] = {"database": database, "items": n_items, "rows": rows}
    with app_on(url) as client:
        assortment = client.post("/v1/assortments", json=LAYOUT).json()["id"]
        response = client.post(
            f"/v1/assortments/{assortment}/items",
            content=items_csv(n_items),
            headers={"content-type": "text/csv"},
        )
        assert response.status_code == 200, response.text
        for phase in ("insert", "replace"):
            start = time.perf_counter()
            response = client.post(
                f"/v1/assortments/{assortment}/history",
                content=history,
                headers={"content-type": "text/csv"},
            )
            seconds = time.perf_counter() - start
            assert response.status_code == 200, response.text
            result[f"{phase}_seconds"] = round(seconds, 2)
            result[f"{phase}_rows_per_second"] = round(rows / seconds)
        if calibrate:
            engine = make_engine(url)
            worker = Worker(Settings(database_url=url), make_session_factory(engine), "bench")
            while worker.run_one():  # the one shared specification's solve
                pass
            run = client.post(f"/v1/assortments/{assortment}/calibration").json()["run"]
            if workers == 0:
                start = time.perf_counter()
                chunks = 0
                while chunks < -(-n_items // 50) and worker.run_one():
                    chunks += 1
                seconds = time.perf_counter() - start
            else:
                with tempfile.TemporaryDirectory() as logs, store.workers(url, workers, Path(logs)):
                    start = time.perf_counter()
                    path = f"/v1/assortments/{assortment}/calibration/{run}"
                    while (
                        client.get(path).json()["state"] != "done"
                        and time.perf_counter() - start < 1_800
                    ):
                        time.sleep(0.2)
                    seconds = time.perf_counter() - start
            summary = client.get(f"/v1/assortments/{assortment}/calibration/{run}").json()
            assert summary["state"] == "done", summary
            result["workers"] = max(1, workers)
            result["calibrate_seconds"] = round(seconds, 2)
            result["calibrate_items_per_second"] = round(n_items / seconds, 1)
            engine.dispose()
    return result


def table(results: list[dict[str, Any]]) -> str:
    lines = [
        "| database | rows | first upload (s) | rows/s | repeat, replacing (s) | rows/s "
        "| workers | calibration (items/s) |",
        "| --- | ---: | ---: | ---: | ---: | ---: | ---: | ---: |",
    ]
    for r in results:
        lines.append(
            f"| {r['database']} | {r['rows']:,} | {r['insert_seconds']} | "
            f"{r['insert_rows_per_second']:,} | {r['replace_seconds']} | "
            f"{r['replace_rows_per_second']:,} | {r.get('workers', '-')} | "
            f"{r.get('calibrate_items_per_second', '-')} |"
        )
    return "\n".join(lines)


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--items", type=int, default=1_000)
    parser.add_argument("--days", type=int, default=120)
    parser.add_argument("--calibrate", action="store_true", help="also calibrate every item")
    parser.add_argument(
        "--workers", type=int, default=0, help="worker processes (0: one in-process worker)"
    )
    parser.add_argument("--only", choices=("sqlite", "postgresql"), help="one database only")
    parser.add_argument("--out", type=Path, default=DEFAULT_OUT, help="JSON results file")
    args = parser.parse_args()
    shape = (args.items, args.days, args.calibrate, args.workers)
    results = []
    if args.only != "postgresql":
        with api.sqlite_database() as url:
            results.append(measure("SQLite", url, *shape))
    reason = api.postgres_unavailable()
    if args.only == "sqlite":
        pass
    elif reason is None:
        with api.postgres_database() as url:
            results.append(measure("PostgreSQL", url, *shape))
    else:
        print(f"PostgreSQL skipped: {reason}")
    print(table(results))
    args.out.parent.mkdir(parents=True, exist_ok=True)
    args.out.write_text(json.dumps(results, indent=2) + "\n")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
