"""Closing reports: each location reports its own closing stock; once all have, every location
reads the same instructions for the night, computed once from the full stock and kept.

Corrections. A count sent after the instructions were issued is refused unless it says
`"correction": true`; then the instructions are computed again from the corrected counts as the
next revision, and the correction (key prefix, time, old and new count, revision) is kept in
`closing_corrections`, logged on the audit logger and listed in every location's instructions.
Each location's instructions say in which revision its own moves last changed, and the ETag
names the revision, so a location can tell that what it acted on has changed."""

from __future__ import annotations

import json
import logging
from dataclasses import dataclass
from datetime import date, datetime, timedelta
from typing import Any

from sqlalchemy.orm import Session

from service.auth import Identity
from service.db.base import utcnow
from service.db.closing import (
    add_correction,
    add_instruction,
    closing_counts,
    corrections_of,
    instruction_for,
    set_closing_count,
)
from service.db.networks import current_spec
from service.db.tables import ClosingCorrection, Instruction, Network, NetworkVersion
from service.errors import (
    ClosingConflictError,
    ClosingInputError,
    PolicyNotReadyError,
    StockProblemsError,
    UnknownLocationError,
)
from service.moves import relays_of, transfers_of
from service.notes import current_version_number, notes_for
from service.serving import PolicyCache, ServedPolicy, business_date_of, recommend
from solver import NetworkSpec

__all__ = ["CountReported", "LocationInstructions", "instructions_for", "report_count"]

audit = logging.getLogger("stockrelay.audit")

# Business dates are local to the stores; allow a day either side of the server's UTC date.
_DATE_SLACK = timedelta(days=1)


def _check_location(spec: NetworkSpec, network_id: int, location: str) -> int:
    """The location's capacity; 404 when the network has no such location."""
    for candidate in spec.locations:
        if candidate.id == location:
            return candidate.capacity
    raise UnknownLocationError(f"network {network_id} has no location {location!r}")


def _check_date(network: Network, business_date: date, pointer: str) -> None:
    earliest = network.created_at.date() - _DATE_SLACK
    latest = utcnow().date() + _DATE_SLACK
    if not earliest <= business_date <= latest:
        raise ClosingInputError(
            f"business date {business_date} is outside {earliest}..{latest} (from the day before "
            "the network was created to tomorrow)",
            [(pointer, f"must lie between {earliest} and {latest}")],
        )


def _check_units(network_id: int, location: str, units: int, capacity: int) -> None:
    if units < 0:
        raise ClosingInputError(
            f"{units} units at {location!r} is below 0", [("/units", "must be 0 or more")]
        )
    if units > capacity:
        # The network says the location holds at most `capacity`: the count cannot be
        # answered until the network is changed.
        raise ClosingInputError(
            f"{units} units at {location!r} is above its capacity of {capacity}. If it really "
            f"holds {units}, change the network: PUT /v1/networks/{network_id} a new version "
            f"with a capacity of at least {units} for {location!r} (If-Match: the current "
            "version), let it solve, then send the count again",
            [("/units", f"must lie between 0 and {capacity}")],
        )


def _missing(spec: NetworkSpec, counts: dict[str, int]) -> list[str]:
    """Locations of the current version that have not reported, in network order."""
    return [location.id for location in spec.locations if location.id not in counts]


@dataclass(frozen=True)
class CountReported:
    """A closing count recorded: the business date it belongs to, when it was recorded, the
    locations yet to report, and the instructions' revision after it (None before they are
    issued)."""

    business_date: date
    units: int
    reported_at: datetime
    missing: list[str]
    revision: int | None


