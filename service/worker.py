"""The solve worker: claims queued jobs, solves them, and stores the policies.

One job at a time per worker; run more workers (processes or machines) against one PostgreSQL to
scale out. A worker holds a lease on its job and renews it every third of the lease while the
solver runs in a background thread; if the worker dies, the lease expires and another worker
claims the job again. Storing the policy and marking the job done happen in one transaction, and
only while the lease is still held.

On SIGTERM or SIGINT the worker stops claiming, lets the current solve finish within a grace
period, and otherwise gives the job back to the queue before exiting.

A priced solve (the job's `method`, service.modes) runs solver.solve_priced, which reports its
progress to the solve thread's slot; the worker thread writes the latest into the job, at most
once per PROGRESS_SECONDS and in a short transaction of its own, for /v1/jobs, the status page
and the metrics.

Simulations and what-if comparisons come through the same queue (the job's `kind`) and run the
same way, in a background thread under a renewed lease; their JSON report is stored, and the
job marked done, in one statement while the lease is held. A simulation uses the network's
stored optimal policy when there is one, and solves it otherwise.

A chunk of an assortment's calibration (kind `calibrate`, service.assortment_history) estimates
its items in the background thread, reading in a session of its own; the new versions, their
solve jobs and the job's report are written in one transaction while the lease is held.
"""

from __future__ import annotations

import json
import logging
import os
import signal
import socket
import threading
import time
import uuid
from dataclasses import dataclass
from types import FrameType
from typing import Any

from pydantic import ValidationError
from sqlalchemy.exc import IntegrityError
from sqlalchemy.orm import Session, sessionmaker

from service import analysis, assortment_history
from service.analysis_requests import SimulationRequest, WhatIfRequest
from service.codec import StoredPolicy, decode_policy, encode_policy
from service.db.analysis_jobs import store_analysis
from service.db.base import utcnow
from service.db.jobs import (
    claim_job,
    fail_exhausted_jobs,
    finish_job,
    get_job,
    record_progress,
    release_job,
    renew_lease,
)
from service.db.policies import policy_for, store_policy
from service.db.tables import NetworkVersion
from service.errors import CorruptPolicyError, LeaseLostError
from service.settings import Settings
from service.vocabulary import JobKind, SolveMethod
from solver import Criterion, NetworkSpec, SolverError, solve_network
from solver.priced import solve_priced
from solver.priced_result import PricedProgress

__all__ = ["PROGRESS_SECONDS", "Worker", "progress_json"]

log = logging.getLogger(__name__)

# Longest wait for a running solve after a stop request before the job is handed back.
_SHUTDOWN_GRACE_SECONDS = 10.0
# How often a worker waiting on a solve looks at its stop flag.
_WAIT_SLICE_SECONDS = 0.1
# Least time between two progress writes of one running solve.
PROGRESS_SECONDS = 1.0


@dataclass(frozen=True)
class _Claimed:
    job_id: int
    attempts: int
    criterion: str
    spec_json: str
    version_id: int
    kind: str
    params: str | None
    tenant_id: int
    spec_hash: str
    method: str
    mode: str


def progress_json(progress: PricedProgress) -> str:
    """A priced solve's progress as stored in the job (see schemas.JobProgressOut)."""
    return json.dumps(
        {
            "stage": progress.stage,
            "iteration": progress.iteration,
            "upper_bound": progress.upper_bound,
            "lower_bound": progress.lower_bound,
            "elapsed": progress.elapsed,
            "candidates": progress.candidates,
            "trade_limit": progress.trade_limit,
            "reported_at": utcnow().isoformat(),
        },
        allow_nan=False,
        separators=(",", ":"),
    )


