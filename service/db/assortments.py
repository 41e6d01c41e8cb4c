"""Assortments and their items: every query of the aggregate.

An item is a network (Network.assortment_id, Network.item_code), so its versions, solve jobs
and policies are those of any network; what is particular is writing thousands of them at once.
`store_items` does that in a handful of statements per upload: one read of the current items,
one multi-row insert each for new networks, new versions and new jobs, and one read each of the
policies and live jobs of the specifications concerned (in chunks of `_CHUNK` hashes).
"""

from __future__ import annotations

import json
from collections.abc import Iterable, Iterator, Sequence
from dataclasses import dataclass
from datetime import date, datetime, time
from typing import Any, TypeVar

import psycopg
from sqlalchemy import Table, delete, func, insert, select, text, update
from sqlalchemy.exc import IntegrityError
from sqlalchemy.orm import Session

from service.db.base import utcnow
from service.db.jobs import enqueue_solves
from service.db.networks import with_current_version
from service.db.tables import (
    Assortment,
    CalibrationSettings,
    ClosingCount,
    Network,
    NetworkVersion,
    Policy,
    SalesDay,
    SolveJob,
)
from service.vocabulary import JobKind, JobState

__all__ = [
    "CalibratedVersion",
    "CurrentItem",
    "HistoryCounts",
    "ItemDay",
    "ItemRow",
    "StoredItems",
    "add_calibrated_versions",
    "all_assortments",
    "assortment_by_name",
    "calibration_job",
    "closing_reports_by_location",
    "create_assortment",
    "current_items",
    "enqueue_calibration",
    "get_assortment",
    "history_counts",
    "in_chunks",
    "insert_rows",
    "item_networks",
    "jobs_by_id",
    "list_assortments",
    "refresh_statistics",
    "same_day_networks",
    "spec_texts",
    "store_item_history",
    "store_items",
]

# Specification hashes per IN (...) list.
_CHUNK = 500
T = TypeVar("T")
_LIVE = (JobState.QUEUED.value, JobState.RUNNING.value)


def create_assortment(
    session: Session,
    tenant_id: int,
    name: str,
    layout_json: str,
    criteria: Sequence[str],
    *,
    mode: str,
    closing_cutoff: time | None,
) -> Assortment:
    assortment = Assortment(
        tenant_id=tenant_id,
        name=name,
        layout_json=layout_json,
        layout_version=1,
        criteria=json.dumps(list(criteria)),
        mode=mode,
        closing_cutoff=closing_cutoff,
        archived=False,
    )
    session.add(assortment)
    session.flush()
    return assortment


def get_assortment(session: Session, tenant_id: int, assortment_id: int) -> Assortment | None:
    """The tenant's assortment, None when missing or another tenant's."""
    assortment = session.get(Assortment, assortment_id)
    if assortment is None or assortment.tenant_id != tenant_id:
        return None
    return assortment


def assortment_by_name(session: Session, tenant_id: int, name: str) -> Assortment | None:
    return session.scalars(
        select(Assortment).where(Assortment.tenant_id == tenant_id, Assortment.name == name)
    ).one_or_none()


def list_assortments(session: Session, tenant_id: int) -> Sequence[Assortment]:
    return session.scalars(
        select(Assortment)
        .where(Assortment.tenant_id == tenant_id, Assortment.archived.is_(False))
        .order_by(Assortment.id)
    ).all()


@dataclass(frozen=True)
class CurrentItem:
    """An item's network and its current version."""

    network_id: int
    item_code: str
    version: int
    version_id: int
    spec_hash: str
    method: str
    unit_volume: float | None


def current_items(session: Session, assortment_id: int) -> dict[str, CurrentItem]:
    """Every item of the assortment by code, with its current version (one statement)."""
    rows = session.execute(
        with_current_version(
            Network.id,
            Network.item_code,
            NetworkVersion.number,
            NetworkVersion.id,
            NetworkVersion.spec_hash,
            NetworkVersion.method,
            Network.unit_volume,
        ).where(Network.assortment_id == assortment_id)
    )
    return {row[1]: CurrentItem(*row) for row in rows}


