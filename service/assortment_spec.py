"""An assortment: one store layout shared by many items, each item a network of its own.

A chain moves hundreds to thousands of items between the same stores over the same lanes. The
layout (locations, lanes with their unit and dispatch costs and limits, the network limit, time
zone, discount) is given once; each item brings its own economics and demand per location, a
volume per unit, and may lower a lane's limit for itself, down to 0 for a lane its trucks cannot
carry. `compose_spec` joins the two into the solver's NetworkSpec, so that everything a single
network has (versions, solves, the read path, calibration) applies to every item unchanged; an
item kept off a lane has a network without that lane, so its lanes are those of the layout it
may use, in the layout's order. The composed specification is named after the layout, not the
item: items with identical numbers compose to identical specifications and share one policy
through the specification hash.

A lane may also carry a `truck_capacity`: what one night's truck on that lane carries for all
items together, counted in units or, with `truck_capacity_unit: "volume"`, in the items'
`unit_volume`. The capacity does not enter any item's own model (each is solved alone); it is
shared out at closing time (solver.assortment).
"""

from __future__ import annotations

from typing import Annotated, Any, Literal

from pydantic import BaseModel, ConfigDict, Field, model_validator

from solver import NetworkSpec
from solver.spec import DailyLaw, LaneLimit, LocationSpec, NightCount

__all__ = [
    "ITEM_CODE_PATTERN",
    "ItemLocation",
    "ItemSpec",
    "Layout",
    "LayoutLane",
    "LayoutLocation",
    "compose_spec",
    "lane_key",
]

ITEM_CODE_PATTERN = r"^[A-Za-z0-9][A-Za-z0-9._/+-]*$"

_LocationId = Annotated[
    str,
    Field(
        min_length=1,
        max_length=64,
        pattern=r"^[A-Za-z0-9][A-Za-z0-9._-]*$",
        description="Identifier of a location, unique in the layout.",
    ),
]
_Amount = Annotated[float, Field(ge=0, allow_inf_nan=False)]
# A layout's name, stores and lanes mean what a network's do: described as the network's are.
_NETWORK = NetworkSpec.model_fields
# An item at a store means what a network's location does: described as the location's fields.
_LOCATION = LocationSpec.model_fields


def _as_location(name: str) -> Any:
    """A Field described as the network location's field `name`."""
    return Field(description=_LOCATION[name].description)


class _Strict(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True, populate_by_name=True)


def lane_key(sender: str, receiver: str) -> str:
    """A lane's name in item overrides and reports: "north>south"."""
    return f"{sender}>{receiver}"


class LayoutLocation(_Strict):
    """A store of the layout; what it holds of each item is the item's business."""

    id: _LocationId


class LayoutLane(_Strict):
    """A directed lane shared by every item of the assortment."""

    from_: Annotated[_LocationId, Field(alias="from")]
    to: _LocationId
    unit_cost: Annotated[_Amount, Field(description="Cost of moving one unit along the lane.")]
    dispatch_cost: Annotated[
        _Amount,
        Field(description="Fixed cost paid by an item once on a night it moves units on the lane."),
    ] = 0.0
    max_units: Annotated[
        LaneLimit,
        Field(description="Most units of one item moved per night; one limit, or one per night."),
    ]
    truck_capacity: Annotated[
        float | None,
        Field(
            gt=0,
            allow_inf_nan=False,
            description="What one night's truck on this lane carries for all items together, "
            "in units or volume (the layout's truck_capacity_unit); none when unlimited.",
        ),
    ] = None


class Layout(_Strict):
    """Stores and lanes shared by the items of an assortment."""

    name: Annotated[
        str,
        Field(
            min_length=1,
            max_length=160,
            pattern=r"^[^/]+$",
            description=_NETWORK["name"].description,
        ),
    ]
    discount: Annotated[
        float, Field(gt=0, lt=1, description="Per-day discount factor of every item.")
    ] = 0.99
    timezone: Annotated[
        str,
        Field(
            min_length=1,
            max_length=64,
            pattern=r"^[A-Za-z][A-Za-z0-9_+-]*(/[A-Za-z0-9_+-]+){0,2}$",
            description="IANA time zone of the stores.",
        ),
    ] = "UTC"
    locations: Annotated[
        list[LayoutLocation],
        Field(min_length=2, max_length=64, description=_NETWORK["locations"].description),
    ]
    lanes: Annotated[
        list[LayoutLane],
        Field(min_length=1, max_length=1_000, description=_NETWORK["lanes"].description),
    ]
    max_units_per_night: Annotated[
        int | None,
        Field(ge=1, description="Most units of one item moved over all lanes in one night."),
    ] = None
    truck_capacity_unit: Annotated[
        Literal["units", "volume"],
        Field(
            description="How lanes' truck_capacity counts: units of any item, or each item's "
            "unit_volume per unit."
        ),
    ] = "units"

    @model_validator(mode="after")
    def _consistent(self) -> Layout:
        ids = [location.id for location in self.locations]
        if len(set(ids)) != len(ids):
            duplicate = next(i for i in ids if ids.count(i) > 1)
            raise ValueError(f"duplicate location id {duplicate!r}")
        seen: set[tuple[str, str]] = set()
        for lane in self.lanes:
            for end in (lane.from_, lane.to):
                if end not in ids:
                    raise ValueError(
                        f"lane {lane_key(lane.from_, lane.to)}: unknown location {end!r}"
                    )
            if lane.from_ == lane.to:
                raise ValueError(f"lane from {lane.from_!r} to itself")
            if (lane.from_, lane.to) in seen:
                raise ValueError(f"duplicate lane {lane_key(lane.from_, lane.to)}")
            seen.add((lane.from_, lane.to))
        return self

    @property
    def location_ids(self) -> list[str]:
        return [location.id for location in self.locations]

    @property
    def lane_keys(self) -> list[str]:
        return [lane_key(lane.from_, lane.to) for lane in self.lanes]

    @property
    def has_trucks(self) -> bool:
        return any(lane.truck_capacity is not None for lane in self.lanes)


