"""Calibration: a network's demand and replenishment estimated from its sales history, and the
version those estimates would make.

For each location with history, solver.estimation estimates demand by censored maximum
likelihood (sold-out days count as "at least") and replenishment from receipts. The proposal is
the current specification with those laws put in; locations without usable history keep theirs.
With the network's `receipts_sell_same_day` setting, units received in the morning count as on
sale that day: a day could sell stock at open plus receipts, and sold out when it sold all of
them; without it (the default) receipts are on sale from the next day. The setting changes how
history is read, not the transfer model, in which a day's replenishment is usable the next day.
A parameter's change is |new - old| / max(|old|, CHANGE_FLOOR) for the mean and the variance of
each law, so that a move from 0.0 to 0.01 units a day does not count as infinite.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass
from datetime import date

import numpy as np
from numpy.typing import NDArray
from sqlalchemy.orm import Session

from service.db.base import utcnow
from service.db.history import (
    calibration_settings,
    days_selling_receipts,
    sales_history,
    save_calibration_settings,
)
from service.db.networks import canonical_spec, latest_version
from service.db.tables import Network, NetworkVersion
from service.errors import HistoryInputError, NothingToApplyError, SettingsConflictError
from service.networks import Written, add_network_version
from solver import ModelTooLargeError, NetworkSpec, SizeLimits
from solver.estimation import (
    CalibrationError,
    CountEstimate,
    LocationCalibration,
    WeekdayEffect,
    calibrate_location,
    recency_weights,
    weekday_effect,
)
from solver.spec import (
    WEEKDAYS,
    DailyLaw,
    Distribution,
    NegativeBinomialDemand,
    PoissonDemand,
    WeeklyDistribution,
)

__all__ = [
    "CHANGE_FLOOR",
    "DEFAULT_CONFIDENCE",
    "AutoApplied",
    "CalibrationOptions",
    "CalibrationOverrides",
    "LocationProposal",
    "Proposal",
    "apply_estimates",
    "auto_apply",
    "law_moments",
    "options_for",
    "propose",
    "save_options",
]

CHANGE_FLOOR = 0.05
DEFAULT_CONFIDENCE = 0.95
# Estimates enter the specification to this many significant digits: enough for the solver,
# few enough that an unchanged history gives an unchanged specification (and hash).
_DIGITS = 6


@dataclass(frozen=True)
class CalibrationOptions:
    """window_days: only the most recent days of history (None: all); half_life_days: weight
    day t by 0.5 ** (age / half_life) (None: equal weights); confidence of the intervals."""

    window_days: int | None = None
    half_life_days: float | None = None
    confidence: float = DEFAULT_CONFIDENCE
    auto_apply_threshold: float | None = None
    receipts_sell_same_day: bool = False

    def available(
        self, stock_at_open: NDArray[np.int64], received: NDArray[np.int64]
    ) -> NDArray[np.int64]:
        """Units each day could sell: the stock at open, plus the day's receipts when they
        sell the same day. Shape (n_days,)."""
        return stock_at_open + received if self.receipts_sell_same_day else stock_at_open


@dataclass(frozen=True)
class LocationProposal:
    location: str
    first_date: date | None
    last_date: date | None
    calibration: LocationCalibration | None
    error: str | None
    current_demand: DailyLaw
    current_replenishment: DailyLaw
    changes: dict[str, float]
    # The test of a weekday effect on demand and on replenishment (None without history, or
    # when a weekday has no day to estimate from); the laws become weekly only when significant.
    weekday_demand: WeekdayEffect | None = None
    weekday_replenishment: WeekdayEffect | None = None

    @property
    def largest_change(self) -> float:
        return max(self.changes.values(), default=0.0)


@dataclass(frozen=True)
class Proposal:
    based_on: NetworkVersion
    options: CalibrationOptions
    locations: tuple[LocationProposal, ...]
    spec: NetworkSpec

    @property
    def spec_hash(self) -> str:
        """The SHA-256 of the proposed specification (the version it would make)."""
        return canonical_spec(self.spec)[1]

    @property
    def calibrated(self) -> tuple[LocationProposal, ...]:
        return tuple(p for p in self.locations if p.calibration is not None)

    @property
    def largest_change(self) -> float:
        return max((p.largest_change for p in self.locations), default=0.0)


@dataclass(frozen=True)
class CalibrationOverrides:
    """Settings given for one view, apply or run in place of the stored ones (None: the
    stored one)."""

    window_days: int | None = None
    half_life_days: float | None = None
    confidence: float | None = None

    def over(self, stored: CalibrationOptions) -> CalibrationOptions:
        return CalibrationOptions(
            window_days=stored.window_days if self.window_days is None else self.window_days,
            half_life_days=(
                stored.half_life_days if self.half_life_days is None else self.half_life_days
            ),
            confidence=stored.confidence if self.confidence is None else self.confidence,
            auto_apply_threshold=stored.auto_apply_threshold,
            receipts_sell_same_day=stored.receipts_sell_same_day,
        )


def options_for(session: Session, network_id: int) -> CalibrationOptions:
    """The network's stored settings (the defaults when it has none)."""
    row = calibration_settings(session, network_id)
    if row is None:
        return CalibrationOptions()
    return CalibrationOptions(
        window_days=row.window_days,
        half_life_days=row.half_life_days,
        confidence=row.confidence,
        auto_apply_threshold=row.auto_apply_threshold,
        receipts_sell_same_day=row.receipts_sell_same_day,
    )


