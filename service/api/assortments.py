"""Assortments: a store layout shared by many items, and bulk uploads of its items."""

from __future__ import annotations

import codecs
from collections.abc import Callable, Iterator, Sequence
from contextlib import contextmanager
from typing import Annotated, Any

from fastapi import APIRouter, Query, Request, Response, status
from fastapi.concurrency import run_in_threadpool
from sqlalchemy.exc import IntegrityError
from sqlalchemy.orm import Session

from service import assortments
from service.api.deps import Reader, SessionDep, SettingsDep, Writer, id_path, media_type
from service.api.schemas.assortments import (
    AssortmentCreate,
    AssortmentOut,
    ItemOut,
    ItemPage,
    ItemsStoredOut,
    ItemStates,
    LayoutUpdate,
)
from service.api.versions import IfMatch, check_if_match, etag
from service.assortment_spec import ItemSpec, Layout
from service.assortments import Assortment
from service.errors import ClosingCountsError, ItemUploadError
from service.item_upload import (
    ParsedItem,
    parse_csv,
    parse_json_document,
    parse_json_lines,
)
from service.problems import (
    PROBLEM_RESPONSES,
    ApiProblem,
    Conflict,
    InvalidInput,
    NotFound,
    UnsupportedMedia,
)

router = APIRouter(prefix="/v1/assortments", tags=["assortments"])

AssortmentId = Annotated[int, id_path("The assortment's id.")]

_CSV_EXAMPLE = (
    "item,location,capacity,unit_margin,holding_cost,demand_mean,demand_variance,"
    "replenishment_mean,unit_volume\n"
    "DRL-18V,harbour,12,38.5,0.2,1.4,2.6,1.2,0.02\n"
    "DRL-18V,old-town,8,38.5,0.2,0.9,,1.1,0.02\n"
    "DRL-18V,ring-road,10,38.5,0.2,1.1,,0.8,0.02\n"
)


def bulk_upload_doc(csv_example: str, member: str, model: str | None = None) -> dict[str, Any]:
    """The request body of a bulk upload for the OpenAPI document: CSV (with `csv_example`),
    JSON lines, or one JSON document `{member: [...]}` whose members are of the component
    schema `model` (service.api.docs.UPLOAD_MODELS puts it in the document), or any object."""
    member_schema = (
        {"type": "object"} if model is None else {"$ref": f"#/components/schemas/{model}"}
    )
    return {
        "requestBody": {
            "required": True,
            "content": {
                "text/csv": {"schema": {"type": "string"}, "example": csv_example},
                "application/x-ndjson": {"schema": {"type": "string"}},
                "application/json": {
                    "schema": {
                        "type": "object",
                        "properties": {member: {"type": "array", "items": member_schema}},
                        "required": [member],
                    }
                },
            },
        }
    }


_UPLOAD_DOC = bulk_upload_doc(_CSV_EXAMPLE, "items", ItemSpec.__name__)


class UploadTooLarge(ApiProblem):
    status, slug, title = 413, "body-too-large", "Request body too large"


def find_or_404(session: Session, tenant_id: int, assortment_id: int) -> Assortment:
    """The tenant's live assortment, or 404 (another tenant's looks exactly like a missing one)."""
    assortment = assortments.find_assortment(session, tenant_id, assortment_id)
    if assortment is None:
        raise NotFound(f"no assortment {assortment_id}")
    return assortment


def _items(session: Session, assortment: Assortment) -> list[ItemOut]:
    return [
        ItemOut.model_validate(item, from_attributes=True)
        for item in assortments.item_solves(session, assortment)
    ]


