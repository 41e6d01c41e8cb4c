"""Closing reports and pick lists of assortments: every query of that part of the aggregate.

A location's closing report is one `closing_counts` row per item (the item's network), so a
single item reads exactly like a network of its own. The pick lists of a business date are one
`pick_lists` row per revision. Every read and write here is a handful of statements whatever
the number of items: multi-row inserts and deletes, IN lists in chunks
(service.db.assortments.in_chunks).
"""

from __future__ import annotations

import zlib
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass
from datetime import date, datetime

from sqlalchemy import Select, delete, func, insert, select
from sqlalchemy.orm import Session

from service.db.assortments import in_chunks, refresh_statistics
from service.db.tables import ClosingCorrection, ClosingCount, Network, PickList, Policy

__all__ = [
    "LocationReport",
    "PolicyHead",
    "add_pick_list",
    "correct_counts",
    "corrections_of",
    "counts_of",
    "latest_pick_list",
    "pick_list_body",
    "policy_heads",
    "policy_rows",
    "reports_of",
    "store_counts",
]


def _items(assortment_id: int) -> Select[int]:
    return select(Network.id).where(Network.assortment_id == assortment_id)


def counts_of(
    session: Session, assortment_id: int, business_date: date, location: str | None = None
) -> dict[str, dict[int, int]]:
    """Closing counts of the assortment's items on `business_date`: location -> network id ->
    units (only `location` when given)."""
    query = select(ClosingCount.location_id, ClosingCount.network_id, ClosingCount.units).where(
        ClosingCount.network_id.in_(_items(assortment_id)),
        ClosingCount.business_date == business_date,
    )
    if location is not None:
        query = query.where(ClosingCount.location_id == location)
    found: dict[str, dict[int, int]] = {}
    for loc, network_id, units in session.execute(query):
        found.setdefault(loc, {})[network_id] = units
    return found


@dataclass(frozen=True)
class LocationReport:
    location: str
    items: int
    reported_at: datetime


def reports_of(session: Session, assortment_id: int, business_date: date) -> list[LocationReport]:
    """Per location that reported on `business_date`: items counted and the latest report."""
    rows = session.execute(
        select(ClosingCount.location_id, func.count(), func.max(ClosingCount.reported_at))
        .where(
            ClosingCount.network_id.in_(_items(assortment_id)),
            ClosingCount.business_date == business_date,
        )
        .group_by(ClosingCount.location_id)
        .order_by(ClosingCount.location_id)
    )
    return [LocationReport(*row) for row in rows]


def store_counts(
    session: Session,
    assortment_id: int,
    location: str,
    business_date: date,
    counts: Mapping[int, int],
    reported_at: datetime,
) -> None:
    """Replace the location's counts of the date by `counts` (network id -> units)."""
    session.execute(
        delete(ClosingCount).where(
            ClosingCount.network_id.in_(_items(assortment_id)),
            ClosingCount.location_id == location,
            ClosingCount.business_date == business_date,
        )
    )
    if counts:
        session.execute(
            insert(ClosingCount),
            [
                {
                    "network_id": network_id,
                    "location_id": location,
                    "business_date": business_date,
                    "units": units,
                    "reported_at": reported_at,
                }
                for network_id, units in counts.items()
            ],
        )
        refresh_statistics(session, ("closing_counts",), len(counts))


def correct_counts(
    session: Session,
    location: str,
    business_date: date,
    changes: Mapping[int, tuple[int, int]],
    revision: int,
    key_prefix: str,
    corrected_at: datetime,
) -> None:
    """Keep a correction row per changed count (network id -> (old, new))."""
    if changes:
        session.execute(
            insert(ClosingCorrection),
            [
                {
                    "network_id": network_id,
                    "location_id": location,
                    "business_date": business_date,
                    "old_units": old,
                    "new_units": new,
                    "revision": revision,
                    "key_prefix": key_prefix,
                    "corrected_at": corrected_at,
                }
                for network_id, (old, new) in changes.items()
            ],
        )


def corrections_of(
    session: Session, assortment_id: int, business_date: date
) -> list[ClosingCorrection]:
    """Every correction of the assortment's counts on `business_date`, oldest first."""
    return list(
        session.scalars(
            select(ClosingCorrection)
            .where(
                ClosingCorrection.network_id.in_(_items(assortment_id)),
                ClosingCorrection.business_date == business_date,
            )
            .order_by(ClosingCorrection.id)
        )
    )


def latest_pick_list(session: Session, assortment_id: int, business_date: date) -> PickList | None:
    return session.scalars(
        select(PickList)
        .where(PickList.assortment_id == assortment_id, PickList.business_date == business_date)
        .order_by(PickList.revision.desc())
        .limit(1)
    ).one_or_none()


def add_pick_list(
    session: Session,
    assortment_id: int,
    business_date: date,
    revision: int,
    body_json: str,
    summary_json: str,
) -> PickList:
    pick_list = PickList(
        assortment_id=assortment_id,
        business_date=business_date,
        revision=revision,
        body=zlib.compress(body_json.encode("utf-8"), 6),
        summary=summary_json,
    )
    session.add(pick_list)
    session.flush()
    return pick_list


def pick_list_body(pick_list: PickList) -> str:
    return zlib.decompress(pick_list.body).decode("utf-8")


@dataclass(frozen=True)
class PolicyHead:
    id: int
    spec_hash: str
    method: str
    solved_at: datetime


def policy_heads(
    session: Session, tenant_id: int, keys: Iterable[tuple[str, str]], criterion: str
) -> dict[tuple[str, str], PolicyHead]:
    """The stored policies (ids, no arrays) of (specification hash, method) pairs for
    `criterion`."""
    wanted = set(keys)
    hashes = sorted({digest for digest, _ in wanted})
    found: dict[tuple[str, str], PolicyHead] = {}
    for chunk in in_chunks(hashes):
        for head in session.execute(
            select(Policy.id, Policy.spec_hash, Policy.method, Policy.solved_at).where(
                Policy.tenant_id == tenant_id,
                Policy.criterion == criterion,
                Policy.spec_hash.in_(chunk),
            )
        ):
            if (head.spec_hash, head.method) in wanted:
                found[(head.spec_hash, head.method)] = PolicyHead(*head)
    return found


def policy_rows(session: Session, ids: Sequence[int]) -> list[Policy]:
    """Stored policies with their arrays, by id."""
    rows: list[Policy] = []
    for chunk in in_chunks(ids):
        rows += session.scalars(select(Policy).where(Policy.id.in_(chunk)))
    return rows
