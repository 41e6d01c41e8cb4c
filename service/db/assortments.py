"""Assortments and their items: every query of the aggregate.

An item is a network (Network.assortment_id, Network.item_code), so its versions, solve jobs
and policies are those of any network; what is particular is writing thousands of them at once.
`store_items` does that in a handful of statements per upload: one read of the current items,
one multi-row insert each for new networks, new versions and new jobs, and one read each of the
policies and live jobs of the specifications concerned (in chunks of `_CHUNK` hashes).
"""

from __future__ import annotations

import json
from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from datetime import time
from typing import Any

from sqlalchemy import insert, select, update
from sqlalchemy.exc import IntegrityError
from sqlalchemy.orm import Session

from service.db.jobs import enqueue_solves
from service.db.networks import with_current_version
from service.db.tables import Assortment, Network, NetworkVersion, Policy, SolveJob
from service.vocabulary import JobKind, JobState

__all__ = [
    "CurrentItem",
    "ItemRow",
    "StoredItems",
    "assortment_by_name",
    "create_assortment",
    "current_items",
    "get_assortment",
    "list_assortments",
    "spec_texts",
    "store_items",
]

# Specification hashes per IN (...) list.
_CHUNK = 500
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
    for start in range(0, len(version_ids), _CHUNK):
        chunk = version_ids[start : start + _CHUNK]
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
    first_version: dict[tuple[str, str], int] = {}
    for item, version_id in zip(writes, version_ids, strict=True):
        first_version.setdefault((item.spec_hash, item.method), version_id)
    jobs = _queue_solves(session, tenant_id, first_version, criteria)
    return StoredItems(
        created=len(new),
        updated=len(changed),
        unchanged=len(items) - len(new) - len(changed),
        jobs=jobs,
    )


def _chunks(values: Sequence[str]) -> Iterable[Sequence[str]]:
    for start in range(0, len(values), _CHUNK):
        yield values[start : start + _CHUNK]


def _queue_solves(
    session: Session,
    tenant_id: int,
    versions: dict[tuple[str, str], int],
    criteria: Sequence[str],
) -> list[int]:
    """Jobs for every (specification, method) of `versions` (its first version's id) and
    criterion without a policy or live job; their ids."""
    if not versions:
        return []
    hashes = sorted({digest for digest, _ in versions})
    have: set[tuple[str, str, str]] = set()
    for chunk in _chunks(hashes):
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
