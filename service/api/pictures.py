"""Pictures of the served policy (SVG or PNG): the net move tonight and the value, by closing
stock of two locations, every other location held at a fixed stock.

Routes are plain `def`: drawing is CPU-bound and runs in the thread pool."""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from typing import Annotated, Any

from fastapi import APIRouter, Depends, Query
from fastapi.responses import Response
from sqlalchemy.orm import Session

from service.api.deps import CacheDep, NetworkId, Reader, SessionDep, get_network
from service.api.schemas.common import DEFAULT_CRITERION_RULE
from service.codec import StoredPolicy
from service.networks import Network
from service.pictures import (
    ANNOTATE_MAX_CELLS,
    ImageFormat,
    Plane,
    caption,
    choose_plane,
    net_inflow_grid,
    parse_fixed_stock,
    render_moves,
    render_values,
    value_grid,
    value_label,
)
from service.problems import POLICY_NOT_READY
from service.serving import PolicyCache, ServedPolicy, business_date_of, load_policy
from solver import Criterion
from solver.priced_result import PricedPolicy
from solver.spec import WEEKDAYS, Weekday

router = APIRouter(tags=["pictures"])

_MEDIA_TYPES: dict[ImageFormat, str] = {"svg": "image/svg+xml", "png": "image/png"}
# Pictures of one policy version never change, but a newer version may be served at any time.
_CACHE_CONTROL = "private, max-age=60"


def _picture_doc(image_format: ImageFormat, what: str) -> dict[int | str, dict[str, Any]]:
    return {
        200: {
            "description": f"{what} The served policy's version is in `X-Policy-Version`.",
            "content": {_MEDIA_TYPES[image_format]: {"schema": {"type": "string"}}},
        },
        **POLICY_NOT_READY,
    }


_MOVES = (
    "A heatmap of the net units the policy moves tonight into the y-axis location (arriving "
    "minus leaving, over all lanes), by closing stock of the x and y locations; positive: the "
    "y location receives, negative: it sends."
)
_VALUES = (
    "A heatmap of the policy's value by closing stock of the x and y locations: expected "
    "discounted profit (discounted), or relative value, 0 when every location is empty "
    "(average). For a priced network: the upper bound on the optimal value at each stock."
)


@dataclass(frozen=True)
class PlaneQuery:
    x: str | None
    y: str | None
    at: str | None
    weekday: Weekday | None


async def plane_query(
    x: Annotated[
        str | None,
        Query(
            max_length=64,
            description="Location on the x axis; default: the first location not on the y axis.",
        ),
    ] = None,
    y: Annotated[
        str | None,
        Query(
            max_length=64,
            description="Location on the y axis; default: the first location, in network "
            "order, not on the x axis.",
        ),
    ] = None,
    at: Annotated[
        str | None,
        Query(
            max_length=10_000,
            description="Closing stock of locations off the axes, as `location:units` items "
            "separated by commas (e.g. `garden:3,yard:5`); a location not named is held at "
            "half its capacity, rounded down.",
        ),
    ] = None,
    weekday: Annotated[
        Weekday | None,
        Query(
            description="For a network with weekly fields: the policy for closing counts on "
            "this weekday (the moves of that night); default: the weekday of the network's "
            "current business date (today in its time zone, or yesterday before its "
            "closing_cutoff). Ignored otherwise."
        ),
    ] = None,
) -> PlaneQuery:
    return PlaneQuery(x, y, at, weekday)


def _phase(
    session: Session, network: Network, result: StoredPolicy, query: PlaneQuery
) -> tuple[int, str]:
    """The phase to draw and the words for it in a title ("" for a stationary policy)."""
    if result.phases == 1:
        return 0, ""
    day = query.weekday or WEEKDAYS[business_date_of(session, network.id).weekday()]
    return result.phase_of(WEEKDAYS.index(day)), f", {day} night"


@dataclass(frozen=True)
class PictureSource:
    """Where a picture's policy comes from: the caller's network, read in the request's session
    through the policy cache."""

    session: Session
    cache: PolicyCache
    tenant_id: int
    network_id: int


async def picture_source(
    network_id: NetworkId, session: SessionDep, cache: CacheDep, caller: Reader
) -> PictureSource:
    return PictureSource(session, cache, caller.tenant_id, network_id)