def law_moments(dist: DailyLaw) -> tuple[float, float]:
    """(mean, variance) of a specification law, in units per day; for a weekly one, of a day
    drawn at random from the week (the mean of the means, and by the law of total variance the
    mean of the variances plus the variance of the means)."""
    if isinstance(dist, WeeklyDistribution):
        moments = np.array([law_moments(day) for day in dist.weekly.days()])
        return float(moments[:, 0].mean()), float(moments[:, 1].mean() + moments[:, 0].var())
    if isinstance(dist, PoissonDemand):
        return dist.mean, dist.mean
    if isinstance(dist, NegativeBinomialDemand):
        return dist.mean, dist.variance
    p = np.asarray(dist.p, dtype=np.float64)
    p /= p.sum()
    k = np.arange(p.size)
    mean = float(k @ p)
    return mean, float(((k - mean) ** 2) @ p)


def _change(old: float, new: float) -> float:
    return abs(new - old) / max(abs(old), CHANGE_FLOOR)


def _rounded(value: float) -> float:
    if value == 0 or not math.isfinite(value):
        return value
    return round(value, _DIGITS - 1 - math.floor(math.log10(abs(value))))


def _law(mean: float, variance: float, family: str) -> Distribution:
    mean, variance = _rounded(mean), _rounded(variance)
    if family == "negative_binomial" and variance > mean > 0:
        return NegativeBinomialDemand(dist="negative_binomial", mean=mean, variance=variance)
    return PoissonDemand(dist="poisson", mean=mean)


def _changes(current: DailyLaw, proposed: DailyLaw, what: str) -> dict[str, float]:
    old_mean, old_variance = law_moments(current)
    new_mean, new_variance = law_moments(proposed)
    return {
        f"{what}_mean": _change(old_mean, new_mean),
        f"{what}_variance": _change(old_variance, new_variance),
    }


def _weekday_test(
    counts: NDArray[np.int64],
    stock_at_open: NDArray[np.int64],
    weekdays: NDArray[np.int64],
    weights: NDArray[np.float64] | None,
    confidence: float,
) -> WeekdayEffect | None:
    """The likelihood-ratio test of a weekday effect, None when some weekday cannot be
    estimated (too short a history, or a weekday with every stocked day sold out)."""
    try:
        return weekday_effect(
            counts, stock_at_open, weekdays, weights=weights, confidence=confidence
        )
    except CalibrationError:
        return None


def _proposed_law(pooled: CountEstimate, weekly: WeekdayEffect | None) -> DailyLaw:
    """One law from the pooled estimate, or one per weekday when the weekday effect is
    significant."""
    if weekly is None or not weekly.significant:
        return _law(pooled.mean, pooled.variance, pooled.family)
    days = {
        day: _law(estimate.mean, estimate.variance, estimate.family).model_dump(mode="json")
        for day, estimate in zip(WEEKDAYS, weekly.weekdays, strict=True)
    }
    return WeeklyDistribution.model_validate({"weekly": days})


def propose(
    session: Session,
    network: Network,
    options: CalibrationOptions,
    version: NetworkVersion | None = None,
) -> Proposal:
    """Estimates for every location of the current version (`version`, when the caller has
    read it already) from the stored history."""
    if version is None:
        version = latest_version(session, network.id)
    assert version is not None, "a network always has a version"
    spec = NetworkSpec.model_validate_json(version.spec_json)
    history = sales_history(session, network.id, window_days=options.window_days)
    document = spec.model_dump(mode="json", by_alias=True, exclude_defaults=True)
    proposals = []
    for index, location in enumerate(spec.locations):
        days = history.get(location.id)
        calibration: LocationCalibration | None = None
        error: str | None = None
        changes: dict[str, float] = {}
        if days is None:
            error = "no history"
        else:
            try:
                calibration = calibrate_location(
                    days.sold,
                    options.available(days.stock_at_open, days.received),
                    days.received,
                    age_days=days.age_days,
                    half_life_days=options.half_life_days,
                    confidence=options.confidence,
                )
            except CalibrationError as exc:
                error = str(exc)
        weekday_demand = weekday_replenishment = None
        if calibration is not None and days is not None:
            weekdays = np.array([day.weekday() for day in days.dates])
            weights = (
                None
                if options.half_life_days is None
                else recency_weights(days.age_days, options.half_life_days)
            )
            weekday_demand = _weekday_test(
                days.sold,
                options.available(days.stock_at_open, days.received),
                weekdays,
                weights,
                options.confidence,
            )
            # Receipts are never censored: an opening stock above them marks no day sold out.
            weekday_replenishment = _weekday_test(
                days.received, days.received + 1, weekdays, weights, options.confidence
            )
            demand = _proposed_law(calibration.demand, weekday_demand)
            replenishment = _proposed_law(calibration.replenishment, weekday_replenishment)
            changes = _changes(location.demand, demand, "demand") | _changes(
                location.replenishment, replenishment, "replenishment"
            )
            document["locations"][index]["demand"] = demand.model_dump(mode="json")
            document["locations"][index]["replenishment"] = replenishment.model_dump(mode="json")
        proposals.append(
            LocationProposal(
                location=location.id,
                first_date=None if days is None else days.first_date,
                last_date=None if days is None else days.last_date,
                calibration=calibration,
                error=error,
                current_demand=location.demand,
                current_replenishment=location.replenishment,
                changes=changes,
                weekday_demand=weekday_demand,
                weekday_replenishment=weekday_replenishment,
            )
        )
    return Proposal(
        based_on=version,
        options=options,
        locations=tuple(proposals),
        spec=NetworkSpec.model_validate(document),
    )


