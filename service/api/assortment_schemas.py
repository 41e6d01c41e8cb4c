"""Request and response models of the assortment routes (service.api.assortments)."""

from __future__ import annotations

from datetime import date, time
from typing import Any, Literal

from pydantic import BaseModel, ConfigDict, Field, field_validator

from service.assortment_spec import Layout
from service.schemas import Criteria, SolveModeName, Timestamp, known_timezone

__all__ = [
    "AssortmentCreate",
    "AssortmentHistoryOut",
    "AssortmentOut",
    "CalibrationChangeOut",
    "CalibrationFailureOut",
    "CalibrationRunIn",
    "CalibrationRunOut",
    "HistoryCountsOut",
    "HistoryUploadOut",
    "ItemOut",
    "ItemPage",
    "ItemStates",
    "ItemsStoredOut",
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

    @field_validator("timezone")
    @classmethod
    def _known_timezone(cls, zone: str) -> str:
        return known_timezone(zone)

    @field_validator("closing_cutoff")
    @classmethod
    def _whole_minutes(cls, cutoff: time | None) -> time | None:
        if cutoff is not None and (
            cutoff.tzinfo is not None or cutoff.second or cutoff.microsecond
        ):
            raise ValueError("give a local time of day in whole minutes, e.g. 04:00")
        return cutoff

    def layout(self) -> Layout:
        return Layout.model_validate(
            self.model_dump(by_alias=True, exclude={"criteria", "mode", "closing_cutoff"})
        )


class ItemStates(BaseModel):
    """How many items stand where: ready (every criterion solved), waiting (a solve queued or
    running), failed (a solve failed), in all."""

    items: int = Field(description="Items of the assortment.")
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

    assortment_id: int = Field(description="The assortment.")
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
    item: str = Field(description="The item's code.")
    network_id: int = Field(
        description="The item's network: its single-network routes (recommendation, versions, "
        "policy export) answer for the item alone."
    )
    version: int = Field(description="The item's current version.")
    spec_hash: str = Field(description="SHA-256 of the item's composed specification.")
    method: Literal["exact", "priced"] = Field(description="How the item is solved.")
    state: ItemStateName = Field(
        description="ready, waiting (a solve queued or running), failed, or not_requested."
    )
    error: str | None = Field(default=None, description="The failed solve's error, if any.")


class ItemPage(BaseModel):
    items: list[ItemOut] = Field(description="Items in code order.")
    next_after: str | None = Field(
        description="Pass as `after` for the next page; null on the last page."
    )


# -- sales history and calibration (service.api.assortment_history) ---------------------------


class HistoryUploadOut(BaseModel):
    """What an upload of history did."""

    assortment_id: int = Field(description="The assortment.")
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
    location: str = Field(description="The location.")


class AssortmentHistoryOut(HistoryCountsOut):
    """The sales history stored for the assortment's items."""

    assortment_id: int = Field(description="The assortment.")
    items: int = Field(description="Items of the assortment.")
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
    item: str = Field(description="The item's code.")
    location: str = Field(description="The location.")
    parameter: Literal[
        "demand_mean", "demand_variance", "replenishment_mean", "replenishment_variance"
    ] = Field(description="The parameter that changed (units per day, or units squared).")
    old: float = Field(description="Its value in the version the estimate replaced.")
    new: float = Field(description="Its estimated value, now in the item's new version.")
    change: float = Field(
        description="|new - old| / max(|old|, 0.05): the relative change calibration reports."
    )


class CalibrationFailureOut(BaseModel):
    item: str = Field(description="The item's code.")
    reason: str = Field(description="Why it was not calibrated.")


class CalibrationRunOut(BaseModel):
    """Where a calibration of every item stands and, over its finished chunks, what changed."""

    run: int = Field(description="The run's id (the id of its first job).")
    assortment_id: int = Field(description="The assortment.")
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
