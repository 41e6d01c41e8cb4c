"""The job queue. Every function takes the caller's Session and leaves committing to it.

The job queue lives in `solve_jobs`: solves, and simulations and what-if comparisons (`kind`),
which go through the same claims and leases but store a JSON report instead of a policy. Whatever
lists or reports solves looks at kind "solve" only. A job is claimable when queued, or when
running with an expired lease (its worker died). Claiming is one UPDATE whose target is chosen by
a subquery with `FOR UPDATE SKIP LOCKED` on PostgreSQL, so concurrent workers never block on or
take the same job; SQLite has a single writer, and the UPDATE re-checks that the job is still
claimable.
"""

from __future__ import annotations

from collections.abc import Iterable, Sequence
from datetime import datetime, timedelta

from sqlalchemy import (
    ColumnElement,
    String,
    and_,
    cast,
    func,
    literal,
    or_,
    select,
    update,
)
from sqlalchemy.exc import IntegrityError
from sqlalchemy.orm import Session, selectinload

from service.codec import EncodedPolicy
from service.db.base import utcnow
from service.db.policies import policy_for
from service.db.tables import (
    NetworkVersion,
    Policy,
    SolveJob,
)
from service.vocabulary import JobKind, JobState
from solver import PolicyResult
from solver.priced_result import PricedPolicy

__all__ = [
    "LIVE_STATES",
    "analysis_job",
    "claim_job",
    "criteria_requested",
    "enqueue_analysis",
    "enqueue_solves",
    "fail_exhausted_jobs",
    "finish_job",
    "get_job",
    "jobs_for",
    "list_jobs",
    "live_analysis_jobs",
    "record_progress",
    "release_job",
    "renew_lease",
    "retry_job",
    "solve_accuracy",
    "store_analysis",
    "store_policy",
]


LIVE_STATES = (JobState.QUEUED.value, JobState.RUNNING.value)


def enqueue_solves(
    session: Session, tenant_id: int, version: NetworkVersion, criteria: Iterable[str]
) -> list[SolveJob]:
    jobs = []
    for criterion in dict.fromkeys(criteria):
        if policy_for(session, tenant_id, version.spec_hash, criterion, version.method):
            continue
        job = SolveJob(
            tenant_id=tenant_id,
            version_id=version.id,
            spec_hash=version.spec_hash,
            criterion=criterion,
            method=version.method,
            state=JobState.QUEUED.value,
            attempts=0,
        )
        try:
            # The partial unique index admits one live job per specification and criterion;
            # when another transaction got there first, its job serves this version too.
            with session.begin_nested():
                session.add(job)
        except IntegrityError:
            continue
        jobs.append(job)
    return jobs


def criteria_requested(session: Session, tenant_id: int, spec_hash: str) -> list[str]:
    """Criteria with a policy or a solve job for the specification, in a fixed order."""
    solved = session.scalars(
        select(Policy.criterion).where(Policy.tenant_id == tenant_id, Policy.spec_hash == spec_hash)
    ).all()
    asked = session.scalars(
        select(SolveJob.criterion).where(
            SolveJob.tenant_id == tenant_id,
            SolveJob.spec_hash == spec_hash,
            SolveJob.kind == JobKind.SOLVE.value,
        )
    ).all()
    # Discounted first, as when a network is created.
    return sorted(set(solved) | set(asked), key=lambda c: (c != "discounted", c))


def _claimable(now: datetime, max_attempts: int) -> ColumnElement[bool]:
    """Queued, or running under an expired lease with attempts left (a job out of attempts is
    failed by fail_exhausted_jobs instead)."""
    return or_(
        SolveJob.state == JobState.QUEUED.value,
        and_(
            SolveJob.state == JobState.RUNNING.value,
            SolveJob.lease_expires_at < now,
            SolveJob.attempts < max_attempts,
        ),
    )


def fail_exhausted_jobs(session: Session, max_attempts: int, now: datetime | None = None) -> int:
    """Fail running jobs whose lease expired on their last allowed attempt. Returns how many."""
    now = now or utcnow()
    result = session.execute(
        update(SolveJob)
        .where(
            SolveJob.state == JobState.RUNNING.value,
            SolveJob.lease_expires_at < now,
            SolveJob.attempts >= max_attempts,
        )
        .values(
            state=JobState.FAILED.value,
            finished_at=now,
            error=literal("no attempts left: the worker solving it stopped before finishing (")
            + cast(SolveJob.attempts, String)
            + literal(" attempts, last by ")
            + func.coalesce(SolveJob.lease_owner, "an unknown worker")
            + literal(")"),
            lease_owner=None,
            lease_expires_at=None,
        )
    )
    return int(getattr(result, "rowcount", 0) or 0)


