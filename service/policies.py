"""The read path: the newest ready policy of a network, cached in memory, and recommendations.

Policies are decoded once per process and kept in an LRU cache keyed by (version, criterion);
each version is served by the policy of its own method (exact or priced, service.modes), and a
version whose method changed serves the previous version's policy, marked stale, until its own
solve is done. A stored policy is checksummed on every load from the database, and one that
fails is deleted and queued for a new solve, never served.
"""

from __future__ import annotations

import json
import logging
import threading
from collections import OrderedDict
from collections.abc import Mapping
from dataclasses import dataclass
from datetime import date, datetime
from typing import Protocol
from zoneinfo import ZoneInfo

from sqlalchemy import select
from sqlalchemy.orm import Session

from service.codec import CorruptPolicyError, StoredPolicy, decode_policy
from service.db import repository
from service.db.repository import VersionHead
from service.db.tables import NetworkVersion
from solver import InvalidStockError, Recommendation
from solver.spec import DEFAULT_TIMEZONE

__all__ = [
    "NetworkKey",
    "NetworkRef",
    "PolicyCache",
    "PolicyNotReadyError",
    "ServedPolicy",
    "StockProblemsError",
    "UnknownNetworkError",
    "load_policy",
    "recommend",
    "stock_vector",
    "today_in",
]

log = logging.getLogger(__name__)


class UnknownNetworkError(LookupError):
    """The network is missing, archived, or another tenant's (which looks exactly the same)."""


class PolicyNotReadyError(Exception):
    """No version of the network has a ready policy for the criterion yet."""

    def __init__(self, message: str, *, job_state: str | None) -> None:
        super().__init__(message)
        self.job_state = job_state


@dataclass(frozen=True)
class ServedPolicy:
    result: StoredPolicy
    version_id: int
    version_number: int
    solved_at: datetime
    stale: bool
    # When the version's demand and replenishment were estimated from history (None: as sent).
    calibrated_at: datetime | None


@dataclass(frozen=True)
class _Entry:
    result: StoredPolicy
    solved_at: datetime


class PolicyCache:
    """Thread-safe LRU of decoded policies keyed by (version id, criterion)."""

    def __init__(self, size: int) -> None:
        self.size = size
        self._entries: OrderedDict[tuple[int, str], _Entry] = OrderedDict()
        self._lock = threading.Lock()
        self.hits = 0
        self.misses = 0

    def get(self, key: tuple[int, str]) -> _Entry | None:
        with self._lock:
            entry = self._entries.get(key)
            if entry is None:
                self.misses += 1
                return None
            self.hits += 1
            self._entries.move_to_end(key)
            return entry

    def put(self, key: tuple[int, str], entry: _Entry) -> None:
        if self.size <= 0:
            return
        with self._lock:
            self._entries[key] = entry
            self._entries.move_to_end(key)
            while len(self._entries) > self.size:
                self._entries.popitem(last=False)


class NetworkKey(Protocol):
    """What the read path needs to know of a network: a Network row, or just its ids."""

    @property
    def id(self) -> int: ...

    @property
    def tenant_id(self) -> int: ...


@dataclass(frozen=True)
class NetworkRef:
    id: int
    tenant_id: int


def load_policy(
    session: Session, cache: PolicyCache, network: NetworkKey, criterion: str
) -> ServedPolicy:
    """The policy of the newest version of `network` that has one; `stale` when a newer version
    is still waiting for its solve. NotFound when the network is missing, another tenant's or
    archived (UnknownNetworkError); PolicyNotReadyError when no version has a policy."""
    versions = repository.live_versions_newest_first(session, network.tenant_id, network.id)
    if not versions:
        raise UnknownNetworkError(f"no network {network.id}")
    for version in versions:
        entry = cache.get((version.id, criterion)) or _load(session, network, version, criterion)
        if entry is None:
            continue
        cache.put((version.id, criterion), entry)
        return ServedPolicy(
            result=entry.result,
            version_id=version.id,
            version_number=version.number,
            solved_at=entry.solved_at,
            stale=version is not versions[0],
            calibrated_at=version.calibrated_at,
        )
    raise _not_ready(session, network, versions[0], criterion)


