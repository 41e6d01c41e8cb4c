"""Queries. Every function takes the caller's Session and leaves committing to it.

The job queue lives in `solve_jobs`: solves, and simulations and what-if comparisons (`kind`),
which go through the same claims and leases but store a JSON report instead of a policy. Whatever
lists or reports solves looks at kind "solve" only. A job is claimable when queued, or when
running with an expired lease (its worker died). Claiming is one UPDATE whose target is chosen by
a subquery with `FOR UPDATE SKIP LOCKED` on PostgreSQL, so concurrent workers never block on or
take the same job; SQLite has a single writer, and the UPDATE re-checks that the job is still
claimable.
"""

from __future__ import annotations

import hashlib
import json
from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from datetime import date, datetime, timedelta
from typing import Any

import numpy as np
from numpy.typing import NDArray
from sqlalchemy import (
    ColumnElement,
    Select,
    String,
    and_,
    bindparam,
    case,
    cast,
    delete,
    func,
    insert,
    literal,
    or_,
    select,
    update,
)
from sqlalchemy.exc import IntegrityError
from sqlalchemy.orm import Session, selectinload

from service.codec import EncodedPolicy
from service.db.base import utcnow
from service.db.tables import (
    Network,
    NetworkVersion,
    Policy,
    SalesDay,
    SolveJob,
    Tenant,
)
from service.vocabulary import JobKind, JobState
from solver import NetworkSpec, PolicyResult
from solver.priced_result import PricedPolicy

__all__ = [
    "LocationHistory",
    "SalesRow",
    "VersionHead",
    "analysis_job",
    "canonical_spec",
    "claim_job",
    "create_network",
    "criteria_requested",
    "current_spec",
    "delete_policy",
    "enqueue_analysis",
    "enqueue_solves",
    "fail_exhausted_jobs",
    "finish_job",
    "get_job",
    "get_or_create_tenant",
    "jobs_for",
    "latest_version",
    "list_jobs",
    "list_networks",
    "live_analysis_jobs",
    "live_versions_newest_first",
    "network_by_name",
    "policy_for",
    "record_progress",
    "release_job",
    "renew_lease",
    "retry_job",
    "sales_history",
    "sales_history_summary",
    "solve_accuracy",
    "store_analysis",
    "store_policy",
    "store_sales_history",
    "versions_newest_first",
    "with_current_version",
]

LIVE_STATES = (JobState.QUEUED.value, JobState.RUNNING.value)


def canonical_spec(spec: NetworkSpec) -> tuple[str, str]:
    """The specification as canonical JSON (sorted keys, no spaces) and its SHA-256."""
    text = json.dumps(
        spec.model_dump(mode="json", by_alias=True), sort_keys=True, separators=(",", ":")
    )
    return text, hashlib.sha256(text.encode("utf-8")).hexdigest()


# -- tenants and networks ----------------------------------------------------------------------


def get_or_create_tenant(session: Session, name: str) -> Tenant:
    tenant = session.scalars(select(Tenant).where(Tenant.name == name)).one_or_none()
    if tenant is None:
        tenant = Tenant(name=name)
        session.add(tenant)
        session.flush()
    return tenant


def network_by_name(session: Session, tenant_id: int, name: str) -> Network | None:
    return session.scalars(
        select(Network).where(Network.tenant_id == tenant_id, Network.name == name)
    ).one_or_none()


def list_networks(session: Session, tenant_id: int | None = None) -> Sequence[Network]:
    query = select(Network).order_by(Network.id)
    if tenant_id is not None:
        query = query.where(Network.tenant_id == tenant_id)
    return session.scalars(query).all()


def versions_newest_first(session: Session, network_id: int) -> Sequence[NetworkVersion]:
    return session.scalars(
        select(NetworkVersion)
        .where(NetworkVersion.network_id == network_id)
        .order_by(NetworkVersion.number.desc())
    ).all()


@dataclass(frozen=True)
class VersionHead:
    """What the read path needs of a version (no specification)."""

    id: int
    number: int
    spec_hash: str
    calibrated_at: datetime | None
    method: str


