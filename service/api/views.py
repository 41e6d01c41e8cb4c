"""Turning stored rows and solver results into response models."""

from __future__ import annotations

from datetime import date, time
from typing import Any

import numpy as np
from sqlalchemy.orm import Session

from service.codec import StoredPolicy
from service.db import reporting
from service.db.tables import Network, SolveJob
from service.policies import ServedPolicy
from service.schemas import (
    CertificateOut,
    JobOut,
    NetworkCreated,
    NetworkOut,
    RecommendationOut,
    RelayOut,
    SolveState,
    TransferOut,
)
from solver import Recommendation
from solver.priced_result import PricedPolicy
from solver.spec import WEEKDAYS

__all__ = [
    "certificate_out",
    "network_out",
    "network_solves_out",
    "recommendation_out",
    "relays_of",
    "transfers_of",
]


def network_out(
    session: Session, network: Network, jobs: list[SolveJob] | None = None
) -> NetworkOut | NetworkCreated:
    """One network's state (with `jobs`, the answer to the write that queued them)."""
    [solves] = reporting.solve_states(
        session, tenant_id=network.tenant_id, network_id=network.id, include_archived=True
    )
    return network_solves_out(solves, jobs)


def network_solves_out(
    solves: reporting.NetworkSolves, jobs: list[SolveJob] | None = None
) -> NetworkOut | NetworkCreated:
    network, version = solves.network, solves.version
    fields = {
        "id": network.id,
        "name": network.name,
        "archived": network.archived,
        "created_at": network.created_at,
        "version": version.number,
        "spec_hash": version.spec_hash,
        "closing_cutoff": (network.closing_cutoff or time(0)).strftime("%H:%M"),
        "mode": network.mode,
        "method": version.method,
        "solves": [
            SolveState(
                criterion=solve.criterion,
                state=solve.state.value,
                job_id=solve.job_id,
                solved_at=solve.solved_at,
                error=solve.error,
            )
            for solve in solves.solves
        ],
    }
    if jobs is None:
        return NetworkOut(**fields)
    return NetworkCreated(**fields, jobs=[JobOut.model_validate(job) for job in jobs])


def transfers_of(result: StoredPolicy, flows: tuple[int, ...]) -> list[TransferOut]:
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


def relays_of(result: StoredPolicy, transfers: list[TransferOut]) -> list[RelayOut]:
    """Every location that receives and sends tonight, in network order, with the reason units
    go through it rather than straight from each origin to each destination."""
    # Most units a lane carries on any night: the largest flow of the exact policy's table, or
    # the priced policy's lane limits.
    if isinstance(result, PricedPolicy):
        most = np.asarray(result.lane_limits).max(axis=0)
    else:
        most = result.flows.max(axis=0)
    lanes = {
        (result.location_ids[a], result.location_ids[b]): (
            float(result.lane_costs[lane]),
            int(most[lane]),
        )
        for lane, (a, b) in enumerate(result.lanes)
    }
    moved = {(t.from_, t.to): t for t in transfers}
    relays = []
    for location in result.location_ids:
        inbound = [t for t in transfers if t.to == location]
        outbound = [t for t in transfers if t.from_ == location]
        if not inbound or not outbound:
            continue
        receives = sum(t.units for t in inbound)
        sends = sum(t.units for t in outbound)
        reasons = []
        for origin in inbound:
            for onward in outbound:
                reasons.append(
                    _why_through(
                        location,
                        origin,
                        onward,
                        lanes.get((origin.from_, onward.to)),
                        moved.get((origin.from_, onward.to)),
                    )
                )
        relays.append(
            RelayOut(
                location=location,
                receives=receives,
                sends=sends,
                net_change=receives - sends,
                explanation=(
                    f"{location} receives {receives} and sends {sends} tonight, net "
                    f"{receives - sends:+d} unit{'s' if abs(receives - sends) != 1 else ''} on "
                    f"its shelf: " + "; ".join(reasons) + "."
                ),
            )
        )
    return relays


def _why_through(
    location: str,
    origin: TransferOut,
    onward: TransferOut,
    direct: tuple[float, int] | None,
    direct_moved: TransferOut | None,
) -> str:
    """Why units from origin.from_ reach onward.to through `location` (one origin-destination
    pair of a relay)."""
    start, end = origin.from_, onward.to
    if start == end:
        return f"{start} sends to {location} and takes units back from it"
    via = origin.unit_cost + onward.unit_cost
    if direct is None:
        return f"there is no lane from {start} to {end}, so units reach {end} through {location}"
    cost, limit = direct
    if direct_moved is not None and direct_moved.units >= limit:
        return f"the direct lane {start} -> {end} is full tonight (at most {limit})"
    if cost > via:
        return (
            f"the direct lane {start} -> {end} costs {cost:g} a unit, more than {via:g} "
            f"through {location}"
        )
    return (
        f"{location}'s own units are worth more at {end}, and {start}'s refill {location} "
        "for tomorrow"
    )


def recommendation_out(
    network_id: int,
    served: ServedPolicy,
    recommendation: Recommendation,
    business_date: date | None = None,
) -> RecommendationOut:
    result = served.result
    ids = result.location_ids
    transfers = transfers_of(result, recommendation.flows)
    priced: dict[str, Any] = {}
    if isinstance(result, PricedPolicy):
        phase = 0 if business_date is None else result.phase_of(business_date.weekday())
        priced = {
            "method": "priced",
            "residual": None,
            "upper_bound": result.upper_bound(recommendation.stock, phase=phase),
            "certificate": certificate_out(result),
        }
    fields: dict[str, Any] = {"residual": getattr(result, "residual", None), **priced}
    return RecommendationOut(
        network_id=network_id,
        criterion=served.criterion,
        version=served.version_number,
        stale=served.stale,
        solved_at=served.solved_at,
        parameters_calibrated_at=served.calibrated_at,
        stock=dict(zip(ids, recommendation.stock, strict=True)),
        transfers=transfers,
        stock_after_transfers=dict(zip(ids, recommendation.post_move_stock, strict=True)),
        relays=relays_of(result, transfers),
        transfer_cost=recommendation.transfer_cost,
        expected_value=recommendation.expected_value,
        value_without_transfers=recommendation.value_without_transfers,
        gain_from_transfers=recommendation.gain_from_transfers,
        profit_per_day=result.gain,
        business_date=business_date,
        night=None if business_date is None else WEEKDAYS[business_date.weekday()],
        **fields,
    )


def certificate_out(result: PricedPolicy) -> CertificateOut:
    certificate = result.certificate
    low, high = certificate.policy_value_interval
    return CertificateOut(
        reference_stock=dict(
            zip(result.location_ids, (int(u) for u in certificate.reference_stock), strict=True)
        ),
        upper_bound=certificate.upper_bound,
        policy_value=certificate.policy_value,
        policy_value_interval=(low, high),
        certified_gap=certificate.certified_gap,
        replications=certificate.replications,
    )
