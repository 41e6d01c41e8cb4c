"""Real `stockrelay worker` processes against one database: concurrent claiming, crashes
(SIGKILL), graceful stops (SIGTERM) and jobs whose attempts run out.

Every worker is started by the `workers` fixture, which kills whatever is still running when the
test ends. Worker output goes to files, so a chatty worker can never block on a full pipe.
"""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, TypeVar

import numpy as np
import pytest
from sqlalchemy import Engine, select, text
from sqlalchemy.orm import Session, sessionmaker

from service.codec import decode_policy
from service.db.keys import get_or_create_tenant
from service.db.migrate import upgrade
from service.db.networks import canonical_spec, create_network
from service.db.session import make_engine, make_session_factory
from service.db.tables import NetworkVersion, Policy, SolveJob
from solver import NetworkSpec, PolicyResult, solve_network

ROOT = Path(__file__).resolve().parents[2]
DEMO = ROOT / "service" / "data" / "demo_network.json"

# Startup (imports, engine) takes about 2 s on the 2-core test machine; deadlines leave room.
STOP_DEADLINE = 15.0

T = TypeVar("T")


# -- networks ----------------------------------------------------------------------------------


def small_variant(i: int) -> NetworkSpec:
    """The demo network with capacities and demand means of its own: 1,271 to 1,989 states,
    solved in about 15 ms each."""
    document: dict[str, Any] = json.loads(DEMO.read_text())
    document["name"] = f"drill kits, variant {i}"
    first, second = document["locations"]
    first["capacity"] = 40 + 2 * (i % 6)
    second["capacity"] = 30 + 2 * (i // 6)
    mean = 2.0 + 0.1 * i
    first["demand"] = {"dist": "negative_binomial", "mean": mean, "variance": 1.6 * mean}
    second["demand"] = {"dist": "poisson", "mean": 1.2 + 0.05 * i}
    return NetworkSpec.model_validate(document)


def slow_network() -> NetworkSpec:
    """Two garden centres sharing compost pallets: 201 x 201 stock states, discount 0.999.

    Measured on the 2-core test machine with one BLAS thread: about 2.3-2.5 s per solve, long
    enough to stop a worker mid-solve, short enough to solve again within the test's deadline.
    """
    return NetworkSpec.model_validate(
        {
            "name": "Compost pallets: Millbrook and Eastgate garden centres",
            "discount": 0.999,
            "locations": [
                {
                    "id": "millbrook",
                    "capacity": 200,
                    "unit_margin": 20.0,
                    "holding_cost": 0.1,
                    "demand": {"dist": "poisson", "mean": 3.5},
                    "replenishment": {"dist": "poisson", "mean": 3.7},
                },
                {
                    "id": "eastgate",
                    "capacity": 200,
                    "unit_margin": 21.0,
                    "holding_cost": 0.2,
                    "demand": {"dist": "poisson", "mean": 3.9},
                    "replenishment": {"dist": "poisson", "mean": 3.4},
                },
            ],
            "lanes": [
                {"from": "millbrook", "to": "eastgate", "unit_cost": 1.5, "max_units": 3},
                {"from": "eastgate", "to": "millbrook", "unit_cost": 1.5, "max_units": 3},
            ],
        }
    )


# -- the database ------------------------------------------------------------------------------


@dataclass
class Store:
    url: str
    engine: Engine
    sessions: sessionmaker[Session]

    def import_networks(self, specs: list[NetworkSpec], criteria: list[str]) -> None:
        with self.sessions.begin() as session:
            tenant = get_or_create_tenant(session, "garden-and-hardware")
            for spec in specs:
                create_network(session, tenant, spec, criteria)

    def jobs(self) -> list[SolveJob]:
        with self.sessions() as session:
            return list(session.scalars(select(SolveJob).order_by(SolveJob.id)))

    def policies(self) -> list[Policy]:
        with self.sessions() as session:
            return list(session.scalars(select(Policy).order_by(Policy.id)))


def open_store(url: str) -> Iterator[Store]:
    engine = make_engine(url)
    upgrade(engine)
    try:
        yield Store(url, engine, make_session_factory(engine))
    finally:
        engine.dispose()


@pytest.fixture
def store(database_url: str) -> Iterator[Store]:
    yield from open_store(database_url)


@pytest.fixture
def pg_store(postgres_url: str) -> Iterator[Store]:
    yield from open_store(postgres_url)


def connected_workers(store: Store) -> set[str]:
    """application_name of every other session on this PostgreSQL database."""
    with store.engine.connect() as connection:
        return set(
            connection.scalars(
                text(
                    "SELECT application_name FROM pg_stat_activity "
                    "WHERE datname = current_database() AND pid <> pg_backend_pid()"
                )
            )
        )


# -- worker processes --------------------------------------------------------------------------


@dataclass
class WorkerProcess:
    process: subprocess.Popen[bytes]
    log: Path

    @property
    def pid(self) -> int:
        return self.process.pid

    def output(self) -> str:
        return self.log.read_text(errors="replace")

    def holds(self, job: SolveJob) -> bool:
        """Whether `job` is running under this process's lease (owner is host:pid:suffix)."""
        return job.state == "running" and f":{self.pid}:" in (job.lease_owner or "")

    def stop(self, timeout: float = STOP_DEADLINE) -> tuple[int, float]:
        """SIGTERM, then wait: (exit code, seconds it took)."""
        started = time.monotonic()
        self.process.send_signal(signal.SIGTERM)
        try:
            code = self.process.wait(timeout=timeout)
        except subprocess.TimeoutExpired:
            pytest.fail(f"worker {self.pid} ignored SIGTERM for {timeout} s:\n{self.output()}")
        return code, time.monotonic() - started


@dataclass
class Workers:
    tmp_path: Path
    started: list[WorkerProcess] = field(default_factory=list)

    def start(self, url: str, **settings: str | float | int) -> WorkerProcess:
        env = {k: v for k, v in os.environ.items() if not k.startswith("STOCKRELAY_")}
        env.update({f"STOCKRELAY_{k.upper()}": str(v) for k, v in settings.items()})
        env["STOCKRELAY_DATABASE_URL"] = url
        # One BLAS thread per worker: on two cores, multi-threaded BLAS in several workers
        # oversubscribes the CPU and makes solve times swing by 2-3x.
        env["OPENBLAS_NUM_THREADS"] = "1"
        log = self.tmp_path / f"worker-{len(self.started)}.log"
        with log.open("wb") as sink:
            process = subprocess.Popen(
                [sys.executable, "-m", "service.cli", "worker"],
                cwd=ROOT,
                env=env,
                stdin=subprocess.DEVNULL,
                stdout=sink,
                stderr=subprocess.STDOUT,
            )
        worker = WorkerProcess(process, log)
        self.started.append(worker)
        return worker

    def check_alive(self) -> None:
        for worker in self.started:
            code = worker.process.poll()
            if code is not None and code != -signal.SIGKILL:
                pytest.fail(f"worker {worker.pid} exited with {code}:\n{worker.output()}")

    def kill_all(self) -> None:
        for worker in self.started:
            if worker.process.poll() is None:
                worker.process.kill()
            worker.process.wait(timeout=STOP_DEADLINE)


@pytest.fixture
def workers(tmp_path: Path) -> Iterator[Workers]:
    pool = Workers(tmp_path)
    try:
        yield pool
    finally:
        pool.kill_all()


def wait_for(
    probe: Callable[[], T | None], *, deadline: float, what: str, pool: Workers | None = None
) -> T:
    """Poll `probe` every 50 ms until it returns something other than None (or False)."""
    give_up = time.monotonic() + deadline
    while True:
        value = probe()
        if value is not None and value is not False:
            return value
        if pool is not None:
            pool.check_alive()
        if time.monotonic() > give_up:
            logs = "" if pool is None else "\n".join(w.output() for w in pool.started)
            pytest.fail(f"gave up after {deadline} s waiting for {what}\n{logs}")
        time.sleep(0.05)


def only_job(store: Store) -> SolveJob:
    [job] = store.jobs()
    return job


def in_state(store: Store, state: str) -> SolveJob | None:
    job = only_job(store)
    return job if job.state == state else None


def running_under(store: Store, worker: WorkerProcess) -> SolveJob | None:
    job = only_job(store)
    return job if worker.holds(job) else None


# -- tests -------------------------------------------------------------------------------------


def test_four_workers_share_sixty_jobs_without_duplicates(
    pg_store: Store, workers: Workers
) -> None:
    names = [f"stockrelay-worker-{n}" for n in range(4)]
    pool = [
        workers.start(
            f"{pg_store.url}?application_name={name}", lease_seconds=10, poll_interval=0.1
        )
        for name in names
    ]
    # Queue the jobs only once every worker is connected and polling, so that they compete.
    wait_for(
        lambda: connected_workers(pg_store) >= set(names),
        deadline=30,
        what="four workers to connect",
        pool=workers,
    )
    specs = [small_variant(i) for i in range(30)]
    assert len({canonical_spec(spec)[1] for spec in specs}) == 30
    pg_store.import_networks(specs, ["discounted", "average"])

    owners_seen: set[str] = set()

    def drained() -> bool:
        jobs = pg_store.jobs()
        owners_seen.update(job.lease_owner for job in jobs if job.lease_owner is not None)
        return all(job.state not in ("queued", "running") for job in jobs)

    wait_for(drained, deadline=90, what="the queue to drain", pool=workers)
    # Sampled every 50 ms, so not every worker need be caught holding a job; two show that
    # the jobs really were claimed concurrently.
    pids = {owner.split(":")[1] for owner in owners_seen}
    assert len(pids) >= 2 and pids <= {str(worker.pid) for worker in pool}, owners_seen

    jobs = pg_store.jobs()
    assert [(job.state, job.attempts, job.error) for job in jobs] == [("done", 1, None)] * 60
    policies = pg_store.policies()
    keys = [(p.tenant_id, p.spec_hash, p.criterion) for p in policies]
    assert len(policies) == 60 == len(set(keys))
    assert {p.job_id for p in policies} == {job.id for job in jobs}

    with pg_store.sessions() as session:
        spec_of = {
            version.spec_hash: NetworkSpec.model_validate_json(version.spec_json)
            for version in session.scalars(select(NetworkVersion))
        }
    for policy in policies:
        stored = decode_policy(policy.arrays, policy.layout, policy.checksum, policy.meta)
        assert isinstance(stored, PolicyResult)
        expected = solve_network(spec_of[policy.spec_hash], criterion=policy.criterion)
        assert stored.criterion == policy.criterion
        # Relative to the largest value: average-criterion bias values pass through zero.
        scale = float(np.abs(expected.values).max())
        np.testing.assert_allclose(stored.values, expected.values, rtol=1e-9, atol=1e-9 * scale)
        np.testing.assert_array_equal(stored.action, expected.action)

    for worker in pool:
        assert worker.process.poll() is None, worker.output()
    for worker in pool:
        code, _ = worker.stop()
        assert code == 0, worker.output()


def test_a_killed_workers_job_is_solved_by_the_next_worker(store: Store, workers: Workers) -> None:
    store.import_networks([slow_network()], ["discounted"])
    settings = {"lease_seconds": 2, "poll_interval": 0.1}

    first = workers.start(store.url, **settings)
    wait_for(
        lambda: running_under(store, first), deadline=20, what="worker A to claim", pool=workers
    )
    first.process.kill()
    assert first.process.wait(timeout=STOP_DEADLINE) == -signal.SIGKILL
    assert only_job(store).state == "running"  # until its lease expires

    second = workers.start(store.url, **settings)
    job = wait_for(
        lambda: in_state(store, "done"),
        deadline=30,
        what="worker B to finish the job",
        pool=workers,
    )

    assert (job.attempts, job.lease_owner, job.lease_expires_at, job.error) == (2, None, None, None)
    [policy] = store.policies()
    assert (policy.job_id, policy.spec_hash, policy.criterion) == (
        job.id,
        job.spec_hash,
        "discounted",
    )
    code, _ = second.stop()
    assert code == 0, second.output()


def test_sigterm_mid_solve_stops_cleanly_and_leaves_the_job_consistent(
    store: Store, workers: Workers
) -> None:
    store.import_networks([slow_network()], ["discounted"])
    lease = 2.0
    grace = min(10.0, lease / 2)  # service/worker.py: the shutdown grace period

    worker = workers.start(store.url, lease_seconds=lease, poll_interval=0.1)
    wait_for(
        lambda: running_under(store, worker), deadline=20, what="the worker to claim", pool=workers
    )
    code, seconds = worker.stop()

    assert code == 0, worker.output()
    # The worker notices the stop when its wait for the solve next wakes (at most a third of the
    # lease), then allows the grace period; 2 s more for handing back and interpreter shutdown.
    assert seconds < lease / 3 + grace + 2.0, worker.output()
    job = only_job(store)
    assert job.lease_owner is None and job.lease_expires_at is None
    if job.state == "queued":
        # Handed back: the interrupted attempt is not counted.
        assert (job.attempts, job.started_at, job.error) == (0, None, "handed back at shutdown")
        assert store.policies() == []
    else:
        assert (job.state, job.attempts, job.error) == ("done", 1, None)
        assert [p.job_id for p in store.policies()] == [job.id]


def test_a_job_whose_last_attempt_dies_is_failed_naming_the_worker(
    store: Store, workers: Workers
) -> None:
    store.import_networks([slow_network()], ["discounted"])
    settings = {"lease_seconds": 2, "poll_interval": 0.1, "max_attempts": 1}

    first = workers.start(store.url, **settings)
    claimed = wait_for(
        lambda: running_under(store, first), deadline=20, what="worker A's claim", pool=workers
    )
    first.process.kill()
    first.process.wait(timeout=STOP_DEADLINE)

    second = workers.start(store.url, **settings)
    job = wait_for(
        lambda: in_state(store, "failed"),
        deadline=20,
        what="the job to be failed",
        pool=workers,
    )

    assert job.attempts == 1
    assert job.error is not None
    assert "stopped before finishing" in job.error
    assert claimed.lease_owner is not None and claimed.lease_owner in job.error
    assert (job.lease_owner, job.lease_expires_at) == (None, None)
    assert job.finished_at is not None
    assert store.policies() == []
    code, _ = second.stop()
    assert code == 0, second.output()
