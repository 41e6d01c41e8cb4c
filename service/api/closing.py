"""Closing reports and the night's instructions over HTTP (the use cases: service.closing).

Each location reports its own closing stock; once all have, every location reads the same
instructions for the night, computed once from the full stock and kept. A count sent after the
instructions were issued is refused unless it says `"correction": true`; the ETag of the
instructions names their revision, so a location can tell that what it acted on has changed."""

from __future__ import annotations

from dataclasses import asdict
from dataclasses import fields as dataclass_fields
from datetime import date
from typing import Annotated

from fastapi import APIRouter, Header, Query, Response, status

from service import closing
from service.api.deps import CacheDep, NetworkId, Reader, SessionDep, Writer, get_network
from service.api.schemas.closing import (
    ClosingStockIn,
    ClosingStockOut,
    CorrectionOut,
    InstructionsOut,
    Movement,
)
from service.problems import POLICY_NOT_READY, PROBLEM_RESPONSES

router = APIRouter(prefix="/v1/networks/{network_id}/locations/{location}", tags=["closing"])


@router.put("/closing-stock", response_model=ClosingStockOut)
def report_closing_stock(
    network_id: NetworkId,
    location: str,
    body: ClosingStockIn,
    session: SessionDep,
    cache: CacheDep,
    caller: Writer,
) -> ClosingStockOut:
    """Record this location's closing stock for a business date (a repeat replaces it). Once
    the night's instructions are issued, only a correction (`"correction": true`) changes a
    count: the instructions are then issued again as the next revision."""
    network = get_network(session, caller.tenant_id, network_id)
    reported = closing.report_count(
        session,
        cache,
        network,
        location,
        body.units,
        business_date=body.business_date,
        correction=body.correction,
        caller=caller,
    )
    return ClosingStockOut(network_id=network_id, location=location, **asdict(reported))


@router.get(
    "/instructions",
    response_model=InstructionsOut,
    responses={
        304: {"description": "If-None-Match names the current revision's ETag."},
        409: PROBLEM_RESPONSES[409],
        **POLICY_NOT_READY,
    },
)
def location_instructions(
    network_id: NetworkId,
    location: str,
    session: SessionDep,
    cache: CacheDep,
    caller: Reader,
    response: Response,
    business_date: Annotated[
        date | None,
        Query(
            description="The business day whose closing counts; default: the network's current "
            "business date (today in its time zone, or yesterday before its closing_cutoff)."
        ),
    ] = None,
    if_none_match: Annotated[
        str | None,
        Header(description="An ETag seen before: 304 while the instructions are unchanged."),
    ] = None,
) -> InstructionsOut | Response:
    """What this location sends and receives tonight; 409 until every location has reported.
    The ETag names the revision: it changes when a corrected count changes the plan."""
    network = get_network(session, caller.tenant_id, network_id)
    found = closing.instructions_for(session, cache, network, location, business_date)
    tag = found.etag
    if if_none_match is not None and tag in {t.strip() for t in if_none_match.split(",")}:
        return Response(status_code=status.HTTP_304_NOT_MODIFIED, headers={"ETag": tag})
    response.headers["ETag"] = tag
    fields = {field.name: getattr(found, field.name) for field in dataclass_fields(found)}
    return InstructionsOut(
        **fields
        | {
            "corrections": [
                CorrectionOut(
                    location=c.location_id,
                    old_units=c.old_units,
                    new_units=c.new_units,
                    revision=c.revision,
                    key_prefix=c.key_prefix,
                    corrected_at=c.corrected_at,
                )
                for c in found.corrections
            ],
            "send": [Movement(location=other, units=units) for other, units in found.send],
            "receive": [Movement(location=other, units=units) for other, units in found.receive],
        }
    )
