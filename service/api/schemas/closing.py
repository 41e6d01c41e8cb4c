"""Closing counts and the night's instructions."""

from __future__ import annotations

from datetime import date
from typing import Annotated

from pydantic import (
    BaseModel,
    ConfigDict,
    Field,
)

from service.api.schemas.common import UTC_TIME, LocationId, NetworkId, Timestamp, _Units

__all__ = [
    "ClosingStockIn",
    "ClosingStockOut",
    "CorrectionOut",
    "InstructionsOut",
    "Movement",
]

_BusinessDate = Annotated[
    date, Field(description="The business date of the closing count (local to the stores).")
]


class ClosingStockIn(BaseModel):
    model_config = ConfigDict(
        extra="forbid",
        json_schema_extra={"examples": [{"business_date": "2026-12-01", "units": 13}]},
    )

    business_date: date | None = Field(
        default=None,
        description="The business date closed; default: the network's current business date "
        "(today in its time zone, or yesterday before its closing_cutoff).",
    )
    units: _Units
    correction: bool = Field(
        default=False,
        description="Correct a count after the night's instructions were issued: they are "
        "computed again from the corrected counts as the next `revision`, and the correction "
        "(key, time, old and new count) is kept and listed in the instructions. Without it, a "
        "count sent after the instructions were issued is refused (409).",
    )


class ClosingStockOut(BaseModel):
    network_id: NetworkId
    location: LocationId
    business_date: _BusinessDate
    units: int = Field(description="Units on hand at closing, as recorded.")
    reported_at: Timestamp = Field(description=f"When the count was recorded, {UTC_TIME}.")
    missing: list[str] = Field(description="Locations yet to report for this business date.")
    revision: int | None = Field(
        default=None,
        description="Revision of the night's instructions after this report (null while they "
        "are not issued yet); a correction that changes the count raises it by one.",
    )


class Movement(BaseModel):
    location: str = Field(description="The other location of the move.")
    units: int = Field(description="Units moved.")


class CorrectionOut(BaseModel):
    """A closing count corrected after the instructions were first issued."""

    location: LocationId
    old_units: int = Field(description="The count it replaced, units.")
    new_units: int = Field(description="The corrected count, units.")
    revision: int = Field(description="The revision of the instructions it produced.")
    key_prefix: str = Field(description="Public prefix of the API key that sent it.")
    corrected_at: Timestamp = Field(description="When the correction was received (UTC).")


class InstructionsOut(BaseModel):
    network_id: NetworkId
    location: LocationId
    business_date: _BusinessDate
    version: int = Field(description="Network version whose policy gave the instructions.")
    criterion: str = Field(description="The criterion whose policy gave the instructions.")
    computed_at: Timestamp = Field(description="When this revision was computed.")
    revision: int = Field(
        description="1 when first issued, one more for each correction of a count (also in "
        "the ETag header)."
    )
    moves_changed_in_revision: int = Field(
        description="The revision in which this location's sends and receives last changed: "
        "above the revision it acted on, its instructions are new."
    )
    corrections: list[CorrectionOut] = Field(
        description="Counts of this night corrected after the first issue, oldest first."
    )
    notes: list[str] = Field(
        default_factory=list,
        description="What deserves a look before acting: a stale or uncalibrated policy, a "
        "move that leaves the sender below its expected demand for tomorrow.",
    )
    send: list[Movement] = Field(description="Units this location sends tonight, by destination.")
    receive: list[Movement] = Field(description="Units this location receives, by origin.")
    net_change: int = Field(description="Units received minus units sent tonight.")
    relay: bool = Field(
        description="True when this location both receives and sends tonight: units pass "
        "through it (see relay_explanation)."
    )
    relay_explanation: str | None = Field(
        default=None, description="Why units go through this location, for a relay."
    )
    stock: dict[str, int] = Field(description="The closing stock the instructions answer.")