def report_count(
    session: Session,
    cache: PolicyCache,
    network: Network,
    location: str,
    units: int,
    *,
    business_date: date | None,
    correction: bool,
    caller: Identity,
) -> CountReported:
    """Record a location's closing stock for a business date (default: the network's current
    one; a repeat replaces it). Once the night's instructions are issued, only a `correction`
    changes a count: the instructions are then issued again as the next revision.

    Raises UnknownLocationError, ClosingInputError (a date or a count that does not fit the
    network; pointers into the request body) and ClosingConflictError (issued already)."""
    spec = current_spec(session, network.id)
    capacity = _check_location(spec, network.id, location)
    business_date = business_date or business_date_of(session, network.id)
    _check_date(network, business_date, "/business_date")
    _check_units(network.id, location, units, capacity)
    issued = instruction_for(session, network.id, business_date, for_update=correction)
    if issued is not None and not correction:
        raise ClosingConflictError(
            f"instructions for {business_date} were issued at {issued.computed_at:%H:%M:%S} "
            "UTC from the counts then reported; they are kept so every location acts on the "
            'same plan. To correct a count, send it again with "correction": true: the '
            f"instructions are issued again as revision {issued.revision + 1}, and every "
            "location sees the change"
        )
    row, old_units = set_closing_count(
        session, network.id, location, business_date, units, utcnow()
    )
    counts = closing_counts(session, network.id, business_date)
    if issued is not None and old_units != units:
        _correct(session, cache, network, issued, counts, location, old_units, units, caller)
    return CountReported(
        business_date=business_date,
        units=units,
        reported_at=row.reported_at,
        missing=_missing(spec, counts),
        revision=None if issued is None else issued.revision,
    )


def _correct(
    session: Session,
    cache: PolicyCache,
    network: Network,
    issued: Instruction,
    counts: dict[str, int],
    location: str,
    old_units: int,
    new_units: int,
    caller: Identity,
) -> None:
    """Issue the night's instructions again from the corrected counts, as the next revision,
    and keep the correction."""
    previous = json.loads(issued.plan)
    served, plan = _plan(session, cache, network, issued.business_date, counts)
    revision = issued.revision + 1
    changed_at = dict(previous.get("moves_changed_in", {}))
    for each in counts:
        if _moves_of(previous, each) != _moves_of(plan, each):
            changed_at[each] = revision
    plan["moves_changed_in"] = changed_at
    issued.plan = json.dumps(plan, sort_keys=True)
    issued.version_id = served.version_id
    issued.criterion = served.result.criterion
    issued.revision = revision
    issued.computed_at = utcnow()
    correction = ClosingCorrection(
        network_id=network.id,
        location_id=location,
        business_date=issued.business_date,
        old_units=old_units,
        new_units=new_units,
        revision=revision,
        key_prefix=caller.key_prefix,
        corrected_at=issued.computed_at,
    )
    add_correction(session, correction)
    audit.info(
        json.dumps(
            {
                "event": "closing_correction",
                "tenant": caller.tenant,
                "key_prefix": caller.key_prefix,
                "network_id": network.id,
                "location": location,
                "business_date": issued.business_date.isoformat(),
                "old_units": old_units,
                "new_units": new_units,
                "revision": revision,
            }
        )
    )


def _moves_of(plan: dict[str, Any], location: str) -> list[tuple[str, str, int]]:
    return sorted(
        (t["from"], t["to"], t["units"])
        for t in plan["transfers"]
        if location in (t["from"], t["to"])
    )


def instructions_for(
    session: Session,
    cache: PolicyCache,
    network: Network,
    location: str,
    business_date: date | None,
) -> LocationInstructions:
    """What `location` sends and receives on the night after `business_date` (default: the
    network's current business date), issued from the full closing stock on the first request
    after every location has reported, and kept.

    Raises UnknownLocationError, ClosingInputError (a date outside the network's range; the
    query parameter's pointer), ClosingConflictError (naming the locations yet to report),
    PolicyNotReadyError and PolicyNotSolvedError."""
    spec = current_spec(session, network.id)
    _check_location(spec, network.id, location)
    if business_date is None:
        business_date = business_date_of(session, network.id)
    _check_date(network, business_date, "query:/business_date")
    issued = instruction_for(session, network.id, business_date)
    if issued is None:
        counts = closing_counts(session, network.id, business_date)
        missing = _missing(spec, counts)
        if missing:
            raise ClosingConflictError(
                f"waiting for the closing stock of {', '.join(missing)} for {business_date}",
                missing=missing,
            )
        issued = _issue(session, cache, network, business_date, counts)
    return _for_location(session, issued, network.id, location)


