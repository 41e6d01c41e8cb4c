"""The parameters of simulations and what-if comparisons: the input of a job of the queue
(stored as JSON on the job, read back by the worker), of the CLI's `simulate`, and the body of
the HTTP requests that start them (service.api.schemas reuses these models as they are).

Bounds here are the contract's; service.analysis checks the parameters against the network
(start stock, overrides naming its locations and lanes, the replication bound of the settings).
"""

from __future__ import annotations

from typing import Annotated

from pydantic import BaseModel, ConfigDict, Field, StrictInt

from solver import Criterion
from solver.spec import LaneSpec, NightCount

__all__ = [
    "MAX_SEED",
    "LaneOverride",
    "LaneRef",
    "LocationOverride",
    "MeasuredDays",
    "Overrides",
    "SimulatedCriterion",
    "SimulationRequest",
    "WarmupDays",
    "WhatIfCriterion",
    "WhatIfRequest",
]

MAX_SEED = 2**63 - 1

# Meanings the reports and jobs of service.api.schemas.analysis share with these requests.
SimulatedCriterion = Annotated[Criterion, Field(description="Whose optimal policy is simulated.")]
MeasuredDays = Annotated[int, Field(description="Days measured per replication.")]
WarmupDays = Annotated[int, Field(description="Days simulated first and not measured.")]
WhatIfCriterion = Annotated[
    Criterion, Field(description="The criterion both networks are solved for.")
]

_StartUnits = Annotated[StrictInt, Field(description="Units on hand before the first night.")]


class SimulationRequest(BaseModel):
    """Simulate the optimal policy beside two simple rules on the same random days."""

    model_config = ConfigDict(
        extra="forbid",
        json_schema_extra={
            "examples": [
                {"criterion": "average", "days": 365, "replications": 200, "seed": 20261201}
            ]
        },
    )

    criterion: SimulatedCriterion = "average"
    days: Annotated[MeasuredDays, Field(ge=1, le=3650)] = 365
    replications: Annotated[
        int, Field(ge=1, le=2000, description="Independent runs; intervals are across them.")
    ] = 200
    warmup_days: Annotated[WarmupDays, Field(ge=0, le=365)] = 30
    seed: Annotated[int, Field(ge=0, le=MAX_SEED)] | None = Field(
        default=None, description="Seed of the random days; chosen at random when absent."
    )
    start_stock: dict[str, _StartUnits] | None = Field(
        default=None,
        description="Stock of every location before the first night (default: half of each "
        "capacity, rounded down).",
    )
    compare_without_rules: bool = Field(
        default=True,
        description="When the network has floors (keep_at_least) or handling limits, also "
        "simulate the optimal policy of the same network without them (dispatch costs kept), "
        "to show what the rules cost and which fill rates they protect; ignored otherwise.",
    )


_NewAmount = Annotated[float, Field(ge=0, allow_inf_nan=False)]


class LocationOverride(BaseModel):
    """New values for one location; absent fields keep theirs."""

    model_config = ConfigDict(extra="forbid")

    capacity: Annotated[int, Field(ge=1, le=100_000)] | None = Field(
        default=None, description="New capacity; absent keeps it."
    )
    unit_margin: _NewAmount | None = Field(
        default=None, description="New profit per unit sold; absent keeps it."
    )
    holding_cost: _NewAmount | None = Field(
        default=None, description="New holding cost per unit; absent keeps it."
    )
    stockout_penalty: _NewAmount | None = Field(
        default=None, description="New penalty per unit of lost demand; absent keeps it."
    )
    demand_mean: _NewAmount | None = Field(
        default=None,
        description="Mean daily demand; a Poisson law keeps its family, a negative binomial "
        "its variance-to-mean ratio; an explicit distribution cannot be rescaled.",
    )
    keep_at_least: NightCount | None = Field(
        default=None, description="New floor (one count, or one per night); 0 removes it."
    )
    max_units_out: NightCount | None = Field(
        default=None,
        description="New limit on units sent per night; null lifts it, absent keeps it.",
    )
    max_units_in: NightCount | None = Field(
        default=None,
        description="New limit on units received per night; null lifts it, absent keeps it.",
    )


class LaneRef(BaseModel):
    model_config = ConfigDict(extra="forbid", populate_by_name=True)

    from_: Annotated[
        str,
        Field(alias="from", min_length=1, max_length=64, description="The sending location's id."),
    ]
    to: Annotated[
        str, Field(min_length=1, max_length=64, description="The receiving location's id.")
    ]


class LaneOverride(LaneRef):
    """New values for an existing lane, named by its ends."""

    unit_cost: _NewAmount | None = Field(
        default=None, description="New cost per unit moved; absent keeps it."
    )
    dispatch_cost: _NewAmount | None = Field(
        default=None, description="New cost per night the lane is used; absent: unchanged."
    )
    max_units: Annotated[int, Field(ge=1, le=10_000)] | None = Field(
        default=None, description="New most units per night; absent keeps it."
    )


class Overrides(BaseModel):
    """Changes to the current version; everything not named stays as it is."""

    model_config = ConfigDict(extra="forbid")

    locations: dict[str, LocationOverride] = Field(
        default_factory=dict, description="By location id."
    )
    lanes: Annotated[list[LaneOverride], Field(max_length=1_000)] = Field(
        default_factory=list, description="Changes to existing lanes."
    )
    new_lanes: Annotated[list[LaneSpec], Field(max_length=1_000)] = Field(
        default_factory=list, description="Lanes to add."
    )
    remove_lanes: Annotated[list[LaneRef], Field(max_length=1_000)] = Field(
        default_factory=list, description="Lanes to remove."
    )
    max_units_per_night: Annotated[int, Field(ge=1)] | None = Field(
        default=None,
        description="Most units moved in one night; null lifts the limit, absent keeps it.",
    )
    remove_rules: bool = Field(
        default=False,
        description="Drop every floor and handling limit (after the changes above; dispatch "
        "costs stay): what the rules cost.",
    )


class WhatIfRequest(BaseModel):
    model_config = ConfigDict(
        extra="forbid",
        json_schema_extra={
            "examples": [
                {
                    "criterion": "discounted",
                    "overrides": {
                        "locations": {"hilltop": {"capacity": 12}},
                        "lanes": [{"from": "riverside", "to": "hilltop", "unit_cost": 3.0}],
                    },
                }
            ]
        },
    )

    criterion: WhatIfCriterion = "discounted"
    overrides: Overrides = Field(description="Changes to the current version.")