def spec_texts(session: Session, version_ids: Sequence[int]) -> dict[int, str]:
    """The specification JSON of versions, by id (in chunks of `_CHUNK`)."""
    found: dict[int, str] = {}
    for chunk in in_chunks(version_ids):
        found.update(
            session.execute(
                select(NetworkVersion.id, NetworkVersion.spec_json).where(
                    NetworkVersion.id.in_(chunk)
                )
            ).all()
        )
    return found


@dataclass(frozen=True)
class ItemRow:
    """An item as it should be stored: its network's name and the composed specification."""

    item_code: str
    network_name: str
    spec_json: str
    spec_hash: str
    method: str
    unit_volume: float


@dataclass(frozen=True)
class StoredItems:
    created: int
    updated: int
    unchanged: int
    jobs: list[int]


# Rows written at once beyond which PostgreSQL's statistics of the tables are refreshed.
_ANALYZE_AFTER = 1_000


def refresh_statistics(session: Session, tables: Sequence[str], rows: int) -> None:
    """After a bulk write of `rows` rows on PostgreSQL, ANALYZE `tables` in this transaction:
    until autovacuum gets to them, the planner would take freshly filled tables for nearly
    empty and join thousands of items by nested loops (minutes instead of milliseconds)."""
    if rows >= _ANALYZE_AFTER and session.get_bind().dialect.name == "postgresql":
        session.execute(text(f"ANALYZE {', '.join(tables)}"))


def store_items(
    session: Session,
    tenant_id: int,
    assortment_id: int,
    mode: str,
    items: Sequence[ItemRow],
    criteria: Sequence[str],
) -> StoredItems:
    """Create the new items and add a version to those whose specification or method changed;
    queue one solve per specification, method and criterion that has neither a policy nor a
    live job in this tenant."""
    current = current_items(session, assortment_id)
    new = [item for item in items if item.item_code not in current]
    changed = [
        item
        for item in items
        if item.item_code in current
        and (
            current[item.item_code].spec_hash != item.spec_hash
            or current[item.item_code].method != item.method
        )
    ]
    # A new volume alone changes no model: the network takes it, without a version.
    volumes = [
        {"id": current[item.item_code].network_id, "unit_volume": item.unit_volume}
        for item in items
        if item.item_code in current and current[item.item_code].unit_volume != item.unit_volume
    ]
    if volumes:
        session.execute(update(Network), volumes)
    network_ids = {code: entry.network_id for code, entry in current.items()}
    if new:
        created = session.execute(
            insert(Network).returning(Network.id, sort_by_parameter_order=True),
            [
                {
                    "tenant_id": tenant_id,
                    "name": item.network_name,
                    "mode": mode,
                    "assortment_id": assortment_id,
                    "item_code": item.item_code,
                    "unit_volume": item.unit_volume,
                }
                for item in new
            ],
        ).scalars()
        network_ids.update(zip((item.item_code for item in new), created, strict=True))
    writes = [*new, *changed]
    version_ids: list[int] = []
    if writes:
        version_ids = list(
            session.execute(
                insert(NetworkVersion).returning(NetworkVersion.id, sort_by_parameter_order=True),
                [
                    {
                        "network_id": network_ids[item.item_code],
                        "number": (
                            current[item.item_code].version + 1 if item.item_code in current else 1
                        ),
                        "spec_json": item.spec_json,
                        "spec_hash": item.spec_hash,
                        "method": item.method,
                    }
                    for item in writes
                ],
            ).scalars()
        )
    made = zip(writes, version_ids, strict=True)
    jobs = _queue_solves(
        session, tenant_id, ((i.spec_hash, i.method, v) for i, v in made), criteria
    )
    refresh_statistics(session, ("networks", "network_versions", "solve_jobs"), len(writes))
    return StoredItems(
        created=len(new),
        updated=len(changed),
        unchanged=len(items) - len(new) - len(changed),
        jobs=jobs,
    )


def in_chunks(values: Sequence[T]) -> Iterator[Sequence[T]]:
    """`values` in slices of `_CHUNK`, one IN (...) list each."""
    for start in range(0, len(values), _CHUNK):
        yield values[start : start + _CHUNK]


