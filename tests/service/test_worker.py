"""The solve worker in-process: outcomes, retries, lease renewal and shutdown."""

from __future__ import annotations

import threading
import time
from collections.abc import Callable
from typing import Any

import numpy as np
import pytest
from sqlalchemy import Engine, select
from sqlalchemy.orm import Session, sessionmaker

from service import worker as worker_module
from service.codec import decode_policy
from service.db import repository
from service.db.tables import NetworkVersion, Policy, SolveJob
from service.settings import Settings
from service.worker import Worker
from solver import PolicyResult, solve_network
from tests.service.test_repository import demo


def make_worker(engine: Engine, sessions: sessionmaker[Session], **settings: Any) -> Worker:
    url = engine.url.render_as_string(hide_password=False)
    return Worker(Settings(database_url=url, poll_interval=0.01, **settings), sessions, "test")


def queue(sessions: sessionmaker[Session], criteria: list[str]) -> None:
    with sessions.begin() as session:
        tenant = repository.get_or_create_tenant(session, "hardware")
        repository.create_network(session, tenant, demo(), criteria)


def jobs(sessions: sessionmaker[Session]) -> list[SolveJob]:
    with sessions() as session:
        return list(session.scalars(select(SolveJob).order_by(SolveJob.id)))


def test_worker_solves_every_queued_job(engine: Engine, sessions: sessionmaker[Session]) -> None:
    queue(sessions, ["discounted", "average"])
    assert make_worker(engine, sessions).run(until_idle=True) == 2
    assert [(j.state, j.attempts) for j in jobs(sessions)] == [("done", 1), ("done", 1)]
    with sessions() as session:
        for policy in session.scalars(select(Policy)):
            stored = decode_policy(policy.arrays, policy.layout, policy.checksum, policy.meta)
            expected = solve_network(demo(), criterion=policy.criterion)  # type: ignore[arg-type]
            np.testing.assert_allclose(stored.values, expected.values, rtol=1e-9)
            np.testing.assert_array_equal(stored.action, expected.action)


def test_solver_refusal_fails_the_job_with_its_message(
    engine: Engine, sessions: sessionmaker[Session]
) -> None:
    queue(sessions, ["discounted"])
    make_worker(engine, sessions, max_states=100).run(until_idle=True)
    [job] = jobs(sessions)
    assert job.state == "failed" and job.attempts == 1
    assert job.error is not None and "150 stock states" in job.error


def test_invalid_stored_specification_fails_the_job(
    engine: Engine, sessions: sessionmaker[Session]
) -> None:
    queue(sessions, ["discounted"])
    with sessions.begin() as session:
        session.scalars(select(NetworkVersion)).one().spec_json = '{"name": "broken"}'
    make_worker(engine, sessions).run(until_idle=True)
    [job] = jobs(sessions)
    assert job.state == "failed"
    assert job.error is not None and job.error.startswith("stored specification is invalid")


def patch_solve(monkeypatch: pytest.MonkeyPatch, solve: Callable[..., PolicyResult]) -> None:
    monkeypatch.setattr(worker_module, "solve_network", solve)


def test_unexpected_errors_are_retried_then_failed(
    engine: Engine, sessions: sessionmaker[Session], monkeypatch: pytest.MonkeyPatch
) -> None:
    def broken(*_args: Any, **_kwargs: Any) -> PolicyResult:
        raise RuntimeError("out of luck")

    patch_solve(monkeypatch, broken)
    queue(sessions, ["discounted"])
    worker = make_worker(engine, sessions, max_attempts=2)
    assert worker.run_one()
    [job] = jobs(sessions)
    assert (job.state, job.attempts, job.error) == ("queued", 1, "RuntimeError: out of luck")
    assert worker.run_one()
    [job] = jobs(sessions)
    assert (job.state, job.attempts) == ("failed", 2)
    assert not worker.run_one()


def test_lease_is_renewed_while_a_long_solve_runs(
    engine: Engine, sessions: sessionmaker[Session], monkeypatch: pytest.MonkeyPatch
) -> None:
    release = threading.Event()

    def slow(*args: Any, **kwargs: Any) -> PolicyResult:
        release.wait(timeout=10)
        return solve_network(*args, **kwargs)

    patch_solve(monkeypatch, slow)
    queue(sessions, ["discounted"])
    worker = make_worker(engine, sessions, lease_seconds=0.3)
    runner = threading.Thread(target=worker.run_one)
    runner.start()
    try:
        # Three lease lengths later nobody else can claim the job: the lease was renewed.
        threading.Event().wait(0.9)
        with sessions.begin() as session:
            assert repository.claim_job(session, "intruder", 0.3, 3) is None
    finally:
        release.set()
        runner.join(timeout=10)
    [job] = jobs(sessions)
    assert (job.state, job.attempts) == ("done", 1)


def test_stop_request_hands_a_running_job_back(
    engine: Engine, sessions: sessionmaker[Session], monkeypatch: pytest.MonkeyPatch
) -> None:
    started, release = threading.Event(), threading.Event()

    def stuck(*args: Any, **kwargs: Any) -> PolicyResult:
        started.set()
        release.wait(timeout=10)
        return solve_network(*args, **kwargs)

    patch_solve(monkeypatch, stuck)
    queue(sessions, ["discounted"])
    # Lease 6 s: renewals every 2 s, 3 s of grace after a stop request.
    worker = make_worker(engine, sessions, lease_seconds=6.0)
    runner = threading.Thread(target=worker.run)
    runner.start()
    try:
        assert started.wait(timeout=10)
        stopped_at = time.monotonic()
        worker.stopping.set()
        runner.join(timeout=10)
        assert not runner.is_alive()
        # The grace period starts at the request, not at the next lease renewal.
        assert time.monotonic() - stopped_at < 3.0 + 0.6
    finally:
        release.set()
    [job] = jobs(sessions)
    assert (job.state, job.attempts, job.lease_owner) == ("queued", 0, None)
    assert job.error == "handed back at shutdown"
