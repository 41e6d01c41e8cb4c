"""Benchmark of the policy store on PostgreSQL: worker-pool throughput, policy load latency and
database size per stored policy.

Usage: .venv/bin/python benchmarks/store.py [--quick] [--out PATH]

Needs the PostgreSQL server at 127.0.0.1:5432 (trust auth, database `test`); a scratch database
is created there and dropped at the end. Networks are variants of the demo scenario (two
hardware stores sharing drill kits) at capacity 20 and 100, each with its own demand so that
every specification is solved once.

Throughput: worker processes (`stockrelay worker`) are started and left idle, the jobs are queued
in one transaction, and the clock runs until the last job is done. Load latency: `load_policy`
through a fresh cache (cold: read, checksum, decompress, decode) and through a warm one.
"""

from __future__ import annotations

import argparse
import json
import os
import statistics
import subprocess
import sys
import time
from collections.abc import Iterator, Sequence
from contextlib import contextmanager
from pathlib import Path
from typing import Any

from sqlalchemy import func, select
from sqlalchemy.orm import Session, sessionmaker

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "benchmarks"))

import api  # noqa: E402  (scratch PostgreSQL databases, shared with benchmarks/api.py)

from service.db.keys import get_or_create_tenant  # noqa: E402
from service.db.migrate import upgrade  # noqa: E402
from service.db.networks import create_network  # noqa: E402
from service.db.session import make_engine, make_session_factory  # noqa: E402
from service.db.tables import Network, NetworkVersion, Policy, SolveJob  # noqa: E402
from service.serving import PolicyCache, load_policy  # noqa: E402
from service.vocabulary import JobState  # noqa: E402
from solver import NetworkSpec  # noqa: E402

DEMO = ROOT / "service" / "data" / "demo_network.json"
DEFAULT_OUT = ROOT / "benchmarks" / "results" / "store.json"


def network(capacity: int, variant: int) -> NetworkSpec:
    """The demo scenario at `capacity` per store, demand nudged by `variant` (distinct hashes)."""
    document = json.loads(DEMO.read_text())
    document["name"] = f"drill kits c={capacity} #{variant}"
    for location in document["locations"]:
        location["capacity"] = capacity
    document["locations"][1]["demand"]["mean"] = 1.7 + 0.01 * variant
    return NetworkSpec.model_validate(document)


@contextmanager
def workers(url: str, count: int, logs: Path) -> Iterator[None]:
    env = {
        **os.environ,
        "STOCKRELAY_DATABASE_URL": url,
        "STOCKRELAY_POLL_INTERVAL": "0.02",
        "OPENBLAS_NUM_THREADS": "1",
    }
    processes = []
    try:
        for i in range(count):
            log = (logs / f"worker-{i}.log").open("w")
            processes.append(
                subprocess.Popen(
                    [sys.executable, "-m", "service.cli", "worker"],
                    env=env,
                    cwd=ROOT,
                    stdout=log,
                    stderr=subprocess.STDOUT,
                )
            )
        time.sleep(1.5)  # let them import and reach their idle loop
        yield
    finally:
        for process in processes:
            process.terminate()
        for process in processes:
            try:
                process.wait(timeout=20)
            except subprocess.TimeoutExpired:
                process.kill()


def queue(sessions: sessionmaker[Session], capacity: int, count: int, offset: int) -> None:
    with sessions.begin() as session:
        tenant = get_or_create_tenant(session, "bench")
        for variant in range(offset, offset + count):
            create_network(session, tenant, network(capacity, variant), ["discounted"])


def wait_done(sessions: sessionmaker[Session], deadline: float) -> None:
    live = (JobState.QUEUED.value, JobState.RUNNING.value)
    while time.monotonic() < deadline:
        with sessions() as session:
            if not session.scalar(
                select(func.count()).select_from(SolveJob).where(SolveJob.state.in_(live))
            ):
                return
        time.sleep(0.02)
    raise TimeoutError("jobs still pending at the deadline")


