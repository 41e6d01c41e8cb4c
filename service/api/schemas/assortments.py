"""Request and response models of the assortment routes (service.api.assortments)."""

from __future__ import annotations

from datetime import date, time
from typing import Annotated, Any, Literal

from pydantic import BaseModel, ConfigDict, Field, StrictInt, field_validator

from service.api.schemas.common import Criteria, Timestamp
from service.assortment_spec import Layout
from service.timezones import known_timezone, local_cutoff
from service.vocabulary import SolveMethodName, SolveModeName

__all__ = [
    "AssortmentCreate",
    "AssortmentHistoryOut",
    "AssortmentOut",
    "CalibrationChangeOut",
    "CalibrationFailureOut",
    "CalibrationRunIn",
    "CalibrationRunOut",
    "ClosingReportOut",
    "ClosingStateOut",
    "HistoryCountsOut",
    "HistoryUploadOut",
    "ItemOut",
    "ItemPage",
    "ItemRecommendationsOut",
    "ItemStates",
    "ItemStocksIn",
    "ItemsStoredOut",
    "LayoutUpdate",
    "LocationReportOut",
    "PickListOut",
]

DEMO_LAYOUT: dict[str, Any] = {
    "name": "hardware-east",
    "timezone": "Europe/Berlin",
    "locations": [{"id": "harbour"}, {"id": "old-town"}, {"id": "ring-road"}],
    "lanes": [
        {
            "from": "harbour",
            "to": "old-town",
            "unit_cost": 1.2,
            "max_units": 6,
            "truck_capacity": 20,
        },
        {
            "from": "old-town",
            "to": "harbour",
            "unit_cost": 1.2,
            "max_units": 6,
            "truck_capacity": 20,
        },
        {"from": "old-town", "to": "ring-road", "unit_cost": 0.9, "max_units": 4},
        {"from": "ring-road", "to": "old-town", "unit_cost": 0.9, "max_units": 4},
    ],
    "criteria": ["discounted"],
}


# Fields that mean the same in every assortment model below.
_AssortmentId = Annotated[int, Field(description="The assortment.")]
_ItemCode = Annotated[str, Field(description="The item's code.")]
_ItemNetwork = Annotated[int, Field(description="The item's network.")]
_ItemCount = Annotated[int, Field(description="Items of the assortment.")]
_Location = Annotated[str, Field(description="The location.")]
_Sender = Annotated[str, Field(alias="from", description="The sending location.")]
_Receiver = Annotated[str, Field(description="The receiving location.")]
_LaneUnitCost = Annotated[float, Field(description="Lane cost per unit.")]


class AssortmentCreate(Layout):
    """A store layout shared by many items, and how its items are solved."""

    model_config = ConfigDict(json_schema_extra={"examples": [DEMO_LAYOUT]})

    criteria: Criteria = ["discounted"]  # noqa: RUF012  (pydantic copies defaults)
    mode: SolveModeName = Field(
        default="auto",
        description="How every item is solved: exact, priced, or auto (exact within the exact "
        "size limits, priced beyond them).",
    )
    closing_cutoff: time | None = Field(
        default=None,
        description="Local time before which a closing report belongs to the previous business "
        "date; absent: midnight.",
    )

    _known_timezone = field_validator("timezone")(known_timezone)
    _whole_minutes = field_validator("closing_cutoff")(local_cutoff)

    def layout(self) -> Layout:
        return Layout.model_validate(
            self.model_dump(by_alias=True, exclude={"criteria", "mode", "closing_cutoff"})
        )


class LayoutUpdate(Layout):
    """The next layout of an assortment: the same name and stores; lanes, costs, limits,
    trucks, time zone and discount may change."""

    _known_timezone = field_validator("timezone")(known_timezone)

    def layout(self) -> Layout:
        return Layout.model_validate(self.model_dump(by_alias=True))


