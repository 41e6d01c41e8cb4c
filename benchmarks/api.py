"""Benchmark of the HTTP API: recommendation latency and throughput against a real uvicorn.

Usage: .venv/bin/python benchmarks/api.py [--quick] [--backend sqlite|postgresql]
                                          [--processes N] [--out PATH]

For each database (SQLite in a temporary folder; PostgreSQL at 127.0.0.1:5432 when it answers,
in a scratch database created and dropped here), the script migrates, starts
`stockrelay serve --processes N` (N uvicorn processes, default one per core, access log on, as
deployed) on a free loopback port, creates the demo network over HTTP, solves it with
`stockrelay worker --until-idle`, and measures POST /v1/networks/{id}/recommendation at seeded
random closing stocks:

* one client, sequential requests on one keep-alive connection;
* 32 concurrent clients on 32 keep-alive connections: with wrk (Debian's `wrk` package, a C
  load generator light enough to leave the cores to the server) when it is installed, else
  httpx2.AsyncClient in this process; every phase bounded in time;
* one batch of 1,000 items (POST /v1/recommendations/batch), repeated, median.

Client, server and database share this machine's two cores; the table gives the CPU time of the
server processes and of this (client) process per request (per batch in the batch rows), so
that a bound can be told from a busy machine. The project's targets: p99 under 10 ms for one
client; 500 requests/s sustained by 32 clients with no errors.
"""

from __future__ import annotations

import argparse
import asyncio
import contextlib
import json
import os
import re
import shutil
import signal
import socket
import subprocess
import sys
import tempfile
import time
import uuid
from collections import Counter
from collections.abc import Callable, Iterator, Sequence
from dataclasses import asdict, dataclass
from pathlib import Path
from typing import Any

import httpx2
import numpy as np
from sqlalchemy import create_engine, text

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from service.auth import create_key  # noqa: E402
from service.db.keys import get_or_create_tenant  # noqa: E402
from service.db.migrate import upgrade  # noqa: E402
from service.db.session import make_engine, make_session_factory  # noqa: E402

ADMIN_URL = "postgresql+psycopg://postgres@127.0.0.1:5432/test"
DEMO = ROOT / "service" / "data" / "demo_network.json"
RESULTS = ROOT / "benchmarks" / "results"
DEFAULT_OUT = RESULTS / "api.json"

P99_TARGET_MS = 10.0
THROUGHPUT_TARGET = 500.0
CONCURRENT_CLIENTS = 32
BATCH_ITEMS = 1000
PHASE_DEADLINE_S = 120.0
WRK_SECONDS = 20
START_DEADLINE_S = 60.0


@dataclass
class Phase:
    database: str
    mode: str
    requests: int
    errors: int
    error_kinds: dict[str, int]
    seconds: float
    p50_ms: float
    p99_ms: float
    max_ms: float
    per_second: float
    server_cpu_ms_per_request: float | None
    client_cpu_ms_per_request: float | None = None


# -- processes and databases -------------------------------------------------------------------


def free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as probe:
        probe.bind(("127.0.0.1", 0))
        port: int = probe.getsockname()[1]
        return port


def environment(url: str) -> dict[str, str]:
    env = {k: v for k, v in os.environ.items() if not k.startswith("STOCKRELAY_")}
    env["STOCKRELAY_DATABASE_URL"] = url
    env["OPENBLAS_NUM_THREADS"] = "1"
    # One key drives all the load: lift its rate limit, which would otherwise be what we measure.
    env["STOCKRELAY_RATE_LIMIT_PER_SECOND"] = "1000000"
    env["STOCKRELAY_RATE_LIMIT_BURST"] = "1000000"
    return env


# The write key of the benchmark's tenant, set by `measure`.
AUTH: dict[str, str] = {}


