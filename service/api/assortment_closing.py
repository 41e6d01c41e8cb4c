"""Closing time for an assortment: one report per location carrying every item, and one pick
list per location once the last has reported."""

from __future__ import annotations

import csv
import io
import json
from datetime import date
from typing import Annotated, Any

from fastapi import APIRouter, Header, Path, Query, Request, Response
from fastapi.concurrency import run_in_threadpool

from service import assortment_closing as closing
from service.api.assortments import AssortmentId, find_or_404, read_lines, refused, storing_whole
from service.api.deps import ItemCacheDep, Reader, SessionDep, SettingsDep, Writer, media_type
from service.api.schemas.assortments import (
    ClosingReportOut,
    ClosingStateOut,
    ItemRecommendationsOut,
    ItemStocksIn,
    LocationReportOut,
    PickListOut,
)
from service.assortments import Assortment, layout_of
from service.errors import ClosingCountsError
from service.problems import PROBLEM_RESPONSES, InvalidInput, NotFound, UnsupportedMedia
from solver import InvalidStockError

router = APIRouter(prefix="/v1/assortments/{assortment_id}", tags=["assortments"])

Location = Annotated[
    str, Path(min_length=1, max_length=64, description="A location of the layout.")
]
BusinessDate = Annotated[
    date | None,
    Query(description="The business date; absent: the assortment's current one."),
]

_REPORT_DOC: dict[str, Any] = {
    "requestBody": {
        "required": True,
        "content": {
            "text/csv": {
                "schema": {"type": "string"},
                "example": "item,units\nDRL-18V,4\nSAW-CIRC,0\nGRD-125,7\n",
            },
            "application/json": {
                "schema": {
                    "type": "object",
                    "properties": {
                        "counts": {"type": "object", "additionalProperties": {"type": "integer"}}
                    },
                    "required": ["counts"],
                },
                "example": {"counts": {"DRL-18V": 4, "SAW-CIRC": 0, "GRD-125": 7}},
            },
        },
    }
}


def _location(assortment: Assortment, location: str) -> str:
    if location not in layout_of(assortment).location_ids:
        raise NotFound(f"no location {location!r} in assortment {assortment.id}")
    return location


def _parse_csv(lines: list[str]) -> dict[str, tuple[str, int]]:
    reader = csv.reader(lines)
    header = [name.strip().lstrip("\ufeff") for name in next(reader, [])]
    if header != ["item", "units"]:
        raise InvalidInput(
            "a closing report in CSV has the header item,units",
            [("/line/1", f"expected the columns item,units, found {','.join(header) or 'none'}")],
        )
    counts: dict[str, tuple[str, int]] = {}
    problems: list[tuple[str, str]] = []
    for number, record in enumerate(reader, start=2):
        if not any(field.strip() for field in record):
            continue
        where = f"/line/{number}"
        if len(record) != 2:
            problems.append((where, f"expected 2 fields, found {len(record)}"))
            continue
        code, text = record[0].strip(), record[1].strip()
        if not text.lstrip("-").isdigit():
            problems.append((f"{where}/units", f"expected whole units, not {text!r}"))
        elif code in counts:
            problems.append(
                (f"{where}/item", f"item {code!r} counted twice (first at {counts[code][0]})")
            )
        else:
            counts[code] = (f"{where}/units", int(text))
    if problems:
        raise refused("report", problems, listed=100)
    return counts


def _parse_json(lines: list[str]) -> dict[str, tuple[str, int]]:
    try:
        document = json.loads("\n".join(lines))
    except json.JSONDecodeError as exc:
        raise InvalidInput("the body is not JSON", [("", f"not JSON: {exc.msg}")]) from exc
    counts = document.get("counts") if isinstance(document, dict) else None
    if not isinstance(counts, dict) or set(document) != {"counts"}:
        raise InvalidInput('expected {"counts": {item: units, ...}}', [("", "expected counts")])
    problems = [
        (f"/counts/{code}", f"expected whole units, not {units!r}")
        for code, units in counts.items()
        if not isinstance(units, int) or isinstance(units, bool)
    ]
    if problems:
        raise refused("report", problems, listed=100)
    return {code: (f"/counts/{code}", units) for code, units in counts.items()}


@router.put(
    "/locations/{location}/closing-report",
    response_model=ClosingReportOut,
    openapi_extra=_REPORT_DOC,
    responses={413: PROBLEM_RESPONSES[413], 415: PROBLEM_RESPONSES[415]},
)
async def report_closing(
    assortment_id: AssortmentId,
    location: Location,
    request: Request,
    session: SessionDep,
    caller: Writer,
    settings: SettingsDep,
    cache: ItemCacheDep,
    business_date: BusinessDate = None,
    correction: Annotated[
        bool,
        Query(
            description="Change counts of a night whose pick lists are issued: the plan is "
            "made again as the next revision and the changes are kept."
        ),
    ] = False,
) -> ClosingReportOut:
    """One location's closing stock of every item, as CSV (item,units) or JSON; a repeat
    replaces it until the night's pick lists are issued. The last location's report issues
    them."""
    media = media_type(request)
    if media not in ("text/csv", "application/json"):
        raise UnsupportedMedia(f"send text/csv or application/json, not {media}")
    lines = await read_lines(request, settings.max_upload_bytes)

    def work() -> ClosingReportOut:
        assortment = find_or_404(session, caller.tenant_id, assortment_id)
        _location(assortment, location)
        counts = _parse_csv(lines) if media == "text/csv" else _parse_json(lines)
        day = business_date or closing.business_date_of(assortment)
        conflict = (
            "another report for this location and night arrived at the same moment; send this "
            "one again (a repeat replaces it)"
        )
        with storing_whole(session, "report", conflict):
            stored = closing.report_counts(
                session,
                cache,
                assortment,
                location,
                day,
                counts,
                correction=correction,
                key_prefix=caller.key_prefix,
            )
        return ClosingReportOut(
            assortment_id=assortment.id,
            location=location,
            business_date=day,
            items=stored.items,
            missing_locations=stored.missing,
            pick_list_revision=stored.revision,
            corrected=stored.corrected,
        )

    return await run_in_threadpool(work)