def _out(session: Session, assortment: Assortment) -> AssortmentOut:
    items = _items(session, assortment)
    counts = {
        state: sum(item.state == state for item in items)
        for state in ("ready", "waiting", "failed")
    }
    cutoff = assortment.closing_cutoff
    return AssortmentOut(
        id=assortment.id,
        name=assortment.name,
        layout_version=assortment.layout_version,
        criteria=assortments.criteria_of(assortment),
        mode=assortment.mode,
        closing_cutoff=cutoff.strftime("%H:%M") if cutoff is not None else "00:00",
        created_at=assortment.created_at,
        layout=assortments.layout_of(assortment),
        states=ItemStates(
            items=len(items),
            specifications=len({item.spec_hash for item in items}),
            **counts,
        ),
    )


@router.post("", status_code=status.HTTP_201_CREATED, response_model=AssortmentOut)
def create_assortment(
    body: AssortmentCreate, session: SessionDep, caller: Writer, response: Response
) -> AssortmentOut:
    """Store a layout of stores and lanes for many items; items follow with POST .../items."""
    assortment = assortments.create_assortment(
        session,
        caller.tenant_id,
        body.layout(),
        body.criteria,
        mode=body.mode,
        closing_cutoff=body.closing_cutoff,
    )
    response.headers["Location"] = f"/v1/assortments/{assortment.id}"
    return _out(session, assortment)


@router.get("", response_model=list[AssortmentOut])
def list_assortments(session: SessionDep, caller: Reader) -> list[AssortmentOut]:
    return [_out(session, a) for a in assortments.list_assortments(session, caller.tenant_id)]


@router.get("/{assortment_id}", response_model=AssortmentOut)
def get_assortment(
    assortment_id: AssortmentId, session: SessionDep, caller: Reader, response: Response
) -> AssortmentOut:
    """The layout and where its items' solves stand; ETag: the layout's version."""
    assortment = find_or_404(session, caller.tenant_id, assortment_id)
    response.headers["ETag"] = etag(assortment.layout_version)
    return _out(session, assortment)


@router.put("/{assortment_id}", response_model=ItemsStoredOut)
def update_layout(
    assortment_id: AssortmentId,
    body: LayoutUpdate,
    session: SessionDep,
    caller: Writer,
    settings: SettingsDep,
    response: Response,
    if_match: IfMatch = None,
) -> ItemsStoredOut:
    """The next layout (If-Match: the current `layout_version`): lanes, costs, limits, trucks,
    time zone, discount; the stores and the name stay. Every item is composed on it at once,
    a new version (and its solves) where its specification changes."""
    assortment = find_or_404(session, caller.tenant_id, assortment_id)
    check_if_match(assortment.id, assortment.layout_version, if_match, what="assortment")
    try:
        with session.begin_nested():
            stored = assortments.update_layout(
                session, assortment, body.layout(), settings.size_limits
            )
    except ItemUploadError as exc:
        raise refused("upload", exc.errors) from exc
    response.headers["ETag"] = etag(assortment.layout_version)
    return _stored_out(assortment.id, stored)


@router.get("/{assortment_id}/items", response_model=ItemPage)
def list_items(
    assortment_id: AssortmentId,
    session: SessionDep,
    caller: Reader,
    after: Annotated[str | None, Query(description="Item code the page starts after.")] = None,
    limit: Annotated[int, Query(ge=1, le=5_000, description="Items per page.")] = 1_000,
    state: Annotated[
        str | None, Query(description="Only items in this state (ready, waiting, failed).")
    ] = None,
) -> ItemPage:
    """Items in code order with their networks, versions and solve states."""
    items = _items(session, find_or_404(session, caller.tenant_id, assortment_id))
    chosen = [
        item
        for item in items
        if (after is None or item.item > after) and (state is None or item.state == state)
    ]
    page = chosen[:limit]
    return ItemPage(items=page, next_after=page[-1].item if len(chosen) > limit else None)