# Built once: the read path runs it on every recommendation, and SQLAlchemy then reuses the
# statement's compiled form without building and hashing a new one each time.
_LIVE_VERSIONS = (
    select(
        NetworkVersion.id,
        NetworkVersion.number,
        NetworkVersion.spec_hash,
        NetworkVersion.calibrated_at,
        NetworkVersion.method,
    )
    .join(Network, Network.id == NetworkVersion.network_id)
    .where(
        Network.id == bindparam("network_id"),
        Network.tenant_id == bindparam("tenant_id"),
        Network.archived.is_(False),
    )
    .order_by(NetworkVersion.number.desc())
)


def live_versions_newest_first(
    session: Session, tenant_id: int, network_id: int
) -> list[VersionHead]:
    """The versions of the tenant's network, newest first, in one plain query (no ORM objects:
    this is the read path's only query when its policies are cached); empty when the network
    is missing, another tenant's or archived."""
    rows = session.execute(_LIVE_VERSIONS, {"network_id": network_id, "tenant_id": tenant_id})
    return [VersionHead(*row) for row in rows]


def with_current_version(*columns: Any) -> Select[Any]:
    """`select(*columns)` over every network joined to its current (highest-numbered) version,
    to which callers add their own joins and conditions."""
    current = (
        select(
            NetworkVersion.network_id.label("network_id"),
            func.max(NetworkVersion.number).label("number"),
        )
        .group_by(NetworkVersion.network_id)
        .subquery()
    )
    return (
        select(*columns)
        .select_from(Network)
        .join(current, current.c.network_id == Network.id)
        .join(
            NetworkVersion,
            and_(
                NetworkVersion.network_id == Network.id,
                NetworkVersion.number == current.c.number,
            ),
        )
    )


def latest_version(session: Session, network_id: int) -> NetworkVersion | None:
    return session.scalars(
        select(NetworkVersion)
        .where(NetworkVersion.network_id == network_id)
        .order_by(NetworkVersion.number.desc())
        .limit(1)
    ).one_or_none()


def current_spec(session: Session, network_id: int) -> NetworkSpec:
    """The specification of the network's current version."""
    version = latest_version(session, network_id)
    assert version is not None, "a network always has a version"
    return NetworkSpec.model_validate_json(version.spec_json)


def create_network(
    session: Session,
    tenant: Tenant,
    spec: NetworkSpec,
    criteria: Iterable[str],
    *,
    mode: str = "auto",
    method: str = "exact",
) -> tuple[Network, NetworkVersion, list[SolveJob]]:
    """A new network asking for solving `mode`, with version 1 of `spec` solved by `method`
    (the mode resolved for it), and the solve jobs it needs."""
    network = Network(tenant_id=tenant.id, name=spec.name, mode=mode)
    session.add(network)
    session.flush()
    version, jobs = add_version(session, network, spec, criteria, method=method)
    return network, version, jobs


def add_version(
    session: Session,
    network: Network,
    spec: NetworkSpec,
    criteria: Iterable[str],
    *,
    method: str = "exact",
) -> tuple[NetworkVersion, list[SolveJob]]:
    """The next version of `network`, solved by `method`, and a job per criterion that has
    neither a policy nor a live job for the same specification and method in this tenant."""
    text, digest = canonical_spec(spec)
    previous = latest_version(session, network.id)
    version = NetworkVersion(
        network_id=network.id,
        number=1 if previous is None else previous.number + 1,
        spec_json=text,
        spec_hash=digest,
        method=method,
    )
    session.add(version)
    session.flush()
    return version, enqueue_solves(session, network.tenant_id, version, criteria)


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


# -- the job queue -----------------------------------------------------------------------------


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
    if job is None or job.state != JobState.FAILED.value:
        return None
    job.state = JobState.QUEUED.value
    job.attempts = 0
    job.error = None
    job.finished_at = None
    try:
        with session.begin_nested():
            session.flush()
    except IntegrityError:
        return None
    return job


# -- policies ----------------------------------------------------------------------------------


def policy_for(
    session: Session, tenant_id: int, spec_hash: str, criterion: str, method: str = "exact"
) -> Policy | None:
    return session.scalars(
        select(Policy).where(
            Policy.tenant_id == tenant_id,
            Policy.spec_hash == spec_hash,
            Policy.criterion == criterion,
            Policy.method == method,
        )
    ).one_or_none()


def delete_policy(session: Session, policy_id: int) -> None:
    session.execute(delete(Policy).where(Policy.id == policy_id))


# -- sales history and calibration -------------------------------------------------------------


@dataclass(frozen=True)
class SalesRow:
    location: str
    business_date: date
    units_sold: int
    stock_at_open: int
    units_received: int


