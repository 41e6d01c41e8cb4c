"""Simulations and what-if comparisons on the job queue (service.db.jobs): queued with their
request as JSON, claimed and leased like solves, and done with a JSON report instead of a
policy. Any number may be live for one specification; a tenant's live ones are counted against
its cap. Every function takes the caller's Session and leaves committing to it.
"""

from __future__ import annotations

from datetime import datetime

from sqlalchemy import func, select
from sqlalchemy.orm import Session

from service.db.base import utcnow
from service.db.jobs import LIVE_STATES
from service.db.leases import update_held
from service.db.tables import NetworkVersion, SolveJob
from service.vocabulary import JobKind, JobState

__all__ = ["analysis_job", "enqueue_analysis", "live_analysis_jobs", "store_analysis"]


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
    return update_held(
        session,
        job_id,
        owner,
        SolveJob.kind != JobKind.SOLVE,
        state=JobState.DONE,
        finished_at=now,
        lease_owner=None,
        lease_expires_at=None,
        solve_seconds=seconds,
        result=result,
        error=None,
    )
