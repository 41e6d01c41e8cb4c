"""Simulations and what-if comparisons: their reports and jobs (the request bodies are the
analysis parameters of service.analysis_requests)."""

from __future__ import annotations

from typing import Literal, cast

from pydantic import (
    BaseModel,
    ConfigDict,
    Field,
)
from pydantic.config import JsonDict

from service.analysis_requests import (
    MeasuredDays,
    SimulatedCriterion,
    SimulationRequest,
    WarmupDays,
    WhatIfCriterion,
)
from service.api.schemas.common import (
    Attempts,
    CreatedAt,
    FinishedAt,
    JobError,
    JobState,
    NetworkId,
    StartedAt,
)
from service.vocabulary import (
    SolveMethodName,
)
from solver import Criterion, NetworkSpec

__all__ = [
    "IntervalOut",
    "LocationRulesEffectOut",
    "MoveChangesOut",
    "PolicySimulationOut",
    "RulesEffectOut",
    "SimulationJobOut",
    "SimulationReportOut",
    "WhatIfChangeOut",
    "WhatIfJobOut",
    "WhatIfOut",
    "WhatIfResultOut",
    "WhatIfSummaryOut",
]


class IntervalOut(BaseModel):
    mean: float = Field(description="Mean over the replications.")
    low: float | None = Field(description="Null when one replication cannot show a spread.")
    high: float | None = Field(
        description="Upper end of the interval; null when one replication cannot show a spread."
    )


class PolicySimulationOut(BaseModel):
    name: Literal["optimal", "priced", "do_nothing", "balance_cover", "optimal_without_rules"] = (
        Field(
            description="optimal: the solved policy; priced: the priced policy's nightly plan (a "
            "network solved by prices); do_nothing: never move; balance_cover: move toward equal "
            "days of cover when the move pays for itself the next day (all of these keep the "
            "network's floors and handling limits); optimal_without_rules: the optimal policy of "
            "the network with its floors and handling limits removed."
        )
    )
    profit_per_day: IntervalOut = Field(description="Currency per day, move costs deducted.")
    fill_rate: IntervalOut = Field(description="Units sold / units demanded.")
    fill_rate_by_location: dict[str, IntervalOut] = Field(description="Fill rate per location.")
    stockout_days: IntervalOut = Field(description="Fraction of location-days with lost sales.")
    stockout_days_by_location: dict[str, IntervalOut] = Field(
        description="Stock-out day fraction per location."
    )
    units_moved_per_night: IntervalOut = Field(description="Units moved per night.")
    move_cost_per_day: IntervalOut = Field(description="Cost of moves per day.")
    difference_to_optimal: IntervalOut | None = Field(
        description="Profit per day minus the network's policy's (optimal, or priced) on the "
        "same days; null for that policy itself."
    )


class LocationRulesEffectOut(BaseModel):
    fill_rate_with_rules: IntervalOut = Field(
        description="Units sold / units demanded at the location, keeping the rules."
    )
    fill_rate_without_rules: IntervalOut = Field(
        description="The same with the network's floors and handling limits removed."
    )
    stockout_days_with_rules: IntervalOut = Field(description="Fraction of days with lost sales.")
    stockout_days_without_rules: IntervalOut = Field(
        description="Fraction of days with lost sales, without the rules."
    )


class RulesEffectOut(BaseModel):
    """What the floors and handling limits cost and protect, from the optimal policies with and
    without them on the same simulated days."""

    profit_per_day_cost: IntervalOut = Field(
        description="Profit per day given up by keeping the rules: the optimal policy without "
        "them minus the optimal policy with them, paired by replication (>= 0 up to noise)."
    )
    by_location: dict[str, LocationRulesEffectOut] = Field(
        description="Per location: fill rate and stock-out days with and without the rules."
    )


class SimulationReportOut(BaseModel):
    criterion: Criterion = Field(description="Whose optimal policy was simulated.")
    days: MeasuredDays
    replications: int = Field(description="Independent runs.")
    warmup_days: WarmupDays
    seed: int = Field(description="Seed of the random days; the same seed gives the same report.")
    confidence: float = Field(description="Level of every interval.")
    start_stock: dict[str, int] = Field(description="Stock by location before the first night.")
    optimal_source: Literal["stored", "solved"] = Field(
        description="stored: the network's cached policy; solved: solved for this simulation."
    )
    policies: list[PolicySimulationOut] = Field(
        description="One report per policy, the optimal one first."
    )
    rules: RulesEffectOut | None = Field(
        default=None,
        description="The effect of the network's floors and handling limits; null when it has "
        "none or the comparison was not asked for.",
    )
    notes: list[str] = Field(description="Policies left out, and why.")


