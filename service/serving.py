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
from datetime import UTC, date, datetime, time, timedelta
from typing import Generic, Protocol, TypeVar
from zoneinfo import ZoneInfo

from sqlalchemy.orm import Session

from service.codec import StoredPolicy, decode_policy
from service.db.jobs import LIVE_STATES, criteria_requested, enqueue_solves, jobs_for
from service.db.networks import (
    VersionHead,
    current_spec_json_and_cutoff,
    live_versions_newest_first,
)
from service.db.policies import delete_policy, policy_for
from service.db.tables import Network, NetworkVersion
from service.errors import (
    CorruptPolicyError,
    PolicyNotReadyError,
    PolicyNotSolvedError,
    StockProblemsError,
    UnknownNetworkError,
)
from solver import CRITERIA, Recommendation
from solver.result import stock_problems
from solver.spec import DEFAULT_TIMEZONE

__all__ = [
    "CachedPolicy",
    "Lru",
    "NetworkKey",
    "NetworkRef",
    "PolicyCache",
    "ServedPolicy",
    "business_date_now",
    "business_date_of",
    "load_policy",
    "recommend",
    "stock_vector",
    "today_in",
    "utc_now",
]

log = logging.getLogger(__name__)


@dataclass(frozen=True)
class ServedPolicy:
    result: StoredPolicy
    criterion: str
    version_id: int
    version_number: int
    spec_hash: str
    solved_at: datetime
    stale: bool
    # When the version's demand and replenishment were estimated from history (None: as sent).
    calibrated_at: datetime | None


@dataclass(frozen=True)
class _Entry:
    result: StoredPolicy
    solved_at: datetime


# A cache entry: a decoded policy and when it was solved.
CachedPolicy = _Entry


K = TypeVar("K")
V = TypeVar("V")


class Lru(Generic[K, V]):
    """Thread-safe least-recently-used map holding at most `size` entries (none when 0)."""

    def __init__(self, size: int) -> None:
        self.size = size
        self._entries: OrderedDict[K, V] = OrderedDict()
        self._lock = threading.Lock()
        self.hits = 0
        self.misses = 0

    def get(self, key: K) -> V | None:
        with self._lock:
            entry = self._entries.get(key)
            if entry is None:
                self.misses += 1
                return None
            self.hits += 1
            self._entries.move_to_end(key)
            return entry

    def __contains__(self, key: K) -> bool:
        """Whether `key` is cached, without counting a lookup or refreshing its place."""
        with self._lock:
            return key in self._entries

    def put(self, key: K, entry: V) -> None:
        if self.size <= 0:
            return
        with self._lock:
            self._entries[key] = entry
            self._entries.move_to_end(key)
            while len(self._entries) > self.size:
                self._entries.popitem(last=False)


# Decoded policies keyed by (version id, criterion).
PolicyCache = Lru[tuple[int, str], _Entry]


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
    session: Session, cache: PolicyCache, network: NetworkKey, criterion: str | None
) -> ServedPolicy:
    """The policy of the newest version of `network` that has one for `criterion` (None: the
    first of solver.CRITERIA the current version is solved for). An older version answers, with
    `stale` set, only while the current one's solve is queued or running: `stale` never lasts
    when nothing is being solved. UnknownNetworkError when the network is missing, another
    tenant's or archived; PolicyNotReadyError while the current version's solve is under way
    and no older version has a policy; PolicyNotSolvedError when no job will produce it."""
    versions = live_versions_newest_first(session, network.tenant_id, network.id)
    if not versions:
        raise UnknownNetworkError(_unknown(session, network))
    newest = versions[0]
    if criterion is None:
        criterion = _default_criterion(session, cache, network, newest)
    for version in versions:
        entry = cache.get((version.id, criterion)) or _load(session, network, version, criterion)
        if entry is None:
            if version is newest:
                _check_being_solved(session, network, newest, criterion)
            continue
        cache.put((version.id, criterion), entry)
        return ServedPolicy(
            result=entry.result,
            criterion=criterion,
            version_id=version.id,
            version_number=version.number,
            spec_hash=version.spec_hash,
            solved_at=entry.solved_at,
            stale=version is not newest,
            calibrated_at=version.calibrated_at,
        )
    raise _not_ready(session, network, newest, criterion)


def _unknown(session: Session, network: NetworkKey) -> str:
    """Why a network serves nothing: missing (or another tenant's), or archived."""
    row = session.get(Network, network.id)
    if row is not None and row.tenant_id == network.tenant_id and row.archived:
        return (
            f"network {network.id} is archived: it serves no recommendations or instructions "
            f"(GET /v1/networks/{network.id} still shows it)"
        )
    return f"no network {network.id}"


def _default_criterion(
    session: Session, cache: PolicyCache, network: NetworkKey, newest: VersionHead
) -> str:
    # The common case costs nothing: the current version's first criterion is cached.
    if (newest.id, CRITERIA[0]) in cache:
        return CRITERIA[0]
    requested = criteria_requested(session, network.tenant_id, newest.spec_hash)
    for criterion in CRITERIA:
        if criterion in requested:
            return criterion
    return CRITERIA[0]


