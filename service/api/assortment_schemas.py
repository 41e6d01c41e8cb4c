"""Request and response models of the assortment routes (service.api.assortments)."""

from __future__ import annotations

from datetime import time
from typing import Any, Literal

from pydantic import BaseModel, ConfigDict, Field, field_validator

from service.assortment_spec import Layout
from service.schemas import Criteria, SolveModeName, Timestamp, known_timezone

__all__ = [
    "AssortmentCreate",
    "AssortmentOut",
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
