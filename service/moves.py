"""Tonight's moves in the planner's terms: the transfers of a recommendation (lane by lane) and
the relays among them (locations that receive and send on the same night), with the reason
units go through a relay. Shared by the recommendation answer and the closing instructions.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass
from typing import Any

import numpy as np
from numpy.typing import NDArray

from service.codec import StoredPolicy
from solver.priced_result import PricedPolicy

__all__ = ["Relay", "Transfer", "relays_of", "transfers_of"]


@dataclass(frozen=True)
class Transfer:
    """Units sent tonight over one lane, with the lane's unit cost and its dispatch cost (paid
    once when units > 0), in currency."""

    from_: str
    to: str
    units: int
    unit_cost: float
    dispatch_cost: float

    def as_json(self) -> dict[str, Any]:
        """As the HTTP contract spells a transfer ("from", not "from_")."""
        fields = asdict(self)
        fields["from"] = fields.pop("from_")
        return fields


@dataclass(frozen=True)
class Relay:
    """A location that receives and sends tonight; `net_change` = receives - sends."""

    location: str
    receives: int
    sends: int
    net_change: int
    explanation: str

    def as_json(self) -> dict[str, Any]:
        return asdict(self)


def transfers_of(result: StoredPolicy, flows: tuple[int, ...]) -> list[Transfer]:
    ids = result.location_ids
    return [
        Transfer(
            from_=ids[a],
            to=ids[b],
            units=units,
            unit_cost=float(result.lane_costs[lane]),
            dispatch_cost=float(result.dispatch_costs[lane]),
        )
        for lane, ((a, b), units) in enumerate(zip(result.lanes, flows, strict=True))
        if units > 0
    ]


def relays_of(result: StoredPolicy, transfers: list[Transfer], phase: int) -> list[Relay]:
    """Every location that receives and sends tonight, in network order, with the reason units
    go through it rather than straight from each origin to each destination. `phase` is the
    policy phase of tonight (result.phase_of the business date's weekday): a lane's limit may
    differ from night to night, and a full lane is full by tonight's."""
    most = _night_limits(result, phase)
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
            Relay(
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


def _night_limits(result: StoredPolicy, phase: int) -> NDArray[np.int64]:
    """Most units each lane carries on the night of `phase`, shape (L,): the priced policy's
    lane limits of that night, or the largest flow the exact policy's table allows that night."""
    if isinstance(result, PricedPolicy):
        return np.asarray(result.lane_limits[phase], dtype=np.int64)
    limits: NDArray[np.int64] = result.flows[result.allowed[phase]].max(axis=0)
    return limits


def _why_through(
    location: str,
    origin: Transfer,
    onward: Transfer,
    direct: tuple[float, int] | None,
    direct_moved: Transfer | None,
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