class ItemLocation(_Strict):
    """An item at one store: its stockroom, economics, demand and replenishment there (the
    fields of a network's location, solver.spec.LocationSpec, without the id)."""

    capacity: Annotated[int, Field(ge=1, le=100_000, description="Most units held.")]
    unit_margin: Annotated[_Amount, Field(description="Profit per unit sold.")]
    holding_cost: Annotated[_Amount, _as_location("holding_cost")] = 0.0
    stockout_penalty: Annotated[_Amount, _as_location("stockout_penalty")] = 0.0
    demand: Annotated[DailyLaw, _as_location("demand")]
    replenishment: Annotated[DailyLaw, _as_location("replenishment")]
    keep_at_least: Annotated[NightCount, _as_location("keep_at_least")] = 0
    max_units_out: Annotated[NightCount | None, _as_location("max_units_out")] = None
    max_units_in: Annotated[NightCount | None, _as_location("max_units_in")] = None


class ItemSpec(_Strict):
    """One item of an assortment."""

    item: Annotated[
        str,
        Field(
            min_length=1,
            max_length=100,
            pattern=ITEM_CODE_PATTERN,
            description="The item's code, unique in its assortment.",
        ),
    ]
    unit_volume: Annotated[
        float,
        Field(
            gt=0,
            allow_inf_nan=False,
            description="Room one unit takes on a truck (the layout's truck_capacity_unit).",
        ),
    ] = 1.0
    locations: Annotated[
        dict[str, ItemLocation],
        Field(
            min_length=2,
            max_length=64,
            description="The item at each store of the layout, by the store's id (every store).",
        ),
    ]
    lane_limits: Annotated[
        dict[str, Annotated[int, Field(ge=0, le=10_000)]],
        Field(
            description='Lower limits of some lanes for this item, by lane ("north>south"). '
            "0 keeps the item off the lane (one whose trucks cannot carry it): its network "
            "leaves the lane out and it is never moved on it, while the other items still "
            "share the lane's truck. At least one lane of the layout stays open to the item."
        ),
    ] = {}


def _lane_for(lane: LayoutLane, override: int | None) -> dict[str, Any]:
    """The lane as the item's network has it (a document: the network validates it)."""
    document = lane.model_dump(mode="json", by_alias=True, exclude={"truck_capacity"})
    if override is not None:
        limit = document["max_units"]
        if isinstance(limit, dict):
            document["max_units"] = {
                "weekly": {day: min(units, override) for day, units in limit["weekly"].items()}
            }
        else:
            document["max_units"] = min(limit, override)
    return document


def compose_spec(layout: Layout, item: ItemSpec) -> NetworkSpec:
    """The item's network on the layout: the layout's lanes in the layout's order, less those
    the item's lane_limits set to 0. Raises ValueError naming what does not fit (a location
    missing from the item or unknown to the layout, an override of an unknown lane, every lane
    set to 0) and pydantic's ValidationError for numbers the network refuses."""
    ids = layout.location_ids
    missing = [i for i in ids if i not in item.locations]
    unknown = [i for i in item.locations if i not in ids]
    if missing:
        raise ValueError(f"item {item.item!r} has no numbers for location(s) {', '.join(missing)}")
    if unknown:
        raise ValueError(f"item {item.item!r}: unknown location(s) {', '.join(unknown)}")
    keys = set(layout.lane_keys)
    strange = [key for key in item.lane_limits if key not in keys]
    if strange:
        raise ValueError(
            f"item {item.item!r}: lane_limits names unknown lane(s) {', '.join(strange)} "
            '(write them as "from>to")'
        )
    limits = [item.lane_limits.get(lane_key(lane.from_, lane.to)) for lane in layout.lanes]
    lanes = [
        _lane_for(lane, limit)
        for lane, limit in zip(layout.lanes, limits, strict=True)
        if limit != 0
    ]
    if not lanes:
        raise ValueError(
            f"item {item.item!r}: lane_limits set every lane of the layout to 0; an item needs "
            "at least one lane it may be moved on"
        )
    document = {
        "name": layout.name,
        "discount": layout.discount,
        "timezone": layout.timezone,
        "max_units_per_night": layout.max_units_per_night,
        "locations": [
            {"id": i, **item.locations[i].model_dump(mode="json", exclude_defaults=True)}
            for i in ids
        ],
        "lanes": lanes,
    }
    return NetworkSpec.model_validate(document)
