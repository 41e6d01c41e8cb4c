"""The network specification: the validated input of the solver, shared with the HTTP API.

A network is a set of retail locations holding one item, joined by directed lanes along which
units may be moved overnight. Amounts are in currency units per unit of stock; demand and
replenishment are counts per business day.

Weekdays. A location's `demand` and `replenishment` may be given per weekday,
`{"weekly": {"mon": <distribution>, ..., "sun": <distribution>}}`, and so may a lane's
`max_units` (`{"weekly": {"mon": 3, ..., "sun": 0}}`, 0 meaning no move that night). A day's
distribution applies to that business day; a night's limit applies to the moves made on the
evening of that business day (Sunday's limit to Sunday night). A network with any weekly field is
periodic: its optimal policy depends on the weekday (see solver.model for the phases). Its
`timezone` (an IANA name such as "Europe/Berlin") tells the service which business date a
closing count belongs to; here only its form is checked, since solver/ reads no tz database.

Rules of the trade. A lane's `dispatch_cost` is paid once on a night the lane moves at least one
unit, on top of `unit_cost` per unit (a truck, a driver). A location's `keep_at_least` is a floor:
it never sends units that would leave it, after the night's moves, with fewer than that many (it
may still receive, whatever its stock). `max_units_out` and `max_units_in` are handling limits:
most units a location sends, or receives, in one night. All three location fields take a weekly
form like a lane's `max_units`. Every new field is left out of the serialised form at its
default, so a network that does not use it serialises (and hashes) exactly as before.
"""

from __future__ import annotations

import math
from typing import Annotated, Any, Generic, Literal, TypeVar, get_args

from pydantic import (
    BaseModel,
    ConfigDict,
    Discriminator,
    Field,
    Tag,
    ValidationError,
    field_validator,
    model_validator,
)
from pydantic_core import InitErrorDetails, PydanticCustomError

__all__ = [
    "WEEKDAYS",
    "WEEKDAY_NAMES",
    "DailyDistributions",
    "Distribution",
    "LaneSpec",
    "LocationSpec",
    "NegativeBinomialDemand",
    "NetworkSpec",
    "NightCount",
    "NightlyUnits",
    "PmfDemand",
    "PoissonDemand",
    "Weekday",
    "WeeklyCount",
    "WeeklyDistribution",
    "WeeklyUnits",
]

PMF_SUM_TOLERANCE = 1e-9
# Keys of a weekly field, Monday first: day d of a week is WEEKDAYS[d] (0 = Monday, as in
# datetime.date.weekday()).
Weekday = Literal["mon", "tue", "wed", "thu", "fri", "sat", "sun"]
WEEKDAYS: tuple[Weekday, ...] = get_args(Weekday)
# The same days for people (messages), in the same order.
WEEKDAY_NAMES = ("Monday", "Tuesday", "Wednesday", "Thursday", "Friday", "Saturday", "Sunday")
DEFAULT_TIMEZONE = "UTC"

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


_WHICH_LAW = "Which law: poisson, negative_binomial or pmf."
_MEAN = "Mean units per day."


class PoissonDemand(_Strict):
    """Poisson counts with the given mean per day."""

    dist: Annotated[Literal["poisson"], Field(description=_WHICH_LAW)]
    mean: Annotated[_Amount, Field(description=_MEAN)]


