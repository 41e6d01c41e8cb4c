"""The job queue. Every function takes the caller's Session and leaves committing to it.

The job queue lives in `solve_jobs`: solves, and simulations and what-if comparisons (`kind`),
which go through the same claims and leases (service.db.leases) but store a JSON report
(service.db.analysis_jobs) instead of a policy (service.db.policies.store_policy). Whatever
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

from service.db.base import utcnow
from service.db.leases import update_held
from service.db.policies import policy_for
from service.db.tables import (
    NetworkVersion,
    Policy,
    SolveJob,
)
from service.vocabulary import JobKind, JobState

__all__ = [
    "LIVE_STATES",
    "claim_job",
    "criteria_requested",
    "enqueue_solves",
    "fail_exhausted_jobs",
    "finish_job",
    "get_job",
    "jobs_for",
    "list_jobs",
    "record_progress",
    "release_job",
    "renew_lease",
    "retry_job",
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


def renew_lease(
    session: Session, job_id: int, owner: str, lease_seconds: float, now: datetime | None = None
) -> bool:
    """Extend `owner`'s lease; False when the job is no longer theirs."""
    now = now or utcnow()
    return update_held(
        session, job_id, owner, lease_expires_at=now + timedelta(seconds=lease_seconds)
    )


def release_job(session: Session, job_id: int, owner: str, note: str | None = None) -> bool:
    """Give a job back to the queue without counting the attempt (worker shutting down)."""
    return update_held(
        session,
        job_id,
        owner,
        state=JobState.QUEUED,
        attempts=SolveJob.attempts - 1,
        lease_owner=None,
        lease_expires_at=None,
        started_at=None,
        error=note,
        progress=None,
    )


def record_progress(session: Session, job_id: int, owner: str, progress: str) -> bool:
    """Keep a running solve's latest progress (JSON) while `owner` holds it; False when the job
    is no longer theirs."""
    return update_held(session, job_id, owner, progress=progress)


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
    return update_held(
        session,
        job_id,
        owner,
        state=JobState.QUEUED if retry else JobState.FAILED,
        error=error,
        finished_at=None if retry else now,
        lease_owner=None,
        lease_expires_at=None,
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
