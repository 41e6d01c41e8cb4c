"""Simulations and what-if comparisons: their reports and jobs (the request bodies are the
analysis parameters of service.analysis_requests)."""

from __future__ import annotations

from typing import Literal

from pydantic import (
    BaseModel,
    Field,
)

from service.analysis_requests import (
    SimulationRequest,
)
from service.api.schemas.common import Timestamp
from service.vocabulary import (
    JobStateName,
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
    mean: float
    low: float | None = Field(description="Null when one replication cannot show a spread.")
    high: float | None


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
    fill_rate_by_location: dict[str, IntervalOut]
    stockout_days: IntervalOut = Field(description="Fraction of location-days with lost sales.")
    stockout_days_by_location: dict[str, IntervalOut]
    units_moved_per_night: IntervalOut
    move_cost_per_day: IntervalOut
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
    criterion: Criterion
    days: int
    replications: int
    warmup_days: int
    seed: int
    confidence: float = Field(description="Level of every interval.")
    start_stock: dict[str, int]
    optimal_source: Literal["stored", "solved"] = Field(
        description="stored: the network's cached policy; solved: solved for this simulation."
    )
    policies: list[PolicySimulationOut]
    rules: RulesEffectOut | None = Field(
        default=None,
        description="The effect of the network's floors and handling limits; null when it has "
        "none or the comparison was not asked for.",
    )
    notes: list[str] = Field(description="Policies left out, and why.")


class _AnalysisJobOut(BaseModel):
    id: int
    network_id: int
    version: int = Field(description="The network version analysed.")
    state: JobStateName
    criterion: Criterion
    attempts: int
    created_at: Timestamp
    started_at: Timestamp | None
    finished_at: Timestamp | None
    seconds: float | None = Field(description="Computing time of the finished job.")
    error: str | None


class SimulationJobOut(_AnalysisJobOut):
    request: SimulationRequest = Field(description="What is simulated, the seed included.")
    report: SimulationReportOut | None = Field(description="Once the job is done.")


class WhatIfSummaryOut(BaseModel):
    states: int
    method: SolveMethodName = Field(
        default="exact", description="exact or priced: how both networks were solved."
    )
    profit_per_day: float | None = Field(description="Long-run profit per day (average only).")
    mean_value: float | None = Field(
        description="Expected discounted profit averaged over every stock (discounted only)."
    )
    reference_stock: dict[str, int]
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

    profit_per_day: float | None
    mean_value: float | None
    value_at_reference: float | None
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
    base_states: int
    changed_states: int
    detail: str


class WhatIfResultOut(BaseModel):
    criterion: Criterion
    base: WhatIfSummaryOut
    changed: WhatIfSummaryOut
    change: WhatIfChangeOut
    moves: MoveChangesOut
    changed_spec: NetworkSpec = Field(description="The current version with the overrides.")


class WhatIfOut(WhatIfResultOut):
    network_id: int
    version: int = Field(description="The network version the overrides were applied to.")


class WhatIfJobOut(_AnalysisJobOut):
    result: WhatIfResultOut | None = Field(description="Once the job is done.")
