"""Request and response models of the HTTP API: the contract. The network itself is the solver's
NetworkSpec; everything else is defined here, inputs separate from outputs."""

from __future__ import annotations

import json
from datetime import UTC, date, datetime, time
from typing import Annotated, Any, Literal

from pydantic import (
    AfterValidator,
    BaseModel,
    ConfigDict,
    Field,
    StrictInt,
    WithJsonSchema,
    field_validator,
)

from service.analysis_requests import (
    MAX_SEED,
    LaneOverride,
    LaneRef,
    LocationOverride,
    Overrides,
    SimulationRequest,
    WhatIfRequest,
)
from service.demo import DEMO_NETWORK, DEMO_STOCK
from service.timezones import known_timezone
from service.vocabulary import (
    JobStateName,
    SolveMethodName,
    SolveModeName,
    SolveStatusName,
)
from solver import CRITERIA, Criterion, NetworkSpec
from solver.spec import Weekday

__all__ = [
    "DEFAULT_CRITERION_RULE",
    "MAX_SEED",
    "AutoApplyOut",
    "BatchItem",
    "BatchOutcome",
    "BatchRequest",
    "BatchResponse",
    "CalibrationOut",
    "CalibrationSettingsIn",
    "CalibrationSettingsOut",
    "CertificateOut",
    "ClosingStockIn",
    "ClosingStockOut",
    "CorrectionOut",
    "EstimateOut",
    "HistoryOut",
    "HistoryRowIn",
    "HistoryStored",
    "HistoryUpload",
    "InstructionsOut",
    "IntervalOut",
    "JobOut",
    "JobProgressOut",
    "LaneOverride",
    "LaneRef",
    "LocationCalibrationOut",
    "LocationHistoryOut",
    "LocationOverride",
    "LocationRulesEffectOut",
    "MoveChangesOut",
    "NetworkCreate",
    "NetworkCreated",
    "NetworkOut",
    "NetworkUpdate",
    "Overrides",
    "PolicySimulationOut",
    "Problem",
    "RecommendationOut",
    "RecommendationRequest",
    "RelayOut",
    "RulesEffectOut",
    "SimulationJobOut",
    "SimulationReportOut",
    "SimulationRequest",
    "SolveState",
    "TransferOut",
    "VersionOut",
    "WeekdayTestOut",
    "WhatIfChangeOut",
    "WhatIfJobOut",
    "WhatIfOut",
    "WhatIfRequest",
    "WhatIfResultOut",
    "WhatIfSummaryOut",
    "known_timezone",
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

    @field_validator("timezone")
    @classmethod
    def _known_timezone(cls, zone: str) -> str:
        return known_timezone(zone)

    @field_validator("closing_cutoff")
    @classmethod
    def _whole_minutes(cls, cutoff: time | None) -> time | None:
        if cutoff is not None and (
            cutoff.tzinfo is not None or cutoff.second or cutoff.microsecond
        ):
            raise ValueError("give a local time of day in whole minutes, e.g. 04:00")
        return cutoff

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


class JobProgressOut(BaseModel):
    """The latest progress a running priced solve reported."""

    stage: Literal["pricing", "certifying"] = Field(
        description="pricing: improving the lane prices; certifying: simulating the policy "
        "for its lower bound."
    )
    iteration: int = Field(description="Pricing iteration, or batch of replications.")
    upper_bound: float = Field(description="Best upper bound on the optimal value so far.")
    lower_bound: float | None = Field(
        description="Best lower bound so far (the policy's simulated value); null until certifying."
    )
    elapsed: float = Field(description="Seconds since the solve started.")
    reported_at: Timestamp = Field(description="When the worker reported it (UTC).")


class JobOut(_Out):
    id: int
    network_id: int = Field(description="The network whose version is solved.")
    version_number: int = Field(description="The network version solved (as in If-Match).")
    version_id: int = Field(description="Internal id of that version's row; prefer the two above.")
    criterion: str
    method: SolveMethodName = Field(
        default="exact", description="exact or priced: how the job solves."
    )
    state: JobStateName
    attempts: int
    created_at: Timestamp
    started_at: Timestamp | None
    finished_at: Timestamp | None
    solve_seconds: float | None
    iterations: int | None
    residual: float | None
    error: str | None
    progress: JobProgressOut | None = Field(
        default=None,
        description="Priced solves: the latest progress reported while running (kept once done).",
    )

    @field_validator("progress", mode="before")
    @classmethod
    def _progress_json(cls, value: Any) -> Any:
        return json.loads(value) if isinstance(value, str) else value


class SolveState(BaseModel):
    """Where the policy of the current version stands for one criterion."""

    criterion: str
    state: SolveStatusName
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
    closing_cutoff: str = Field(
        description="Local time (HH:MM) before which a closing count belongs to the previous "
        "business date; 00:00: midnight."
    )
    mode: SolveModeName = Field(description="The solving mode the network asks for.")
    method: SolveMethodName = Field(
        description="The method that mode resolves to for the current version."
    )
    solves: list[SolveState]


class NetworkCreated(NetworkOut):
    jobs: list[JobOut] = Field(description="Solve jobs queued by this version.")


class VersionOut(_Out):
    number: int
    spec_hash: str
    created_at: Timestamp
    spec: NetworkSpec


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


class RecommendationRequest(BaseModel):
    model_config = ConfigDict(
        extra="forbid",
        json_schema_extra={"examples": [{"stock": DEMO_STOCK, "criterion": "discounted"}]},
    )

    stock: Stock
    criterion: Criterion | None = Field(default=None, description=DEFAULT_CRITERION_RULE)
    business_date: BusinessDate = None


class TransferOut(BaseModel):
    model_config = ConfigDict(populate_by_name=True)

    from_: str = Field(alias="from")
    to: str
    units: int
    unit_cost: float
    dispatch_cost: float = Field(
        description="The lane's fixed cost per night it is used, paid when units > 0."
    )


class RelayOut(BaseModel):
    """A location that both receives and sends units on one night: units pass through it."""

    location: str
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
        description="Confidence interval of that value (common random numbers, control variate)."
    )
    certified_gap: float = Field(
        description="(upper bound - low end of the interval) / upper bound, as a fraction: "
        "0.012 is 1.2%."
    )
    replications: int = Field(description="Simulated replications behind the interval.")