@dataclass(frozen=True)
class LocationHistory:
    """One location's days in date order: arrays of shape (n_days,); age_days counts back from
    the network's most recent reported day (0 for that day)."""

    dates: tuple[date, ...]
    sold: NDArray[np.int64]
    stock_at_open: NDArray[np.int64]
    received: NDArray[np.int64]
    age_days: NDArray[np.float64]

    @property
    def first_date(self) -> date:
        return self.dates[0]

    @property
    def last_date(self) -> date:
        return self.dates[-1]


def store_sales_history(
    session: Session, network_id: int, rows: Sequence[SalesRow]
) -> tuple[int, int]:
    """Insert the rows, replacing any stored for the same location and day; (inserted,
    replaced). Rows must be unique by (location, business date)."""
    if not rows:
        return 0, 0
    dates = [row.business_date for row in rows]
    stored = {
        (location, day): row_id
        for row_id, location, day in session.execute(
            select(SalesDay.id, SalesDay.location_id, SalesDay.business_date).where(
                SalesDay.network_id == network_id,
                SalesDay.business_date.between(min(dates), max(dates)),
                SalesDay.location_id.in_({row.location for row in rows}),
            )
        )
    }
    now = utcnow()
    fresh, replaced = [], []
    for row in rows:
        values = {
            "units_sold": row.units_sold,
            "stock_at_open": row.stock_at_open,
            "units_received": row.units_received,
            "reported_at": now,
        }
        row_id = stored.get((row.location, row.business_date))
        if row_id is None:
            fresh.append(
                values
                | {
                    "network_id": network_id,
                    "location_id": row.location,
                    "business_date": row.business_date,
                }
            )
        else:
            replaced.append(values | {"id": row_id})
    if fresh:
        session.execute(insert(SalesDay), fresh)
    if replaced:
        session.execute(update(SalesDay), replaced)
    return len(fresh), len(replaced)


def sales_history(
    session: Session, network_id: int, *, window_days: int | None = None
) -> dict[str, LocationHistory]:
    """The network's history by location; with `window_days`, only the days within that many
    days of the most recent one."""
    latest = session.scalar(
        select(func.max(SalesDay.business_date)).where(SalesDay.network_id == network_id)
    )
    if latest is None:
        return {}
    query = select(
        SalesDay.location_id,
        SalesDay.business_date,
        SalesDay.units_sold,
        SalesDay.stock_at_open,
        SalesDay.units_received,
    ).where(SalesDay.network_id == network_id)
    if window_days is not None:
        query = query.where(SalesDay.business_date > latest - timedelta(days=window_days))
    by_location: dict[str, list[tuple[date, int, int, int]]] = {}
    for location, day, sold, at_open, received in session.execute(
        query.order_by(SalesDay.location_id, SalesDay.business_date)
    ):
        by_location.setdefault(location, []).append((day, sold, at_open, received))
    history = {}
    for location, days in by_location.items():
        columns = list(zip(*days, strict=True))
        history[location] = LocationHistory(
            dates=tuple(columns[0]),
            sold=np.array(columns[1], dtype=np.int64),
            stock_at_open=np.array(columns[2], dtype=np.int64),
            received=np.array(columns[3], dtype=np.int64),
            age_days=np.array([(latest - day).days for day in columns[0]], dtype=np.float64),
        )
    return history


def sales_history_summary(
    session: Session, network_id: int, *, receipts_sell_same_day: bool = False
) -> list[tuple[str, int, int, date, date]]:
    """(location, days, sold-out days, first day, last day) per location with history. A day
    sold out when it sold all it could: its stock at open, plus its receipts when they sell the
    same day."""
    available = (
        SalesDay.stock_at_open + SalesDay.units_received
        if receipts_sell_same_day
        else SalesDay.stock_at_open
    )
    sold_out = func.sum(case((and_(SalesDay.units_sold == available, available > 0), 1), else_=0))
    rows = session.execute(
        select(
            SalesDay.location_id,
            func.count(),
            sold_out,
            func.min(SalesDay.business_date),
            func.max(SalesDay.business_date),
        )
        .where(SalesDay.network_id == network_id)
        .group_by(SalesDay.location_id)
        .order_by(SalesDay.location_id)
    ).all()
    return [
        (location, int(days), int(out or 0), first, last)
        for location, days, out, first, last in rows
    ]


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
