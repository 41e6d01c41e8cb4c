"""Networks and their versions: the request bodies (the solver's NetworkSpec with criteria,
cut-off and mode) and the network's state."""

from __future__ import annotations

from datetime import time

from pydantic import (
    BaseModel,
    ConfigDict,
    Field,
    field_validator,
)

from service.api.schemas.common import UTC_TIME, CreatedAt, Criteria, Timestamp, _Out
from service.api.schemas.jobs import JobOut
from service.demo import DEMO_NETWORK
from service.timezones import known_timezone, local_cutoff
from service.vocabulary import (
    SolveMethodName,
    SolveModeName,
    SolveStatusName,
)
from solver import NetworkSpec

__all__ = [
    "NetworkCreate",
    "NetworkCreated",
    "NetworkOut",
    "NetworkUpdate",
    "SolveState",
    "VersionOut",
]


class NetworkCreate(NetworkSpec):
    """A network specification, and the criteria to solve it for."""

    model_config = ConfigDict(json_schema_extra={"examples": [DEMO_NETWORK]})

    criteria: Criteria = ["discounted"]  # noqa: RUF012  (pydantic copies defaults)
    closing_cutoff: time | None = Field(
        default=None,
        description="Local time (in `timezone`) before which a closing count belongs to the "
        "previous business date, e.g. 04:00 for stores that close after midnight; absent: "
        "midnight on creation, unchanged on update. Not part of the specification: changing "
        "it queues no solve.",
    )
    mode: SolveModeName | None = Field(
        default=None,
        description="How the network is solved: exact (every stock state), priced (lane "
        "prices and per-store values, with a certified optimality gap), or auto: exact while "
        "the network is within the exact size limits, priced beyond them. Not part of the "
        "specification's hash. Default auto; on PUT, absent keeps the network's mode.",
    )

    _known_timezone = field_validator("timezone")(known_timezone)
    _whole_minutes = field_validator("closing_cutoff")(local_cutoff)

    def spec(self) -> NetworkSpec:
        """The specification alone. The request was validated as a NetworkSpec (this model is
        one), so its fields are taken as they are, not validated a second time."""
        fields = NetworkSpec.model_fields
        return NetworkSpec.model_construct(
            self.model_fields_set & fields.keys(),
            **{name: getattr(self, name) for name in fields},
        )


class NetworkUpdate(NetworkCreate):
    """The next version of a network's specification (send If-Match with the current version).
    Without `criteria` the next version is solved for the criteria the current one is. A
    changed `mode` queues the solves of the new method."""

    criteria: Criteria | None = Field(  # type: ignore[assignment]
        default=None,
        description="Criteria to solve the new version for; absent: those of the current "
        "version (as calibration apply does).",
    )


class SolveState(BaseModel):
    """Where the policy of the current version stands for one criterion."""

    criterion: str = Field(description="The criterion this entry is about.")
    state: SolveStatusName = Field(
        description="ready, queued, running, failed, or not_requested (never asked for)."
    )
    job_id: int | None = Field(
        default=None, description="The job that solves it, when there is one."
    )
    solved_at: Timestamp | None = Field(
        default=None, description=f"When the policy was solved, {UTC_TIME}; null until ready."
    )
    error: str | None = Field(
        default=None, description="Why the last solve failed; null otherwise."
    )


class NetworkOut(_Out):
    id: int = Field(description="The network's id, used in every /v1/networks/{network_id} path.")
    name: str = Field(description="A name of your choosing, unique within the tenant.")
    archived: bool = Field(description="True once deleted: kept for its history, no longer served.")
    created_at: CreatedAt
    version: int = Field(description="Current version number; send it in If-Match to update.")
    spec_hash: str = Field(description="SHA-256 of the current specification as canonical JSON.")
    closing_cutoff: str = Field(
        description="Local time (HH:MM) before which a closing count belongs to the previous "
        "business date; 00:00: midnight."
    )
    mode: SolveModeName = Field(description="The solving mode the network asks for.")
    method: SolveMethodName = Field(
        description="The method that mode resolves to for the current version."
    )
    solves: list[SolveState] = Field(
        description="Where each criterion's policy of the current version stands."
    )


class NetworkCreated(NetworkOut):
    jobs: list[JobOut] = Field(description="Solve jobs queued by this version.")


class VersionOut(_Out):
    number: int = Field(description="Version number, 1 for the first.")
    spec_hash: str = Field(description="SHA-256 of the specification as canonical JSON.")
    created_at: Timestamp = Field(description=f"When this version was stored, {UTC_TIME}.")
    spec: NetworkSpec = Field(description="The specification of this version.")