def _queue_solves(
    session: Session,
    tenant_id: int,
    made: Iterable[tuple[str, str, int]],
    criteria: Sequence[str],
) -> list[int]:
    """Jobs for every (specification, method) of the versions `made` (hash, method, id), solved
    as its first version, and criterion without a policy or live job; their ids."""
    versions: dict[tuple[str, str], int] = {}
    for digest, method, version_id in made:
        versions.setdefault((digest, method), version_id)
    if not versions:
        return []
    hashes = sorted({digest for digest, _ in versions})
    have: set[tuple[str, str, str]] = set()
    for chunk in in_chunks(hashes):
        have.update(
            (digest, criterion, method)
            for digest, criterion, method in session.execute(
                select(Policy.spec_hash, Policy.criterion, Policy.method).where(
                    Policy.tenant_id == tenant_id, Policy.spec_hash.in_(chunk)
                )
            )
        )
        have.update(
            (digest, criterion, method)
            for digest, criterion, method in session.execute(
                select(SolveJob.spec_hash, SolveJob.criterion, SolveJob.method).where(
                    SolveJob.tenant_id == tenant_id,
                    SolveJob.kind == JobKind.SOLVE.value,
                    SolveJob.state.in_(_LIVE),
                    SolveJob.spec_hash.in_(chunk),
                )
            )
        )
    rows: list[dict[str, Any]] = [
        {
            "tenant_id": tenant_id,
            "version_id": version_id,
            "spec_hash": digest,
            "criterion": criterion,
            "method": method,
            "kind": JobKind.SOLVE.value,
            "state": JobState.QUEUED.value,
            "attempts": 0,
        }
        for (digest, method), version_id in versions.items()
        for criterion in dict.fromkeys(criteria)
        if (digest, criterion, method) not in have
    ]
    if not rows:
        return []
    try:
        with session.begin_nested():
            return list(
                session.execute(
                    insert(SolveJob).returning(SolveJob.id, sort_by_parameter_order=True), rows
                ).scalars()
            )
    except IntegrityError:
        # Another upload queued some of these specifications at the same moment: queue one at
        # a time, leaving those to the other's jobs (service.db.jobs.enqueue_solves).
        queued: list[int] = []
        for (_digest, _method), version_id in versions.items():
            version = session.get_one(NetworkVersion, version_id)
            queued += [job.id for job in enqueue_solves(session, tenant_id, version, criteria)]
        return queued


# -- sales history of the items ----------------------------------------------------------------

# Rows of history per INSERT executed (and per DELETE of replaced rows).
_HISTORY_ROWS = 5_000


@dataclass(frozen=True)
class ItemDay:
    """One item's business day at one location, under the item's network."""

    network_id: int
    location: str
    business_date: date
    units_sold: int
    stock_at_open: int
    units_received: int


def same_day_networks(session: Session, network_ids: Sequence[int]) -> set[int]:
    """Those of `network_ids` whose calibration settings say receipts sell the day they come."""
    found: set[int] = set()
    for chunk in in_chunks(network_ids):
        found.update(
            session.scalars(
                select(CalibrationSettings.network_id).where(
                    CalibrationSettings.network_id.in_(chunk),
                    CalibrationSettings.receipts_sell_same_day.is_(True),
                )
            )
        )
    return found


def store_item_history(session: Session, days: Sequence[ItemDay]) -> tuple[int, int]:
    """Store the days (unique by network, location and date), replacing those stored already:
    one read of the stored keys per chunk of networks, one DELETE per chunk of replaced rows,
    multi-row INSERTs of _HISTORY_ROWS rows. Returns (inserted, replaced)."""
    if not days:
        return 0, 0
    first = min(day.business_date for day in days)
    last = max(day.business_date for day in days)
    networks = sorted({day.network_id for day in days})
    stored: dict[tuple[int, str, date], int] = {}
    for chunk in in_chunks(networks):
        stored.update(
            ((network_id, location, day), row_id)
            for row_id, network_id, location, day in session.execute(
                select(
                    SalesDay.id, SalesDay.network_id, SalesDay.location_id, SalesDay.business_date
                ).where(SalesDay.network_id.in_(chunk), SalesDay.business_date.between(first, last))
            )
        )
    replaced = [
        row_id
        for day in days
        if (row_id := stored.get((day.network_id, day.location, day.business_date))) is not None
    ]
    for start in range(0, len(replaced), _HISTORY_ROWS):
        session.execute(
            delete(SalesDay).where(SalesDay.id.in_(replaced[start : start + _HISTORY_ROWS]))
        )
    now = utcnow()
    insert_rows(
        session,
        SalesDay.metadata.tables[SalesDay.__tablename__],
        (
            "network_id",
            "location_id",
            "business_date",
            "units_sold",
            "stock_at_open",
            "units_received",
            "reported_at",
        ),
        (
            (
                day.network_id,
                day.location,
                day.business_date,
                day.units_sold,
                day.stock_at_open,
                day.units_received,
                now,
            )
            for day in days
        ),
    )
    refresh_statistics(session, ("sales_history",), len(days))
    return len(days) - len(replaced), len(replaced)


