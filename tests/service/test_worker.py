"""The solve worker in-process: outcomes, retries, lease renewal and shutdown; simulations and
what-if comparisons on the same queue."""

from __future__ import annotations

import json
import threading
import time
from collections.abc import Callable
from typing import Any

import numpy as np
import pytest
from sqlalchemy import Engine, select
from sqlalchemy.orm import Session, sessionmaker
from threadpoolctl import threadpool_limits

from service import analysis
from service import worker as worker_module
from service.analysis_requests import Overrides, SimulationRequest
from service.codec import decode_policy
from service.db.analysis_jobs import enqueue_analysis, store_analysis
from service.db.jobs import (
    claim_job,
    criteria_requested,
    enqueue_solves,
    jobs_for,
)
from service.db.keys import get_or_create_tenant
from service.db.networks import create_network
from service.db.tables import NetworkVersion, Policy, SolveJob
from service.settings import Settings
from service.vocabulary import JobKind
from service.worker import Worker
from solver import PolicyResult, solve_network
from tests.service.test_repository import demo


def make_worker(engine: Engine, sessions: sessionmaker[Session], **settings: Any) -> Worker:
    url = engine.url.render_as_string(hide_password=False)
    return Worker(Settings(database_url=url, poll_interval=0.01, **settings), sessions, "test")


def queue(sessions: sessionmaker[Session], criteria: list[str]) -> None:
    with sessions.begin() as session:
        tenant = get_or_create_tenant(session, "hardware")
        create_network(session, tenant, demo(), criteria)


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
            assert isinstance(stored, PolicyResult)
            expected = solve_network(demo(), criterion=policy.criterion)
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


def assert_lease_renewed_until(
    engine: Engine, sessions: sessionmaker[Session], release: threading.Event
) -> None:
    """Run the queued job with a 0.3 s lease while the work waits for `release`: three lease
    lengths later nobody else can claim it (the lease was renewed), and it ends done, once."""
    worker = make_worker(engine, sessions, lease_seconds=0.3)
    runner = threading.Thread(target=worker.run_one)
    runner.start()
    try:
        threading.Event().wait(0.9)
        with sessions.begin() as session:
            assert claim_job(session, "intruder", 0.3, 3) is None
    finally:
        release.set()
        runner.join(timeout=10)
    [job] = jobs(sessions)
    assert (job.state, job.attempts) == ("done", 1)


def test_lease_is_renewed_while_a_long_solve_runs(
    engine: Engine, sessions: sessionmaker[Session], monkeypatch: pytest.MonkeyPatch
) -> None:
    release = threading.Event()

    def slow(*args: Any, **kwargs: Any) -> PolicyResult:
        release.wait(timeout=10)
        return solve_network(*args, **kwargs)

    patch_solve(monkeypatch, slow)
    queue(sessions, ["discounted"])
    assert_lease_renewed_until(engine, sessions, release)


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


# -- simulations and what-if comparisons -------------------------------------------------------

SHORT_SIMULATION = {"criterion": "average", "days": 40, "replications": 8, "warmup_days": 5}


def queue_analysis(
    sessions: sessionmaker[Session],
    kind: JobKind,
    params: dict[str, Any],
    criteria: list[str] | None = None,
) -> None:
    """The demo network (solves queued for `criteria`, none by default) and one job of `kind`."""
    with sessions.begin() as session:
        tenant = get_or_create_tenant(session, "hardware")
        _network, version, _jobs = create_network(session, tenant, demo(), criteria or [])
        enqueue_analysis(
            session,
            tenant.id,
            version,
            kind,
            params.get("criterion", "discounted"),
            json.dumps(params),
        )


def report_of(job: SolveJob) -> Any:
    assert job.result is not None
    return json.loads(job.result)


def test_simulation_job_stores_the_report_of_its_request(
    engine: Engine, sessions: sessionmaker[Session]
) -> None:
    params = {**SHORT_SIMULATION, "seed": 3}
    queue_analysis(sessions, JobKind.SIMULATE, params)
    assert make_worker(engine, sessions).run(until_idle=True) == 1
    [job] = jobs(sessions)
    assert (job.kind, job.state, job.attempts, job.error) == ("simulate", "done", 1, None)
    assert job.lease_owner is None and job.solve_seconds is not None
    expected = analysis.run_simulation(demo(), SimulationRequest.model_validate(params))
    assert report_of(job) == expected
    assert report_of(job)["optimal_source"] == "solved"
    with sessions() as session:
        assert session.scalars(select(Policy)).all() == []  # a simulation stores no policy


def test_simulation_job_simulates_the_stored_policy(
    engine: Engine, sessions: sessionmaker[Session]
) -> None:
    params = {**SHORT_SIMULATION, "seed": 4}
    queue_analysis(sessions, JobKind.SIMULATE, params, criteria=["average"])
    assert make_worker(engine, sessions).run(until_idle=True) == 2
    solve, simulation = jobs(sessions)
    assert (solve.kind, simulation.kind) == ("solve", "simulate")
    report = report_of(simulation)
    assert report["optimal_source"] == "stored"
    # The stored policy is the one the simulation would have solved: the same days, the same
    # outcomes.
    solved_here = analysis.run_simulation(demo(), SimulationRequest.model_validate(params))
    assert report["policies"] == solved_here["policies"]


