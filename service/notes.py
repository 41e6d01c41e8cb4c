"""Cautions for the people who act on tonight's moves: the moves follow the model and its
parameters, so say when those deserve a look. Shared by the recommendation answer and the
closing instructions, which say the same things in the same words."""

from __future__ import annotations

from datetime import date, timedelta

from sqlalchemy.orm import Session

from service.db.networks import latest_version
from service.db.tables import NetworkVersion
from service.estimates import law_moments
from service.serving import Lru, ServedPolicy
from solver import NetworkSpec, Recommendation

__all__ = ["current_version_number", "notes_for"]


def current_version_number(session: Session, network_id: int) -> int:
    version = latest_version(session, network_id)
    assert version is not None, "a network always has a version"
    return version.number


def notes_for(
    session: Session,
    network_id: int,
    served: ServedPolicy,
    recommendation: Recommendation,
    business_date: date | None,
) -> list[str]:
    """What deserves a look before acting on `recommendation`: a stale policy, parameters
    entered by hand rather than estimated, and each location that sends and keeps less than
    its expected demand of the day after `business_date` (None: a stationary network, whose
    demand is the same every day)."""
    notes = []
    if served.stale:
        notes.append(
            f"planned with version {served.version_number}'s policy while version "
            f"{current_version_number(session, network_id)} is being solved: the newer "
            "network's changes are not in it"
        )
    if served.calibrated_at is None:
        notes.append(
            f"version {served.version_number}'s demand and replenishment were entered as they "
            "are, not estimated from sales history: check them before relying on the moves"
        )
    return notes + _short_senders(session, served, recommendation, business_date)


def _short_senders(
    session: Session,
    served: ServedPolicy,
    recommendation: Recommendation,
    business_date: date | None,
) -> list[str]:
    result = served.result
    sent = [0] * len(result.location_ids)
    for (a, _), units in zip(result.lanes, recommendation.flows, strict=True):
        sent[a] += units
    if not any(sent):
        return []
    tomorrow = 0 if business_date is None else (business_date + timedelta(days=1)).weekday()
    expected_on = _expected_demand(session, served)[tomorrow]
    notes = []
    for index, location in enumerate(result.location_ids):
        if sent[index] == 0:
            continue
        expected = expected_on[index]
        keeps = recommendation.post_move_stock[index]
        if keeps < expected:
            notes.append(
                f"{location} sends {sent[index]} and keeps {keeps}, below its expected "
                f"demand of {expected:.2f} tomorrow: worth a look if its demand is uncertain"
            )
    return notes


# Each location's expected demand on each weekday (Monday first), by specification hash: read
# from a version's specification once per process rather than on every recommendation that
# moves something (a batch of 1,000 would read and parse 1,000 specifications). A hash names one
# specification for good, so nothing kept here goes stale.
_EXPECTED_DEMAND: Lru[str, tuple[tuple[float, ...], ...]] = Lru(size=4096)


def _expected_demand(session: Session, served: ServedPolicy) -> tuple[tuple[float, ...], ...]:
    table = _EXPECTED_DEMAND.get(served.spec_hash)
    if table is None:
        version = session.get_one(NetworkVersion, served.version_id)
        spec = NetworkSpec.model_validate_json(version.spec_json)
        table = tuple(
            tuple(law_moments(location.demand_on(day))[0] for location in spec.locations)
            for day in range(7)
        )
        _EXPECTED_DEMAND.put(served.spec_hash, table)
    return table