class ItemStates(BaseModel):
    """How many items stand where: ready (every criterion solved), waiting (a solve queued or
    running), failed (a solve failed), in all."""

    items: _ItemCount
    ready: int = Field(description="Items whose current version is solved for every criterion.")
    waiting: int = Field(description="Items with a solve queued or running.")
    failed: int = Field(description="Items with a failed solve (see their jobs).")
    specifications: int = Field(
        description="Distinct specifications among the items: items with identical numbers "
        "share one policy."
    )


class AssortmentOut(BaseModel):
    model_config = ConfigDict(populate_by_name=True)

    id: int = Field(description="The assortment's id.")
    name: str = Field(description="The layout's name.")
    layout_version: int = Field(description="Changes of the layout so far, from 1.")
    criteria: list[str] = Field(description="Criteria every item is solved for.")
    mode: SolveModeName = Field(description="The solving mode of every item.")
    closing_cutoff: str = Field(description="Local time (HH:MM) ending a business date's closing.")
    created_at: Timestamp = Field(description="When the assortment was created (UTC).")
    layout: Layout = Field(description="The stores and lanes shared by the items.")
    states: ItemStates = Field(description="Where the items' solves stand.")


class ItemsStoredOut(BaseModel):
    """What an upload of items did."""

    assortment_id: _AssortmentId
    received: int = Field(description="Items in the upload.")
    created: int = Field(description="Items new to the assortment.")
    updated: int = Field(description="Items given a new version (their numbers changed).")
    unchanged: int = Field(description="Items whose numbers were already these.")
    specifications: int = Field(description="Distinct specifications among the uploaded items.")
    jobs_queued: int = Field(
        description="Solves queued: one per new specification and criterion without a policy."
    )


ItemStateName = Literal["ready", "waiting", "failed", "not_requested"]


class ItemOut(BaseModel):
    item: _ItemCode
    network_id: int = Field(
        description="The item's network: its single-network routes (recommendation, versions, "
        "policy export) answer for the item alone."
    )
    version: int = Field(description="The item's current version.")
    spec_hash: str = Field(description="SHA-256 of the item's composed specification.")
    method: SolveMethodName = Field(description="How the item is solved.")
    state: ItemStateName = Field(
        description="ready, waiting (a solve queued or running), failed, or not_requested."
    )
    error: str | None = Field(default=None, description="The failed solve's error, if any.")


class ItemPage(BaseModel):
    items: list[ItemOut] = Field(description="Items in code order.")
    next_after: str | None = Field(
        description="Pass as `after` for the next page; null on the last page."
    )


class ClosingReportOut(BaseModel):
    """What a location's closing report did."""

    assortment_id: _AssortmentId
    location: str = Field(description="The reporting location.")
    business_date: date = Field(description="The business date the counts belong to.")
    items: int = Field(description="Items counted.")
    missing_locations: list[str] = Field(description="Locations still to report this night.")
    pick_list_revision: int | None = Field(
        description="The revision of the night's pick lists once issued (this report may have "
        "issued it); null while locations are missing."
    )
    corrected: int = Field(description="Counts this correction changed (0 for a first report).")


class LocationReportOut(BaseModel):
    location: str = Field(description="A location that reported.")
    items: int = Field(description="Items it counted.")
    reported_at: Timestamp = Field(description="When its latest report arrived (UTC).")


class SharingOut(BaseModel):
    """How the lanes' shared trucks were shared out tonight (currency)."""

    value: float = Field(description="Value of the moves as allocated.")
    bound: float = Field(
        description="No allocation within the trucks' capacity is worth more than this."
    )
    unconstrained_value: float = Field(description="Value with every item's own best moves.")
    sharing_cost: float = Field(description="What the shared trucks cost tonight.")
    gap: float = Field(description="bound - value: how far from the best allocation at most.")
    lane_load: list[float] = Field(description="Capacity used per lane, in the layout's order.")


class PickSummaryOut(BaseModel):
    """The night's totals over every item."""

    criterion: str = Field(description="The criterion whose policies planned the night.")
    items: _ItemCount
    planned: int = Field(description="Items planned from their policies.")
    not_solved: int = Field(
        description="Items without a policy yet (no moves for them; see their solve state)."
    )
    units_moved: int = Field(description="Units moved over all items and lanes.")
    gain: float = Field(description="Value of all moves over moving nothing (currency).")
    transfer_cost: float = Field(description="Unit and dispatch costs of all moves.")
    sharing: SharingOut | None = Field(description="Shared trucks; null when none is shared.")
    seconds: float = Field(description="Seconds the planning took.")


