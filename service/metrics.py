"""Prometheus metrics: what the solve workers did, read from the database when scraped, and what
this API process answered, counted in memory.

Solves run in other processes (`stockrelay worker`, on any machine) and there may be several API
processes, so there are two sources:

* **From the database** (`DatabaseCollector`): solve times, job outcomes, the queue and policy
  ages are aggregated from `solve_jobs` (which also queues simulations and what-if comparisons,
  told apart by `kind`) and `policies`, in five queries at every scrape; the assortments' items
  by state and tonight's closing counts in four more, and one per assortment. Every API process
  reports the same numbers, and no process shares memory with another.
* **In process**: recommendation latency and policy cache lookups are counted by the process
  that answered. By default they are per API process: behind `stockrelay serve --processes N` a
  scrape sees the share of whichever process answered it. With PROMETHEUS_MULTIPROC_DIR set in
  the environment of `stockrelay serve` (an empty directory, emptied before every start: read by
  prometheus-client itself when it is imported), prometheus-client's multiprocess mode is used
  and every scrape reports the sums over all processes of the server.

Metrics (histograms in seconds):

* stockrelay_solve_seconds{states, criterion, method}: histogram, solve time of done solve jobs;
* stockrelay_jobs_total{kind, outcome}: counter, done, failed and retried jobs;
* stockrelay_queue_depth{kind}: gauge, queued jobs;
* stockrelay_jobs_running{kind}: gauge, jobs leased to a worker;
* stockrelay_queue_oldest_age_seconds: gauge, age of the oldest queued job (0 when none);
* stockrelay_policy_age_seconds{network_id, criterion}: gauge, age of the current policy;
* stockrelay_assortment_items{assortment, state}: gauge, items of each assortment by state
  (ready, waiting, failed, not_requested; service.assortments.item_state);
* stockrelay_assortment_closing_locations{assortment, state}: gauge, locations of each
  assortment by tonight's closing counts (the assortment's current business date): complete
  (every item counted), partial (some), none (the status page names them);
* stockrelay_database_up: gauge, 1 when this scrape's queries succeeded, else 0;
* stockrelay_recommendation_seconds{endpoint}: histogram, latency of answered recommendation
  requests, endpoint "single" (one network) or "batch" (a whole batch);
* stockrelay_policy_cache_lookups_total{result}: counter, policy cache hits and misses;
* stockrelay_priced_solve_iteration, stockrelay_priced_solve_upper_bound,
  stockrelay_priced_solve_lower_bound, stockrelay_priced_solve_elapsed_seconds
  {job_id, network_id, criterion, stage}: gauges, the latest progress of each running priced
  solve (one series per running job, so at most one per worker; gone once it ends; the lower
  bound only once certifying has found one). `stage` is "pricing", "planning" or
  "certifying" (solver.PricedProgress); the iteration is the pricing iteration, the planning
  candidate being simulated, or the certificate's replications finished.

`kind` is the job's kind: "solve", "simulate", "what_if" or "calibrate".
`assortment` is an assortment's id: the assortment series are bounded by assortments times
states or locations, never by items.
`states` is the size class of the network in stock states (the product over locations of
capacity + 1): "<1k" (under 1,000), "1k-100k" (1,000 to 99,999), "100k+" (100,000 and more).

`stockrelay_jobs_total` counts the jobs now in the `done` and `failed` states, and as
`retried` every claim of a job after its first (a transient error, or a worker that stopped
without finishing). A job handed back at shutdown is not counted, as its attempt is not. The
counts come from the table, so `stockrelay jobs retry` (which moves a failed job back to the
queue with fresh attempts) lowers them, which Prometheus takes for a counter reset.

`stockrelay_policy_age_seconds` has a series per network (not archived) and criterion whose
current version has a policy; none while the current version is still being solved.
"""

from __future__ import annotations

import json
import logging
import threading
import time
from collections.abc import Callable, Iterable, Iterator, Sequence
from dataclasses import dataclass, field
from typing import TYPE_CHECKING

from prometheus_client import (
    CollectorRegistry,
    Counter,
    Histogram,
    disable_created_metrics,
    generate_latest,
    values,
)
from prometheus_client.core import (
    CounterMetricFamily,
    GaugeMetricFamily,
    HistogramMetricFamily,
    Metric,
)
from prometheus_client.multiprocess import MultiProcessCollector
from prometheus_client.registry import Collector
from sqlalchemy.exc import SQLAlchemyError
from sqlalchemy.orm import Session, sessionmaker