@router.get("/closing", response_model=ClosingStateOut)
def closing_state(
    assortment_id: AssortmentId,
    session: SessionDep,
    caller: Reader,
    business_date: BusinessDate = None,
) -> ClosingStateOut:
    """Which locations have reported on the business date, and the pick lists' revision and
    totals once issued."""
    assortment = find_or_404(session, caller.tenant_id, assortment_id)
    day = business_date or closing.business_date_of(assortment)
    state = closing.closing_state(session, assortment, day)
    pick_list = state.pick_list
    return ClosingStateOut(
        business_date=day,
        reported=[
            LocationReportOut(location=r.location, items=r.items, reported_at=r.reported_at)
            for r in state.reported
        ],
        missing_locations=state.missing,
        pick_list_revision=None if pick_list is None else pick_list.revision,
        summary=None if pick_list is None else json.loads(pick_list.summary),
    )


_CSV_COLUMNS = (
    "business_date",
    "revision",
    "item",
    "move",
    "counterpart",
    "units",
    "unit_cost",
    "item_gain",
)


def _csv(pick_list: closing.LocationPickList) -> str:
    out = io.StringIO()
    writer = csv.writer(out, lineterminator="\n")
    writer.writerow(_CSV_COLUMNS)
    for line in pick_list.lines:
        for move, key, other in (("send", "sends", "to"), ("receive", "receives", "from")):
            for entry in line[key]:
                writer.writerow(
                    (
                        pick_list.business_date.isoformat(),
                        pick_list.revision,
                        line["item"],
                        move,
                        entry[other],
                        entry["units"],
                        f"{entry['unit_cost']:.2f}",
                        f"{line['gain']:.2f}",
                    )
                )
    return out.getvalue()


@router.get(
    "/locations/{location}/pick-list",
    response_model=PickListOut,
    responses={
        200: {"content": {"text/csv": {"schema": {"type": "string"}}}},
        304: {"description": "Unchanged since the revision named in If-None-Match."},
    },
)
def pick_list(
    assortment_id: AssortmentId,
    location: Location,
    session: SessionDep,
    caller: Reader,
    business_date: BusinessDate = None,
    format: Annotated[str, Query(pattern="^(json|csv)$", description="json or csv.")] = "json",
    if_none_match: Annotated[
        str | None, Header(description="An ETag from an earlier read.")
    ] = None,
) -> Any:
    """What this location sends and receives tonight, per item, with what the item's moves
    are worth; 409 naming the locations still to report."""
    assortment = find_or_404(session, caller.tenant_id, assortment_id)
    _location(assortment, location)
    day = business_date or closing.business_date_of(assortment)
    found = closing.location_pick_list(session, assortment, location, day)
    etag = f'"{day.isoformat()}-r{found.revision}"'
    headers = {"ETag": etag}
    if if_none_match is not None and etag in {tag.strip() for tag in if_none_match.split(",")}:
        return Response(status_code=304, headers=headers)
    if format == "csv":
        return Response(_csv(found), media_type="text/csv", headers=headers)
    body = PickListOut(
        assortment_id=assortment.id,
        location=location,
        business_date=day,
        revision=found.revision,
        computed_at=found.computed_at,
        lines=found.lines,
        summary=found.summary,
        corrections=found.corrections,
    )
    return Response(
        body.model_dump_json(by_alias=True), media_type="application/json", headers=headers
    )


@router.post("/recommendations", response_model=ItemRecommendationsOut)
def recommend_items(
    assortment_id: AssortmentId,
    body: ItemStocksIn,
    session: SessionDep,
    caller: Reader,
    cache: ItemCacheDep,
) -> Response:
    """Tonight's moves of many items at once from their closing stocks, with the layout's
    shared trucks; nothing is stored (closing reports issue the kept pick lists)."""
    assortment = find_or_404(session, caller.tenant_id, assortment_id)
    day = body.business_date or closing.business_date_of(assortment)
    try:
        plan = closing.recommend_items(session, cache, assortment, body.stocks, day)
    except ClosingCountsError as exc:
        raise refused("report", exc.errors) from exc
    except InvalidStockError as exc:
        raise InvalidInput(str(exc), [("/stocks", str(exc))]) from exc
    names = plan.locations
    items = [
        {
            "item": line["item"],
            "network_id": line["network_id"],
            "version": line["version"],
            "state": line["state"],
            "transfers": [
                {"from": names[a], "to": names[b], "units": units} for a, b, units in line["moves"]
            ],
            "expected_value": line["value"],
            "value_without_transfers": line["value_without_moves"],
            "transfer_cost": line["transfer_cost"],
        }
        for line in plan.lines
    ]
    # Built as plain JSON: validating tens of thousands of lines through the response model
    # would cost more than planning them.
    document = {"business_date": day.isoformat(), "items": items, "summary": plan.summary}
    return Response(json.dumps(document, separators=(",", ":")), media_type="application/json")