class _AnalysisJobOut(BaseModel):
    """A job of the analysis queue; each kind describes its `id` and `criterion`."""

    id: int
    network_id: NetworkId
    version: int = Field(description="The network version analysed.")
    state: JobState
    criterion: Criterion
    attempts: Attempts
    created_at: CreatedAt
    started_at: StartedAt
    finished_at: FinishedAt
    seconds: float | None = Field(description="Computing time of the finished job.")
    error: JobError


class SimulationJobOut(_AnalysisJobOut):
    id: int = Field(description="The simulation's id (GET .../simulations/{job_id}).")
    criterion: SimulatedCriterion
    request: SimulationRequest = Field(description="What is simulated, the seed included.")
    report: SimulationReportOut | None = Field(description="Once the job is done.")


class WhatIfSummaryOut(BaseModel):
    states: int = Field(description="Number of stock states of the network.")
    method: SolveMethodName = Field(
        default="exact", description="exact or priced: how both networks were solved."
    )
    profit_per_day: float | None = Field(description="Long-run profit per day (average only).")
    mean_value: float | None = Field(
        description="Expected discounted profit averaged over every stock (discounted only)."
    )
    reference_stock: dict[str, int] = Field(
        description="The stock the values are compared at (half of each capacity, rounded down)."
    )
    value_at_reference: float | None = Field(
        description="Expected discounted profit from the reference stock (discounted only; "
        "null for a priced network)."
    )
    upper_bound_at_reference: float | None = Field(
        default=None,
        description="Priced networks: the upper bound on the optimal value at the reference stock.",
    )
    certified_gap: float | None = Field(
        default=None, description="Priced networks: the solve's certified gap (a fraction)."
    )
    residual: float | None = Field(description="Null for a priced network.")
    error_bound: float | None = Field(description="Null for a priced network.")


class WhatIfChangeOut(BaseModel):
    """Changed minus base."""

    profit_per_day: float | None = Field(
        description="Change of the long-run profit per day (average only)."
    )
    mean_value: float | None = Field(description="Change of the mean value (discounted only).")
    value_at_reference: float | None = Field(
        description="Change of the value at the reference stock (discounted only)."
    )
    upper_bound_at_reference: float | None = Field(
        default=None,
        description="Priced networks: the upper bound at the certificate's reference stock; "
        "null for exact ones.",
    )


class MoveChangesOut(BaseModel):
    comparable: bool = Field(description="False when the overrides change the stock states.")
    states_changed: int | None = Field(
        description="Stocks at which the recommended moves differ (null when not comparable)."
    )
    base_states: int = Field(description="Stock states of the current version.")
    changed_states: int = Field(description="Stock states with the overrides.")
    detail: str = Field(description="The comparison in words.")


def _describe_change(schema: JsonDict) -> None:
    # pydantic drops a field's description that repeats the docstring of the model it refers
    # to, as `change`'s would; the contract states it on the property all the same.
    properties = cast(JsonDict, schema["properties"])
    cast(JsonDict, properties["change"])["description"] = WhatIfChangeOut.__doc__


class WhatIfResultOut(BaseModel):
    model_config = ConfigDict(json_schema_extra=_describe_change)

    criterion: WhatIfCriterion
    base: WhatIfSummaryOut = Field(description="The current version, solved.")
    changed: WhatIfSummaryOut = Field(description="The version with the overrides, solved.")
    change: WhatIfChangeOut
    moves: MoveChangesOut = Field(description="How the recommended moves differ.")
    changed_spec: NetworkSpec = Field(description="The current version with the overrides.")


class WhatIfOut(WhatIfResultOut):
    network_id: NetworkId
    version: int = Field(description="The network version the overrides were applied to.")


class WhatIfJobOut(_AnalysisJobOut):
    id: int = Field(description="The comparison's id (GET .../what-if/{job_id}).")
    criterion: WhatIfCriterion
    result: WhatIfResultOut | None = Field(description="Once the job is done.")
