"""Shared pieces of the HTTP models: timestamps in UTC, closing stock, criteria lists, the
base of response models."""

from __future__ import annotations

from datetime import UTC, datetime
from typing import Annotated

from pydantic import (
    AfterValidator,
    BaseModel,
    ConfigDict,
    Field,
    StrictInt,
)

from solver import CRITERIA, Criterion

__all__ = [
    "DEFAULT_CRITERION_RULE",
    "MAX_BATCH_ITEMS",
    "Criteria",
    "Stock",
    "Timestamp",
    "_Out",
    "_Units",
    "_as_utc",
]


DEFAULT_CRITERION_RULE = (
    f"Absent: the first of {', '.join(CRITERIA)} that the network's current version is solved for."
)


def _as_utc(moment: datetime) -> datetime:
    """The database keeps naive UTC; the API always says so (RFC 3339, `Z`)."""
    return moment.replace(tzinfo=UTC) if moment.tzinfo is None else moment.astimezone(UTC)


Timestamp = Annotated[datetime, AfterValidator(_as_utc)]


MAX_BATCH_ITEMS = 1000


_Units = Annotated[StrictInt, Field(description="Units on hand at closing time.")]


Stock = Annotated[
    dict[str, _Units],
    Field(description="Closing stock by location id; every location of the network, once."),
]


Criteria = Annotated[
    list[Criterion],
    Field(min_length=1, max_length=2, description="Criteria to solve for (default discounted)."),
]


class _Out(BaseModel):
    model_config = ConfigDict(from_attributes=True, populate_by_name=True)
