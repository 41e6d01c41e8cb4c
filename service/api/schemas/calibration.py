"""Sales history uploads and calibration: estimates, settings, automatic apply."""

from __future__ import annotations

from datetime import date
from typing import Annotated, Any, Literal

from pydantic import (
    BaseModel,
    ConfigDict,
    Field,
    StrictInt,
)

from service.api.schemas.common import LocationId, NetworkId
from service.api.schemas.jobs import JobOut
from solver import NetworkSpec

__all__ = [
    "MAX_HISTORY_ROWS",
    "AutoApplyOut",
    "CalibrationOut",
    "CalibrationSettingsIn",
    "CalibrationSettingsOut",
    "EstimateOut",
    "HistoryOut",
    "HistoryRowIn",
    "HistoryStored",
    "HistoryUpload",
    "LocationCalibrationOut",
    "LocationHistoryOut",
    "WeekdayTestOut",
]


_Count = Annotated[StrictInt, Field(ge=0, le=10_000_000)]
_SoldOutDays = Annotated[int, Field(description="Days on which sales reached the stock at open.")]


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
    location: LocationId
    days: int = Field(description="Business days stored.")
    sold_out_days: _SoldOutDays
    first_date: date = Field(description="The first business date stored.")
    last_date: date = Field(description="The last business date stored.")


class AutoApplyOut(BaseModel):
    applied: bool = Field(description="True when a new version was created.")
    reason: str = Field(description="Why it was or was not applied.")
    version: int | None = Field(description="The version created, when applied.")
    jobs: list[JobOut] = Field(description="Solve jobs it queued.")


class HistoryStored(BaseModel):
    network_id: NetworkId
    received: int = Field(description="Rows received.")
    inserted: int = Field(description="Rows stored for days not stored before.")
    replaced: int = Field(description="Rows that replaced stored ones for the same day.")
    locations: list[LocationHistoryOut] = Field(description="What is stored now, per location.")
    auto_apply: AutoApplyOut | None = Field(
        description="What automatic calibration did (only with a threshold configured)."
    )


class HistoryOut(BaseModel):
    network_id: NetworkId
    locations: list[LocationHistoryOut] = Field(description="What is stored, per location.")


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
    confidence: Annotated[
        float, Field(ge=0.5, lt=1, description="Level of the estimates' intervals.")
    ] = 0.95
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
        "than its stock at open is refused; so is turning it off while stored days sold more "
        "than their stock at open (409 naming them).",
    )


class CalibrationSettingsOut(CalibrationSettingsIn):
    network_id: NetworkId


class EstimateOut(BaseModel):
    family: Literal["poisson", "negative_binomial"] = Field(
        description="The law chosen: poisson or negative_binomial."
    )
    mean: float = Field(description="Estimated mean units per day.")
    mean_interval: tuple[float, float] = Field(
        description="Profile-likelihood interval of the mean, at `confidence`."
    )
    variance: float = Field(description="Estimated variance of the units per day.")
    variance_interval: tuple[float, float] | None = Field(
        description="Profile-likelihood interval of the variance (negative binomial only)."
    )
    naive_mean: float = Field(description="Plain (weighted) average, ignoring stock-outs.")
    p_value: float = Field(
        description="Likelihood-ratio test of Poisson against negative binomial."
    )
    selection: str = Field(description="Why this family was chosen, in words.")
    confidence: float = Field(description="Level of the intervals.")
    effective_days: float = Field(description="Days of data after recency weighting.")


class WeekdayTestOut(BaseModel):
    significant: bool = Field(description="True: the proposal gives this law per weekday.")
    p_value: float = Field(description="p-value of the likelihood-ratio test.")
    statistic: float = Field(description="Likelihood-ratio statistic.")
    df: int = Field(description="Degrees of freedom of the test.")
    summary: str = Field(description="The result in words.")
    means: dict[str, float] = Field(description="Estimated mean per weekday (mon .. sun).")


class LocationCalibrationOut(BaseModel):
    location: LocationId
    first_date: date | None = Field(description="First business date used; null without history.")
    last_date: date | None = Field(description="Last business date used; null without history.")
    days: int = Field(description="Business days used.")
    sold_out_days: _SoldOutDays
    days_without_stock: int = Field(
        description="Days that opened with no stock (they show no demand)."
    )
    demand: EstimateOut | None = Field(
        description="Estimate of daily demand (censored by stock-outs)."
    )
    replenishment: EstimateOut | None = Field(description="Estimate of daily deliveries.")
    current_demand: dict[str, Any] = Field(description="The current version's demand law.")
    current_replenishment: dict[str, Any] = Field(
        description="The current version's replenishment law."
    )
    changes: dict[str, float] = Field(
        description="Relative change of each mean and variance against the current version "
        "(of a day drawn at random from the week, for weekly laws)."
    )
    weekday_demand: WeekdayTestOut | None = Field(
        description="Likelihood-ratio test of a weekday effect on demand (censored)."
    )
    weekday_replenishment: WeekdayTestOut | None = Field(
        description="Likelihood-ratio test of a weekday effect on deliveries."
    )
    warnings: list[str] = Field(description="What deserves a look before applying.")
    error: str | None = Field(description="Why this location keeps its current laws.")


class CalibrationOut(BaseModel):
    network_id: NetworkId
    based_on_version: int = Field(description="The current version (send it in If-Match).")
    would_create_version: int = Field(description="The version number applying would create.")
    calibrated_locations: int = Field(description="Locations with new estimates.")
    largest_change: float = Field(description="Largest relative change of a mean or variance.")
    settings: CalibrationSettingsIn = Field(
        description="The settings the estimates were made with."
    )
    locations: list[LocationCalibrationOut] = Field(description="Estimates per location.")
    spec: NetworkSpec = Field(description="The specification the next version would have.")
    spec_hash: str = Field(description="SHA-256 of that specification as canonical JSON.")
