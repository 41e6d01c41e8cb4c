"""Networks and their versions: names, the versions of a network (the read path's plain query
among them), the current version and its specification, new networks and versions (queueing
their solves through service.db.jobs).

Every function takes the caller's Session and leaves committing to it.
"""

from __future__ import annotations

import hashlib
import json
from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from datetime import datetime, time
from typing import Any

from sqlalchemy import (
    Select,
    and_,
    bindparam,
    func,
    select,
)
from sqlalchemy.orm import Session

from service.db.jobs import enqueue_solves
from service.db.tables import (
    Network,
    NetworkVersion,
    SolveJob,
    Tenant,
)
from solver import NetworkSpec

__all__ = [
    "VersionHead",
    "add_version",
    "canonical_spec",
    "create_network",
    "current_spec",
    "current_spec_json_and_cutoff",
    "latest_version",
    "list_networks",
    "live_versions_newest_first",
    "network_by_name",
    "versions_newest_first",
    "with_current_version",
]


def canonical_spec(spec: NetworkSpec) -> tuple[str, str]:
    """The specification as canonical JSON (sorted keys, no spaces) and its SHA-256."""
    text = json.dumps(
        spec.model_dump(mode="json", by_alias=True), sort_keys=True, separators=(",", ":")
    )
    return text, hashlib.sha256(text.encode("utf-8")).hexdigest()


def network_by_name(session: Session, tenant_id: int, name: str) -> Network | None:
    return session.scalars(
        select(Network).where(Network.tenant_id == tenant_id, Network.name == name)
    ).one_or_none()


def list_networks(session: Session, tenant_id: int | None = None) -> Sequence[Network]:
    query = select(Network).order_by(Network.id)
    if tenant_id is not None:
        query = query.where(Network.tenant_id == tenant_id)
    return session.scalars(query).all()


def versions_newest_first(session: Session, network_id: int) -> Sequence[NetworkVersion]:
    return session.scalars(
        select(NetworkVersion)
        .where(NetworkVersion.network_id == network_id)
        .order_by(NetworkVersion.number.desc())
    ).all()


@dataclass(frozen=True)
class VersionHead:
    """What the read path needs of a version (no specification)."""

    id: int
    number: int
    spec_hash: str
    calibrated_at: datetime | None
    method: str


# Built once: the read path runs it on every recommendation, and SQLAlchemy then reuses the
# statement's compiled form without building and hashing a new one each time.
_LIVE_VERSIONS = (
    select(
        NetworkVersion.id,
        NetworkVersion.number,
        NetworkVersion.spec_hash,
        NetworkVersion.calibrated_at,
        NetworkVersion.method,
    )
    .join(Network, Network.id == NetworkVersion.network_id)
    .where(
        Network.id == bindparam("network_id"),
        Network.tenant_id == bindparam("tenant_id"),
        Network.archived.is_(False),
    )
    .order_by(NetworkVersion.number.desc())
)


def live_versions_newest_first(
    session: Session, tenant_id: int, network_id: int
) -> list[VersionHead]:
    """The versions of the tenant's network, newest first, in one plain query (no ORM objects:
    this is the read path's only query when its policies are cached); empty when the network
    is missing, another tenant's or archived."""
    rows = session.execute(_LIVE_VERSIONS, {"network_id": network_id, "tenant_id": tenant_id})
    return [VersionHead(*row) for row in rows]


def with_current_version(*columns: Any) -> Select[Any]:
    """`select(*columns)` over every network joined to its current (highest-numbered) version,
    to which callers add their own joins and conditions."""
    current = (
        select(
            NetworkVersion.network_id.label("network_id"),
            func.max(NetworkVersion.number).label("number"),
        )
        .group_by(NetworkVersion.network_id)
        .subquery()
    )
    return (
        select(*columns)
        .select_from(Network)
        .join(current, current.c.network_id == Network.id)
        .join(
            NetworkVersion,
            and_(
                NetworkVersion.network_id == Network.id,
                NetworkVersion.number == current.c.number,
            ),
        )
    )


def latest_version(session: Session, network_id: int) -> NetworkVersion | None:
    return session.scalars(
        select(NetworkVersion)
        .where(NetworkVersion.network_id == network_id)
        .order_by(NetworkVersion.number.desc())
        .limit(1)
    ).one_or_none()


def current_spec(session: Session, network_id: int) -> NetworkSpec:
    """The specification of the network's current version."""
    version = latest_version(session, network_id)
    assert version is not None, "a network always has a version"
    return NetworkSpec.model_validate_json(version.spec_json)


def create_network(
    session: Session,
    tenant: Tenant,
    spec: NetworkSpec,
    criteria: Iterable[str],
    *,
    mode: str = "auto",
    method: str = "exact",
) -> tuple[Network, NetworkVersion, list[SolveJob]]:
    """A new network asking for solving `mode`, with version 1 of `spec` solved by `method`
    (the mode resolved for it), and the solve jobs it needs."""
    network = Network(tenant_id=tenant.id, name=spec.name, mode=mode)
    session.add(network)
    session.flush()
    version, jobs = add_version(session, network, spec, criteria, method=method)
    return network, version, jobs


def add_version(
    session: Session,
    network: Network,
    spec: NetworkSpec,
    criteria: Iterable[str],
    *,
    method: str = "exact",
    previous: NetworkVersion | None = None,
) -> tuple[NetworkVersion, list[SolveJob]]:
    """The next version of `network`, solved by `method`, and a job per criterion that has
    neither a policy nor a live job for the same specification and method in this tenant.
    `previous`: the current version when the caller has read it already."""
    text, digest = canonical_spec(spec)
    if previous is None:
        previous = latest_version(session, network.id)
    version = NetworkVersion(
        network_id=network.id,
        number=1 if previous is None else previous.number + 1,
        spec_json=text,
        spec_hash=digest,
        method=method,
    )
    session.add(version)
    session.flush()
    return version, enqueue_solves(session, network.tenant_id, version, criteria)


def current_spec_json_and_cutoff(session: Session, network_id: int) -> tuple[str, time | None]:
    """The specification (JSON text) of the network's current version and the network's closing
    cut-off, in one query."""
    row = session.execute(
        select(NetworkVersion.spec_json, Network.closing_cutoff)
        .join(Network, Network.id == NetworkVersion.network_id)
        .where(NetworkVersion.network_id == network_id)
        .order_by(NetworkVersion.number.desc())
        .limit(1)
    ).one()
    return row[0], row[1]
