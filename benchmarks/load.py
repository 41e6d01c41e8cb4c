"""Sustained mixed load against `stockrelay serve` + a solve worker + PostgreSQL on loopback.

Usage: .venv/bin/python benchmarks/load.py [--seconds 30] [--clients 16]

For `--seconds`, `--clients` concurrent clients (httpx2, one key) send a mix of requests:
80% recommendations at random closing stocks, 10% batches of 50 items, 10% new versions of
their own network (PUT with If-Match and an Idempotency-Key, a demand mean nudged each time), so
the worker re-solves in the background throughout. Afterwards the worker is given time to drain
the queue, and every job is checked: done, or failed with a reason; none lost (queued or running
forever). Prints a table and writes benchmarks/results/load.json. Bounded in time and count,
loopback only.
"""

from __future__ import annotations

import argparse
import asyncio
import json
import random
import statistics
import subprocess
import sys
import time
from collections import Counter
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import httpx2
from sqlalchemy import func, select

sys.path.insert(0, str(Path(__file__).resolve().parent))
sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

import api

from service.auth import create_key
from service.db.keys import get_or_create_tenant
from service.db.migrate import upgrade
from service.db.session import make_engine, make_session_factory
from service.db.tables import SolveJob
from service.vocabulary import JobState

OUT = api.RESULTS / "load.json"
DRAIN_SECONDS = 120.0


async def _client(
    base: str,
    auth: dict[str, str],
    network_id: int,
    deadline: float,
    seed: int,
    latencies: dict[str, list[float]],
    statuses: Counter[str],
) -> None:
    rng = random.Random(seed)
    document = json.loads(api.DEMO.read_text())
    document["name"] = f"load client {seed}"
    async with httpx2.AsyncClient(base_url=base, timeout=30, headers=auth) as client:
        created = await client.post("/v1/networks", json=document)
        own = created.json()["id"]
        version = 1
        while time.monotonic() < deadline:
            roll = rng.random()
            stock = {"riverside": rng.randint(0, 14), "hilltop": rng.randint(0, 9)}
            start = time.perf_counter()
            if roll < 0.8:
                kind = "recommendation"
                response = await client.post(
                    f"/v1/networks/{network_id}/recommendation", json={"stock": stock}
                )
            elif roll < 0.9:
                kind = "batch of 50"
                items = [
                    {
                        "network_id": network_id,
                        "stock": {"riverside": rng.randint(0, 14), "hilltop": rng.randint(0, 9)},
                    }
                    for _ in range(50)
                ]
                response = await client.post("/v1/recommendations/batch", json={"items": items})
            else:
                kind = "new version"
                document["locations"][1]["demand"]["mean"] = round(rng.uniform(1.0, 2.5), 3)
                response = await client.put(
                    f"/v1/networks/{own}",
                    json=document,
                    headers={"If-Match": f'"{version}"', "Idempotency-Key": f"{seed}-{version}"},
                )
                if response.status_code == 200:
                    version = response.json()["version"]
            latencies[kind].append(time.perf_counter() - start)
            statuses[f"{kind} {response.status_code}"] += 1