SourceDep = Annotated[PictureSource, Depends(picture_source)]
PlaneDep = Annotated[PlaneQuery, Depends(plane_query)]
CriterionQuery = Annotated[Criterion | None, Query(description=DEFAULT_CRITERION_RULE)]
Annotate = Annotated[
    bool,
    Query(
        description=f"Write the units in every cell (only when the picture has at most "
        f"{ANNOTATE_MAX_CELLS} stock levels along each axis; otherwise ignored)."
    ),
]


def _moves_route(image_format: ImageFormat) -> Callable[..., Response]:
    """The route drawing the net moves in `image_format`."""

    def route(
        source: SourceDep,
        plane: PlaneDep,
        criterion: CriterionQuery = None,
        annotate: Annotate = False,
    ) -> Response:
        drawing = _drawing(source, plane, criterion)
        return _image(_moves(drawing, annotate, image_format), image_format, drawing.served)

    return route


def _values_route(image_format: ImageFormat) -> Callable[..., Response]:
    """The route drawing the value in `image_format`."""

    def route(source: SourceDep, plane: PlaneDep, criterion: CriterionQuery = None) -> Response:
        drawing = _drawing(source, plane, criterion)
        return _image(_values(drawing, image_format), image_format, drawing.served)

    return route


# One route per picture and format, named as the operation (policy_svg, value_png, ...).
for _picture, _route, _what in (
    ("policy", _moves_route, _MOVES),
    ("value", _values_route, _VALUES),
):
    for _format in _MEDIA_TYPES:
        router.add_api_route(
            f"/v1/networks/{{network_id}}/{_picture}.{_format}",
            _route(_format),
            methods=["GET"],
            name=f"{_picture}_{_format}",
            response_class=Response,
            responses=_picture_doc(_format, _what),
        )


@dataclass(frozen=True)
class _Drawing:
    """What a picture shows: the network, its served policy, the plane, and the phase with the
    words for it in a title ("" for a stationary policy)."""

    network: Network
    served: ServedPolicy
    plane: Plane
    phase: int
    night: str


def _drawing(source: PictureSource, query: PlaneQuery, criterion: str | None) -> _Drawing:
    """The network (404), the served policy (503 before its solve) and the plane to draw (422
    naming each bad parameter). A malformed `at` is refused before the policy is loaded."""
    network = get_network(source.session, source.tenant_id, source.network_id)
    fixed = parse_fixed_stock(query.at) if query.at is not None else {}
    served = load_policy(source.session, source.cache, network, criterion)
    plane = choose_plane(served.result, query.x, query.y, fixed)
    phase, night = _phase(source.session, network, served.result, query)
    return _Drawing(network, served, plane, phase, night)


def _moves(drawing: _Drawing, annotate: bool, image_format: ImageFormat) -> bytes:
    served, plane = drawing.served, drawing.plane
    subject = (
        f"version {served.version_number} · net moves, {served.criterion} policy{drawing.night}"
    )
    return render_moves(
        net_inflow_grid(served.result, plane, drawing.phase),
        x_id=plane.x_id,
        y_id=plane.y_id,
        title=caption(drawing.network.name, subject, plane),
        image_format=image_format,
        annotate=annotate,
    )


def _values(drawing: _Drawing, image_format: ImageFormat) -> bytes:
    served, plane, night = drawing.served, drawing.plane, drawing.night
    subject = f"version {served.version_number} · value of the {served.criterion} policy{night}"
    label = value_label(served.criterion)
    if isinstance(served.result, PricedPolicy):
        subject = (
            f"version {served.version_number} · upper bound, {served.criterion} priced "
            f"policy{night}"
        )
        label = f"upper bound on the optimal value: {label}"
    if served.result.gain is not None:
        subject += f", profit per day {served.result.gain:,.2f}"
    return render_values(
        value_grid(served.result, plane, drawing.phase),
        x_id=plane.x_id,
        y_id=plane.y_id,
        title=caption(drawing.network.name, subject, plane),
        colour_label=label,
        image_format=image_format,
    )


def _image(body: bytes, image_format: ImageFormat, served: ServedPolicy) -> Response:
    return Response(
        content=body,
        media_type=_MEDIA_TYPES[image_format],
        headers={
            "Cache-Control": _CACHE_CONTROL,
            "X-Policy-Version": str(served.version_number),
        },
    )
