"""Turning stored rows and solver results into response models."""

from __future__ import annotations

from datetime import date

from sqlalchemy.orm import Session

from service.db import repository
from service.db.tables import JobState, Network, SolveJob
from service.policies import ServedPolicy
from service.schemas import (
    JobOut,
    NetworkCreated,
    NetworkOut,
    RecommendationOut,
    SolveState,
    TransferOut,
)
from solver import PolicyResult, Recommendation
from solver.spec import WEEKDAYS

__all__ = ["network_out", "recommendation_out", "transfers_of"]

CRITERIA = ("discounted", "average")


def network_out(
    session: Session, network: Network, jobs: list[SolveJob] | None = None
) -> NetworkOut | NetworkCreated:
    version = repository.latest_version(session, network.id)
    assert version is not None, "a network always has a version"
    solves = []
    for criterion in CRITERIA:
        policy = repository.policy_for(session, network.tenant_id, version.spec_hash, criterion)
        if policy is not None:
            solves.append(
                SolveState(criterion=criterion, state="ready", solved_at=policy.solved_at)
            )
            continue
        history = repository.jobs_for(session, network.tenant_id, version.spec_hash, criterion)
        if not history:
            solves.append(SolveState(criterion=criterion, state="not_requested"))
            continue
        job = history[0]
        state = "queued" if job.state == JobState.DONE else job.state
        solves.append(
            SolveState(
                criterion=criterion,
                state=state,
                job_id=job.id,
                error=job.error if job.state == JobState.FAILED else None,
            )
        )
    fields = {
        "id": network.id,
        "name": network.name,
        "archived": network.archived,
        "created_at": network.created_at,
        "version": version.number,
        "spec_hash": version.spec_hash,
        "solves": solves,
    }
    if jobs is None:
        return NetworkOut(**fields)
    return NetworkCreated(**fields, jobs=[JobOut.model_validate(job) for job in jobs])


def transfers_of(result: PolicyResult, flows: tuple[int, ...]) -> list[TransferOut]:
    ids = result.location_ids
    return [
        TransferOut(
            from_=ids[a],
            to=ids[b],
            units=units,
            unit_cost=float(result.lane_costs[lane]),
            dispatch_cost=float(result.dispatch_costs[lane]),
        )
        for lane, ((a, b), units) in enumerate(zip(result.lanes, flows, strict=True))
        if units > 0
    ]


def recommendation_out(
    network_id: int,
    criterion: str,
    served: ServedPolicy,
    recommendation: Recommendation,
    business_date: date | None = None,
) -> RecommendationOut:
    result = served.result
    ids = result.location_ids
    return RecommendationOut(
        network_id=network_id,
        criterion=criterion,
        version=served.version_number,
        stale=served.stale,
        solved_at=served.solved_at,
        parameters_calibrated_at=served.calibrated_at,
        residual=result.residual,
        stock=dict(zip(ids, recommendation.stock, strict=True)),
        transfers=transfers_of(result, recommendation.flows),
        stock_after_transfers=dict(zip(ids, recommendation.post_move_stock, strict=True)),
        transfer_cost=recommendation.transfer_cost,
        expected_value=recommendation.expected_value,
        value_without_transfers=recommendation.value_without_transfers,
        gain_from_transfers=recommendation.gain_from_transfers,
        profit_per_day=result.gain,
        business_date=business_date,
        night=None if business_date is None else WEEKDAYS[business_date.weekday()],
    )