def _check_being_solved(
    session: Session, network: NetworkKey, newest: VersionHead, criterion: str
) -> None:
    """PolicyNotSolvedError unless the current version's solve for `criterion` is queued or
    running (its policy is not stored yet)."""
    jobs = jobs_for(session, network.tenant_id, newest.spec_hash, criterion, newest.method)
    if jobs and jobs[0].state in LIVE_STATES:
        return
    requested = criteria_requested(session, network.tenant_id, newest.spec_hash)
    solved_for: list[str] = [c for c in CRITERIA if c in requested and c != criterion]
    others = (
        f"it is solved (or being solved) for {', '.join(solved_for)}; ask for that criterion"
        if solved_for
        else "it is solved for no criterion"
    )
    if jobs:
        job = jobs[0]
        raise PolicyNotSolvedError(
            f"the {criterion} solve of version {newest.number} of network {network.id} failed "
            f"(job {job.id}: {job.error}); retry the job or send a corrected version; {others}",
            criteria=solved_for,
            job_state=job.state,
        )
    raise PolicyNotSolvedError(
        f"version {newest.number} of network {network.id} is not solved for {criterion}: "
        f"{others}, or add {criterion} to its criteria (PUT /v1/networks/{network.id} with "
        '"criteria")',
        criteria=solved_for,
        job_state=None,
    )


def _load(
    session: Session, network: NetworkKey, version: VersionHead, criterion: str
) -> _Entry | None:
    row = policy_for(session, network.tenant_id, version.spec_hash, criterion, version.method)
    if row is None:
        return None
    try:
        result = decode_policy(row.arrays, row.layout, row.checksum, row.meta)
    except CorruptPolicyError as exc:
        log.error("policy %d of network %d is corrupt (%s); solving again", row.id, network.id, exc)
        # Repair in a transaction of its own, so that it is kept whatever becomes of the
        # caller's (which usually ends in a rollback: this request cannot be served from it).
        with Session(session.get_bind()) as repair, repair.begin():
            delete_policy(repair, row.id)
            enqueue_solves(
                repair, network.tenant_id, repair.get_one(NetworkVersion, version.id), [criterion]
            )
        session.expire_all()
        return None
    return _Entry(result, row.solved_at)


def _not_ready(
    session: Session, network: NetworkKey, version: VersionHead, criterion: str
) -> PolicyNotReadyError:
    """The current version's solve is live (checked by _check_being_solved) and no version has
    a policy yet: worth waiting for."""
    job = jobs_for(session, network.tenant_id, version.spec_hash, criterion, version.method)[0]
    return PolicyNotReadyError(
        f"the {criterion} policy of version {version.number} of network {network.id} is not "
        f"ready (job {job.id} {job.state})",
        job_state=job.state,
    )


def stock_vector(result: StoredPolicy, stock: Mapping[str, int]) -> list[int]:
    """Closing stock by location id, in network order; StockProblemsError naming every missing,
    unknown or out-of-range location."""
    ids = result.location_ids
    problems = stock_problems(ids, result.capacities, stock)
    if problems:
        raise StockProblemsError(problems)
    return [stock[location] for location in ids]


def recommend(
    session: Session,
    cache: PolicyCache,
    network: NetworkKey,
    stock: Mapping[str, int],
    criterion: str | None = None,
    *,
    business_date: date | None = None,
) -> tuple[ServedPolicy, Recommendation, date | None]:
    """Tonight's moves for `network` from closing `stock` (units by location id) counted on
    `business_date`, and the business date whose night the answer is for. A stationary policy
    is the same every night (the date is returned as given); a weekly one uses the night after
    the business date, by default the current business date where the stores are (see
    business_date_now)."""
    served = load_policy(session, cache, network, criterion)
    result = served.result
    if result.phases > 1 and business_date is None:
        business_date = business_date_of(session, network.id)
    phase = 0 if business_date is None else result.phase_of(business_date.weekday())
    recommendation = result.recommend(stock_vector(result, stock), phase=phase)
    return served, recommendation, business_date


def utc_now() -> datetime:
    """The current moment (aware, UTC): the read path's only clock, replaced in tests."""
    return datetime.now(UTC)


def today_in(zone: str) -> date:
    """Today's date where the locations are (an IANA time zone)."""
    return utc_now().astimezone(ZoneInfo(zone)).date()


def business_date_now(zone: str, cutoff: time | None, now: datetime | None = None) -> date:
    """The business date a closing count sent now belongs to: the local date in `zone`, or the
    day before while the local time is before `cutoff` (a count sent at 02:00 with a 04:00
    cut-off closes the previous day). No cut-off: midnight."""
    local = (now or utc_now()).astimezone(ZoneInfo(zone))
    if cutoff is not None and local.time().replace(tzinfo=None) < cutoff:
        return local.date() - timedelta(days=1)
    return local.date()


def business_date_of(session: Session, network_id: int) -> date:
    """The current business date of a network, from its current version's time zone and its
    closing cut-off. Only asked when a caller gives no business date."""
    zone, cutoff = _clock_of(session, network_id)
    return business_date_now(zone, cutoff)


def _clock_of(session: Session, network_id: int) -> tuple[str, time | None]:
    spec_json, cutoff = current_spec_json_and_cutoff(session, network_id)
    zone: str = json.loads(spec_json).get("timezone", DEFAULT_TIMEZONE)
    return zone, cutoff
