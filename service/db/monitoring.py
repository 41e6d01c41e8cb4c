"""The aggregates the metrics (service.metrics) and the status page (service.status_page) read:
jobs by kind and state, solve-time histograms, running priced solves' progress, recent jobs,
tonight's closing counts. (Where each network's current version stands is
service.db.reporting.solve_states.)

Every function takes the caller's Session and only reads.
"""

from __future__ import annotations

from collections import defaultdict
from collections.abc import Iterable, Sequence
from datetime import date, datetime

from sqlalchemy import and_, case, func, select
from sqlalchemy.orm import Session

from service.db.tables import ClosingCount, Network, NetworkVersion, SolveJob
from service.vocabulary import JobKind, JobState

__all__ = [
    "first_spec_of_hashes",
    "job_lines",
    "jobs_by_kind_and_state",
    "live_job_counts",
    "recent_solve_seconds",
    "reported_locations",
    "running_progress",
    "solve_seconds_buckets",
]


def first_spec_of_hashes(session: Session, hashes: Sequence[str]) -> list[tuple[str, str]]:
    """(specification hash, specification JSON) of the first version stored with each hash."""
    first = (
        select(func.min(NetworkVersion.id))
        .where(NetworkVersion.spec_hash.in_(hashes))
        .group_by(NetworkVersion.spec_hash)
    )
    rows = session.execute(
        select(NetworkVersion.spec_hash, NetworkVersion.spec_json).where(
            NetworkVersion.id.in_(first)
        )
    ).all()
    return [(spec_hash, text) for spec_hash, text in rows]


def jobs_by_kind_and_state(session: Session) -> list[tuple[str, str, int, datetime | None, int]]:
    """(kind, state, jobs, oldest creation time, claims after the first) over every job."""
    rows = session.execute(
        select(
            SolveJob.kind,
            SolveJob.state,
            func.count(),
            func.min(SolveJob.created_at),
            func.coalesce(
                func.sum(case((SolveJob.attempts > 1, SolveJob.attempts - 1), else_=0)), 0
            ),
        ).group_by(SolveJob.kind, SolveJob.state)
    ).all()
    return [(kind, state, int(n), first, int(extra)) for kind, state, n, first, extra in rows]


def solve_seconds_buckets(
    session: Session, bounds: Sequence[float]
) -> list[tuple[str, str, str, int, float, list[int]]]:
    """One row per (specification hash, criterion, method) of done solves: (hash, criterion,
    method, solves, total seconds, solves within each of `bounds` seconds: cumulative counts),
    computed by the database."""
    done = and_(
        SolveJob.kind == JobKind.SOLVE.value,
        SolveJob.state == JobState.DONE.value,
        SolveJob.solve_seconds.is_not(None),
    )
    rows = session.execute(
        select(
            SolveJob.spec_hash,
            SolveJob.criterion,
            SolveJob.method,
            func.count(),
            func.sum(SolveJob.solve_seconds),
            *(func.sum(case((SolveJob.solve_seconds <= bound, 1), else_=0)) for bound in bounds),
        )
        .where(done)
        .group_by(SolveJob.spec_hash, SolveJob.criterion, SolveJob.method)
    ).all()
    return [
        (spec_hash, criterion, method, int(n), float(total or 0.0), [int(b) for b in buckets])
        for spec_hash, criterion, method, n, total, *buckets in rows
    ]


def running_progress(session: Session) -> list[tuple[int, int, str, str | None]]:
    """(job id, network id, criterion, progress JSON) of each running solve that reported
    progress, by job id."""
    rows = session.execute(
        select(SolveJob.id, NetworkVersion.network_id, SolveJob.criterion, SolveJob.progress)
        .join(NetworkVersion, NetworkVersion.id == SolveJob.version_id)
        .where(
            SolveJob.kind == JobKind.SOLVE.value,
            SolveJob.state == JobState.RUNNING.value,
            SolveJob.progress.is_not(None),
        )
        .order_by(SolveJob.id)
    ).all()
    return [(job_id, network_id, criterion, text) for job_id, network_id, criterion, text in rows]


def live_job_counts(session: Session, tenant_id: int) -> dict[str, int]:
    """Queued and running jobs of the tenant (every kind), by state."""
    live = (JobState.QUEUED.value, JobState.RUNNING.value)
    return {
        state: int(count)
        for state, count in session.execute(
            select(SolveJob.state, func.count())
            .where(SolveJob.tenant_id == tenant_id, SolveJob.state.in_(live))
            .group_by(SolveJob.state)
        ).all()
    }


def reported_locations(session: Session, tonight: dict[int, date]) -> dict[int, set[str]]:
    """The locations that reported a closing count for each network's business date (network
    id -> date), in one query."""
    reported: dict[int, set[str]] = defaultdict(set)
    if not tonight:
        return reported
    for network_id, location_id, business_date in session.execute(
        select(ClosingCount.network_id, ClosingCount.location_id, ClosingCount.business_date).where(
            ClosingCount.network_id.in_(tonight),
            ClosingCount.business_date.in_(set(tonight.values())),
        )
    ).all():
        if tonight[network_id] == business_date:
            reported[network_id].add(location_id)
    return reported


def recent_solve_seconds(
    session: Session, tenant_id: int, per_network: int
) -> dict[int, list[float]]:
    """Solve seconds of the last `per_network` finished solves of each of the tenant's
    networks, oldest first."""
    ranked = (
        select(
            Network.id.label("network_id"),
            SolveJob.solve_seconds,
            SolveJob.id.label("job_id"),
            func.row_number()
            .over(partition_by=Network.id, order_by=SolveJob.id.desc())
            .label("rank"),
        )
        .join(NetworkVersion, NetworkVersion.id == SolveJob.version_id)
        .join(Network, Network.id == NetworkVersion.network_id)
        .where(
            SolveJob.tenant_id == tenant_id,
            SolveJob.kind == JobKind.SOLVE.value,
            SolveJob.state == JobState.DONE.value,
            SolveJob.solve_seconds.is_not(None),
        )
        .subquery()
    )
    times: dict[int, list[float]] = defaultdict(list)
    for network_id, seconds in session.execute(
        select(ranked.c.network_id, ranked.c.solve_seconds)
        .where(ranked.c.rank <= per_network)
        .order_by(ranked.c.network_id, ranked.c.job_id)
    ).all():
        times[network_id].append(float(seconds))
    return times


def job_lines(
    session: Session,
    tenant_id: int,
    *,
    states: Iterable[str] | None,
    oldest_first: bool,
    limit: int,
) -> list[tuple[SolveJob, int, int, str]]:
    """(job, version number, network id, network name) of the tenant's jobs, optionally of
    some states only, oldest or newest first."""
    query = (
        select(SolveJob, NetworkVersion.number, Network.id, Network.name)
        .join(NetworkVersion, NetworkVersion.id == SolveJob.version_id)
        .join(Network, Network.id == NetworkVersion.network_id)
        .where(SolveJob.tenant_id == tenant_id)
        .order_by(SolveJob.id if oldest_first else SolveJob.id.desc())
        .limit(limit)
    )
    if states is not None:
        query = query.where(SolveJob.state.in_(list(states)))
    return [
        (job, number, network_id, name)
        for job, number, network_id, name in session.execute(query).all()
    ]