def insert_rows(
    session: Session, table: Table, columns: Sequence[str], rows: Iterable[tuple[Any, ...]]
) -> None:
    """Insert `rows` (values of `columns`, in order) into `table` in the session's transaction.
    PostgreSQL takes them by COPY FROM STDIN (psycopg's copy, several times faster than any
    INSERT for bulk loads); elsewhere one compiled INSERT runs over chunks of _HISTORY_ROWS rows
    (the driver's executemany: compiling a multi-row VALUES statement costs more than the rows
    it carries)."""
    connection = session.connection()
    if connection.dialect.name == "postgresql":
        driver = connection.connection.driver_connection
        assert driver is not None
        load = f"COPY {table.name} ({', '.join(columns)}) FROM STDIN"
        try:
            with driver.cursor() as cursor, cursor.copy(load) as copy:
                for row in rows:
                    copy.write_row(row)
        except psycopg.IntegrityError as exc:
            # As SQLAlchemy reports a refused INSERT, so that callers catch one error.
            raise IntegrityError(load, None, exc) from exc
        return
    statement = insert(table)
    chunk: list[dict[str, Any]] = []
    for row in rows:
        chunk.append(dict(zip(columns, row, strict=True)))
        if len(chunk) == _HISTORY_ROWS:
            session.execute(statement, chunk)
            chunk = []
    if chunk:
        session.execute(statement, chunk)


@dataclass(frozen=True)
class HistoryCounts:
    """What the items of an assortment have of history: rows (item-location-days), distinct
    business dates, items with any row, first and last date (None without history)."""

    rows: int
    days: int
    items: int
    first_date: date | None
    last_date: date | None


def history_counts(
    session: Session, assortment_id: int
) -> tuple[HistoryCounts, dict[str, HistoryCounts]]:
    """The assortment's history in all and by location (two aggregate statements)."""
    columns = (
        func.count(),
        func.count(func.distinct(SalesDay.business_date)),
        func.count(func.distinct(SalesDay.network_id)),
        func.min(SalesDay.business_date),
        func.max(SalesDay.business_date),
    )
    mine = Network.assortment_id == assortment_id
    joined = Network.id == SalesDay.network_id
    rows, days, items, first, last = session.execute(
        select(*columns).select_from(SalesDay).join(Network, joined).where(mine)
    ).one()
    total = HistoryCounts(int(rows), int(days), int(items), first, last)
    by_location = {
        location: HistoryCounts(int(r), int(d), int(i), f, la)
        for location, r, d, i, f, la in session.execute(
            select(SalesDay.location_id, *columns)
            .join(Network, joined)
            .where(mine)
            .group_by(SalesDay.location_id)
            .order_by(SalesDay.location_id)
        )
    }
    return total, by_location


# -- calibration of every item -----------------------------------------------------------------


def enqueue_calibration(
    session: Session,
    tenant_id: int,
    criterion: str,
    chunks: Sequence[tuple[int, str, dict[str, Any]]],
) -> list[int]:
    """Queue one calibration job per chunk (version id, specification hash and parameters of
    one of its items: the job hangs on a version like every job). Each job's parameters gain
    `run`, the first job's id, which names the run; the first job's also `jobs`, every id.
    Returns the jobs' ids, the run's first."""
    ids = list(
        session.execute(
            insert(SolveJob).returning(SolveJob.id, sort_by_parameter_order=True),
            [
                {
                    "tenant_id": tenant_id,
                    "version_id": version_id,
                    "spec_hash": digest,
                    "criterion": criterion,
                    "kind": JobKind.CALIBRATE.value,
                    "state": JobState.QUEUED.value,
                    "attempts": 0,
                }
                for version_id, digest, _ in chunks
            ],
        ).scalars()
    )
    run = ids[0]
    session.execute(
        update(SolveJob),
        [
            {
                "id": job_id,
                "params": json.dumps(
                    params | {"run": run} | ({"jobs": ids} if job_id == run else {}),
                    separators=(",", ":"),
                ),
            }
            for job_id, (_, _, params) in zip(ids, chunks, strict=True)
        ],
    )
    return ids