class _Solve(threading.Thread):
    """Runs one solve; daemon, so a worker that gives up on it can still exit."""

    def __init__(self, spec: NetworkSpec, criterion: str, method: str, settings: Settings) -> None:
        super().__init__(daemon=True, name="stockrelay-solve")
        self.spec, self.criterion, self.method, self.settings = spec, criterion, method, settings
        self.result: StoredPolicy | None = None
        self.error: BaseException | None = None
        # The latest progress of a priced solve, and how many reports have come (the worker
        # thread compares the count with the last it wrote).
        self.progress: PricedProgress | None = None
        self.reports = 0

    def _report(self, progress: PricedProgress) -> None:
        self.progress = progress
        self.reports += 1

    def run(self) -> None:
        criterion: Criterion = "average" if self.criterion == "average" else "discounted"
        try:
            if self.method == SolveMethod.PRICED:
                self.result = solve_priced(self.spec, criterion=criterion, progress=self._report)
            else:
                self.result = solve_network(
                    self.spec, criterion=criterion, limits=self.settings.size_limits
                )
        except BaseException as exc:  # handed to the worker thread, which decides
            self.error = exc


class _Analyse(threading.Thread):
    """Runs one simulation or what-if comparison; daemon, like _Solve."""

    def __init__(
        self,
        claimed: _Claimed,
        spec: NetworkSpec,
        optimal: StoredPolicy | None,
        settings: Settings,
    ) -> None:
        super().__init__(daemon=True, name=f"stockrelay-{claimed.kind}")
        self.claimed, self.spec, self.optimal, self.settings = claimed, spec, optimal, settings
        self.result: dict[str, Any] | None = None
        self.error: BaseException | None = None
        self.seconds = 0.0

    def run(self) -> None:
        start = time.perf_counter()
        try:
            self.result = self._compute()
        except BaseException as exc:  # handed to the worker thread, which decides
            self.error = exc
        finally:
            self.seconds = time.perf_counter() - start

    def _compute(self) -> dict[str, Any]:
        kind, params = self.claimed.kind, self.claimed.params
        if params is None:
            raise ValueError(f"the {kind} job has no parameters")
        limits = self.settings.size_limits
        if kind == JobKind.SIMULATE:
            return analysis.run_simulation(
                self.spec,
                SimulationRequest.model_validate_json(params),
                self.optimal,
                limits=limits,
                max_replication_days=self.settings.simulation_max_replication_days,
                method=self.claimed.method,
            )
        if kind == JobKind.WHAT_IF:
            request = WhatIfRequest.model_validate_json(params)
            return analysis.run_what_if(
                self.spec,
                request.overrides,
                criterion=request.criterion,
                limits=limits,
                mode=self.claimed.mode,
            )
        raise ValueError(f"unknown job kind {kind!r}")


class _Calibrate(threading.Thread):
    """Estimates the items of one calibration chunk; daemon, like _Solve."""

    def __init__(
        self, claimed: _Claimed, sessions: sessionmaker[Session], settings: Settings
    ) -> None:
        super().__init__(daemon=True, name="stockrelay-calibrate")
        self.claimed, self.sessions, self.settings = claimed, sessions, settings
        self.result: assortment_history.ChunkEstimates | None = None
        self.error: BaseException | None = None
        self.seconds = 0.0

    def run(self) -> None:
        start = time.perf_counter()
        try:
            if self.claimed.params is None:
                raise ValueError("the calibrate job has no parameters")
            with self.sessions() as session:
                self.result = assortment_history.estimate_chunk(
                    session,
                    self.claimed.tenant_id,
                    json.loads(self.claimed.params),
                    self.settings.size_limits,
                )
        except BaseException as exc:  # handed to the worker thread, which decides
            self.error = exc
        finally:
            self.seconds = time.perf_counter() - start