class PickSendOut(BaseModel):
    to: _Receiver
    units: int = Field(description="Units to pack.")
    unit_cost: _LaneUnitCost


class PickReceiveOut(BaseModel):
    model_config = ConfigDict(populate_by_name=True)

    from_: _Sender
    units: int = Field(description="Units to expect.")
    unit_cost: _LaneUnitCost


class PickLineOut(BaseModel):
    item: _ItemCode
    network_id: _ItemNetwork
    version: int = Field(description="The item's version that planned it.")
    closing_stock: int = Field(description="The location's closing count of the item.")
    sends: list[PickSendOut] = Field(description="Units this location sends, by receiver.")
    receives: list[PickReceiveOut] = Field(description="Units it receives, by sender.")
    gain: float = Field(
        description="What the item's moves tonight (at every location) are worth over moving "
        "nothing, on its policy's value scale."
    )
    item_transfer_cost: float = Field(description="The item's move costs tonight, all lanes.")


class ItemCorrectionOut(BaseModel):
    item: str = Field(description="The corrected item.")
    location: str = Field(description="Where its count was corrected.")
    old_units: int = Field(description="The count before.")
    new_units: int = Field(description="The count after.")
    revision: int = Field(description="The pick lists' revision the correction issued.")
    key_prefix: str = Field(description="The public prefix of the API key that corrected it.")
    corrected_at: Timestamp = Field(description="When (UTC).")


class PickListOut(BaseModel):
    """One location's pick list of a business date: only items it moves."""

    assortment_id: _AssortmentId
    location: _Location
    business_date: date = Field(description="The business date of the closing counts.")
    revision: int = Field(description="1 when first issued; each correction adds one.")
    computed_at: Timestamp = Field(description="When this revision was made (UTC).")
    lines: list[PickLineOut] = Field(description="Items this location sends or receives.")
    summary: PickSummaryOut = Field(description="The night over every item and location.")
    corrections: list[ItemCorrectionOut] = Field(
        description="Every count corrected this night, at any location."
    )


class ClosingStateOut(BaseModel):
    business_date: date = Field(description="The business date.")
    reported: list[LocationReportOut] = Field(description="Locations that reported.")
    missing_locations: list[str] = Field(description="Locations still to report.")
    pick_list_revision: int | None = Field(description="The pick lists' revision once issued.")
    summary: PickSummaryOut | None = Field(description="The night's totals once issued.")


class ItemStocksIn(BaseModel):
    """Closing stocks of many items, for their moves without a closing report."""

    model_config = ConfigDict(extra="forbid")

    stocks: dict[str, dict[str, StrictInt]] = Field(
        min_length=1,
        max_length=50_000,
        description="Item code -> location -> units on hand, every location of the layout.",
    )
    business_date: date | None = Field(
        default=None,
        description="Picks the weekday for items with weekly numbers; absent: the assortment's "
        "current business date.",
    )


class ItemMoveOut(BaseModel):
    model_config = ConfigDict(populate_by_name=True)

    from_: _Sender
    to: _Receiver
    units: int = Field(description="Units moved.")


class ItemRecommendationOut(BaseModel):
    item: _ItemCode
    network_id: _ItemNetwork
    version: int = Field(description="The item's version whose policy answered.")
    state: Literal["planned", "not_solved"] = Field(
        description="planned, or not_solved when the item has no policy yet (no moves)."
    )
    transfers: list[ItemMoveOut] = Field(description="Tonight's moves of the item.")
    expected_value: float | None = Field(
        description="The item's value with the moves, as its single recommendation says."
    )
    value_without_transfers: float | None = Field(description="The same moving nothing.")
    transfer_cost: float = Field(description="The item's move costs.")


class ItemRecommendationsOut(BaseModel):
    business_date: date = Field(description="The business date the moves are for.")
    items: list[ItemRecommendationOut] = Field(description="One answer per item, in order.")
    summary: PickSummaryOut = Field(description="Totals over the items.")