def calibration_job(session: Session, tenant_id: int, job_id: int) -> SolveJob | None:
    """The tenant's calibration job `job_id`; None when missing, another's or another kind."""
    job = session.get(SolveJob, job_id)
    if job is None or job.tenant_id != tenant_id or job.kind != JobKind.CALIBRATE.value:
        return None
    return job


def jobs_by_id(session: Session, job_ids: Sequence[int]) -> Sequence[SolveJob]:
    return session.scalars(
        select(SolveJob).where(SolveJob.id.in_(job_ids)).order_by(SolveJob.id)
    ).all()


def item_networks(session: Session, assortment_id: int, codes: Sequence[str]) -> dict[str, Network]:
    """The networks of the assortment's items `codes`, by code (absent codes left out)."""
    return {
        network.item_code or "": network
        for network in session.scalars(
            select(Network).where(
                Network.assortment_id == assortment_id, Network.item_code.in_(codes)
            )
        )
    }


@dataclass(frozen=True)
class CalibratedVersion:
    """An item's next version from its estimates: made only while the item's current version
    is still `based_on` (its number)."""

    network_id: int
    based_on: int
    spec_json: str
    spec_hash: str
    method: str


def add_calibrated_versions(
    session: Session,
    tenant_id: int,
    versions: Sequence[CalibratedVersion],
    criteria: Sequence[str],
    calibrated_at: datetime,
) -> tuple[set[int], list[int]]:
    """Add each version whose item has not changed since it was estimated (one read, one
    multi-row insert) and queue the solves they need as store_items does. Returns the networks
    given a version and the jobs queued."""
    if not versions:
        return set(), []
    ids = [version.network_id for version in versions]
    current: dict[int, int] = {}
    for chunk in in_chunks(ids):
        current.update(
            (network_id, number)
            for network_id, number in session.execute(
                select(NetworkVersion.network_id, func.max(NetworkVersion.number))
                .where(NetworkVersion.network_id.in_(chunk))
                .group_by(NetworkVersion.network_id)
            )
        )
    fresh = [version for version in versions if current.get(version.network_id) == version.based_on]
    if not fresh:
        return set(), []
    version_ids = session.execute(
        insert(NetworkVersion).returning(NetworkVersion.id, sort_by_parameter_order=True),
        [
            {
                "network_id": version.network_id,
                "number": version.based_on + 1,
                "spec_json": version.spec_json,
                "spec_hash": version.spec_hash,
                "method": version.method,
                "calibrated_at": calibrated_at,
            }
            for version in fresh
        ],
    ).scalars()
    made = zip(fresh, version_ids, strict=True)
    jobs = _queue_solves(
        session, tenant_id, ((f.spec_hash, f.method, v) for f, v in made), criteria
    )
    return {version.network_id for version in fresh}, jobs


# -- the status page and the metrics -----------------------------------------------------------


def all_assortments(session: Session, tenant_id: int | None) -> Sequence[Assortment]:
    """The live assortments of `tenant_id` (None: of every tenant), by id."""
    query = select(Assortment).where(Assortment.archived.is_(False)).order_by(Assortment.id)
    if tenant_id is not None:
        query = query.where(Assortment.tenant_id == tenant_id)
    return session.scalars(query).all()


def closing_reports_by_location(
    session: Session, assortment_id: int, business_date: date
) -> dict[str, int]:
    """How many items each location has counted for `business_date` (closing_counts rows of
    the assortment's items)."""
    return {
        location: int(count)
        for location, count in session.execute(
            select(ClosingCount.location_id, func.count())
            .join(Network, Network.id == ClosingCount.network_id)
            .where(
                Network.assortment_id == assortment_id,
                ClosingCount.business_date == business_date,
            )
            .group_by(ClosingCount.location_id)
        )
    }