class Worker:
    def __init__(
        self,
        settings: Settings,
        session_factory: sessionmaker[Session],
        owner: str | None = None,
    ) -> None:
        self.settings = settings
        self.sessions = session_factory
        self.owner = owner or f"{socket.gethostname()}:{os.getpid()}:{uuid.uuid4().hex[:8]}"
        self.stopping = threading.Event()

    def install_signal_handlers(self) -> None:
        def request_stop(signum: int, _frame: FrameType | None) -> None:
            log.info("worker %s: %s received, stopping", self.owner, signal.Signals(signum).name)
            self.stopping.set()

        signal.signal(signal.SIGTERM, request_stop)
        signal.signal(signal.SIGINT, request_stop)

    def run(self, *, until_idle: bool = False) -> int:
        """Work until stopped (or, with `until_idle`, until the queue is empty). Returns the
        number of jobs handled."""
        handled = 0
        # Scale-out is by processes: BLAS threads would only compete with the other workers.
        self.settings.limit_blas_threads()
        log.info("worker %s started", self.owner)
        while not self.stopping.is_set():
            if self.run_one():
                handled += 1
            elif until_idle:
                break
            else:
                self.stopping.wait(self.settings.poll_interval)
        log.info("worker %s stopped after %d jobs", self.owner, handled)
        return handled

    def run_one(self) -> bool:
        """Claim and handle one job; False when none was claimable."""
        claimed = self._claim()
        if claimed is None:
            return False
        self._handle(claimed)
        return True

    def _claim(self) -> _Claimed | None:
        with self.sessions.begin() as session:
            failed = fail_exhausted_jobs(session, self.settings.max_attempts)
            if failed:
                log.warning("failed %d jobs whose workers stopped on their last attempt", failed)
            job = claim_job(
                session, self.owner, self.settings.lease_seconds, self.settings.max_attempts
            )
            if job is None:
                return None
            version = session.get_one(NetworkVersion, job.version_id)
            return _Claimed(
                job.id,
                job.attempts,
                job.criterion,
                version.spec_json,
                version.id,
                job.kind,
                job.params,
                job.tenant_id,
                job.spec_hash,
                version.method,
                version.network.mode,
            )

    def _handle(self, claimed: _Claimed) -> None:
        log.info(
            "job %d: %s version %d (%s), attempt %d",
            claimed.job_id,
            "solving" if claimed.kind == JobKind.SOLVE else f"{claimed.kind} of",
            claimed.version_id,
            claimed.criterion,
            claimed.attempts,
        )
        try:
            spec = NetworkSpec.model_validate_json(claimed.spec_json)
        except ValidationError as exc:
            self._fail(claimed, f"stored specification is invalid: {exc}")
            return

        solve: _Solve | _Analyse | _Calibrate
        if claimed.kind == JobKind.SOLVE:
            solve = _Solve(spec, claimed.criterion, claimed.method, self.settings)
        elif claimed.kind == JobKind.CALIBRATE:
            solve = _Calibrate(claimed, self.sessions, self.settings)
        else:
            solve = _Analyse(claimed, spec, self._stored_policy(claimed), self.settings)
        solve.start()
        if not self._wait(claimed, solve):
            return
        if solve.error is not None:
            if isinstance(solve.error, SolverError | ValueError):
                # The same input fails the same way: no point trying again.
                self._fail(claimed, str(solve.error))
            else:
                self._fail(
                    claimed,
                    f"{type(solve.error).__name__}: {solve.error}",
                    retry=claimed.attempts < self.settings.max_attempts,
                )
            return
        assert solve.result is not None
        if isinstance(solve, _Solve):
            if solve.progress is not None:
                # The last report, which the throttle may have held back.
                self._write_progress(claimed, solve.progress)
            self._store(claimed, solve.result)
        elif isinstance(solve, _Calibrate):
            self._store_calibration(claimed, solve.result, solve.seconds)
        else:
            self._store_report(claimed, solve.result, solve.seconds)

    def _stored_policy(self, claimed: _Claimed) -> StoredPolicy | None:
        """The stored optimal policy a simulation compares against; None when there is none
        (or it is corrupt: the read path repairs it), and the simulation solves its own."""
        if claimed.kind != JobKind.SIMULATE:
            return None
        with self.sessions() as session:
            row = policy_for(
                session, claimed.tenant_id, claimed.spec_hash, claimed.criterion, claimed.method
            )
            if row is None:
                return None
            try:
                return decode_policy(row.arrays, row.layout, row.checksum, row.meta)
            except CorruptPolicyError as exc:
                log.warning("job %d: stored policy unusable (%s); solving", claimed.job_id, exc)
                return None

    def _wait(self, claimed: _Claimed, solve: threading.Thread) -> bool:
        """Renew the lease until the solve ends. False when the job was handed back or lost.

        Waits in short slices so that a stop request is noticed at once, not at the next
        renewal."""
        renew_every = self.settings.lease_seconds / 3
        grace = min(_SHUTDOWN_GRACE_SECONDS, self.settings.lease_seconds / 2)
        renewed_at = time.monotonic()
        stop_requested_at: float | None = None
        written, written_at = 0, -PROGRESS_SECONDS
        while True:
            solve.join(timeout=min(_WAIT_SLICE_SECONDS, renew_every))
            if not solve.is_alive():
                return True
            now = time.monotonic()
            progress = solve.progress if isinstance(solve, _Solve) else None
            if (
                progress is not None
                and isinstance(solve, _Solve)
                and solve.reports > written
                and now - written_at >= PROGRESS_SECONDS
            ):
                written, written_at = solve.reports, now
                self._write_progress(claimed, progress)
            if self.stopping.is_set():
                stop_requested_at = stop_requested_at or now
                if now - stop_requested_at > grace:
                    with self.sessions.begin() as session:
                        release_job(session, claimed.job_id, self.owner, "handed back at shutdown")
                    log.info("job %d: handed back to the queue at shutdown", claimed.job_id)
                    return False
            if now - renewed_at < renew_every:
                continue
            with self.sessions.begin() as session:
                held = renew_lease(session, claimed.job_id, self.owner, self.settings.lease_seconds)
            renewed_at = now
            if not held:
                log.warning("job %d: lease lost; leaving it to its new owner", claimed.job_id)
                return False

    def _write_progress(self, claimed: _Claimed, progress: PricedProgress) -> None:
        with self.sessions.begin() as session:
            record_progress(session, claimed.job_id, self.owner, progress_json(progress))

    def _fail(self, claimed: _Claimed, error: str, *, retry: bool = False) -> None:
        with self.sessions.begin() as session:
            finish_job(session, claimed.job_id, self.owner, error=error, retry=retry)
        log.warning("job %d: %s: %s", claimed.job_id, "will retry" if retry else "failed", error)

    def _store(self, claimed: _Claimed, result: StoredPolicy) -> None:
        encoded = encode_policy(result)
        with self.sessions.begin() as session:
            job = get_job(session, claimed.job_id)
            stored = job is not None and store_policy(session, job, self.owner, result, encoded)
        if stored:
            log.info(
                "job %d: %s solve done in %.3f s, %d iterations",
                claimed.job_id,
                claimed.method,
                result.seconds["total"],
                result.iterations,
            )
        else:
            log.warning("job %d: lease lost before the policy was stored", claimed.job_id)

    def _store_report(self, claimed: _Claimed, report: dict[str, Any], seconds: float) -> None:
        text = json.dumps(report, allow_nan=False, separators=(",", ":"))
        with self.sessions.begin() as session:
            stored = store_analysis(session, claimed.job_id, self.owner, text, seconds)
        if stored:
            log.info("job %d: %s done in %.3f s", claimed.job_id, claimed.kind, seconds)
        else:
            log.warning("job %d: lease lost before the report was stored", claimed.job_id)

    def _store_calibration(
        self, claimed: _Claimed, estimates: assortment_history.ChunkEstimates, seconds: float
    ) -> None:
        try:
            with self.sessions.begin() as session:
                report = assortment_history.apply_chunk(
                    session, claimed.tenant_id, estimates, utcnow()
                )
                text = json.dumps(report, allow_nan=False, separators=(",", ":"))
                if not store_analysis(session, claimed.job_id, self.owner, text, seconds):
                    raise LeaseLostError
        except LeaseLostError:
            log.warning("job %d: lease lost before the calibration was stored", claimed.job_id)
            return
        except IntegrityError as exc:
            # Another writer gave one of the items a version at the same moment: estimate the
            # chunk again from the item's new version.
            self._fail(
                claimed,
                f"an item changed while it was stored: {exc.orig}",
                retry=claimed.attempts < self.settings.max_attempts,
            )
            return
        log.info(
            "job %d: calibrate done in %.3f s, %d items given a version",
            claimed.job_id,
            seconds,
            report["calibrated"],
        )
