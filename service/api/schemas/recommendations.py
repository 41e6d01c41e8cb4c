"""Recommendations for tonight, one network or a batch."""

from __future__ import annotations

from datetime import date
from typing import Annotated, Any

from pydantic import (
    BaseModel,
    ConfigDict,
    Field,
    WithJsonSchema,
)

from service.api.schemas.common import (
    DEFAULT_CRITERION_RULE,
    MAX_BATCH_ITEMS,
    UTC_TIME,
    LocationId,
    NetworkId,
    Stock,
    Timestamp,
)
from service.api.schemas.problem_types import Problem
from service.demo import DEMO_STOCK
from service.vocabulary import (
    SolveMethodName,
)
from solver import Criterion
from solver.spec import Weekday

__all__ = [
    "BatchItem",
    "BatchOutcome",
    "BatchRequest",
    "BatchResponse",
    "BusinessDate",
    "CertificateOut",
    "RecommendationOut",
    "RecommendationRequest",
    "RelayOut",
    "TransferOut",
]


BusinessDate = Annotated[
    date | None,
    Field(
        description="Business date of the closing count; tonight is the night after it. "
        "Matters only for a network with weekly fields, where it defaults to the current "
        "business date: today in the network's time zone, or yesterday before its "
        "closing_cutoff.",
        ge=date(2000, 1, 1),
        le=date(2199, 12, 31),
    ),
]

_CriterionOrFirst = Annotated[Criterion | None, Field(description=DEFAULT_CRITERION_RULE)]


class RecommendationRequest(BaseModel):
    model_config = ConfigDict(
        extra="forbid",
        json_schema_extra={"examples": [{"stock": DEMO_STOCK, "criterion": "discounted"}]},
    )

    stock: Stock
    criterion: _CriterionOrFirst = None
    business_date: BusinessDate = None


class TransferOut(BaseModel):
    model_config = ConfigDict(populate_by_name=True)

    from_: str = Field(alias="from", description="The sending location's id.")
    to: str = Field(description="The receiving location's id.")
    units: int = Field(description="Units to move tonight.")
    unit_cost: float = Field(description="Cost of moving one unit along the lane.")
    dispatch_cost: float = Field(
        description="The lane's fixed cost per night it is used, paid when units > 0."
    )


class RelayOut(BaseModel):
    """A location that both receives and sends units on one night: units pass through it."""

    location: LocationId
    receives: int = Field(description="Units arriving tonight, over all lanes.")
    sends: int = Field(description="Units leaving tonight, over all lanes.")
    net_change: int = Field(description="receives - sends: what its stock gains tonight.")
    explanation: str = Field(description="Why units go through this location, in words.")


class CertificateOut(BaseModel):
    """How far a priced policy can be from optimal, certified at one reference stock."""

    reference_stock: dict[str, int] = Field(
        description="The closing stock, per location, at which the certificate is computed."
    )
    upper_bound: float = Field(
        description="Lagrangian upper bound on the optimal value at the reference stock: no "
        "policy can do better."
    )
    policy_value: float = Field(description="The priced policy's simulated value there.")
    policy_value_interval: tuple[float, float] = Field(
        description="Confidence interval of that value (simulated with the store values' "
        "martingale as a control variate)."
    )
    certified_gap: float = Field(
        description="(upper bound - low end of the interval) / upper bound, as a fraction: "
        "0.012 is 1.2%."
    )
    replications: int = Field(description="Simulated replications behind the interval.")


class RecommendationOut(BaseModel):
    network_id: NetworkId
    criterion: str = Field(description="The criterion whose policy answered.")
    version: int = Field(description="Version whose policy answered.")
    stale: bool = Field(
        description="True when the current version's solve for this criterion is queued or "
        "running and an older version answers meanwhile; never while nothing is being solved "
        "(a current version not solved for the criterion answers 409 instead)."
    )
    solved_at: Timestamp = Field(description=f"When the policy was solved, {UTC_TIME}.")
    parameters_calibrated_at: Timestamp | None = Field(
        description="When that version's demand and replenishment were estimated from sales "
        "history; null when they were sent as they are."
    )
    residual: float | None = Field(
        description="Bellman residual of the exact solve; null for a priced policy (see "
        "certificate)."
    )
    stock: dict[str, int] = Field(description="The closing stock sent, by location.")
    transfers: list[TransferOut] = Field(description="Tonight's moves; empty when none pays.")
    stock_after_transfers: dict[str, int] = Field(
        description="Stock by location once tonight's moves arrive."
    )
    relays: list[RelayOut] = Field(
        default_factory=list,
        description="Locations that receive and send on the same night (three or more "
        "locations), with their net change and why; empty when there are none.",
    )
    notes: list[str] = Field(
        default_factory=list,
        description="What deserves a look before acting, in the words of the closing "
        "instructions: a stale or uncalibrated policy, a move that leaves the sender below its "
        "expected demand for tomorrow; empty when there is nothing to say.",
    )
    transfer_cost: float = Field(description="Cost of tonight's moves.")
    expected_value: float = Field(
        description="Value of following the policy from this stock (discounted: expected "
        "discounted profit; average: relative value, 0 for the all-empty stock)."
    )
    value_without_transfers: float = Field(
        description="Value of moving nothing tonight and following the policy afterwards."
    )
    gain_from_transfers: float = Field(
        description="expected_value minus value_without_transfers: what tonight's moves are worth."
    )
    profit_per_day: float | None = Field(
        description="Long-run profit per day of the policy (average criterion only; for a "
        "priced policy, the upper bound on the optimal profit per day)."
    )
    business_date: date | None = Field(
        default=None,
        description="The business date whose night the answer is for (as sent, or today in the "
        "network's time zone for a weekly network); null for a stationary network sent none.",
    )
    night: Weekday | None = Field(
        default=None, description="Weekday of that business date: the night of the moves."
    )
    method: SolveMethodName = Field(
        default="exact",
        description="exact: the optimal policy over every stock state; priced: the nightly plan "
        "from lane prices and per-store values.",
    )
    upper_bound: float | None = Field(
        default=None,
        description="Priced policies: an upper bound on the optimal value at this stock "
        "(discounted; under the average criterion, on the optimal profit per day). "
        "expected_value and value_without_transfers are then on the relaxation's scale. Null "
        "for exact policies.",
    )
    certificate: CertificateOut | None = Field(
        default=None, description="Priced policies: the solve's certified optimality gap."
    )


class BatchItem(BaseModel):
    model_config = ConfigDict(extra="forbid")

    network_id: Annotated[int, Field(ge=1, le=2_147_483_647)]
    stock: Stock
    criterion: _CriterionOrFirst = None
    business_date: BusinessDate = None


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
        Field(
            min_length=1,
            max_length=MAX_BATCH_ITEMS,
            description=f"Up to {MAX_BATCH_ITEMS:,} recommendation requests, each with its "
            "network_id.",
        ),
    ]


class BatchOutcome(BaseModel):
    """Exactly one of `result` and `problem`."""

    result: RecommendationOut | None = Field(
        default=None, description="The recommendation, when the item succeeded."
    )
    problem: Problem | None = Field(
        default=None, description="The problem (RFC 9457), when the item failed."
    )


class BatchResponse(BaseModel):
    items: list[BatchOutcome] = Field(description="One outcome per item, in the order sent.")
