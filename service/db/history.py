"""Sales history and calibration settings: daily rows per location, stored (replacing a day
reported again), read back as arrays per location, and summarised; how a network's estimates
are made.

Every function takes the caller's Session and leaves committing to it.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from datetime import date, datetime, timedelta

import numpy as np
from numpy.typing import NDArray
from sqlalchemy import (
    and_,
    case,
    func,
    insert,
    select,
    update,
)
from sqlalchemy.orm import Session

from service.db.base import utcnow
from service.db.tables import (
    CalibrationSettings,
    SalesDay,
)

__all__ = [
    "LocationHistory",
    "SalesRow",
    "calibration_settings",
    "days_selling_receipts",
    "sales_history",
    "sales_history_summary",
    "save_calibration_settings",
    "store_sales_history",
]


@dataclass(frozen=True)
class SalesRow:
    location: str
    business_date: date
    units_sold: int
    stock_at_open: int
    units_received: int


@dataclass(frozen=True)
class LocationHistory:
    """One location's days in date order: arrays of shape (n_days,); age_days counts back from
    the network's most recent reported day (0 for that day)."""

    dates: tuple[date, ...]
    sold: NDArray[np.int64]
    stock_at_open: NDArray[np.int64]
    received: NDArray[np.int64]
    age_days: NDArray[np.float64]

    @property
    def first_date(self) -> date:
        return self.dates[0]

    @property
    def last_date(self) -> date:
        return self.dates[-1]


def store_sales_history(
    session: Session, network_id: int, rows: Sequence[SalesRow]
) -> tuple[int, int]:
    """Insert the rows, replacing any stored for the same location and day; (inserted,
    replaced). Rows must be unique by (location, business date)."""
    if not rows:
        return 0, 0
    dates = [row.business_date for row in rows]
    stored = {
        (location, day): row_id
        for row_id, location, day in session.execute(
            select(SalesDay.id, SalesDay.location_id, SalesDay.business_date).where(
                SalesDay.network_id == network_id,
                SalesDay.business_date.between(min(dates), max(dates)),
                SalesDay.location_id.in_({row.location for row in rows}),
            )
        )
    }
    now = utcnow()
    fresh, replaced = [], []
    for row in rows:
        values = {
            "units_sold": row.units_sold,
            "stock_at_open": row.stock_at_open,
            "units_received": row.units_received,
            "reported_at": now,
        }
        row_id = stored.get((row.location, row.business_date))
        if row_id is None:
            fresh.append(
                values
                | {
                    "network_id": network_id,
                    "location_id": row.location,
                    "business_date": row.business_date,
                }
            )
        else:
            replaced.append(values | {"id": row_id})
    if fresh:
        session.execute(insert(SalesDay), fresh)
    if replaced:
        session.execute(update(SalesDay), replaced)
    return len(fresh), len(replaced)


def sales_history(
    session: Session, network_id: int, *, window_days: int | None = None
) -> dict[str, LocationHistory]:
    """The network's history by location; with `window_days`, only the days within that many
    days of the most recent one."""
    latest = session.scalar(
        select(func.max(SalesDay.business_date)).where(SalesDay.network_id == network_id)
    )
    if latest is None:
        return {}
    query = select(
        SalesDay.location_id,
        SalesDay.business_date,
        SalesDay.units_sold,
        SalesDay.stock_at_open,
        SalesDay.units_received,
    ).where(SalesDay.network_id == network_id)
    if window_days is not None:
        query = query.where(SalesDay.business_date > latest - timedelta(days=window_days))
    by_location: dict[str, list[tuple[date, int, int, int]]] = {}
    for location, day, sold, at_open, received in session.execute(
        query.order_by(SalesDay.location_id, SalesDay.business_date)
    ):
        by_location.setdefault(location, []).append((day, sold, at_open, received))
    history = {}
    for location, days in by_location.items():
        columns = list(zip(*days, strict=True))
        history[location] = LocationHistory(
            dates=tuple(columns[0]),
            sold=np.array(columns[1], dtype=np.int64),
            stock_at_open=np.array(columns[2], dtype=np.int64),
            received=np.array(columns[3], dtype=np.int64),
            age_days=np.array([(latest - day).days for day in columns[0]], dtype=np.float64),
        )
    return history


def sales_history_summary(
    session: Session, network_id: int, *, receipts_sell_same_day: bool = False
) -> list[tuple[str, int, int, date, date]]:
    """(location, days, sold-out days, first day, last day) per location with history. A day
    sold out when it sold all it could: its stock at open, plus its receipts when they sell the
    same day."""
    available = (
        SalesDay.stock_at_open + SalesDay.units_received
        if receipts_sell_same_day
        else SalesDay.stock_at_open
    )
    sold_out = func.sum(case((and_(SalesDay.units_sold == available, available > 0), 1), else_=0))
    rows = session.execute(
        select(
            SalesDay.location_id,
            func.count(),
            sold_out,
            func.min(SalesDay.business_date),
            func.max(SalesDay.business_date),
        )
        .where(SalesDay.network_id == network_id)
        .group_by(SalesDay.location_id)
        .order_by(SalesDay.location_id)
    ).all()
    return [
        (location, int(days), int(out or 0), first, last)
        for location, days, out, first, last in rows
    ]


def days_selling_receipts(
    session: Session, network_id: int, *, limit: int
) -> tuple[int, list[tuple[str, date]]]:
    """Stored days that sold more than their stock at open, which only a day selling its
    morning receipts can: how many, and the first `limit` as (location, date), oldest first."""
    over = and_(SalesDay.network_id == network_id, SalesDay.units_sold > SalesDay.stock_at_open)
    count = session.scalar(select(func.count()).select_from(SalesDay).where(over)) or 0
    first = session.execute(
        select(SalesDay.location_id, SalesDay.business_date)
        .where(over)
        .order_by(SalesDay.business_date, SalesDay.location_id)
        .limit(limit)
    ).all()
    return int(count), [(location, day) for location, day in first]


def calibration_settings(session: Session, network_id: int) -> CalibrationSettings | None:
    """The network's stored calibration settings; None when it has none (the defaults)."""
    return session.get(CalibrationSettings, network_id)


def save_calibration_settings(
    session: Session,
    network_id: int,
    *,
    window_days: int | None,
    half_life_days: float | None,
    confidence: float,
    auto_apply_threshold: float | None,
    receipts_sell_same_day: bool,
    updated_at: datetime,
) -> CalibrationSettings:
    """Store (or replace) the network's calibration settings."""
    row = session.get(CalibrationSettings, network_id)
    if row is None:
        row = CalibrationSettings(network_id=network_id)
        session.add(row)
    row.window_days = window_days
    row.half_life_days = half_life_days
    row.confidence = confidence
    row.auto_apply_threshold = auto_apply_threshold
    row.receipts_sell_same_day = receipts_sell_same_day
    row.updated_at = updated_at
    return row