def _load(
    session: Session, network: NetworkKey, version: VersionHead, criterion: str
) -> _Entry | None:
    row = repository.policy_for(
        session, network.tenant_id, version.spec_hash, criterion, version.method
    )
    if row is None:
        return None
    try:
        result = decode_policy(row.arrays, row.layout, row.checksum, row.meta)
    except CorruptPolicyError as exc:
        log.error("policy %d of network %d is corrupt (%s); solving again", row.id, network.id, exc)
        # Repair in a transaction of its own, so that it is kept whatever becomes of the
        # caller's (which usually ends in a rollback: this request cannot be served from it).
        with Session(session.get_bind()) as repair, repair.begin():
            repository.delete_policy(repair, row.id)
            repository.enqueue_solves(
                repair, network.tenant_id, repair.get_one(NetworkVersion, version.id), [criterion]
            )
        session.expire_all()
        return None
    return _Entry(result, row.solved_at)


def _not_ready(
    session: Session, network: NetworkKey, version: VersionHead, criterion: str
) -> PolicyNotReadyError:
    jobs = repository.jobs_for(
        session, network.tenant_id, version.spec_hash, criterion, version.method
    )
    if not jobs:
        return PolicyNotReadyError(
            f"no {criterion} solve was requested for version {version.number} of network "
            f"{network.id}",
            job_state=None,
        )
    job = jobs[0]
    detail = f": {job.error}" if job.error and job.state == "failed" else ""
    return PolicyNotReadyError(
        f"the {criterion} policy of version {version.number} of network {network.id} is not "
        f"ready (job {job.id} {job.state}{detail})",
        job_state=job.state,
    )


class StockProblemsError(InvalidStockError):
    """Closing stock that does not fit the network; `problems` pairs each offending location
    with what is wrong there."""

    def __init__(self, problems: list[tuple[str, str]]) -> None:
        super().__init__("; ".join(f"{location}: {what}" for location, what in problems))
        self.problems = problems


def stock_vector(result: StoredPolicy, stock: Mapping[str, int]) -> list[int]:
    """Closing stock by location id, in network order; StockProblemsError naming every missing,
    unknown or out-of-range location."""
    ids = result.location_ids
    problems = [(location, "missing") for location in ids if location not in stock]
    problems += [
        (location, "unknown location") for location in stock if location not in result.location_ids
    ]
    for location, capacity in zip(ids, result.capacities, strict=True):
        units = stock.get(location)
        if units is not None and not 0 <= units <= capacity:
            problems.append((location, f"{units} units is outside 0..{capacity}"))
    if problems:
        raise StockProblemsError(problems)
    return [stock[location] for location in ids]


def recommend(
    session: Session,
    cache: PolicyCache,
    network: NetworkKey,
    stock: Mapping[str, int],
    criterion: str = "discounted",
    *,
    business_date: date | None = None,
) -> tuple[ServedPolicy, Recommendation, date | None]:
    """Tonight's moves for `network` from closing `stock` (units by location id) counted on
    `business_date`, and the business date whose night the answer is for. A stationary policy
    is the same every night (the date is returned as given); a weekly one uses the night after
    the business date, by default today's in the network's time zone."""
    served = load_policy(session, cache, network, criterion)
    result = served.result
    if result.phases > 1 and business_date is None:
        business_date = today_in(_timezone_of(session, served.version_id))
    phase = 0 if business_date is None else result.phase_of(business_date.weekday())
    recommendation = result.recommend(stock_vector(result, stock), phase=phase)
    return served, recommendation, business_date


def today_in(zone: str) -> date:
    """Today's date where the locations are (an IANA time zone)."""
    return datetime.now(ZoneInfo(zone)).date()


def _timezone_of(session: Session, version_id: int) -> str:
    # Only weekly networks need it, and only when the caller gave no business date.
    spec_json = session.scalar(
        select(NetworkVersion.spec_json).where(NetworkVersion.id == version_id)
    )
    zone: str = json.loads(spec_json or "{}").get("timezone", DEFAULT_TIMEZONE)
    return zone
