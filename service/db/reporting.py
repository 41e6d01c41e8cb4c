"""Reporting queries: where each network's current version stands, per criterion.

`solve_states` is the one answer to "is the current version solved, being solved, failed or
never asked for, for each criterion (and the version's solving method)?", shared by the network
endpoints (`service.api.views.network_out`), the status page and the metrics. It runs three
statements whatever the number of networks:

1. every selected network joined to its current (highest-numbered) version;
2. the policies stored for those versions' specification hashes and methods (columns only,
   never the policy itself);
3. the newest solve job of each (specification hash, criterion, method) of those versions.

A done job without its policy means the policy was found corrupt and is being solved again: it
reads as "queued", as it always has on GET /v1/networks/{id}.
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import datetime
from typing import Any

from sqlalchemy import ColumnElement, Select, and_, func, select
from sqlalchemy.orm import Session, defer

from service.db.networks import with_current_version
from service.db.tables import Network, NetworkVersion, Policy, SolveJob
from service.vocabulary import JobKind, JobState, SolveStatus
from solver.result import CRITERIA

__all__ = ["CriterionSolve", "NetworkSolves", "solve_states"]


@dataclass(frozen=True)
class CriterionSolve:
    """One criterion of a network's current version: when ready, when it was solved and how
    long the solve took (seconds); otherwise the newest solve job, with its error when failed."""

    criterion: str
    state: SolveStatus
    solved_at: datetime | None = None
    solve_seconds: float | None = None
    job_id: int | None = None
    error: str | None = None


@dataclass(frozen=True)
class NetworkSolves:
    """A network, its current version and one CriterionSolve per criterion of CRITERIA (in
    that order)."""

    network: Network
    version: NetworkVersion
    solves: tuple[CriterionSolve, ...]


def solve_states(
    session: Session,
    *,
    tenant_id: int | None,
    network_id: int | None = None,
    include_archived: bool = False,
    with_spec: bool = False,
    assortment_id: int | None = None,
    include_items: bool = True,
) -> list[NetworkSolves]:
    """The solve state of every network of `tenant_id` (None: every tenant), or of the one
    network `network_id`, or of the items of assortment `assortment_id`, by network id.
    Archived networks only with `include_archived`, items of assortments only with
    `include_items`. The versions' specification JSON is loaded only `with_spec` (it can be
    large)."""
    conditions: list[ColumnElement[bool]] = []
    if tenant_id is not None:
        conditions.append(Network.tenant_id == tenant_id)
    if network_id is not None:
        conditions.append(Network.id == network_id)
    if not include_archived:
        conditions.append(Network.archived.is_(False))
    if assortment_id is not None:
        conditions.append(Network.assortment_id == assortment_id)
    elif not include_items:
        conditions.append(Network.assortment_id.is_(None))

    def current(*columns: Any) -> Select[Any]:
        return with_current_version(*columns).where(*conditions)

    heads = current(Network, NetworkVersion).order_by(Network.id)
    if not with_spec:
        heads = heads.options(defer(NetworkVersion.spec_json))
    rows = session.execute(heads).all()
    if not rows:
        return []
    same_solve = and_(
        Policy.tenant_id == Network.tenant_id,
        Policy.spec_hash == NetworkVersion.spec_hash,
        Policy.method == NetworkVersion.method,
    )
    policies = {
        (network, criterion): (solved_at, seconds)
        for network, criterion, solved_at, seconds in session.execute(
            current(Network.id, Policy.criterion, Policy.solved_at, Policy.solve_seconds).join(
                Policy, same_solve
            )
        )
    }
    # The newest solve job of each (tenant, specification, criterion, method) as a derived
    # table joined by id: PostgreSQL hash-joins it, where an IN (subquery) in the join
    # condition was planned as a subplan run per row (minutes for thousands of items).
    newest = select(func.max(SolveJob.id).label("id")).where(SolveJob.kind == JobKind.SOLVE.value)
    if tenant_id is not None:
        newest = newest.where(SolveJob.tenant_id == tenant_id)
    latest = newest.group_by(
        SolveJob.tenant_id, SolveJob.spec_hash, SolveJob.criterion, SolveJob.method
    ).subquery()
    jobs = {
        (network, criterion): (job_id, state, error)
        for network, criterion, job_id, state, error in session.execute(
            current(Network.id, SolveJob.criterion, SolveJob.id, SolveJob.state, SolveJob.error)
            .join(
                SolveJob,
                and_(
                    SolveJob.tenant_id == Network.tenant_id,
                    SolveJob.spec_hash == NetworkVersion.spec_hash,
                    SolveJob.method == NetworkVersion.method,
                ),
            )
            .join(latest, latest.c.id == SolveJob.id)
        )
    }
    return [
        NetworkSolves(
            network,
            version,
            tuple(
                _solve(
                    criterion,
                    policies.get((network.id, criterion)),
                    jobs.get((network.id, criterion)),
                )
                for criterion in CRITERIA
            ),
        )
        for network, version in rows
    ]


def _solve(
    criterion: str,
    policy: tuple[datetime, float | None] | None,
    job: tuple[int, str, str | None] | None,
) -> CriterionSolve:
    if policy is not None:
        solved_at, seconds = policy
        return CriterionSolve(criterion, SolveStatus.READY, solved_at, seconds)
    if job is None:
        return CriterionSolve(criterion, SolveStatus.NOT_REQUESTED)
    job_id, state, error = job
    if state == JobState.DONE:
        return CriterionSolve(criterion, SolveStatus.QUEUED, job_id=job_id)
    return CriterionSolve(
        criterion,
        SolveStatus(state),
        job_id=job_id,
        error=error if state == JobState.FAILED else None,
    )
