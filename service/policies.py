"""The read path: the newest ready policy of a network, cached in memory, and recommendations.

Policies are decoded once per process and kept in an LRU cache keyed by (version, criterion);
a stored policy is checksummed on every load from the database, and one that fails is deleted
and queued for a new solve, never served.
"""

from __future__ import annotations

import logging
import threading
from collections import OrderedDict
from collections.abc import Mapping
from dataclasses import dataclass
from datetime import datetime

from sqlalchemy.orm import Session

from service.codec import CorruptPolicyError, decode_policy
from service.db import repository
from service.db.tables import Network, NetworkVersion
from solver import InvalidStockError, PolicyResult, Recommendation

__all__ = [
    "BusinessDateRequiredError",
    "PolicyCache",
    "PolicyNotReadyError",
    "ServedPolicy",
    "StockProblemsError",
    "load_policy",
    "recommend",
    "stock_vector",
]

log = logging.getLogger(__name__)


class PolicyNotReadyError(Exception):
    """No version of the network has a ready policy for the criterion yet."""

    def __init__(self, message: str, *, job_state: str | None) -> None:
        super().__init__(message)
        self.job_state = job_state


@dataclass(frozen=True)
class ServedPolicy:
    result: PolicyResult
    version_id: int
    version_number: int
    solved_at: datetime
    stale: bool


@dataclass(frozen=True)
class _Entry:
    result: PolicyResult
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


def load_policy(
    session: Session, cache: PolicyCache, network: Network, criterion: str
) -> ServedPolicy:
    """The policy of the newest version of `network` that has one; `stale` when a newer version
    is still waiting for its solve. PolicyNotReadyError when no version has one."""
    versions = repository.versions_newest_first(session, network.id)
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
        )
    raise _not_ready(session, network, versions[0] if versions else None, criterion)


def _load(
    session: Session, network: Network, version: NetworkVersion, criterion: str
) -> _Entry | None:
    row = repository.policy_for(session, network.tenant_id, version.spec_hash, criterion)
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
    session: Session, network: Network, version: NetworkVersion | None, criterion: str
) -> PolicyNotReadyError:
    if version is None:
        return PolicyNotReadyError(f"network {network.id} has no versions", job_state=None)
    jobs = repository.jobs_for(session, network.tenant_id, version.spec_hash, criterion)
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


class BusinessDateRequiredError(Exception):
    """The policy depends on the weekday, and the request did not say which day it is."""


class StockProblemsError(InvalidStockError):
    """Closing stock that does not fit the network; `problems` pairs each offending location
    with what is wrong there."""

    def __init__(self, problems: list[tuple[str, str]]) -> None:
        super().__init__("; ".join(f"{location}: {what}" for location, what in problems))
        self.problems = problems


def stock_vector(result: PolicyResult, stock: Mapping[str, int]) -> list[int]:
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
    network: Network,
    stock: Mapping[str, int],
    criterion: str = "discounted",
    *,
    weekday: int | None = None,
) -> tuple[ServedPolicy, Recommendation]:
    """Tonight's moves for `network` from closing `stock` (units by location id), counted on a
    business date with this `weekday` (0 = Monday). A stationary policy ignores the weekday; a
    weekly one needs it (BusinessDateRequiredError without)."""
    served = load_policy(session, cache, network, criterion)
    result = served.result
    if weekday is None and result.phases > 1:
        raise BusinessDateRequiredError(
            f"version {served.version_number} of network {network.id} has weekday-dependent "
            "demand, replenishment or lane limits, so its recommendations depend on the business "
            "date of the closing stock, which this request cannot give yet; use the closing-stock "
            "and instructions endpoints, which carry the business date"
        )
    phase = 0 if weekday is None else result.phase_of(weekday)
    return served, result.recommend(stock_vector(result, stock), phase=phase)
