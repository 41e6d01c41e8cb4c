"""Shared pieces of the HTTP models: timestamps in UTC, closing stock, criteria lists, the
base of response models, and the fields that mean the same wherever they stand (a network's
id, a location, a job's state and times), described once."""

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

from service.vocabulary import JobStateName
from solver import CRITERIA, Criterion

__all__ = [
    "DEFAULT_CRITERION_RULE",
    "MAX_BATCH_ITEMS",
    "UTC_TIME",
    "Attempts",
    "CreatedAt",
    "Criteria",
    "FinishedAt",
    "JobError",
    "JobState",
    "LocationId",
    "NetworkId",
    "StartedAt",
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
UTC_TIME = "UTC time (ISO 8601)"


NetworkId = Annotated[int, Field(description="The network's id.")]
LocationId = Annotated[str, Field(description="A location's id within the network.")]

# A job of the queue: a solve, a simulation or a what-if comparison.
JobState = Annotated[JobStateName, Field(description="queued, running, done or failed.")]
Attempts = Annotated[
    int,
    Field(description="How many times a worker has claimed it (a lost worker's job is retried)."),
]
CreatedAt = Annotated[Timestamp, Field(description=f"When it was created, {UTC_TIME}.")]
StartedAt = Annotated[
    Timestamp | None, Field(description=f"When a worker started it, {UTC_TIME}; null before.")
]
FinishedAt = Annotated[
    Timestamp | None, Field(description=f"When it finished, {UTC_TIME}; null before.")
]
JobError = Annotated[str | None, Field(description="Why it failed; null otherwise.")]


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