# -- sales history and calibration (service.api.assortment_history) ---------------------------


class HistoryUploadOut(BaseModel):
    """What an upload of history did."""

    assortment_id: _AssortmentId
    received: int = Field(description="Rows in the upload.")
    inserted: int = Field(description="Rows stored as days new to their item and location.")
    replaced: int = Field(description="Rows that replaced a day stored already.")
    items: int = Field(description="Items the upload had rows for.")


class HistoryCountsOut(BaseModel):
    rows: int = Field(description="Days stored, one per item, location and business date.")
    days: int = Field(description="Distinct business dates.")
    items_with_history: int = Field(description="Items with at least one day stored.")
    first_date: date | None = Field(description="The earliest business date; null when none.")
    last_date: date | None = Field(description="The latest business date; null when none.")


class LocationHistoryCountsOut(HistoryCountsOut):
    location: _Location


class AssortmentHistoryOut(HistoryCountsOut):
    """The sales history stored for the assortment's items."""

    assortment_id: _AssortmentId
    items: _ItemCount
    locations: list[LocationHistoryCountsOut] = Field(
        description="The same counts per location with history."
    )


class CalibrationRunIn(BaseModel):
    """How to estimate; every setting absent takes each item's calibration settings."""

    model_config = ConfigDict(extra="forbid")

    window_days: int | None = Field(
        default=None, ge=7, le=36_600, description="Use only the most recent days."
    )
    half_life_days: float | None = Field(
        default=None, gt=0, le=36_600, description="Recency half-life in days."
    )
    confidence: float | None = Field(
        default=None, ge=0.5, lt=1, description="Confidence of the intervals."
    )
    items_per_chunk: int = Field(
        default=50,
        ge=1,
        le=1_000,
        description="Items per job: the run is shared by the workers one chunk at a time.",
    )


class CalibrationChangeOut(BaseModel):
    item: _ItemCode
    location: _Location
    parameter: Literal[
        "demand_mean", "demand_variance", "replenishment_mean", "replenishment_variance"
    ] = Field(description="The parameter that changed (units per day, or units squared).")
    old: float = Field(description="Its value in the version the estimate replaced.")
    new: float = Field(description="Its estimated value, now in the item's new version.")
    change: float = Field(
        description="|new - old| / max(|old|, 0.05): the relative change calibration reports."
    )


class CalibrationFailureOut(BaseModel):
    item: _ItemCode
    reason: str = Field(description="Why it was not calibrated.")


class CalibrationRunOut(BaseModel):
    """Where a calibration of every item stands and, over its finished chunks, what changed."""

    run: int = Field(description="The run's id (the id of its first job).")
    assortment_id: _AssortmentId
    state: Literal["queued", "running", "done"] = Field(
        description="done once every chunk has finished (done or failed)."
    )
    created_at: Timestamp = Field(description="When the run was started (UTC).")
    finished_at: Timestamp | None = Field(description="When its last chunk finished (UTC).")
    chunks: int = Field(description="Jobs of the run, each a chunk of items.")
    chunks_queued: int = Field(description="Chunks waiting for a worker.")
    chunks_running: int = Field(description="Chunks a worker is estimating.")
    chunks_done: int = Field(description="Chunks finished.")
    chunks_failed: int = Field(description="Chunks that failed (their items count as failed).")
    items: int = Field(description="Items in the run.")
    calibrated: int = Field(description="Items given a new version with their estimates.")
    unchanged: int = Field(description="Items whose estimates equal their current numbers.")
    skipped: int = Field(description="Items without any history (left as they are).")
    failed: int = Field(description="Items that could not be estimated or stored (`failures`).")
    jobs_queued: int = Field(description="Solves queued for the new versions.")
    largest_changes: list[CalibrationChangeOut] = Field(
        description="The largest relative changes of the calibrated items, largest first (at "
        "most 20)."
    )
    failures: list[CalibrationFailureOut] = Field(
        description="Failed items with the reason (at most 50)."
    )