class RecommendationOut(BaseModel):
    network_id: int
    criterion: str
    version: int = Field(description="Version whose policy answered.")
    stale: bool = Field(
        description="True when the current version's solve for this criterion is queued or "
        "running and an older version answers meanwhile; never while nothing is being solved "
        "(a current version not solved for the criterion answers 409 instead)."
    )
    solved_at: Timestamp
    parameters_calibrated_at: Timestamp | None = Field(
        description="When that version's demand and replenishment were estimated from sales "
        "history; null when they were sent as they are."
    )
    residual: float | None = Field(
        description="Bellman residual of the exact solve; null for a priced policy (see "
        "certificate)."
    )
    stock: dict[str, int]
    transfers: list[TransferOut] = Field(description="Tonight's moves; empty when none pays.")
    stock_after_transfers: dict[str, int]
    relays: list[RelayOut] = Field(
        default_factory=list,
        description="Locations that receive and send on the same night (three or more "
        "locations), with their net change and why; empty when there are none.",
    )
    transfer_cost: float
    expected_value: float = Field(
        description="Value of following the policy from this stock (discounted: expected "
        "discounted profit; average: relative value, 0 for the all-empty stock)."
    )
    value_without_transfers: float
    gain_from_transfers: float
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
    criterion: Criterion | None = Field(default=None, description=DEFAULT_CRITERION_RULE)
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