def test_what_if_job_stores_the_comparison(engine: Engine, sessions: sessionmaker[Session]) -> None:
    params = {"criterion": "average", "overrides": {"locations": {"hilltop": {"unit_margin": 30}}}}
    queue_analysis(sessions, JobKind.WHAT_IF, params)
    assert make_worker(engine, sessions).run(until_idle=True) == 1
    [job] = jobs(sessions)
    assert (job.kind, job.state, job.criterion) == ("what_if", "done", "average")
    expected = analysis.run_what_if(
        demo(), Overrides.model_validate(params["overrides"]), criterion="average"
    )
    result = report_of(job)
    assert result["moves"] == expected["moves"]
    assert result["change"]["profit_per_day"] == pytest.approx(
        expected["change"]["profit_per_day"], rel=1e-9
    )
    assert result["change"]["profit_per_day"] < 0  # a lower margin at hilltop earns less


@pytest.mark.parametrize(
    ("kind", "params", "message"),
    [
        (
            JobKind.SIMULATE,
            {**SHORT_SIMULATION, "start_stock": {"riverside": 99, "hilltop": 0}},
            "99 units is outside 0..14",
        ),
        (JobKind.SIMULATE, {"days": "many"}, "days"),
        (JobKind.WHAT_IF, {"overrides": {"locations": {"uptown": {}}}}, "unknown location"),
    ],
)
def test_analysis_input_problems_fail_at_once(
    engine: Engine,
    sessions: sessionmaker[Session],
    kind: JobKind,
    params: dict[str, Any],
    message: str,
) -> None:
    queue_analysis(sessions, kind, params)
    make_worker(engine, sessions).run(until_idle=True)
    [job] = jobs(sessions)
    assert (job.state, job.attempts, job.result) == ("failed", 1, None)
    assert job.error is not None and message in job.error


def test_unexpected_analysis_errors_are_retried_then_failed(
    engine: Engine, sessions: sessionmaker[Session], monkeypatch: pytest.MonkeyPatch
) -> None:
    def broken(*_args: Any, **_kwargs: Any) -> dict[str, Any]:
        raise RuntimeError("disk full")

    monkeypatch.setattr(analysis, "run_simulation", broken)
    queue_analysis(sessions, JobKind.SIMULATE, SHORT_SIMULATION)
    worker = make_worker(engine, sessions, max_attempts=2)
    assert worker.run_one()
    [job] = jobs(sessions)
    assert (job.state, job.attempts, job.error) == ("queued", 1, "RuntimeError: disk full")
    assert worker.run_one()
    [job] = jobs(sessions)
    assert (job.state, job.attempts) == ("failed", 2)


def test_lease_is_renewed_while_a_long_simulation_runs(
    engine: Engine, sessions: sessionmaker[Session], monkeypatch: pytest.MonkeyPatch
) -> None:
    release = threading.Event()
    simulate = analysis.run_simulation

    def slow(*args: Any, **kwargs: Any) -> dict[str, Any]:
        release.wait(timeout=10)
        return simulate(*args, **kwargs)

    monkeypatch.setattr(analysis, "run_simulation", slow)
    queue_analysis(sessions, JobKind.SIMULATE, SHORT_SIMULATION)
    assert_lease_renewed_until(engine, sessions, release)


def test_a_report_is_stored_only_under_the_lease(sessions: sessionmaker[Session]) -> None:
    queue_analysis(sessions, JobKind.SIMULATE, SHORT_SIMULATION)
    with sessions.begin() as session:
        job = claim_job(session, "first", 60, 3)
        assert job is not None
        assert not store_analysis(session, job.id, "second", "{}", 0.1)
    [job] = jobs(sessions)
    assert (job.state, job.result, job.lease_owner) == ("running", None, "first")
    with sessions.begin() as session:
        assert store_analysis(session, job.id, "first", '{"ok": true}', 0.1)
    [job] = jobs(sessions)
    assert (job.state, job.result, job.solve_seconds) == ("done", '{"ok": true}', 0.1)


def test_solves_deduplicate_beside_live_simulations(sessions: sessionmaker[Session]) -> None:
    queue_analysis(sessions, JobKind.SIMULATE, SHORT_SIMULATION)
    with sessions.begin() as session:
        version = session.scalars(select(NetworkVersion)).one()
        tenant_id = version.network.tenant_id
        for _ in range(2):  # more simulations of the same specification and criterion
            enqueue_analysis(
                session, tenant_id, version, JobKind.SIMULATE, "average", json.dumps({})
            )
        assert [
            job.criterion for job in enqueue_solves(session, tenant_id, version, ["average"])
        ] == ["average"]
        assert enqueue_solves(session, tenant_id, version, ["average"]) == []
        assert criteria_requested(session, tenant_id, version.spec_hash) == ["average"]
        [solve] = jobs_for(session, tenant_id, version.spec_hash, "average")
        assert solve.kind == "solve"


@pytest.mark.parametrize(("threads", "expected"), [({}, 1), ({"blas_threads": 2}, 2)])
def test_the_worker_uses_the_configured_blas_threads(
    engine: Engine,
    sessions: sessionmaker[Session],
    monkeypatch: pytest.MonkeyPatch,
    threads: dict[str, int],
    expected: int,
    blas_threads: Callable[[], set[int]],
) -> None:
    queue(sessions, ["discounted"])
    threadpool_limits(limits=3, user_api="blas")
    seen: list[set[int]] = []

    def watched(*args: Any, **kwargs: Any) -> PolicyResult:
        seen.append(blas_threads())
        return solve_network(*args, **kwargs)

    patch_solve(monkeypatch, watched)
    make_worker(engine, sessions, **threads).run(until_idle=True)
    assert seen == [{expected}]