@contextlib.contextmanager
def server(url: str, log: Path, workers: int) -> Iterator[tuple[str, subprocess.Popen[bytes]]]:
    """`stockrelay serve` on a free loopback port; stopped (SIGTERM, then SIGKILL) on exit."""
    port = free_port()
    with log.open("wb") as sink:
        process = subprocess.Popen(
            [sys.executable, "-m", "service.cli", "serve", "--host", "127.0.0.1", "--port",
             str(port), "--processes", str(workers)],
            cwd=ROOT, env=environment(url), stdin=subprocess.DEVNULL, stdout=sink, stderr=sink,
        )  # fmt: skip
    base = f"http://127.0.0.1:{port}"
    try:
        give_up = time.monotonic() + START_DEADLINE_S
        while True:
            if process.poll() is not None:
                raise RuntimeError(f"the server exited with {process.returncode}; see {log}")
            with contextlib.suppress(httpx2.TransportError):
                if httpx2.get(base + "/readyz", timeout=2).status_code == 200:
                    break
            if time.monotonic() > give_up:
                raise TimeoutError(f"the server did not answer within {START_DEADLINE_S} s")
            time.sleep(0.1)
        yield base, process
    finally:
        if process.poll() is None:
            process.send_signal(signal.SIGTERM)
        try:
            process.wait(timeout=20)
        except subprocess.TimeoutExpired:
            process.kill()
            process.wait(timeout=20)


def solve_queued(url: str) -> None:
    subprocess.run(
        [sys.executable, "-m", "service.cli", "worker", "--until-idle"],
        cwd=ROOT, env=environment(url), stdin=subprocess.DEVNULL, check=True,
        timeout=PHASE_DEADLINE_S,
    )  # fmt: skip


@contextlib.contextmanager
def sqlite_database() -> Iterator[str]:
    with tempfile.TemporaryDirectory(prefix="stockrelay-bench-") as folder:
        yield f"sqlite:///{Path(folder) / 'stockrelay.db'}"


def postgres_unavailable() -> str | None:
    engine = create_engine(ADMIN_URL, connect_args={"connect_timeout": 3})
    try:
        with engine.connect() as connection:
            connection.execute(text("SELECT 1"))
    except Exception as exc:
        return str(exc).splitlines()[0]
    finally:
        engine.dispose()
    return None