def save_options(session: Session, network: Network, options: CalibrationOptions) -> None:
    """Keep `options` as the network's settings. SettingsConflictError when they turn
    receipts_sell_same_day off while stored days sold more than their stock at open: those
    days are only valid with it on, as an upload's rows are checked (service.history), and
    calibration could not read them."""
    if not options.receipts_sell_same_day:
        _check_no_same_day_sales(session, network)
    save_calibration_settings(
        session,
        network.id,
        window_days=options.window_days,
        half_life_days=options.half_life_days,
        confidence=options.confidence,
        auto_apply_threshold=options.auto_apply_threshold,
        receipts_sell_same_day=options.receipts_sell_same_day,
        updated_at=utcnow(),
    )


def _check_no_same_day_sales(session: Session, network: Network) -> None:
    count, days = days_selling_receipts(session, network.id, limit=HistoryInputError.SHOWN)
    if not count:
        return
    named = ", ".join(f"{location} on {day}" for location, day in days)
    more = f" and {count - len(days)} more" if count > len(days) else ""
    raise SettingsConflictError(
        f"receipts_sell_same_day stays on: {count} stored day{'s' if count != 1 else ''} of "
        f"history sold more than the stock at open, which only a day that sells its receipts "
        f"can ({named}{more}); send those days again with units_sold at most stock_at_open "
        "(a repeat replaces a day), then turn the setting off",
        days=days,
    )


def apply_estimates(
    session: Session,
    network: Network,
    options: CalibrationOptions,
    *,
    limits: SizeLimits,
    check_current: Callable[[NetworkVersion], None] | None = None,
) -> Written:
    """The estimates from the stored history as the network's next version, solved for the
    criteria the current version is; `check_current` sees the current version first (e.g. an
    If-Match check).

    Raises NothingToApplyError when no location can be estimated or the estimates equal the
    current parameters, ModelTooLargeError when the proposed version is beyond the limits of
    the network's mode."""
    current = latest_version(session, network.id)
    assert current is not None, "a network always has a version"
    if check_current is not None:
        check_current(current)
    proposal = propose(session, network, options, current)
    if not proposal.calibrated:
        reasons = "; ".join(f"{p.location}: {p.error}" for p in proposal.locations)
        raise NothingToApplyError(
            f"no location of network {network.id} can be estimated ({reasons})"
        )
    if proposal.spec_hash == current.spec_hash:
        raise NothingToApplyError(
            f"the estimates equal version {current.number}'s parameters already"
        )
    return add_network_version(
        session, network, proposal.spec, limits=limits, current=current, calibrated_at=utcnow()
    )


@dataclass(frozen=True)
class AutoApplied:
    """What became of the automatic apply after an upload: `written` when a version was made,
    else why not."""

    reason: str
    written: Written | None = None


def auto_apply(
    session: Session, network: Network, options: CalibrationOptions, *, limits: SizeLimits
) -> AutoApplied | None:
    """Make the estimates the next version when they move a parameter by more than the
    network's threshold; None when the network has no threshold."""
    threshold = options.auto_apply_threshold
    if threshold is None:
        return None
    current = latest_version(session, network.id)
    assert current is not None, "a network always has a version"
    proposal = propose(session, network, options, current)
    moved = proposal.largest_change
    if not proposal.calibrated:
        return AutoApplied("no location has history to estimate from")
    if moved <= threshold:
        return AutoApplied(f"largest change {moved:.1%} is within the threshold {threshold:.1%}")
    try:
        written = add_network_version(
            session, network, proposal.spec, limits=limits, current=current, calibrated_at=utcnow()
        )
    except ModelTooLargeError as exc:
        # The upload is kept; only the automatic version is not made (a weekly proposal has
        # seven times the states of the network it comes from).
        return AutoApplied(f"the proposed version is too large: {exc}")
    return AutoApplied(f"largest change {moved:.1%} exceeds the threshold {threshold:.1%}", written)
