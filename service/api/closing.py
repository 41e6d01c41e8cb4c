"""Closing reports: each location reports its own closing stock; once all have, every location
reads the same instructions for the night, computed once from the full stock and kept."""

from __future__ import annotations

import json
from datetime import date, timedelta
from typing import Annotated

from fastapi import APIRouter, Query
from sqlalchemy import select
from sqlalchemy.exc import IntegrityError
from sqlalchemy.orm import Session

from service.api.deps import CacheDep, NetworkId, Reader, SessionDep, Writer, get_network
from service.api.views import relays_of, transfers_of
from service.db import repository
from service.db.base import utcnow
from service.db.tables import ClosingCount, Instruction, Network, NetworkVersion
from service.policies import PolicyNotReadyError, StockProblemsError, recommend
from service.problems import PROBLEM_RESPONSES, Conflict, InvalidInput, NotFound
from service.schemas import ClosingStockIn, ClosingStockOut, InstructionsOut, Movement
from solver import NetworkSpec

router = APIRouter(
    prefix="/v1/networks/{network_id}/locations/{location}",
    tags=["closing"],
    responses=PROBLEM_RESPONSES,
)

# Business dates are local to the stores; allow a day either side of the server's UTC date.
_DATE_SLACK = timedelta(days=1)


def _current_number(session: Session, network: Network) -> int:
    version = repository.latest_version(session, network.id)
    assert version is not None
    return version.number


def _check_location(spec: NetworkSpec, network_id: int, location: str) -> int:
    """The location's capacity; 404 when the network has no such location."""
    for candidate in spec.locations:
        if candidate.id == location:
            return candidate.capacity
    raise NotFound(f"network {network_id} has no location {location!r}")


def _check_date(network: Network, business_date: date, pointer: str) -> None:
    earliest = network.created_at.date() - _DATE_SLACK
    latest = utcnow().date() + _DATE_SLACK
    if not earliest <= business_date <= latest:
        raise InvalidInput(
            f"business date {business_date} is outside {earliest}..{latest} (from the day before "
            "the network was created to tomorrow)",
            [(pointer, f"must lie between {earliest} and {latest}")],
        )


def _missing(spec: NetworkSpec, counts: dict[str, int]) -> list[str]:
    """Locations of the current version that have not reported, in network order."""
    return [location.id for location in spec.locations if location.id not in counts]


def _counts(session: Session, network_id: int, business_date: date) -> dict[str, int]:
    rows = session.scalars(
        select(ClosingCount).where(
            ClosingCount.network_id == network_id, ClosingCount.business_date == business_date
        )
    )
    return {row.location_id: row.units for row in rows}


def _instruction(
    session: Session, network_id: NetworkId, business_date: date
) -> Instruction | None:
    return session.scalars(
        select(Instruction).where(
            Instruction.network_id == network_id, Instruction.business_date == business_date
        )
    ).one_or_none()


@router.put("/closing-stock", response_model=ClosingStockOut)
def report_closing_stock(
    network_id: NetworkId, location: str, body: ClosingStockIn, session: SessionDep, caller: Writer
) -> ClosingStockOut:
    """Record this location's closing stock for a business date (a repeat replaces it, until
    the night's instructions have been issued)."""
    network = get_network(session, caller.tenant_id, network_id)
    spec = repository.current_spec(session, network.id)
    capacity = _check_location(spec, network_id, location)
    _check_date(network, body.business_date, "/business_date")
    if not 0 <= body.units <= capacity:
        raise InvalidInput(
            f"{body.units} units at {location!r} is outside 0..{capacity}",
            [("/units", f"must lie between 0 and {capacity}")],
        )
    issued = _instruction(session, network_id, body.business_date)
    if issued is not None:
        raise Conflict(
            f"instructions for {body.business_date} were issued at {issued.computed_at:%H:%M:%S} "
            "UTC from the counts then reported; they are kept so every location acts on the "
            "same plan"
        )
    row = session.scalars(
        select(ClosingCount).where(
            ClosingCount.network_id == network_id,
            ClosingCount.location_id == location,
            ClosingCount.business_date == body.business_date,
        )
    ).one_or_none()
    if row is None:
        row = ClosingCount(
            network_id=network_id, location_id=location, business_date=body.business_date
        )
        session.add(row)
    row.units = body.units
    row.reported_at = utcnow()
    session.flush()
    counts = _counts(session, network_id, body.business_date)
    return ClosingStockOut(
        network_id=network_id,
        location=location,
        business_date=body.business_date,
        units=body.units,
        reported_at=row.reported_at,
        missing=_missing(spec, counts),
    )