def run(seconds: float, clients: int) -> dict[str, Any]:
    with api.postgres_database() as url:
        engine = make_engine(url)
        upgrade(engine)
        with make_session_factory(engine).begin() as session:
            key = create_key(session, get_or_create_tenant(session, "load"), "write")[1]
        auth = {"Authorization": f"Bearer {key}"}
        api.RESULTS.mkdir(parents=True, exist_ok=True)
        worker_log = (api.RESULTS / "load-worker.log").open("wb")
        worker = subprocess.Popen(
            [sys.executable, "-m", "service.cli", "worker"],
            cwd=api.ROOT, env={**api.environment(url), "STOCKRELAY_POLL_INTERVAL": "0.05"},
            stdin=subprocess.DEVNULL, stdout=worker_log, stderr=worker_log,
        )  # fmt: skip
        try:
            with api.server(url, api.RESULTS / "load-server.log") as (base, _process):
                created = httpx2.post(
                    base + "/v1/networks", json=json.loads(api.DEMO.read_text()), headers=auth
                )
                network_id = created.json()["id"]
                give_up = time.monotonic() + 60
                while not _ready(base, auth, network_id):
                    if time.monotonic() > give_up:
                        raise TimeoutError("the demo network was not solved within 60 s")
                    time.sleep(0.1)
                latencies: dict[str, list[float]] = {
                    "recommendation": [],
                    "batch of 50": [],
                    "new version": [],
                }
                statuses: Counter[str] = Counter()
                deadline = time.monotonic() + seconds
                started = time.perf_counter()

                async def everyone() -> None:
                    await asyncio.gather(
                        *(
                            _client(base, auth, network_id, deadline, seed, latencies, statuses)
                            for seed in range(clients)
                        )
                    )

                asyncio.run(everyone())
                elapsed = time.perf_counter() - started
            drain_until = time.monotonic() + DRAIN_SECONDS
            live = ("queued", "running")
            with make_session_factory(engine)() as session:
                while time.monotonic() < drain_until and session.scalar(
                    select(func.count()).select_from(SolveJob).where(SolveJob.state.in_(live))
                ):
                    time.sleep(0.2)
                    session.expire_all()
                states = Counter(session.scalars(select(SolveJob.state)).all())
        finally:
            worker.terminate()
            worker.wait(timeout=30)
            worker_log.close()
            engine.dispose()
    rows = []
    for kind, values in latencies.items():
        ordered = sorted(values)
        rows.append(
            {
                "kind": kind,
                "requests": len(values),
                "per_second": len(values) / elapsed,
                "p50_ms": 1000 * statistics.median(ordered) if ordered else None,
                "p99_ms": 1000 * ordered[int(0.99 * (len(ordered) - 1))] if ordered else None,
            }
        )
    errors = sum(n for status, n in statuses.items() if status.split()[-1].startswith("5"))
    return {
        "seconds": elapsed,
        "clients": clients,
        "rows": rows,
        "statuses": dict(statuses),
        "errors_5xx": errors,
        "jobs": dict(states),
        "jobs_lost": states.get(JobState.QUEUED, 0) + states.get(JobState.RUNNING, 0),
    }


def _ready(base: str, auth: dict[str, str], network_id: int) -> bool:
    solves = httpx2.get(f"{base}/v1/networks/{network_id}", headers=auth).json()["solves"]
    return any(s["criterion"] == "discounted" and s["state"] == "ready" for s in solves)


def main(argv: Sequence[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description="Sustained mixed load on API + worker + PG.")
    parser.add_argument("--seconds", type=float, default=30.0)
    parser.add_argument("--clients", type=int, default=16)
    args = parser.parse_args(argv)
    reason = api.postgres_unavailable()
    if reason is not None:
        sys.stderr.write(f"PostgreSQL not reachable: {reason}\n")
        return 2
    result = run(args.seconds, args.clients)
    lines = [
        f"{result['clients']} clients for {result['seconds']:.0f} s; 5xx answers: "
        f"{result['errors_5xx']}; jobs: {result['jobs']}; jobs lost: {result['jobs_lost']}",
        "",
        "| request | count | per second | p50 ms | p99 ms |",
        "|---|---:|---:|---:|---:|",
    ]
    lines += [
        f"| {r['kind']} | {r['requests']:,} | {r['per_second']:.1f} | {r['p50_ms']:.1f} | "
        f"{r['p99_ms']:.1f} |"
        for r in result["rows"]
        if r["requests"]
    ]
    sys.stdout.write("\n".join(lines) + "\n")
    OUT.write_text(json.dumps(result, indent=2))
    sys.stdout.write(f"wrote {OUT}\n")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