from service import assortments
from service.db import reporting
from service.db.base import utcnow
from service.db.monitoring import (
    first_spec_of_hashes,
    jobs_by_kind_and_state,
    running_progress,
    solve_seconds_buckets,
)
from service.serving import PolicyCache
from service.vocabulary import JobKind, JobState, SolveStatus

if TYPE_CHECKING:
    from service.serving import _Entry as CacheEntry

__all__ = [
    "CACHE_LOOKUPS",
    "RECOMMENDATION_SECONDS",
    "SIZE_CLASSES",
    "SOLVE_BUCKETS",
    "DatabaseCollector",
    "MeteredPolicyCache",
    "observe_recommendation",
    "render_metrics",
    "size_class",
]

log = logging.getLogger(__name__)

# `_created` series (when each labelled child first appeared) mean nothing to our dashboards
# and, per child, would double the series of every counter and histogram.
disable_created_metrics()  # type: ignore[no-untyped-call]

# Solves take milliseconds on small networks and minutes on the largest the solver accepts.
SOLVE_BUCKETS = (0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5, 5.0, 10.0, 30.0, 60.0, 300.0)
# A recommendation is milliseconds; a batch of 1,000 about a second.
LATENCY_BUCKETS = (0.001, 0.0025, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5, 5.0, 10.0)
# (label, smallest number of stock states in the class), largest first.
SIZE_CLASSES = (("100k+", 100_000), ("1k-100k", 1_000), ("<1k", 0))

RECOMMENDATION_SECONDS = Histogram(
    "stockrelay_recommendation_seconds",
    "Time from the start of a recommendation request to its answer, by endpoint "
    "(single: one network, batch: the whole batch); answered requests only.",
    ["endpoint"],
    buckets=LATENCY_BUCKETS,
    registry=None,
)
CACHE_LOOKUPS = Counter(
    "stockrelay_policy_cache_lookups",
    "Lookups in the in-process cache of decoded policies, by result (hit or miss).",
    ["result"],
    registry=None,
)


def observe_recommendation(endpoint: str, started: float) -> None:
    """Record the latency of a recommendation request begun at `started` (time.perf_counter)."""
    RECOMMENDATION_SECONDS.labels(endpoint).observe(time.perf_counter() - started)


class MeteredPolicyCache(PolicyCache):
    """The policy cache, counting its hits and misses in CACHE_LOOKUPS."""

    def get(self, key: tuple[int, str]) -> CacheEntry | None:
        entry = super().get(key)
        CACHE_LOOKUPS.labels("miss" if entry is None else "hit").inc()
        return entry


def size_class(states: int) -> str:
    """The `states` label of a network with `states` stock states."""
    return next(label for label, smallest in SIZE_CLASSES if states >= smallest)


def _states_of(spec_json: str) -> int:
    """Stock states of a stored (canonical) specification: the product of capacity + 1."""
    states = 1
    for location in json.loads(spec_json)["locations"]:
        states *= int(location["capacity"]) + 1
    return states


def _size_class_of(spec_hash: str, spec_json: str) -> str:
    try:
        return size_class(_states_of(spec_json))
    except (ValueError, KeyError, TypeError) as exc:  # stored specifications are validated
        log.warning("metrics: specification %s has no readable capacities: %r", spec_hash, exc)
        return "unknown"


class _SizeClasses:
    """Size class by specification hash. A hash names one specification forever, so what is
    learnt once is kept for the life of the process (one short string per specification)."""

    def __init__(self) -> None:
        self._known: dict[str, str] = {}
        self._lock = threading.Lock()

    def of(self, session: Session, hashes: Iterable[str]) -> dict[str, str]:
        wanted = set(hashes)
        with self._lock:
            missing = sorted(wanted - self._known.keys())
        for start in range(0, len(missing), 500):
            chunk = missing[start : start + 500]
            rows = first_spec_of_hashes(session, chunk)
            learnt = {spec_hash: _size_class_of(spec_hash, text) for spec_hash, text in rows}
            with self._lock:
                self._known.update(learnt)
        with self._lock:
            return {h: self._known[h] for h in wanted if h in self._known}


_SIZES = _SizeClasses()