@router.get("/instructions", response_model=InstructionsOut)
def location_instructions(
    network_id: NetworkId,
    location: str,
    business_date: Annotated[date, Query(description="The business day whose closing counts.")],
    session: SessionDep,
    cache: CacheDep,
    caller: Reader,
) -> InstructionsOut:
    """What this location sends and receives tonight; 409 until every location has reported."""
    network = get_network(session, caller.tenant_id, network_id)
    spec = repository.current_spec(session, network.id)
    _check_location(spec, network_id, location)
    _check_date(network, business_date, "query:/business_date")
    issued = _instruction(session, network_id, business_date)
    if issued is None:
        counts = _counts(session, network_id, business_date)
        missing = _missing(spec, counts)
        if missing:
            raise Conflict(
                f"waiting for the closing stock of {', '.join(missing)} for {business_date}",
                missing=missing,
            )
        issued = _issue(session, cache, network, business_date, counts)
    return _for_location(session, issued, network_id, location)


def _issue(
    session: Session,
    cache: CacheDep,
    network: Network,
    business_date: date,
    counts: dict[str, int],
) -> Instruction:
    try:
        served, recommendation, _ = recommend(
            session, cache, network, counts, None, business_date=business_date
        )
    except StockProblemsError as exc:
        # The counts fit the current version (they were checked on arrival); only an older
        # policy, served while the current one is solved, can refuse them: wait for it.
        raise PolicyNotReadyError(
            f"the closing stock fits version {_current_number(session, network)} of network "
            f"{network.id}, whose policy is not ready yet ({exc})",
            job_state=None,
        ) from exc
    transfers = transfers_of(served.result, recommendation.flows)
    plan = {
        "stock": counts,
        "transfers": [t.model_dump(by_alias=True) for t in transfers],
        "relays": [relay.model_dump() for relay in relays_of(served.result, transfers)],
    }
    instruction = Instruction(
        network_id=network.id,
        business_date=business_date,
        version_id=served.version_id,
        criterion=served.criterion,
        plan=json.dumps(plan, sort_keys=True),
        computed_at=utcnow(),
    )
    try:
        with session.begin_nested():
            session.add(instruction)
    except IntegrityError:
        # Another location's request issued them first: everyone reads that one.
        existing = _instruction(session, network.id, business_date)
        assert existing is not None
        return existing
    return instruction


def _for_location(
    session: Session, instruction: Instruction, network_id: int, location: str
) -> InstructionsOut:
    plan = json.loads(instruction.plan)
    version = session.get_one(NetworkVersion, instruction.version_id)
    relay = next((r for r in plan.get("relays", []) if r["location"] == location), None)
    received = sum(t["units"] for t in plan["transfers"] if t["to"] == location)
    sent = sum(t["units"] for t in plan["transfers"] if t["from"] == location)
    return InstructionsOut(
        network_id=network_id,
        location=location,
        business_date=instruction.business_date,
        version=version.number,
        criterion=instruction.criterion,
        computed_at=instruction.computed_at,
        send=[
            Movement(location=t["to"], units=t["units"])
            for t in plan["transfers"]
            if t["from"] == location
        ],
        receive=[
            Movement(location=t["from"], units=t["units"])
            for t in plan["transfers"]
            if t["to"] == location
        ],
        net_change=received - sent,
        relay=received > 0 and sent > 0,
        relay_explanation=None if relay is None else relay["explanation"],
        stock=plan["stock"],
    )