def _plan(
    session: Session,
    cache: PolicyCache,
    network: Network,
    business_date: date,
    counts: dict[str, int],
) -> tuple[ServedPolicy, dict[str, Any]]:
    """The night's moves from the full closing stock, as stored in an instruction's plan."""
    try:
        served, recommendation, _ = recommend(
            session, cache, network, counts, None, business_date=business_date
        )
    except StockProblemsError as exc:
        # The counts fit the current version (they were checked on arrival); only an older
        # policy, served while the current one is solved, can refuse them: wait for it.
        raise PolicyNotReadyError(
            f"the closing stock fits version {current_version_number(session, network.id)} "
            f"of network {network.id}, whose policy is not ready yet ({exc})",
            job_state=None,
        ) from exc
    transfers = transfers_of(served.result, recommendation.flows)
    phase = served.result.phase_of(business_date.weekday())
    plan = {
        "stock": counts,
        "transfers": [t.as_json() for t in transfers],
        "relays": [relay.as_json() for relay in relays_of(served.result, transfers, phase)],
        "notes": notes_for(session, network.id, served, recommendation, business_date),
    }
    return served, plan


def _issue(
    session: Session,
    cache: PolicyCache,
    network: Network,
    business_date: date,
    counts: dict[str, int],
) -> Instruction:
    served, plan = _plan(session, cache, network, business_date, counts)
    plan["moves_changed_in"] = dict.fromkeys(counts, 1)
    instruction = Instruction(
        network_id=network.id,
        business_date=business_date,
        version_id=served.version_id,
        criterion=served.criterion,
        plan=json.dumps(plan, sort_keys=True),
        computed_at=utcnow(),
        revision=1,
    )
    return add_instruction(session, instruction)


@dataclass(frozen=True)
class LocationInstructions:
    """One location's part of a night's instructions. `send` and `receive` are (other
    location, units) pairs; `corrections` the night's corrected counts, oldest first."""

    network_id: int
    location: str
    business_date: date
    version: int
    criterion: str
    computed_at: datetime
    revision: int
    moves_changed_in_revision: int
    corrections: list[ClosingCorrection]
    notes: list[str]
    send: list[tuple[str, int]]
    receive: list[tuple[str, int]]
    net_change: int
    relay: bool
    relay_explanation: str | None
    stock: dict[str, int]

    @property
    def etag(self) -> str:
        """Names the business date and the revision."""
        return f'"{self.business_date.isoformat()}.r{self.revision}"'


def _for_location(
    session: Session, instruction: Instruction, network_id: int, location: str
) -> LocationInstructions:
    plan = json.loads(instruction.plan)
    version = session.get_one(NetworkVersion, instruction.version_id)
    relay = next((r for r in plan.get("relays", []) if r["location"] == location), None)
    received = sum(t["units"] for t in plan["transfers"] if t["to"] == location)
    sent = sum(t["units"] for t in plan["transfers"] if t["from"] == location)
    return LocationInstructions(
        network_id=network_id,
        location=location,
        business_date=instruction.business_date,
        version=version.number,
        criterion=instruction.criterion,
        computed_at=instruction.computed_at,
        revision=instruction.revision,
        moves_changed_in_revision=plan.get("moves_changed_in", {}).get(location, 1),
        corrections=list(corrections_of(session, network_id, instruction.business_date)),
        notes=plan.get("notes", []),
        send=[(t["to"], t["units"]) for t in plan["transfers"] if t["from"] == location],
        receive=[(t["from"], t["units"]) for t in plan["transfers"] if t["to"] == location],
        net_change=received - sent,
        relay=received > 0 and sent > 0,
        relay_explanation=None if relay is None else relay["explanation"],
        stock=plan["stock"],
    )
