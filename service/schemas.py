"""Request and response models of the HTTP API: the contract. The network itself is the solver's
NetworkSpec; everything else is defined here, inputs separate from outputs."""

from __future__ import annotations

import json
from datetime import UTC, date, datetime
from pathlib import Path
from typing import Annotated, Any, Literal

from pydantic import AfterValidator, BaseModel, ConfigDict, Field, StrictInt, WithJsonSchema

from solver import NetworkSpec

__all__ = [
    "BatchItem",
    "BatchOutcome",
    "BatchRequest",
    "BatchResponse",
    "ClosingStockIn",
    "ClosingStockOut",
    "CriterionName",
    "InstructionsOut",
    "JobOut",
    "NetworkCreate",
    "NetworkCreated",
    "NetworkOut",
    "NetworkUpdate",
    "Problem",
    "RecommendationOut",
    "RecommendationRequest",
    "SolveState",
    "TransferOut",
    "VersionOut",
]

CriterionName = Literal["discounted", "average"]


def _as_utc(moment: datetime) -> datetime:
    """The database keeps naive UTC; the API always says so (RFC 3339, `Z`)."""
    return moment.replace(tzinfo=UTC) if moment.tzinfo is None else moment.astimezone(UTC)


Timestamp = Annotated[datetime, AfterValidator(_as_utc)]
MAX_BATCH_ITEMS = 1000

_DEMO = Path(__file__).parent / "data" / "demo_network.json"
DEMO_NETWORK: dict[str, Any] = json.loads(_DEMO.read_text(encoding="utf-8"))
DEMO_STOCK: dict[str, Any] = {"riverside": 13, "hilltop": 1}

_Units = Annotated[StrictInt, Field(description="Units on hand at closing time.")]
Stock = Annotated[
    dict[str, _Units],
    Field(description="Closing stock by location id; every location of the network, once."),
]
Criteria = Annotated[
    list[CriterionName],
    Field(min_length=1, max_length=2, description="Criteria to solve for (default discounted)."),
]


class _Out(BaseModel):
    model_config = ConfigDict(from_attributes=True, populate_by_name=True)


class NetworkCreate(NetworkSpec):
    """A network specification, and the criteria to solve it for."""

    model_config = ConfigDict(json_schema_extra={"examples": [DEMO_NETWORK]})

    criteria: Criteria = ["discounted"]  # noqa: RUF012  (pydantic copies defaults)

    def spec(self) -> NetworkSpec:
        return NetworkSpec.model_validate(self.model_dump(by_alias=True, exclude={"criteria"}))


class NetworkUpdate(NetworkCreate):
    """The next version of a network's specification (send If-Match with the current version)."""


class JobOut(_Out):
    id: int
    version_id: int
    criterion: str
    state: Literal["queued", "running", "done", "failed"]
    attempts: int
    created_at: Timestamp
    started_at: Timestamp | None
    finished_at: Timestamp | None
    solve_seconds: float | None
    iterations: int | None
    residual: float | None
    error: str | None


class SolveState(BaseModel):
    """Where the policy of the current version stands for one criterion."""

    criterion: str
    state: Literal["ready", "queued", "running", "failed", "not_requested"]
    job_id: int | None = None
    solved_at: Timestamp | None = None
    error: str | None = None


class NetworkOut(_Out):
    id: int
    name: str
    archived: bool
    created_at: Timestamp
    version: int = Field(description="Current version number; send it in If-Match to update.")
    spec_hash: str = Field(description="SHA-256 of the current specification as canonical JSON.")
    solves: list[SolveState]


class NetworkCreated(NetworkOut):
    jobs: list[JobOut] = Field(description="Solve jobs queued by this version.")


class VersionOut(_Out):
    number: int
    spec_hash: str
    created_at: Timestamp
    spec: NetworkSpec


class RecommendationRequest(BaseModel):
    model_config = ConfigDict(
        extra="forbid",
        json_schema_extra={"examples": [{"stock": DEMO_STOCK, "criterion": "discounted"}]},
    )

    stock: Stock
    criterion: CriterionName = "discounted"


class TransferOut(BaseModel):
    model_config = ConfigDict(populate_by_name=True)

    from_: str = Field(alias="from")
    to: str
    units: int
    unit_cost: float


class RecommendationOut(BaseModel):
    network_id: int
    criterion: str
    version: int = Field(description="Version whose policy answered.")
    stale: bool = Field(description="True when a newer version is still being solved.")
    solved_at: Timestamp
    residual: float
    stock: dict[str, int]
    transfers: list[TransferOut] = Field(description="Tonight's moves; empty when none pays.")
    stock_after_transfers: dict[str, int]
    transfer_cost: float
    expected_value: float = Field(
        description="Value of following the policy from this stock (discounted: expected "
        "discounted profit; average: relative value, 0 for the all-empty stock)."
    )
    value_without_transfers: float
    gain_from_transfers: float
    profit_per_day: float | None = Field(
        description="Long-run profit per day of the policy (average criterion only)."
    )


class BatchItem(BaseModel):
    model_config = ConfigDict(extra="forbid")

    network_id: Annotated[int, Field(ge=1, le=2_147_483_647)]
    stock: Stock
    criterion: CriterionName = "discounted"


class BatchRequest(BaseModel):
    model_config = ConfigDict(
        extra="forbid",
        json_schema_extra={
            "examples": [{"items": [{"network_id": 1, "stock": DEMO_STOCK}]}],
        },
    )

    # Items are validated one by one, so that a malformed item fails alone; the schema still
    # documents each as a BatchItem.
    items: Annotated[
        list[Annotated[Any, WithJsonSchema(BatchItem.model_json_schema())]],
        Field(min_length=1, max_length=MAX_BATCH_ITEMS),
    ]


class Problem(BaseModel):
    """RFC 9457 problem details."""

    model_config = ConfigDict(extra="allow")

    type: str
    title: str
    status: int
    detail: str
    instance: str | None = None


class BatchOutcome(BaseModel):
    """Exactly one of `result` and `problem`."""

    result: RecommendationOut | None = None
    problem: Problem | None = None


class BatchResponse(BaseModel):
    items: list[BatchOutcome]


class ClosingStockIn(BaseModel):
    model_config = ConfigDict(
        extra="forbid",
        json_schema_extra={"examples": [{"business_date": "2026-12-01", "units": 13}]},
    )

    business_date: date
    units: _Units


class ClosingStockOut(BaseModel):
    network_id: int
    location: str
    business_date: date
    units: int
    reported_at: Timestamp
    missing: list[str] = Field(description="Locations yet to report for this business date.")


class Movement(BaseModel):
    location: str
    units: int


class InstructionsOut(BaseModel):
    network_id: int
    location: str
    business_date: date
    version: int
    criterion: str
    computed_at: Timestamp
    send: list[Movement] = Field(description="Units this location sends tonight, by destination.")
    receive: list[Movement] = Field(description="Units this location receives, by origin.")
    stock: dict[str, int] = Field(description="The closing stock the instructions answer.")