@contextlib.contextmanager
def postgres_database() -> Iterator[str]:
    name = f"stockrelay_bench_{uuid.uuid4().hex[:10]}"
    admin = create_engine(ADMIN_URL, isolation_level="AUTOCOMMIT")
    with admin.connect() as connection:
        connection.execute(text(f'CREATE DATABASE "{name}"'))
    try:
        yield f"postgresql+psycopg://postgres@127.0.0.1:5432/{name}"
    finally:
        with admin.connect() as connection:
            connection.execute(text(f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)'))
        admin.dispose()


def cpu_seconds(pid: int) -> float | None:
    """User + system CPU time so far of a process and its children (the API processes of a
    multi-process server), from Linux /proc; None elsewhere."""
    try:
        fields = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()
        children = Path(f"/proc/{pid}/task/{pid}/children").read_text().split()
    except OSError:
        return None
    own = (int(fields[11]) + int(fields[12])) / os.sysconf("SC_CLK_TCK")
    return own + sum(cpu_seconds(int(child)) or 0.0 for child in children)


# -- measuring ---------------------------------------------------------------------------------


def stock_bodies(count: int, seed: int) -> list[bytes]:
    """Request bodies at random closing stocks of the demo network."""
    spec = json.loads(DEMO.read_text())
    rng = np.random.default_rng(seed)
    return [
        json.dumps(
            {"stock": {loc["id"]: int(rng.integers(0, loc["capacity"] + 1))
                       for loc in spec["locations"]}}
        ).encode()
        for _ in range(count)
    ]  # fmt: skip


def outcome(response: httpx2.Response | BaseException) -> str | None:
    """None for a 200, else what went wrong: the status code or the exception's name."""
    if isinstance(response, BaseException):
        return type(response).__name__
    return None if response.status_code == 200 else str(response.status_code)


def summarize(
    database: str,
    mode: str,
    latencies: list[float],
    errors: Counter[str],
    seconds: float,
    cpu: float | None,
) -> Phase:
    ms = np.array(latencies) * 1000 if latencies else np.array([np.nan])
    n = len(latencies)
    return Phase(
        database=database,
        mode=mode,
        requests=n,
        errors=sum(errors.values()),
        error_kinds=dict(errors),
        seconds=seconds,
        p50_ms=float(np.percentile(ms, 50)),
        p99_ms=float(np.percentile(ms, 99)),
        max_ms=float(ms.max()),
        per_second=n / seconds,
        server_cpu_ms_per_request=None if cpu is None or not n else 1000 * cpu / n,
    )


def sequential(base: str, path: str, bodies: list[bytes], pid: int, database: str) -> Phase:
    headers = {"content-type": "application/json"}
    latencies: list[float] = []
    errors: Counter[str] = Counter()
    cpu_before = cpu_seconds(pid)
    with httpx2.Client(base_url=base, timeout=10, headers=AUTH) as client:
        start = time.perf_counter()
        give_up = start + PHASE_DEADLINE_S
        for body in bodies:
            t = time.perf_counter()
            try:
                wrong = outcome(client.post(path, content=body, headers=headers))
            except httpx2.HTTPError as exc:
                wrong = outcome(exc)
            latencies.append(time.perf_counter() - t)
            if wrong is not None:
                errors[wrong] += 1
            if time.perf_counter() > give_up:
                break
        seconds = time.perf_counter() - start
    cpu_after = cpu_seconds(pid)
    cpu = None if cpu_before is None or cpu_after is None else cpu_after - cpu_before
    return summarize(database, "1 client", latencies, errors, seconds, cpu)


async def _concurrent(
    base: str, path: str, bodies: list[bytes], clients: int
) -> tuple[list[float], Counter[str], float]:
    headers = {"content-type": "application/json"}
    latencies: list[float] = []
    errors: Counter[str] = Counter()
    pending = iter(bodies)
    limits = httpx2.Limits(max_connections=clients, max_keepalive_connections=clients)
    async with httpx2.AsyncClient(base_url=base, timeout=10, limits=limits, headers=AUTH) as client:
        start = time.perf_counter()
        give_up = start + PHASE_DEADLINE_S

        async def one_client() -> None:
            for body in pending:
                t = time.perf_counter()
                try:
                    wrong = outcome(await client.post(path, content=body, headers=headers))
                except httpx2.HTTPError as exc:
                    wrong = outcome(exc)
                latencies.append(time.perf_counter() - t)
                if wrong is not None:
                    errors[wrong] += 1
                if time.perf_counter() > give_up:
                    return

        await asyncio.gather(*(one_client() for _ in range(clients)))
        return latencies, errors, time.perf_counter() - start


_WRK_SCRIPT = """
local bodies = {%(bodies)s}
local n = 0
local statuses = {}
request = function()
  n = n %% #bodies + 1
  return wrk.format("POST", "%(path)s", {["Content-Type"] = "application/json",
                    ["Authorization"] = "%(auth)s"}, bodies[n])
end
done = function(summary, latency, requests)
  local l = latency
  io.write(string.format("RESULT %%d %%d %%d %%f %%f %%f %%f\\n", summary.requests,
    summary.errors.status, summary.errors.connect + summary.errors.read + summary.errors.write
    + summary.errors.timeout, summary.duration / 1e6, l:percentile(50) / 1e3,
    l:percentile(99) / 1e3, l.max / 1e3))
end
"""


def concurrent_wrk(
    wrk: str, base: str, path: str, bodies: list[bytes], pid: int, database: str
) -> Phase:
    """32 clients from wrk for WRK_SECONDS; errors are non-2xx answers and socket errors."""
    lua = _WRK_SCRIPT % {
        "bodies": ", ".join(json.dumps(body.decode()) for body in bodies),
        "path": path,
        "auth": AUTH["Authorization"],
    }
    with tempfile.NamedTemporaryFile("w", suffix=".lua") as script:
        script.write(lua)
        script.flush()
        cpu_before = cpu_seconds(pid)
        run = subprocess.run(
            [wrk, "-t2", f"-c{CONCURRENT_CLIENTS}", f"-d{WRK_SECONDS}s", "--timeout", "10s",
             "-s", script.name, base],
            capture_output=True, text=True, check=True, timeout=WRK_SECONDS + 60,
        )  # fmt: skip
        cpu_after = cpu_seconds(pid)
    found = re.search(r"^RESULT (\d+) (\d+) (\d+) (\S+) (\S+) (\S+) (\S+)$", run.stdout, re.M)
    if found is None:
        raise RuntimeError(f"unexpected wrk output:\n{run.stdout}\n{run.stderr}")
    requests, bad_status, socket_errors = (int(found.group(i)) for i in (1, 2, 3))
    seconds, p50, p99, worst = (float(found.group(i)) for i in (4, 5, 6, 7))
    errors: Counter[str] = Counter()
    if bad_status:
        errors["non-2xx"] = bad_status
    if socket_errors:
        errors["socket"] = socket_errors
    cpu = None if cpu_before is None or cpu_after is None else cpu_after - cpu_before
    return Phase(
        database=database,
        mode=f"{CONCURRENT_CLIENTS} clients (wrk)",
        requests=requests,
        errors=sum(errors.values()),
        error_kinds=dict(errors),
        seconds=seconds,
        p50_ms=p50,
        p99_ms=p99,
        max_ms=worst,
        per_second=requests / seconds,
        server_cpu_ms_per_request=None if cpu is None or not requests else 1000 * cpu / requests,
    )


def concurrent(base: str, path: str, bodies: list[bytes], pid: int, database: str) -> Phase:
    wrk = shutil.which("wrk")
    if wrk is not None:
        return concurrent_wrk(wrk, base, path, bodies, pid, database)
    cpu_before = cpu_seconds(pid)
    latencies, errors, seconds = asyncio.run(_concurrent(base, path, bodies, CONCURRENT_CLIENTS))
    cpu_after = cpu_seconds(pid)
    cpu = None if cpu_before is None or cpu_after is None else cpu_after - cpu_before
    return summarize(database, f"{CONCURRENT_CLIENTS} clients", latencies, errors, seconds, cpu)


def batch(base: str, network_id: int, repeats: int, pid: int, database: str) -> Phase:
    stocks = [json.loads(body)["stock"] for body in stock_bodies(BATCH_ITEMS, seed=7)]
    body = {"items": [{"network_id": network_id, "stock": stock} for stock in stocks]}
    latencies: list[float] = []
    errors: Counter[str] = Counter()
    cpu_before = cpu_seconds(pid)
    with httpx2.Client(base_url=base, timeout=60, headers=AUTH) as client:
        start = time.perf_counter()
        for _ in range(repeats):
            t = time.perf_counter()
            response = client.post("/v1/recommendations/batch", json=body)
            latencies.append(time.perf_counter() - t)
            if response.status_code != 200:
                errors[str(response.status_code)] += BATCH_ITEMS
            else:
                for item in response.json()["items"]:
                    if item["result"] is None:
                        errors[str(item["problem"]["status"])] += 1
        seconds = time.perf_counter() - start
    cpu_after = cpu_seconds(pid)
    cpu = None if cpu_before is None or cpu_after is None else cpu_after - cpu_before
    phase = summarize(database, f"batch of {BATCH_ITEMS:,}", latencies, errors, seconds, cpu)
    phase.per_second = BATCH_ITEMS * phase.requests / seconds  # items per second
    return phase


def client_cpu(phase: Callable[[], Phase]) -> Phase:
    """Run `phase`, adding this process's CPU time per request (the clients share the cores)."""
    before = time.process_time()
    result = phase()
    if result.requests:
        result.client_cpu_ms_per_request = 1000 * (time.process_time() - before) / result.requests
    return result


def measure(database: str, url: str, quick: bool, workers: int) -> list[Phase]:
    engine = make_engine(url)
    upgrade(engine)
    with make_session_factory(engine).begin() as session:
        key = create_key(session, get_or_create_tenant(session, "benchmark"), "write")[1]
    AUTH["Authorization"] = f"Bearer {key}"
    engine.dispose()
    RESULTS.mkdir(parents=True, exist_ok=True)
    with server(url, RESULTS / f"api-server-{database}.log", workers) as (base, process):
        document = json.loads(DEMO.read_text())
        created = httpx2.post(base + "/v1/networks", json=document, timeout=10, headers=AUTH)
        created.raise_for_status()
        network_id = created.json()["id"]
        solve_queued(url)
        path = f"/v1/networks/{network_id}/recommendation"
        # Enough to reach every API process: each keeps its own policy cache and pool.
        warm_up = stock_bodies(100 * workers, seed=1)
        sequential(base, path, warm_up, process.pid, database)  # policy cached, pools filled
        n_sequential, n_concurrent, n_batches = (200, 500, 2) if quick else (2000, 5000, 5)
        pid = process.pid
        return [
            client_cpu(
                lambda: sequential(base, path, stock_bodies(n_sequential, 2), pid, database)
            ),
            client_cpu(
                lambda: concurrent(base, path, stock_bodies(n_concurrent, 3), pid, database)
            ),
            client_cpu(lambda: batch(base, network_id, n_batches, pid, database)),
        ]


# -- reporting ---------------------------------------------------------------------------------


def verdict(phase: Phase) -> str:
    if phase.mode == "1 client":
        return f"p99 < {P99_TARGET_MS:g} ms " + (
            "met" if phase.p99_ms < P99_TARGET_MS else "MISSED"
        )
    if "clients" in phase.mode:
        met = phase.per_second >= THROUGHPUT_TARGET and phase.errors == 0
        return f">= {THROUGHPUT_TARGET:g}/s, 0 errors " + ("met" if met else "MISSED")
    return ""


def table(phases: list[Phase]) -> str:
    lines = [
        "| database | load | requests | errors | p50 ms | p99 ms | max ms | per second "
        "| server CPU ms/request | client CPU ms/request | target |",
        "|---|---|---:|---:|---:|---:|---:|---:|---:|---:|---|",
    ]
    for p in phases:
        server = "" if p.server_cpu_ms_per_request is None else f"{p.server_cpu_ms_per_request:.2f}"
        client = "" if p.client_cpu_ms_per_request is None else f"{p.client_cpu_ms_per_request:.2f}"
        unit = " items" if p.mode.startswith("batch") else ""
        kinds = ", ".join(f"{n} x {kind}" for kind, n in sorted(p.error_kinds.items()))
        errors = f"{p.errors} ({kinds})" if p.errors else "0"
        lines.append(
            f"| {p.database} | {p.mode} | {p.requests:,} | {errors} | {p.p50_ms:.2f} | "
            f"{p.p99_ms:.2f} | {p.max_ms:.2f} | {p.per_second:,.0f}{unit} | {server} | {client} "
            f"| {verdict(p)} |"
        )
    return "\n".join(lines) + "\n"


def main(argv: Sequence[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=(__doc__ or "").splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="fewer requests")
    parser.add_argument("--backend", choices=["sqlite", "postgresql"], action="append")
    parser.add_argument("--out", type=Path, default=DEFAULT_OUT)
    parser.add_argument(
        "--processes", type=int, default=os.cpu_count() or 1, help="API processes (one per core)"
    )
    args = parser.parse_args(argv)
    backends = args.backend or ["sqlite", "postgresql"]

    phases: list[Phase] = []
    skipped: dict[str, str] = {}
    for backend in backends:
        if backend == "sqlite":
            with sqlite_database() as url:
                phases += measure("sqlite", url, args.quick, args.processes)
            continue
        reason = postgres_unavailable()
        if reason is not None:
            skipped["postgresql"] = reason
            sys.stdout.write(f"PostgreSQL skipped: {reason}\n")
            continue
        with postgres_database() as url:
            phases += measure("postgresql", url, args.quick, args.processes)

    sys.stdout.write(table(phases))
    document: dict[str, Any] = {
        "phases": [asdict(p) | {"target": verdict(p)} for p in phases],
        "skipped": skipped,
        "targets": {"p99_ms_one_client": P99_TARGET_MS, "requests_per_s": THROUGHPUT_TARGET},
        "cpus": os.cpu_count(),
        "api_processes": args.processes,
        "load_generator": "wrk" if shutil.which("wrk") else "httpx2",
    }
    args.out.parent.mkdir(parents=True, exist_ok=True)
    args.out.write_text(json.dumps(document, indent=2))
    sys.stdout.write(f"wrote {args.out}\n")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
