"""Closing counts, the night's instructions and their corrections, per network and business
date.

Every function takes the caller's Session and leaves committing to it.
"""

from __future__ import annotations

from collections.abc import Sequence
from datetime import date, datetime

from sqlalchemy import select
from sqlalchemy.exc import IntegrityError
from sqlalchemy.orm import Session

from service.db.tables import ClosingCorrection, ClosingCount, Instruction

__all__ = [
    "add_correction",
    "add_instruction",
    "closing_counts",
    "corrections_of",
    "instruction_for",
    "set_closing_count",
]


def closing_counts(session: Session, network_id: int, business_date: date) -> dict[str, int]:
    """Units reported per location for the business date."""
    rows = session.scalars(
        select(ClosingCount).where(
            ClosingCount.network_id == network_id, ClosingCount.business_date == business_date
        )
    )
    return {row.location_id: row.units for row in rows}


def set_closing_count(
    session: Session,
    network_id: int,
    location: str,
    business_date: date,
    units: int,
    reported_at: datetime,
) -> tuple[ClosingCount, int]:
    """Record (or replace) a location's count; the row and the units it held before (unset on
    a first count)."""
    row = session.scalars(
        select(ClosingCount).where(
            ClosingCount.network_id == network_id,
            ClosingCount.location_id == location,
            ClosingCount.business_date == business_date,
        )
    ).one_or_none()
    if row is None:
        row = ClosingCount(network_id=network_id, location_id=location, business_date=business_date)
        session.add(row)
    old_units = row.units
    row.units = units
    row.reported_at = reported_at
    session.flush()
    return row, old_units


def instruction_for(
    session: Session, network_id: int, business_date: date, *, for_update: bool = False
) -> Instruction | None:
    query = select(Instruction).where(
        Instruction.network_id == network_id, Instruction.business_date == business_date
    )
    if for_update:
        # Two corrections at once must not both make the same revision (PostgreSQL; SQLite
        # has one writer anyway).
        query = query.with_for_update()
    return session.scalars(query).one_or_none()


def add_instruction(session: Session, instruction: Instruction) -> Instruction:
    """Keep the night's first instructions; when another request issued them first, theirs
    (everyone reads the same)."""
    try:
        with session.begin_nested():
            session.add(instruction)
    except IntegrityError:
        existing = instruction_for(session, instruction.network_id, instruction.business_date)
        assert existing is not None
        return existing
    return instruction


def add_correction(session: Session, correction: ClosingCorrection) -> None:
    session.add(correction)
    session.flush()


def corrections_of(
    session: Session, network_id: int, business_date: date
) -> Sequence[ClosingCorrection]:
    """The corrections of a business date's counts, oldest first."""
    return session.scalars(
        select(ClosingCorrection)
        .where(
            ClosingCorrection.network_id == network_id,
            ClosingCorrection.business_date == business_date,
        )
        .order_by(ClosingCorrection.id)
    ).all()