class ProblemTypeOut(BaseModel):
    """One kind of problem: what a problem's `type` URI names."""

    type: str = Field(description="The URI problems of this kind carry, e.g. /problems/not-found.")
    title: str = Field(description="The short summary every problem of this kind carries.")
    description: str = Field(description="What it means and what to do about it.")


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

    business_date: date | None = Field(
        default=None,
        description="The business date closed; default: the network's current business date "
        "(today in its time zone, or yesterday before its closing_cutoff).",
    )
    units: _Units
    correction: bool = Field(
        default=False,
        description="Correct a count after the night's instructions were issued: they are "
        "computed again from the corrected counts as the next `revision`, and the correction "
        "(key, time, old and new count) is kept and listed in the instructions. Without it, a "
        "count sent after the instructions were issued is refused (409).",
    )


class ClosingStockOut(BaseModel):
    network_id: int
    location: str
    business_date: date
    units: int
    reported_at: Timestamp
    missing: list[str] = Field(description="Locations yet to report for this business date.")
    revision: int | None = Field(
        default=None,
        description="Revision of the night's instructions after this report (null while they "
        "are not issued yet); a correction that changes the count raises it by one.",
    )


class Movement(BaseModel):
    location: str
    units: int


class CorrectionOut(BaseModel):
    """A closing count corrected after the instructions were first issued."""

    location: str
    old_units: int = Field(description="The count it replaced, units.")
    new_units: int = Field(description="The corrected count, units.")
    revision: int = Field(description="The revision of the instructions it produced.")
    key_prefix: str = Field(description="Public prefix of the API key that sent it.")
    corrected_at: Timestamp = Field(description="When the correction was received (UTC).")


class InstructionsOut(BaseModel):
    network_id: int
    location: str
    business_date: date
    version: int
    criterion: str
    computed_at: Timestamp = Field(description="When this revision was computed.")
    revision: int = Field(
        description="1 when first issued, one more for each correction of a count (also in "
        "the ETag header)."
    )
    moves_changed_in_revision: int = Field(
        description="The revision in which this location's sends and receives last changed: "
        "above the revision it acted on, its instructions are new."
    )
    corrections: list[CorrectionOut] = Field(
        description="Counts of this night corrected after the first issue, oldest first."
    )
    notes: list[str] = Field(
        default_factory=list,
        description="What deserves a look before acting: a stale or uncalibrated policy, a "
        "move that leaves the sender below its expected demand for tomorrow.",
    )
    send: list[Movement] = Field(description="Units this location sends tonight, by destination.")
    receive: list[Movement] = Field(description="Units this location receives, by origin.")
    net_change: int = Field(description="Units received minus units sent tonight.")
    relay: bool = Field(
        description="True when this location both receives and sends tonight: units pass "
        "through it (see relay_explanation)."
    )
    relay_explanation: str | None = Field(
        default=None, description="Why units go through this location, for a relay."
    )
    stock: dict[str, int] = Field(description="The closing stock the instructions answer.")


# -- sales history and calibration -------------------------------------------------------------

_Count = Annotated[StrictInt, Field(ge=0, le=10_000_000)]
MAX_HISTORY_ROWS = 200_000


class HistoryRowIn(BaseModel):
    """One location's business day."""

    model_config = ConfigDict(extra="forbid")

    date: date
    location: Annotated[str, Field(min_length=1, max_length=64)]
    units_sold: _Count
    stock_at_open: _Count = Field(description="Units on hand when the day began.")
    units_received: _Count = Field(
        description="Units delivered during the day (on sale the next day, or the same day "
        "with the network's receipts_sell_same_day calibration setting)."
    )


class HistoryUpload(BaseModel):
    model_config = ConfigDict(
        extra="forbid",
        json_schema_extra={
            "examples": [
                {
                    "rows": [
                        {
                            "date": "2026-11-30",
                            "location": "riverside",
                            "units_sold": 4,
                            "stock_at_open": 4,
                            "units_received": 3,
                        },
                        {
                            "date": "2026-11-30",
                            "location": "hilltop",
                            "units_sold": 1,
                            "stock_at_open": 6,
                            "units_received": 0,
                        },
                    ]
                }
            ]
        },
    )

    rows: Annotated[list[HistoryRowIn], Field(min_length=1, max_length=MAX_HISTORY_ROWS)]