def throughput(url: str, capacity: int, n_workers: int, n_jobs: int, offset: int) -> float:
    sessions = make_session_factory(make_engine(url))
    logs = ROOT / "benchmarks" / "results"
    logs.mkdir(parents=True, exist_ok=True)
    with workers(url, n_workers, logs):
        start = time.monotonic()
        queue(sessions, capacity, n_jobs, offset)
        wait_done(sessions, start + 600)
        elapsed = time.monotonic() - start
    return n_jobs / elapsed


def load_latency(url: str, capacity: int, repeats: int) -> dict[str, float]:
    sessions = make_session_factory(make_engine(url))
    with sessions() as session:
        networks = [
            n
            for n in session.scalars(select(Network))
            if n.name.startswith(f"drill kits c={capacity} ")
        ]
    cold, warm = [], []
    for i in range(repeats):
        target = networks[i % len(networks)]
        with sessions() as session:
            fresh = PolicyCache(4)
            t = time.perf_counter()
            load_policy(session, fresh, session.get_one(Network, target.id), "discounted")
            cold.append(time.perf_counter() - t)
            t = time.perf_counter()
            load_policy(session, fresh, session.get_one(Network, target.id), "discounted")
            warm.append(time.perf_counter() - t)
    return {
        "cold_p50_ms": 1000 * statistics.median(cold),
        "warm_p50_ms": 1000 * statistics.median(warm),
    }


def policy_size(url: str, capacity: int) -> dict[str, float]:
    engine = make_engine(url)
    with engine.connect() as connection:
        rows = connection.execute(
            select(
                func.avg(
                    func.octet_length(Policy.arrays)
                    + func.octet_length(Policy.layout)
                    + func.octet_length(Policy.meta)
                )
            )
            .select_from(Policy)
            .join(SolveJob, SolveJob.id == Policy.job_id)
            .join(NetworkVersion, NetworkVersion.id == SolveJob.version_id)
            .join(Network, Network.id == NetworkVersion.network_id)
            .where(Network.name.like(f"drill kits c={capacity} #%"))
        ).scalar_one()
        states = (capacity + 1) ** 2
    return {"bytes_per_policy": float(rows or 0), "bytes_per_state": float(rows or 0) / states}


def main(argv: Sequence[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="fewer jobs")
    parser.add_argument("--out", type=Path, default=DEFAULT_OUT)
    args = parser.parse_args(argv)
    plan = {20: 60, 100: 16} if not args.quick else {20: 12, 100: 4}

    results: dict[str, Any] = {"throughput": [], "load": {}, "size": {}}
    with api.postgres_database() as url:
        engine = make_engine(url)
        upgrade(engine)
        engine.dispose()
        offset = 0
        for capacity, n_jobs in plan.items():
            for n_workers in (1, 2):
                rate = throughput(url, capacity, n_workers, n_jobs, offset)
                offset += n_jobs
                results["throughput"].append(
                    {"capacity": capacity, "workers": n_workers, "jobs": n_jobs, "jobs_per_s": rate}
                )
            results["load"][str(capacity)] = load_latency(url, capacity, 30)
            results["size"][str(capacity)] = policy_size(url, capacity)

    lines = ["| network | workers | jobs | jobs/s |", "|---|---:|---:|---:|"]
    lines += [
        f"| 2 stores, capacity {r['capacity']} | {r['workers']} | {r['jobs']} "
        f"| {r['jobs_per_s']:.1f} |"
        for r in results["throughput"]
    ]
    lines += [
        "",
        "| network | load cold p50 ms | load warm p50 ms | bytes per policy |",
        "|---|---:|---:|---:|",
    ]
    lines += [
        f"| 2 stores, capacity {c} | {results['load'][c]['cold_p50_ms']:.2f} | "
        f"{results['load'][c]['warm_p50_ms']:.3f} | {results['size'][c]['bytes_per_policy']:,.0f} |"
        for c in results["load"]
    ]
    sys.stdout.write("\n".join(lines) + "\n")
    args.out.parent.mkdir(parents=True, exist_ok=True)
    args.out.write_text(json.dumps(results, indent=2))
    sys.stdout.write(f"wrote {args.out}\n")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