def claim_job(
    session: Session,
    owner: str,
    lease_seconds: float,
    max_attempts: int,
    now: datetime | None = None,
) -> SolveJob | None:
    """Take the oldest claimable job and lease it to `owner`; None when there is none."""
    now = now or utcnow()
    claimable = _claimable(now, max_attempts)
    target = (
        select(SolveJob.id)
        .where(claimable)
        .order_by(SolveJob.id)
        .limit(1)
        .with_for_update(skip_locked=True)
        .scalar_subquery()
    )
    job_id = session.execute(
        update(SolveJob)
        .where(SolveJob.id == target, claimable)
        .values(
            state=JobState.RUNNING.value,
            attempts=SolveJob.attempts + 1,
            lease_owner=owner,
            lease_expires_at=now + timedelta(seconds=lease_seconds),
            started_at=now,
        )
        .returning(SolveJob.id)
    ).scalar_one_or_none()
    if job_id is None:
        return None
    return session.get(SolveJob, job_id, populate_existing=True)


def _owned(job_id: int, owner: str) -> ColumnElement[bool]:
    return and_(
        SolveJob.id == job_id,
        SolveJob.lease_owner == owner,
        SolveJob.state == JobState.RUNNING.value,
    )


def renew_lease(
    session: Session, job_id: int, owner: str, lease_seconds: float, now: datetime | None = None
) -> bool:
    """Extend `owner`'s lease; False when the job is no longer theirs."""
    now = now or utcnow()
    result = session.execute(
        update(SolveJob)
        .where(_owned(job_id, owner))
        .values(lease_expires_at=now + timedelta(seconds=lease_seconds))
    )
    return bool(getattr(result, "rowcount", 0))


def release_job(session: Session, job_id: int, owner: str, note: str | None = None) -> bool:
    """Give a job back to the queue without counting the attempt (worker shutting down)."""
    result = session.execute(
        update(SolveJob)
        .where(_owned(job_id, owner))
        .values(
            state=JobState.QUEUED.value,
            attempts=SolveJob.attempts - 1,
            lease_owner=None,
            lease_expires_at=None,
            started_at=None,
            error=note,
            progress=None,
        )
    )
    return bool(getattr(result, "rowcount", 0))


def record_progress(session: Session, job_id: int, owner: str, progress: str) -> bool:
    """Keep a running solve's latest progress (JSON) while `owner` holds it; False when the job
    is no longer theirs."""
    result = session.execute(
        update(SolveJob).where(_owned(job_id, owner)).values(progress=progress)
    )
    return bool(getattr(result, "rowcount", 0))


def finish_job(
    session: Session,
    job_id: int,
    owner: str,
    *,
    error: str | None = None,
    retry: bool = False,
    now: datetime | None = None,
) -> bool:
    """Mark `owner`'s job failed with `error` (or queued again when `retry`)."""
    now = now or utcnow()
    state = JobState.QUEUED if retry else JobState.FAILED
    result = session.execute(
        update(SolveJob)
        .where(_owned(job_id, owner))
        .values(
            state=state.value,
            error=error,
            finished_at=None if retry else now,
            lease_owner=None,
            lease_expires_at=None,
        )
    )
    return bool(getattr(result, "rowcount", 0))


def store_policy(
    session: Session,
    job: SolveJob,
    owner: str,
    result: PolicyResult | PricedPolicy,
    encoded: EncodedPolicy,
    now: datetime | None = None,
) -> bool:
    """Mark the job done and store its policy, in the caller's transaction. False (and nothing
    written) when the lease was lost; the job then belongs to whoever holds it now.

    A priced policy has no Bellman residual: the job's residual is null, the policy row's 0, and
    its error bound the certified distance to the optimum at the reference stock (upper bound
    minus the low end of the policy value's interval)."""
    now = now or utcnow()
    residual, error_bound = solve_accuracy(result)
    done = session.execute(
        update(SolveJob)
        .where(_owned(job.id, owner))
        .values(
            state=JobState.DONE.value,
            finished_at=now,
            lease_owner=None,
            lease_expires_at=None,
            solve_seconds=result.seconds["total"],
            iterations=result.iterations,
            residual=residual,
            error=None,
        )
    )
    if not getattr(done, "rowcount", 0):
        return False
    if policy_for(session, job.tenant_id, job.spec_hash, job.criterion, job.method) is None:
        session.add(
            Policy(
                tenant_id=job.tenant_id,
                spec_hash=job.spec_hash,
                criterion=job.criterion,
                method=job.method,
                job_id=job.id,
                arrays=encoded.arrays,
                layout=encoded.layout,
                checksum=encoded.checksum,
                meta=encoded.meta,
                gain=result.gain,
                residual=residual or 0.0,
                error_bound=error_bound,
                iterations=result.iterations,
                solve_seconds=result.seconds["total"],
                solved_at=now,
            )
        )
        session.flush()
    return True


