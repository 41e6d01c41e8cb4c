"""Use cases of sales history: check daily rows against the network, store them (a day reported
again replaces the stored one), apply the estimates automatically when the network asks for it
(service.estimates.auto_apply), and summarise what is stored.

A refused upload changes nothing: every row is checked before any is stored, and
HistoryInputError names each problem with a pointer into the upload.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from datetime import date, timedelta

from sqlalchemy.exc import IntegrityError
from sqlalchemy.orm import Session

from service.db.base import utcnow
from service.db.history import SalesRow, sales_history_summary, store_sales_history
from service.db.networks import current_spec
from service.db.tables import Network
from service.errors import ConcurrentUploadError, HistoryInputError
from service.estimates import AutoApplied, auto_apply, options_for
from solver import NetworkSpec, SizeLimits

__all__ = [
    "LocationDays",
    "SalesRow",
    "Stored",
    "check_rows",
    "history_day_problems",
    "latest_history_date",
    "store_history",
    "summary",
]

# History is local business days; a day ahead of the server's UTC date allows for time zones.
_DATE_SLACK = timedelta(days=1)
OLDEST = date(1990, 1, 1)


def latest_history_date() -> date:
    """The latest business date a day of history may have: tomorrow in UTC (time zones)."""
    return utcnow().date() + _DATE_SLACK


def history_day_problems(
    business_date: date,
    units_sold: int,
    stock_at_open: int,
    units_received: int,
    *,
    latest: date,
    same_day: bool,
) -> list[tuple[str, str]]:
    """(column, message) for each rule one location's day of history breaks: a date outside
    OLDEST..`latest`, more sold than the day could sell (its stock at open, plus its receipts
    when `same_day`: the network's receipts sell on the day they arrive). Shared by the
    uploads of single networks and of assortments."""
    problems = []
    if not OLDEST <= business_date <= latest:
        problems.append(("date", f"{business_date} is outside {OLDEST}..{latest}"))
    if same_day and units_sold > stock_at_open + units_received:
        problems.append(
            (
                "units_sold",
                f"{units_sold} units sold but only {stock_at_open} on hand at "
                f"opening and {units_received} received",
            )
        )
    elif not same_day and units_sold > stock_at_open:
        problems.append(
            (
                "units_sold",
                f"{units_sold} units sold but only {stock_at_open} on hand at "
                "opening (receipts are on sale from the next day; if this network's stores "
                "sell morning deliveries the same day, PUT calibration/settings with "
                '"receipts_sell_same_day": true)',
            )
        )
    return problems


@dataclass(frozen=True)
class LocationDays:
    """Days of history stored for one location; a day sold out when it sold all it could."""

    location: str
    days: int
    sold_out_days: int
    first_date: date
    last_date: date


@dataclass(frozen=True)
class Stored:
    """An upload stored: rows received, inserted and replaced, what is stored now per location,
    and the automatic apply (None when the network has no threshold)."""

    received: int
    inserted: int
    replaced: int
    locations: list[LocationDays]
    auto_apply: AutoApplied | None


def check_rows(
    rows: Sequence[SalesRow], spec: NetworkSpec, csv_upload: bool, same_day: bool
) -> None:
    """HistoryInputError naming every problem the rows have against the network (pointers
    "/line/N/..." for a CSV upload, whose line 1 is the header, else "/rows/i/..."); `same_day`:
    the network's receipts sell on the day they arrive."""
    known = set(spec.location_ids)
    latest = latest_history_date()
    first_seen: dict[tuple[str, date], int] = {}
    errors: list[tuple[str, str]] = []
    for index, row in enumerate(rows):
        where = f"/line/{index + 2}" if csv_upload else f"/rows/{index}"
        if row.location not in known:
            errors.append((f"{where}/location", f"unknown location {row.location!r}"))
        errors += [
            (f"{where}/{column}", message)
            for column, message in history_day_problems(
                row.business_date,
                row.units_sold,
                row.stock_at_open,
                row.units_received,
                latest=latest,
                same_day=same_day,
            )
        ]
        key = (row.location, row.business_date)
        if key in first_seen:
            earlier = first_seen[key]
            earlier_where = f"line {earlier + 2}" if csv_upload else f"row {earlier}"
            errors.append(
                (
                    where,
                    f"{row.location} on {row.business_date} is given twice (also {earlier_where})",
                )
            )
        else:
            first_seen[key] = index
    if errors:
        raise HistoryInputError(errors)


def store_history(
    session: Session,
    network: Network,
    rows: Sequence[SalesRow],
    *,
    csv_upload: bool,
    limits: SizeLimits,
) -> Stored:
    """Check the rows against the network's current version, store them, then apply the
    estimates automatically when the network's threshold asks for it.

    Raises HistoryInputError (nothing stored), ConcurrentUploadError when another upload
    stored some of the same days at the same moment."""
    options = options_for(session, network.id)
    check_rows(rows, current_spec(session, network.id), csv_upload, options.receipts_sell_same_day)
    try:
        with session.begin_nested():
            inserted, replaced = store_sales_history(session, network.id, rows)
    except IntegrityError as exc:
        raise ConcurrentUploadError(
            "another upload stored some of these days at the same moment; send this one again "
            "(a repeat replaces them)"
        ) from exc
    applied = auto_apply(session, network, options, limits=limits)
    return Stored(len(rows), inserted, replaced, summary(session, network.id), applied)


def summary(session: Session, network_id: int) -> list[LocationDays]:
    """Days of history stored per location."""
    same_day = options_for(session, network_id).receipts_sell_same_day
    return [
        LocationDays(location, days, out, first, last)
        for location, days, out, first, last in sales_history_summary(
            session, network_id, receipts_sell_same_day=same_day
        )
    ]
