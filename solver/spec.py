"""The network specification: the validated input of the solver, shared with the HTTP API.

A network is a set of retail locations holding one item, joined by directed lanes along which
units may be moved overnight. Amounts are in currency units per unit of stock; demand and
replenishment are counts per business day.
"""

from __future__ import annotations

import math
from typing import Annotated, Literal

from pydantic import (
    BaseModel,
    ConfigDict,
    Field,
    ValidationError,
    field_validator,
    model_validator,
)
from pydantic_core import InitErrorDetails, PydanticCustomError

__all__ = [
    "Distribution",
    "LaneSpec",
    "LocationSpec",
    "NegativeBinomialDemand",
    "NetworkSpec",
    "PmfDemand",
    "PoissonDemand",
]

PMF_SUM_TOLERANCE = 1e-9

_Amount = Annotated[float, Field(ge=0, allow_inf_nan=False)]
_LocationId = Annotated[
    str,
    Field(
        min_length=1,
        max_length=64,
        pattern=r"^[A-Za-z0-9][A-Za-z0-9._-]*$",
        description="Identifier of a location, unique in its network.",
    ),
]


class _Strict(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True, populate_by_name=True)


class PoissonDemand(_Strict):
    """Poisson counts with the given mean per day."""

    dist: Literal["poisson"]
    mean: _Amount


class NegativeBinomialDemand(_Strict):
    """Overdispersed counts given by their mean and variance per day (variance > mean)."""

    dist: Literal["negative_binomial"]
    mean: Annotated[float, Field(gt=0, allow_inf_nan=False)]
    variance: Annotated[float, Field(gt=0, allow_inf_nan=False)]

    @model_validator(mode="after")
    def _overdispersed(self) -> NegativeBinomialDemand:
        if self.variance <= self.mean:
            raise ValueError(
                f"variance ({self.variance:g}) must exceed the mean ({self.mean:g}); "
                "use a Poisson distribution when they are equal"
            )
        return self


class PmfDemand(_Strict):
    """An explicit probability mass function: p[k] is the probability of k units."""

    dist: Literal["pmf"]
    p: Annotated[
        list[Annotated[float, Field(ge=0, le=1, allow_inf_nan=False)]],
        Field(min_length=1, max_length=100_000),
    ]

    @field_validator("p")
    @classmethod
    def _sums_to_one(cls, p: list[float]) -> list[float]:
        total = math.fsum(p)
        if abs(total - 1.0) > PMF_SUM_TOLERANCE:
            raise ValueError(f"probabilities sum to {total:.12g}, not 1 (tolerance 1e-9)")
        return p


Distribution = Annotated[
    PoissonDemand | NegativeBinomialDemand | PmfDemand, Field(discriminator="dist")
]


class LocationSpec(_Strict):
    """One location: its stockroom, economics and daily demand and replenishment."""

    id: _LocationId
    capacity: Annotated[int, Field(ge=1, le=100_000, description="Most units the location holds.")]
    unit_margin: Annotated[_Amount, Field(description="Profit per unit sold.")]
    holding_cost: Annotated[
        _Amount, Field(description="Cost per unit of stock on hand after the night's moves.")
    ] = 0.0
    stockout_penalty: Annotated[
        _Amount, Field(description="Cost per unit of demand that could not be served.")
    ] = 0.0
    demand: Distribution
    replenishment: Annotated[
        Distribution,
        Field(description="Units arriving during the day, usable from the next day."),
    ]


class LaneSpec(_Strict):
    """A directed lane along which units may be moved overnight."""

    from_: Annotated[_LocationId, Field(alias="from")]
    to: _LocationId
    unit_cost: Annotated[_Amount, Field(description="Cost of moving one unit along the lane.")]
    max_units: Annotated[int, Field(ge=1, le=10_000, description="Most units moved per night.")]


class NetworkSpec(_Strict):
    """A transfer network: at least two locations and the lanes between them."""

    name: Annotated[str, Field(min_length=1, max_length=200)]
    discount: Annotated[
        float,
        Field(
            gt=0,
            lt=1,
            description="Per-day discount factor for the discounted criterion.",
        ),
    ] = 0.99
    locations: Annotated[list[LocationSpec], Field(min_length=2, max_length=64)]
    lanes: Annotated[list[LaneSpec], Field(min_length=1, max_length=1_000)]
    max_units_per_night: Annotated[
        int | None,
        Field(ge=1, description="Most units moved over all lanes in one night."),
    ] = None

    @model_validator(mode="after")
    def _consistent(self) -> NetworkSpec:
        problems: list[InitErrorDetails] = []

        def problem(loc: tuple[str | int, ...], message: str) -> None:
            problems.append(
                InitErrorDetails(
                    type=PydanticCustomError("network", message),
                    loc=loc,
                    input=None,
                )
            )

        first_index: dict[str, int] = {}
        for i, location in enumerate(self.locations):
            if location.id in first_index:
                problem(
                    ("locations", i, "id"),
                    f"duplicate location id {location.id!r} "
                    f"(first used by location {first_index[location.id]})",
                )
            else:
                first_index[location.id] = i

        seen_lanes: dict[tuple[str, str], int] = {}
        for j, lane in enumerate(self.lanes):
            for field, endpoint in (("from", lane.from_), ("to", lane.to)):
                if endpoint not in first_index:
                    problem(("lanes", j, field), f"unknown location {endpoint!r}")
            if lane.from_ == lane.to:
                problem(("lanes", j), f"lane from {lane.from_!r} to itself")
            key = (lane.from_, lane.to)
            if key in seen_lanes:
                problem(
                    ("lanes", j),
                    f"duplicate lane {lane.from_!r} -> {lane.to!r} (first given as lane "
                    f"{seen_lanes[key]}); merge them into one",
                )
            else:
                seen_lanes[key] = j

        if problems:
            raise ValidationError.from_exception_data(type(self).__name__, problems)
        return self

    @property
    def location_ids(self) -> list[str]:
        return [location.id for location in self.locations]