async def read_lines(request: Request, limit: int) -> list[str]:
    """The body's text lines, decoded as they arrive; 413 past `limit` bytes."""
    decoder = codecs.getincrementaldecoder("utf-8-sig")()
    lines: list[str] = []
    pending = ""
    size = 0
    try:
        async for chunk in request.stream():
            size += len(chunk)
            if size > limit:
                raise UploadTooLarge(f"uploads are limited to {limit:,} bytes", limit=limit)
            text = pending + decoder.decode(chunk)
            parts = text.splitlines(keepends=True)
            pending = parts.pop() if parts and not parts[-1].endswith(("\n", "\r")) else ""
            lines += [part.rstrip("\r\n") for part in parts]
        tail = pending + decoder.decode(b"", final=True)
    except UnicodeDecodeError as exc:
        raise InvalidInput("the body is not UTF-8", [("", "not UTF-8")]) from exc
    if tail:
        lines.append(tail.rstrip("\r\n"))
    return lines


def _stored_out(assortment_id: int, stored: assortments.ItemsStored) -> ItemsStoredOut:
    return ItemsStoredOut(
        assortment_id=assortment_id,
        received=stored.received,
        created=stored.created,
        updated=stored.updated,
        unchanged=stored.unchanged,
        specifications=stored.specifications,
        jobs_queued=len(stored.jobs),
    )


def refused(
    what: str, problems: Sequence[tuple[str, str]], *, listed: int | None = None
) -> InvalidInput:
    """422 for an upload refused whole (`what`: "upload", "report"): how many problems, the
    first, and each problem by pointer (the first `listed` of them)."""
    where, text = problems[0]
    return InvalidInput(
        f"the {what} was refused and nothing of it stored: {len(problems)} problem(s), "
        f"the first at {where or 'the top'}: {text}",
        list(problems[:listed]),
    )


@contextmanager
def storing_whole(session: Session, what: str, conflict: str) -> Iterator[None]:
    """Stores an upload (`what`: "upload", "report") all or nothing, in a savepoint: one refused
    (ItemUploadError, ClosingCountsError) answers 422 with every problem, one racing another
    write of the same rows 409 saying `conflict`."""
    try:
        with session.begin_nested():
            yield
    except (ItemUploadError, ClosingCountsError) as exc:
        raise refused(what, exc.errors) from exc
    except IntegrityError as exc:
        raise Conflict(conflict) from exc


@router.post(
    "/{assortment_id}/items",
    response_model=ItemsStoredOut,
    openapi_extra=_UPLOAD_DOC,
    responses={413: PROBLEM_RESPONSES[413], 415: PROBLEM_RESPONSES[415]},
)
async def upload_items(
    assortment_id: AssortmentId,
    request: Request,
    session: SessionDep,
    caller: Writer,
    settings: SettingsDep,
) -> ItemsStoredOut:
    """Create or update items in bulk: CSV (a row per item and location), JSON lines (an item
    per line) or `{"items": [...]}`. All or nothing: any bad row refuses the whole upload with
    every problem's line; items whose numbers did not change keep their version."""
    media = media_type(request)
    parsers: dict[str, Callable[[list[str], Layout], list[ParsedItem]]] = {
        "text/csv": parse_csv,
        "application/x-ndjson": parse_json_lines,
        "application/jsonl": parse_json_lines,
        "application/json": lambda lines, layout: parse_json_document(
            "\n".join(lines).encode("utf-8"), layout
        ),
    }
    if media not in parsers:
        raise UnsupportedMedia(
            f"send text/csv, application/x-ndjson or application/json, not {media}"
        )
    lines = await read_lines(request, settings.max_upload_bytes)

    def work() -> ItemsStoredOut:
        assortment = find_or_404(session, caller.tenant_id, assortment_id)
        layout = assortments.layout_of(assortment)
        conflict = (
            "another upload or network took some of these items' names at the same moment "
            f"(networks are named {assortment.name}/<item>); send the upload again"
        )
        with storing_whole(session, "upload", conflict):
            parsed = parsers[media](lines, layout)
            stored = assortments.store_items(session, assortment, parsed, settings.size_limits)
        return _stored_out(assortment.id, stored)

    return await run_in_threadpool(work)