def solve_accuracy(result: PolicyResult | PricedPolicy) -> tuple[float | None, float]:
    """(Bellman residual, error bound) of a solve; a priced one has no residual, and its error
    bound is upper bound minus the low end of the policy value's interval at the reference
    stock (currency)."""
    if isinstance(result, PricedPolicy):
        certificate = result.certificate
        return None, max(0.0, certificate.upper_bound - certificate.policy_value_interval[0])
    return result.residual, result.error_bound


def store_analysis(
    session: Session,
    job_id: int,
    owner: str,
    result: str,
    seconds: float,
    now: datetime | None = None,
) -> bool:
    """Mark a simulation or what-if job done with its report (`result`, JSON), in one statement
    that holds only while `owner` holds the lease. False (and nothing written) when it was
    lost."""
    now = now or utcnow()
    done = session.execute(
        update(SolveJob)
        .where(_owned(job_id, owner), SolveJob.kind != JobKind.SOLVE.value)
        .values(
            state=JobState.DONE.value,
            finished_at=now,
            lease_owner=None,
            lease_expires_at=None,
            solve_seconds=seconds,
            result=result,
            error=None,
        )
    )
    return bool(getattr(done, "rowcount", 0))


def enqueue_analysis(
    session: Session,
    tenant_id: int,
    version: NetworkVersion,
    kind: JobKind,
    criterion: str,
    params: str,
) -> SolveJob:
    """Queue a simulation or what-if job of `version` with its request (`params`, JSON). Any
    number may be live for one specification."""
    if kind is JobKind.SOLVE:
        raise ValueError("solves are queued by enqueue_solves")
    job = SolveJob(
        tenant_id=tenant_id,
        version_id=version.id,
        spec_hash=version.spec_hash,
        criterion=criterion,
        kind=kind.value,
        params=params,
        state=JobState.QUEUED.value,
        attempts=0,
    )
    session.add(job)
    session.flush()
    return job


def analysis_job(
    session: Session, tenant_id: int, network_id: int, kind: JobKind, job_id: int
) -> tuple[SolveJob, NetworkVersion] | None:
    """The tenant's job of `kind` on a version of `network_id`, with that version; None when
    there is none (another network's or tenant's job looks the same)."""
    row = session.execute(
        select(SolveJob, NetworkVersion)
        .join(NetworkVersion, NetworkVersion.id == SolveJob.version_id)
        .where(
            SolveJob.id == job_id,
            SolveJob.tenant_id == tenant_id,
            SolveJob.kind == kind.value,
            NetworkVersion.network_id == network_id,
        )
    ).one_or_none()
    return None if row is None else (row[0], row[1])


def live_analysis_jobs(session: Session, tenant_id: int) -> int:
    """How many simulations and what-if comparisons of the tenant are queued or running."""
    return int(
        session.scalar(
            select(func.count()).where(
                SolveJob.tenant_id == tenant_id,
                SolveJob.kind.in_((JobKind.SIMULATE.value, JobKind.WHAT_IF.value)),
                SolveJob.state.in_(LIVE_STATES),
            )
        )
        or 0
    )


def get_job(session: Session, job_id: int) -> SolveJob | None:
    return session.get(SolveJob, job_id)


def jobs_for(
    session: Session, tenant_id: int, spec_hash: str, criterion: str, method: str = "exact"
) -> Sequence[SolveJob]:
    """Every solve job ever run for one specification, criterion and method, newest first."""
    return session.scalars(
        select(SolveJob)
        .where(
            SolveJob.tenant_id == tenant_id,
            SolveJob.spec_hash == spec_hash,
            SolveJob.criterion == criterion,
            SolveJob.method == method,
            SolveJob.kind == JobKind.SOLVE.value,
        )
        .order_by(SolveJob.id.desc())
    ).all()


def list_jobs(
    session: Session,
    state: str | None = None,
    limit: int = 100,
    *,
    tenant_id: int | None = None,
    kind: JobKind | None = JobKind.SOLVE,
) -> Sequence[SolveJob]:
    """Newest first, optionally of one state and one tenant; solves unless `kind` says
    otherwise (None: every kind)."""
    query = (
        select(SolveJob)
        .options(selectinload(SolveJob.version))
        .order_by(SolveJob.id.desc())
        .limit(limit)
    )
    if kind is not None:
        query = query.where(SolveJob.kind == kind.value)
    if state is not None:
        query = query.where(SolveJob.state == state)
    if tenant_id is not None:
        query = query.where(SolveJob.tenant_id == tenant_id)
    return session.scalars(query).all()


def retry_job(session: Session, job_id: int) -> SolveJob | None:
    """Queue a failed job again with fresh attempts; None when it is not failed."""
    job = session.get(SolveJob, job_id)
    if job is None or job.state != JobState.FAILED:
        return None
    job.state = JobState.QUEUED
    job.attempts = 0
    job.error = None
    job.finished_at = None
    try:
        with session.begin_nested():
            session.flush()
    except IntegrityError:
        return None
    return job
