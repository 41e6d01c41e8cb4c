"""Turning stored rows and solver results into response models."""

from __future__ import annotations

from datetime import date, time
from typing import Any

from sqlalchemy.orm import Session

from service import networks
from service.api.schemas.jobs import JobOut
from service.api.schemas.networks import NetworkCreated, NetworkOut, SolveState
from service.api.schemas.recommendations import (
    CertificateOut,
    RecommendationOut,
    RelayOut,
    TransferOut,
)
from service.jobs import SolveJob
from service.moves import Relay, Transfer, relays_of, transfers_of
from service.networks import Network, NetworkSolves
from service.serving import ServedPolicy
from solver import Recommendation
from solver.priced_result import PricedPolicy
from solver.spec import WEEKDAYS

__all__ = [
    "certificate_out",
    "network_out",
    "network_solves_out",
    "recommendation_out",
    "relays_out",
    "transfers_out",
]


def network_out(
    session: Session, network: Network, jobs: list[SolveJob] | None = None
) -> NetworkOut | NetworkCreated:
    """One network's state (with `jobs`, the answer to the write that queued them)."""
    return network_solves_out(networks.network_state(session, network), jobs)


def network_solves_out(
    solves: NetworkSolves, jobs: list[SolveJob] | None = None
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


def transfers_out(transfers: list[Transfer]) -> list[TransferOut]:
    return [TransferOut.model_validate(t.as_json()) for t in transfers]


def relays_out(relays: list[Relay]) -> list[RelayOut]:
    return [RelayOut.model_validate(r.as_json()) for r in relays]


def recommendation_out(
    network_id: int,
    served: ServedPolicy,
    recommendation: Recommendation,
    business_date: date | None = None,
    *,
    notes: list[str],
) -> RecommendationOut:
    """The answer to a recommendation request; `notes` as service.notes gives them."""
    result = served.result
    ids = result.location_ids
    transfers = transfers_of(result, recommendation.flows)
    phase = 0 if business_date is None else result.phase_of(business_date.weekday())
    priced: dict[str, Any] = {}
    if isinstance(result, PricedPolicy):
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
        transfers=transfers_out(transfers),
        stock_after_transfers=dict(zip(ids, recommendation.post_move_stock, strict=True)),
        relays=relays_out(relays_of(result, transfers, phase)),
        notes=notes,
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