class NegativeBinomialDemand(_Strict):
    """Overdispersed counts given by their mean and variance per day (variance > mean)."""

    dist: Annotated[Literal["negative_binomial"], Field(description=_WHICH_LAW)]
    mean: Annotated[float, Field(gt=0, allow_inf_nan=False, description=_MEAN)]
    variance: Annotated[
        float,
        Field(
            gt=0,
            allow_inf_nan=False,
            description="Variance of the units per day (larger than the mean).",
        ),
    ]

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

    dist: Annotated[Literal["pmf"], Field(description=_WHICH_LAW)]
    p: Annotated[
        list[Annotated[float, Field(ge=0, le=1, allow_inf_nan=False)]],
        Field(
            min_length=1,
            max_length=100_000,
            description="p[k]: the probability of k units; sums to 1.",
        ),
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

_Day = TypeVar("_Day")


class _Week(_Strict, Generic[_Day]):
    """One value per weekday; all seven days are required."""

    mon: _Day
    tue: _Day
    wed: _Day
    thu: _Day
    fri: _Day
    sat: _Day
    sun: _Day

    @model_validator(mode="before")
    @classmethod
    def _every_day(cls, data: Any) -> Any:
        if isinstance(data, dict):
            missing = [day for day in WEEKDAYS if day not in data]
            unknown = [str(key) for key in data if key not in WEEKDAYS]
            if missing or unknown:
                found = [f"missing {', '.join(missing)}"] if missing else []
                found += [f"unknown {', '.join(map(repr, unknown))}"] if unknown else []
                raise PydanticCustomError(
                    "weekdays",
                    "a weekly value needs exactly the seven days mon, tue, wed, thu, fri, sat, "
                    "sun: {found}",
                    {"found": "; ".join(found)},
                )
        return data

    def days(self) -> tuple[_Day, ...]:
        """The seven values, Monday first."""
        return tuple(getattr(self, day) for day in WEEKDAYS)


class DailyDistributions(_Week[Distribution]):
    """A distribution for each business day."""

    mon: Distribution = Field(description="The law on Mondays.")
    tue: Distribution = Field(description="The law on Tuesdays.")
    wed: Distribution = Field(description="The law on Wednesdays.")
    thu: Distribution = Field(description="The law on Thursdays.")
    fri: Distribution = Field(description="The law on Fridays.")
    sat: Distribution = Field(description="The law on Saturdays.")
    sun: Distribution = Field(description="The law on Sundays.")


_EACH_WEEKDAY = "One value per weekday, mon .. sun."


class WeeklyDistribution(_Strict):
    """Counts whose law depends on the weekday: `{"weekly": {"mon": ..., ..., "sun": ...}}`."""

    weekly: Annotated[DailyDistributions, Field(description=_EACH_WEEKDAY)]


_NightUnits = Annotated[int, Field(ge=0, le=10_000)]


class NightlyUnits(_Week[_NightUnits]):
    """Most units moved on each night, named by the business day whose evening it is."""

    mon: _NightUnits = Field(description="Most units on Monday night (0 closes the lane).")
    tue: _NightUnits = Field(description="Most units on Tuesday night (0 closes the lane).")
    wed: _NightUnits = Field(description="Most units on Wednesday night (0 closes the lane).")
    thu: _NightUnits = Field(description="Most units on Thursday night (0 closes the lane).")
    fri: _NightUnits = Field(description="Most units on Friday night (0 closes the lane).")
    sat: _NightUnits = Field(description="Most units on Saturday night (0 closes the lane).")
    sun: _NightUnits = Field(description="Most units on Sunday night (0 closes the lane).")


class WeeklyUnits(_Strict):
    """A lane limit per night: `{"weekly": {"mon": 3, ..., "sun": 0}}`; 0 closes the lane."""

    weekly: Annotated[NightlyUnits, Field(description=_EACH_WEEKDAY)]

    @model_validator(mode="after")
    def _some_night_open(self) -> WeeklyUnits:
        if not any(self.weekly.days()):
            raise ValueError("no night allows moves (every night is 0); remove the lane instead")
        return self


class WeeklyCount(_Strict):
    """A per-night count of a location (floor or handling limit): `{"weekly": {"mon": 2, ...}}`;
    0 is allowed on every night."""

    weekly: Annotated[NightlyUnits, Field(description=_EACH_WEEKDAY)]


def _law_tag(value: Any) -> str | None:
    if type(value) is dict:
        return "weekly" if "weekly" in value else value.get("dist")
    # A validated law names its own `dist`; only a weekly one has none (checking `dist` first
    # spares an isinstance against a model class, which is slow).
    tag: str | None = getattr(value, "dist", None)
    if tag is not None:
        return tag
    if isinstance(value, dict):
        return "weekly" if "weekly" in value else value.get("dist")
    return "weekly" if isinstance(value, WeeklyDistribution) else None


DailyLaw = Annotated[
    Annotated[PoissonDemand, Tag("poisson")]
    | Annotated[NegativeBinomialDemand, Tag("negative_binomial")]
    | Annotated[PmfDemand, Tag("pmf")]
    | Annotated[WeeklyDistribution, Tag("weekly")],
    Discriminator(
        _law_tag,
        custom_error_type="distribution",
        custom_error_message="expected a distribution with dist 'poisson', 'negative_binomial' "
        "or 'pmf', or a weekly value with one such distribution per day",
    ),
]

_LaneUnits = Annotated[int, Field(ge=1, le=10_000, description="Most units moved per night.")]


def _units_tag(value: Any) -> str:
    # A plain number first: isinstance against a model class is slow, and this runs for every
    # lane of every network validated.
    if type(value) is int:
        return "units"
    return "weekly" if isinstance(value, dict | WeeklyUnits) else "units"


LaneLimit = Annotated[
    Annotated[_LaneUnits, Tag("units")] | Annotated[WeeklyUnits, Tag("weekly")],
    Discriminator(_units_tag),
]


def _count_tag(value: Any) -> str:
    if type(value) is int:
        return "units"
    return "weekly" if isinstance(value, dict | WeeklyCount) else "units"


NightCount = Annotated[
    Annotated[_NightUnits, Tag("units")] | Annotated[WeeklyCount, Tag("weekly")],
    Discriminator(_count_tag),
]


def _on(value: Any, weekday: int) -> Any:
    """The value of a possibly weekly field on `weekday` (0 = Monday)."""
    if isinstance(value, WeeklyDistribution | WeeklyUnits | WeeklyCount):
        return getattr(value.weekly, WEEKDAYS[weekday])
    return value


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
    demand: Annotated[
        DailyLaw, Field(description="Units asked for in a day; one law, or one per weekday.")
    ]
    replenishment: Annotated[
        DailyLaw,
        Field(
            description="Units arriving during the day, usable from the next day; one law, or "
            "one per weekday."
        ),
    ]
    # The rules below are left out of the serialised form at their defaults, so that a network
    # saved before they existed serialises (and hashes) exactly as it did.
    keep_at_least: Annotated[
        NightCount,
        Field(
            description="Floor: never send units that would leave fewer than this many after "
            "the night's moves (receiving is always allowed); one count, or one per night.",
            exclude_if=lambda units: units == 0,
        ),
    ] = 0
    max_units_out: Annotated[
        NightCount | None,
        Field(
            description="Handling limit: most units sent in one night; one count, or one per "
            "night; none when absent.",
            exclude_if=lambda units: units is None,
        ),
    ] = None
    max_units_in: Annotated[
        NightCount | None,
        Field(
            description="Handling limit: most units received in one night; one count, or one "
            "per night; none when absent.",
            exclude_if=lambda units: units is None,
        ),
    ] = None

    @property
    def is_weekly(self) -> bool:
        return any(
            isinstance(value, WeeklyDistribution | WeeklyCount)
            for value in (
                self.demand,
                self.replenishment,
                self.keep_at_least,
                self.max_units_out,
                self.max_units_in,
            )
        )

    @property
    def has_rules(self) -> bool:
        """Whether a floor or a handling limit applies on some night."""
        return (
            self.keep_at_least != 0
            or self.max_units_out is not None
            or self.max_units_in is not None
        )

    def keep_at_least_on(self, weekday: int) -> int:
        """Floor on the evening of business day `weekday` (0 = Monday), units."""
        units: int = _on(self.keep_at_least, weekday)
        return units

    def max_units_out_on(self, weekday: int) -> int | None:
        """Most units sent on the evening of business day `weekday`; None without a limit."""
        units: int | None = _on(self.max_units_out, weekday)
        return units

    def max_units_in_on(self, weekday: int) -> int | None:
        """Most units received on the evening of business day `weekday`; None without a limit."""
        units: int | None = _on(self.max_units_in, weekday)
        return units

    def demand_on(self, weekday: int) -> Distribution:
        """The demand law of business day `weekday` (0 = Monday)."""
        law: Distribution = _on(self.demand, weekday)
        return law

    def replenishment_on(self, weekday: int) -> Distribution:
        """The replenishment law of business day `weekday` (0 = Monday)."""
        law: Distribution = _on(self.replenishment, weekday)
        return law


class LaneSpec(_Strict):
    """A directed lane along which units may be moved overnight."""

    from_: Annotated[_LocationId, Field(alias="from")]
    to: _LocationId
    unit_cost: Annotated[_Amount, Field(description="Cost of moving one unit along the lane.")]
    dispatch_cost: Annotated[
        _Amount,
        Field(
            description="Fixed cost paid once on a night the lane moves one unit or more, on "
            "top of unit_cost (a truck and a driver).",
            # Left out at its default: see LocationSpec.keep_at_least.
            exclude_if=lambda cost: cost == 0,
        ),
    ] = 0.0
    max_units: Annotated[
        LaneLimit,
        Field(
            description="Most units moved per night; one limit, or one per night (0 = no move "
            "that night)."
        ),
    ]

    @property
    def is_weekly(self) -> bool:
        return isinstance(self.max_units, WeeklyUnits)

    def max_units_on(self, weekday: int) -> int:
        """Most units moved on the evening of business day `weekday` (0 = Monday)."""
        units: int = _on(self.max_units, weekday)
        return units


class NetworkSpec(_Strict):
    """A transfer network: at least two locations and the lanes between them."""

    name: Annotated[
        str,
        Field(
            min_length=1,
            max_length=200,
            description="A name of your choosing, unique within the tenant.",
        ),
    ]
    discount: Annotated[
        float,
        Field(
            gt=0,
            lt=1,
            description="Per-day discount factor for the discounted criterion.",
        ),
    ] = 0.99
    locations: Annotated[
        list[LocationSpec],
        Field(min_length=2, max_length=64, description="One entry per location."),
    ]
    lanes: Annotated[
        list[LaneSpec],
        Field(
            min_length=1,
            max_length=1_000,
            description="Directed lanes along which units may move at night.",
        ),
    ]
    max_units_per_night: Annotated[
        int | None,
        Field(ge=1, description="Most units moved over all lanes in one night."),
    ] = None
    timezone: Annotated[
        str,
        Field(
            min_length=1,
            max_length=64,
            pattern=r"^[A-Za-z][A-Za-z0-9_+-]*(/[A-Za-z0-9_+-]+){0,2}$",
            description="IANA time zone of the locations (e.g. Europe/Berlin): which business "
            "date a closing count belongs to.",
            # Left out of the serialised form when it is the default, so that a network saved
            # before time zones existed serialises (and hashes) exactly as it did.
            exclude_if=lambda zone: zone == DEFAULT_TIMEZONE,
        ),
    ] = DEFAULT_TIMEZONE

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
            floors = [location.keep_at_least_on(day) for day in range(len(WEEKDAYS))]
            if max(floors) > location.capacity:
                night = WEEKDAYS[floors.index(max(floors))]
                which = "" if isinstance(location.keep_at_least, int) else f" on {night}"
                problem(
                    ("locations", i, "keep_at_least"),
                    f"keep_at_least{which} ({max(floors)}) exceeds the capacity "
                    f"({location.capacity}) of location {location.id!r}",
                )

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

    @property
    def is_periodic(self) -> bool:
        """Whether some demand, replenishment, lane limit, floor or handling limit depends on the
        weekday, so that the optimal policy does too (seven phases instead of one)."""
        return any(loc.is_weekly for loc in self.locations) or any(
            lane.is_weekly for lane in self.lanes
        )

    @property
    def has_rules(self) -> bool:
        """Whether some location has a floor or a handling limit."""
        return any(loc.has_rules for loc in self.locations)

    def without_rules(self) -> NetworkSpec:
        """The same network with every floor and handling limit removed (dispatch costs kept):
        what the rules cost is the difference between the two."""
        document = self.model_dump(mode="json", by_alias=True)
        for location in document["locations"]:
            for name in ("keep_at_least", "max_units_out", "max_units_in"):
                location.pop(name, None)
        return NetworkSpec.model_validate(document)