@dataclass
class _Histogram:
    count: int = 0
    total: float = 0.0
    buckets: list[int] = field(default_factory=lambda: [0] * len(SOLVE_BUCKETS))

    def add(self, count: int, total: float, buckets: Sequence[int]) -> None:
        self.count += count
        self.total += total
        self.buckets = [a + b for a, b in zip(self.buckets, buckets, strict=True)]

    def samples(self) -> list[tuple[str, float]]:
        # Prometheus buckets are cumulative (le = "less than or equal"); the SQL counts are too.
        pairs = [
            (_bucket_label(b), float(n)) for b, n in zip(SOLVE_BUCKETS, self.buckets, strict=True)
        ]
        return [*pairs, ("+Inf", float(self.count))]


def _bucket_label(bound: float) -> str:
    return repr(float(bound))


class DatabaseCollector(Collector):
    """The worker-side and queue metrics, aggregated in SQL at every scrape."""

    def __init__(self, sessions: Callable[[], sessionmaker[Session]]) -> None:
        self._sessions = sessions

    def collect(self) -> Iterator[Metric]:
        up = GaugeMetricFamily(
            "stockrelay_database_up",
            "1 when the database answered this scrape's queries, 0 when it did not (the "
            "solve, queue and policy metrics are then missing).",
        )
        try:
            with self._sessions()() as session:
                families = [
                    *self._jobs(session),
                    self._solve_seconds(session),
                    self._policy_age(session),
                    *self._priced_progress(session),
                    *self._assortments(session),
                ]
        except SQLAlchemyError as exc:
            log.warning("metrics: database queries failed: %s", exc)
            up.add_metric([], 0.0)
            yield up
            return
        up.add_metric([], 1.0)
        yield up
        yield from families

    @staticmethod
    def _jobs(session: Session) -> list[Metric]:
        rows = jobs_by_kind_and_state(session)
        count = {(kind, state): n for kind, state, n, _, _ in rows}
        retried: dict[str, int] = {}
        for kind, _, _, _, extra in rows:
            retried[kind] = retried.get(kind, 0) + extra
        queued_since = [
            first for _, state, _, first, _ in rows if state == JobState.QUEUED and first
        ]
        # Every kind, even one never queued: a series that exists from the start.
        kinds = sorted({kind.value for kind in JobKind} | {kind for kind, _ in count})

        outcomes = CounterMetricFamily(
            "stockrelay_jobs",
            "Jobs of the queue by kind and outcome: done and failed count the jobs in that "
            "state, retried the claims of a job after its first.",
            labels=["kind", "outcome"],
        )
        queued = GaugeMetricFamily(
            "stockrelay_queue_depth", "Jobs waiting for a worker, by kind.", labels=["kind"]
        )
        running = GaugeMetricFamily(
            "stockrelay_jobs_running", "Jobs leased to a worker, by kind.", labels=["kind"]
        )
        for kind in kinds:
            outcomes.add_metric([kind, "done"], count.get((kind, JobState.DONE.value), 0))
            outcomes.add_metric([kind, "failed"], count.get((kind, JobState.FAILED.value), 0))
            outcomes.add_metric([kind, "retried"], retried.get(kind, 0))
            queued.add_metric([kind], count.get((kind, JobState.QUEUED.value), 0))
            running.add_metric([kind], count.get((kind, JobState.RUNNING.value), 0))
        oldest = min(queued_since, default=None)
        age = 0.0 if oldest is None else max(0.0, (utcnow() - oldest).total_seconds())
        return [
            outcomes,
            queued,
            running,
            GaugeMetricFamily(
                "stockrelay_queue_oldest_age_seconds",
                "Seconds since the oldest queued job (of any kind: workers take them in order) "
                "was created; 0 when none is queued.",
                value=age,
            ),
        ]

    @staticmethod
    def _solve_seconds(session: Session) -> HistogramMetricFamily:
        # One row per specification, criterion and method (the size class is a property of
        # the specification), with the cumulative bucket counts computed by the database.
        rows = solve_seconds_buckets(session, SOLVE_BUCKETS)
        sizes = _SIZES.of(session, (row[0] for row in rows))
        histograms: dict[tuple[str, str, str], _Histogram] = {}
        for spec_hash, criterion, method, n, total, buckets in rows:
            size = sizes.get(spec_hash)
            if size is None:  # a job without a stored version: cannot happen (foreign key)
                continue
            key = (size, criterion, method)
            histograms.setdefault(key, _Histogram()).add(n, total, buckets)
        family = HistogramMetricFamily(
            "stockrelay_solve_seconds",
            "Solve time of done jobs (seconds), by network size in stock states "
            '("<1k", "1k-100k", "100k+"), criterion and method (exact, priced).',
            labels=["states", "criterion", "method"],
        )
        for labels, histogram in sorted(histograms.items()):
            family.add_metric(list(labels), histogram.samples(), histogram.total)
        return family

    @staticmethod
    def _policy_age(session: Session) -> GaugeMetricFamily:
        ready = sorted(
            (row.network.id, solve.criterion, solve.solved_at)
            for row in reporting.solve_states(session, tenant_id=None, include_items=False)
            for solve in row.solves
            if solve.state == SolveStatus.READY and solve.solved_at is not None
        )
        now = utcnow()
        family = GaugeMetricFamily(
            "stockrelay_policy_age_seconds",
            "Seconds since the policy of each network's current version was solved, by "
            "network and criterion; no series while the current version awaits its solve.",
            labels=["network_id", "criterion"],
        )
        for network_id, criterion, solved_at in ready:
            family.add_metric(
                [str(network_id), criterion], max(0.0, (now - solved_at).total_seconds())
            )
        return family

    @staticmethod
    def _assortments(session: Session) -> list[GaugeMetricFamily]:
        items = GaugeMetricFamily(
            "stockrelay_assortment_items",
            "Items of each assortment by the state of their current version's solves (ready, "
            "waiting, failed, not_requested).",
            labels=["assortment", "state"],
        )
        # Locations by state, not by name: this endpoint shows no tenant's data.
        reports = GaugeMetricFamily(
            "stockrelay_assortment_closing_locations",
            "Locations of each assortment by tonight's closing counts (its current business "
            "date): complete (every item counted), partial (some), none.",
            labels=["assortment", "state"],
        )
        for standing in assortments.standings(session, tenant_id=None):
            label = str(standing.assortment.id)
            for state, count in standing.states.items():
                items.add_metric([label, state], count)
            counted = list(standing.reported.values())
            complete = sum(count >= standing.items > 0 for count in counted)
            none = sum(count == 0 for count in counted)
            for state, count in (
                ("complete", complete),
                ("partial", len(counted) - complete - none),
                ("none", none),
            ):
                reports.add_metric([label, state], count)
        return [items, reports]

    @staticmethod
    def _priced_progress(session: Session) -> list[GaugeMetricFamily]:
        rows = running_progress(session)
        labels = ["job_id", "network_id", "criterion", "stage"]
        what = "of each running priced solve, by job (one series per running job)"
        iteration = GaugeMetricFamily(
            "stockrelay_priced_solve_iteration",
            f"Iteration of the stage (pricing iteration, planning candidate or certificate "
            f"replications) {what}.",
            labels=labels,
        )
        upper = GaugeMetricFamily(
            "stockrelay_priced_solve_upper_bound",
            f"Best upper bound on the optimal value (currency) {what}.",
            labels=labels,
        )
        lower = GaugeMetricFamily(
            "stockrelay_priced_solve_lower_bound",
            f"Best lower bound, the policy's simulated value (currency), {what}; absent "
            "before certifying.",
            labels=labels,
        )
        elapsed = GaugeMetricFamily(
            "stockrelay_priced_solve_elapsed_seconds", f"Seconds running {what}.", labels=labels
        )
        for job_id, network_id, criterion, text in rows:
            try:
                report = json.loads(text or "")
                values = [str(job_id), str(network_id), criterion, str(report["stage"])]
                iteration.add_metric(values, float(report["iteration"]))
                upper.add_metric(values, float(report["upper_bound"]))
                if report.get("lower_bound") is not None:
                    lower.add_metric(values, float(report["lower_bound"]))
                elapsed.add_metric(values, float(report["elapsed"]))
            except (ValueError, KeyError, TypeError):
                log.warning("metrics: job %d has unreadable progress", job_id)
        return [iteration, upper, lower, elapsed]


def _multiprocess() -> bool:
    """Whether prometheus-client keeps its values in PROMETHEUS_MULTIPROC_DIR (decided by
    prometheus-client when it was imported)."""
    return values.ValueClass is not values.MutexValue


def render_metrics(sessions: Callable[[], sessionmaker[Session]]) -> bytes:
    """The exposition (Prometheus text format 0.0.4) of every metric above. Runs the database
    queries: call it from the thread pool."""
    registry = CollectorRegistry()
    if _multiprocess():
        MultiProcessCollector(registry)  # type: ignore[no-untyped-call]
    else:
        registry.register(RECOMMENDATION_SECONDS)
        registry.register(CACHE_LOOKUPS)
    registry.register(DatabaseCollector(sessions))
    return generate_latest(registry)