class LocationHistoryOut(BaseModel):
    location: str
    days: int
    sold_out_days: int = Field(description="Days on which sales reached the stock at open.")
    first_date: date
    last_date: date


class AutoApplyOut(BaseModel):
    applied: bool
    reason: str
    version: int | None = Field(description="The version created, when applied.")
    jobs: list[JobOut] = Field(description="Solve jobs it queued.")


class HistoryStored(BaseModel):
    network_id: int
    received: int
    inserted: int
    replaced: int = Field(description="Rows that replaced stored ones for the same day.")
    locations: list[LocationHistoryOut]
    auto_apply: AutoApplyOut | None = Field(
        description="What automatic calibration did (only with a threshold configured)."
    )


class HistoryOut(BaseModel):
    network_id: int
    locations: list[LocationHistoryOut]


class CalibrationSettingsIn(BaseModel):
    model_config = ConfigDict(
        extra="forbid",
        json_schema_extra={
            "examples": [{"window_days": 365, "half_life_days": 90, "auto_apply_threshold": 0.15}]
        },
    )

    window_days: Annotated[int, Field(ge=7, le=36_600)] | None = Field(
        default=None, description="Use only the most recent days (none: all history)."
    )
    half_life_days: Annotated[float, Field(gt=0, le=36_600)] | None = Field(
        default=None, description="Weight a day by 0.5 ** (age / half life); none: equally."
    )
    confidence: Annotated[float, Field(ge=0.5, lt=1)] = 0.95
    auto_apply_threshold: Annotated[float, Field(gt=0, le=100)] | None = Field(
        default=None,
        description="Apply a new estimate by itself when it moves a mean or variance by more "
        "than this fraction (none: never).",
    )
    receipts_sell_same_day: bool = Field(
        default=False,
        description="True: units received in the morning are on sale the same day, so a day "
        "may sell up to stock_at_open + units_received and is sold out when it sells all of "
        "them. False (default): receipts are on sale from the next day, and a row selling more "
        "than its stock at open is refused.",
    )


class CalibrationSettingsOut(CalibrationSettingsIn):
    network_id: int


class EstimateOut(BaseModel):
    family: Literal["poisson", "negative_binomial"]
    mean: float
    mean_interval: tuple[float, float]
    variance: float
    variance_interval: tuple[float, float] | None
    naive_mean: float = Field(description="Plain (weighted) average, ignoring stock-outs.")
    p_value: float = Field(
        description="Likelihood-ratio test of Poisson against negative binomial."
    )
    selection: str
    confidence: float
    effective_days: float


class WeekdayTestOut(BaseModel):
    significant: bool = Field(description="True: the proposal gives this law per weekday.")
    p_value: float
    statistic: float
    df: int
    summary: str
    means: dict[str, float] = Field(description="Estimated mean per weekday (mon .. sun).")


class LocationCalibrationOut(BaseModel):
    location: str
    first_date: date | None
    last_date: date | None
    days: int
    sold_out_days: int
    days_without_stock: int
    demand: EstimateOut | None
    replenishment: EstimateOut | None
    current_demand: dict[str, Any] = Field(description="The current version's demand law.")
    current_replenishment: dict[str, Any]
    changes: dict[str, float] = Field(
        description="Relative change of each mean and variance against the current version "
        "(of a day drawn at random from the week, for weekly laws)."
    )
    weekday_demand: WeekdayTestOut | None = Field(
        description="Likelihood-ratio test of a weekday effect on demand (censored)."
    )
    weekday_replenishment: WeekdayTestOut | None
    warnings: list[str]
    error: str | None = Field(description="Why this location keeps its current laws.")


class CalibrationOut(BaseModel):
    network_id: int
    based_on_version: int = Field(description="The current version (send it in If-Match).")
    would_create_version: int
    calibrated_locations: int
    largest_change: float
    settings: CalibrationSettingsIn
    locations: list[LocationCalibrationOut]
    spec: NetworkSpec = Field(description="The specification the next version would have.")
    spec_hash: str


# -- simulations and what-if comparisons --------------------------------------------------------


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
