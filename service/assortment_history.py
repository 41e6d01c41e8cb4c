"""Use cases of an assortment's sales history: one upload for every item, and the calibration of
every item as one run of chunk jobs shared by the workers.

History rows are stored under each item's network (an item is a network), so the single-network
history summary and calibration read them unchanged. An upload is checked whole before anything
is written: unknown items and locations, the rules a day must keep (service.estimates
history_day_problems, with each item's receipts_sell_same_day setting) and repeated days; a
day stored already is replaced.

A calibration run is one job of kind `calibrate` per chunk of items on the job queue, so that
every worker takes a share. A chunk estimates each of its items from its history
(service.estimates.propose, with the item's calibration settings and the run's overrides),
then, in the transaction that marks the job done, makes the estimates each changed item's next
version and queues their solves. An item whose version changed while it was being estimated is
left alone (reported failed: calibrate again). The run is named by its first job's id; its
summary adds up the reports of its finished chunks.
"""

from __future__ import annotations

import json
from collections.abc import Sequence
from dataclasses import asdict, dataclass, field
from datetime import date, datetime
from typing import Any, Literal

from sqlalchemy.orm import Session

from service.assortments import criteria_of, layout_of
from service.db import assortments as store
from service.db.networks import canonical_spec
from service.db.tables import Assortment, Network
from service.errors import ItemUploadError, NoItemsError
from service.estimates import (
    CalibrationOverrides,
    Proposal,
    law_moments,
    options_for,
    propose,
)
from service.history import history_day_problems, latest_history_date
from service.history_upload import HistoryLine
from service.item_upload import MAX_PROBLEMS
from service.modes import resolve_method
from service.vocabulary import JobState
from solver import ModelTooLargeError, SizeLimits

__all__ = [
    "DEFAULT_ITEMS_PER_CHUNK",
    "LARGEST_CHANGES",
    "ChunkEstimates",
    "HistoryCounts",
    "HistoryStored",
    "HistorySummary",
    "RunSummary",
    "apply_chunk",
    "estimate_chunk",
    "history_summary",
    "run_summary",
    "start_calibration",
    "store_history",
]

DEFAULT_ITEMS_PER_CHUNK = 50
# Changes listed in a chunk's report and in a run's summary, largest first.
LARGEST_CHANGES = 20
# Failed items named in a chunk's report (the counts are always complete).
_FAILURES_LISTED = 50


# -- history -----------------------------------------------------------------------------------


@dataclass(frozen=True)
class HistoryStored:
    """What an upload did: rows received, stored as new days, replacing stored days; items
    concerned."""

    received: int
    inserted: int
    replaced: int
    items: int


class _Problems:
    def __init__(self) -> None:
        self.found: list[tuple[str, str]] = []

    def add(self, where: str, message: str) -> None:
        self.found.append((where, message))
        if len(self.found) >= MAX_PROBLEMS:
            raise ItemUploadError([*self.found, ("", f"stopped after {MAX_PROBLEMS} problems")])


def store_history(
    session: Session, assortment: Assortment, rows: Sequence[HistoryLine]
) -> HistoryStored:
    """Store every row of a parsed upload, or none (ItemUploadError with each row's pointer)."""
    items = store.current_items(session, assortment.id)
    locations = set(layout_of(assortment).location_ids)
    same_day = store.same_day_networks(session, [item.network_id for item in items.values()])
    latest = latest_history_date()
    problems = _Problems()
    seen: dict[tuple[str, str, date], str] = {}
    days: list[store.ItemDay] = []
    for row in rows:
        item = items.get(row.item)
        if item is None:
            problems.add(f"{row.where}/item", f"unknown item {row.item!r}")
        if row.location not in locations:
            problems.add(f"{row.where}/location", f"unknown location {row.location!r}")
        for column, message in history_day_problems(
            row.date,
            row.units_sold,
            row.stock_at_open,
            row.units_received,
            latest=latest,
            same_day=item is not None and item.network_id in same_day,
        ):
            problems.add(f"{row.where}/{column}", message)
        key = (row.item, row.location, row.date)
        if key in seen:
            problems.add(
                row.where,
                f"{row.item} at {row.location} on {row.date} is given twice (also {seen[key]})",
            )
            continue
        seen[key] = row.where
        if item is not None:
            days.append(
                store.ItemDay(
                    item.network_id,
                    row.location,
                    row.date,
                    row.units_sold,
                    row.stock_at_open,
                    row.units_received,
                )
            )
    if problems.found:
        raise ItemUploadError(problems.found)
    inserted, replaced = store.store_item_history(session, days)
    return HistoryStored(
        received=len(rows),
        inserted=inserted,
        replaced=replaced,
        items=len({day.network_id for day in days}),
    )


# Rows, days, items with history, first and last date: of the assortment or one location.
HistoryCounts = store.HistoryCounts


@dataclass(frozen=True)
class HistorySummary:
    """The assortment's history in all and per location, and how many items it has."""

    items: int
    total: HistoryCounts
    locations: dict[str, HistoryCounts]


def history_summary(session: Session, assortment: Assortment) -> HistorySummary:
    total, locations = store.history_counts(session, assortment.id)
    return HistorySummary(
        items=len(store.current_items(session, assortment.id)), total=total, locations=locations
    )


# -- calibration: starting a run ---------------------------------------------------------------


def start_calibration(
    session: Session,
    assortment: Assortment,
    overrides: CalibrationOverrides,
    items_per_chunk: int = DEFAULT_ITEMS_PER_CHUNK,
) -> list[int]:
    """Queue the run: one job per `items_per_chunk` items in code order. Returns the jobs' ids,
    the first naming the run. NoItemsError without items."""
    items = store.current_items(session, assortment.id)
    if not items:
        raise NoItemsError(f"assortment {assortment.id} has no items to calibrate")
    codes = sorted(items)
    settings = {
        "window_days": overrides.window_days,
        "half_life_days": overrides.half_life_days,
        "confidence": overrides.confidence,
    }
    chunks = []
    for start in range(0, len(codes), items_per_chunk):
        part = codes[start : start + items_per_chunk]
        first = items[part[0]]
        chunks.append(
            (
                first.version_id,
                first.spec_hash,
                {"assortment": assortment.id, "items": part, "overrides": settings},
            )
        )
    return store.enqueue_calibration(
        session, assortment.tenant_id, criteria_of(assortment)[0], chunks
    )


# -- calibration: one chunk, in the worker -----------------------------------------------------


@dataclass(frozen=True)
class _Change:
    item: str
    location: str
    parameter: str
    old: float
    new: float
    change: float


@dataclass
class ChunkEstimates:
    """What a chunk found before writing anything: the versions to make, and the items left
    as they are (unchanged, skipped for want of history, failed with why)."""

    assortment_id: int
    criteria: list[str]
    versions: dict[str, store.CalibratedVersion] = field(default_factory=dict)
    unchanged: list[str] = field(default_factory=list)
    skipped: list[str] = field(default_factory=list)
    failed: dict[str, str] = field(default_factory=dict)
    changes: list[_Change] = field(default_factory=list)


def _item_changes(item: str, proposal: Proposal) -> list[_Change]:
    """Each estimated parameter's relative change at each location (service.estimates)."""
    found = []
    for index, location in enumerate(proposal.locations):
        if location.calibration is None:
            continue
        proposed = proposal.spec.locations[index]
        laws = {
            "demand": (location.current_demand, proposed.demand),
            "replenishment": (location.current_replenishment, proposed.replenishment),
        }
        for parameter, change in location.changes.items():
            what, moment = parameter.rsplit("_", 1)
            which = 1 if moment == "variance" else 0
            old, new = (law_moments(law)[which] for law in laws[what])
            found.append(_Change(item, location.location, parameter, old, new, change))
    return found


def estimate_chunk(
    session: Session, tenant_id: int, params: dict[str, Any], limits: SizeLimits
) -> ChunkEstimates:
    """Estimate every item the chunk names (reads only). Raises ValueError for parameters that
    name no assortment of the tenant."""
    assortment = store.get_assortment(session, tenant_id, int(params["assortment"]))
    if assortment is None:
        raise ValueError(f"no assortment {params['assortment']} for this calibration")
    overrides = CalibrationOverrides(**params.get("overrides", {}))
    estimates = ChunkEstimates(assortment.id, criteria_of(assortment))
    networks = store.item_networks(session, assortment.id, list(params["items"]))
    for code in params["items"]:
        network = networks.get(code)
        if network is None:
            estimates.failed[code] = "the item is no longer in the assortment"
            continue
        _estimate_item(session, assortment, network, overrides, limits, estimates)
    return estimates


def _estimate_item(
    session: Session,
    assortment: Assortment,
    network: Network,
    overrides: CalibrationOverrides,
    limits: SizeLimits,
    estimates: ChunkEstimates,
) -> None:
    code = network.item_code or ""
    proposal = propose(session, network, overrides.over(options_for(session, network.id)))
    if not proposal.calibrated:
        reasons = {location.error for location in proposal.locations}
        if reasons == {"no history"}:
            estimates.skipped.append(code)
        else:
            estimates.failed[code] = "; ".join(
                f"{location.location}: {location.error}" for location in proposal.locations
            )
        return
    text, digest = canonical_spec(proposal.spec)
    if digest == proposal.based_on.spec_hash:
        estimates.unchanged.append(code)
        return
    try:
        method = resolve_method(proposal.spec, assortment.mode, limits)
    except ModelTooLargeError as exc:
        estimates.failed[code] = f"the estimated version is too large: {exc}"
        return
    estimates.versions[code] = store.CalibratedVersion(
        network_id=network.id,
        based_on=proposal.based_on.number,
        spec_json=text,
        spec_hash=digest,
        method=method,
    )
    estimates.changes += _item_changes(code, proposal)


def apply_chunk(
    session: Session, tenant_id: int, estimates: ChunkEstimates, calibrated_at: datetime
) -> dict[str, Any]:
    """Make the chunk's versions (those whose item did not change meanwhile) and queue their
    solves; the chunk's report (JSON-ready)."""
    written, jobs = store.add_calibrated_versions(
        session, tenant_id, list(estimates.versions.values()), estimates.criteria, calibrated_at
    )
    failed = dict(estimates.failed)
    calibrated = []
    for code, version in estimates.versions.items():
        if version.network_id in written:
            calibrated.append(code)
        else:
            failed[code] = "the item changed while it was being estimated; calibrate again"
    changes = sorted(
        (change for change in estimates.changes if change.item in calibrated),
        key=lambda change: -change.change,
    )[:LARGEST_CHANGES]
    return {
        "calibrated": len(calibrated),
        "unchanged": len(estimates.unchanged),
        "skipped": len(estimates.skipped),
        "failed": len(failed),
        "jobs_queued": len(jobs),
        "failures": [
            {"item": code, "reason": reason}
            for code, reason in list(failed.items())[:_FAILURES_LISTED]
        ],
        "changes": [asdict(change) for change in changes],
    }


# -- calibration: where a run stands -----------------------------------------------------------


@dataclass(frozen=True)
class RunSummary:
    """A run's chunks by state and, over its finished chunks, what changed. Items of a failed
    chunk count as failed, with the chunk's error."""

    run: int
    assortment_id: int
    created_at: datetime
    finished_at: datetime | None
    chunks: int
    chunks_queued: int
    chunks_running: int
    chunks_done: int
    chunks_failed: int
    items: int
    calibrated: int
    unchanged: int
    skipped: int
    failed: int
    jobs_queued: int
    failures: list[dict[str, str]]
    changes: list[dict[str, Any]]

    @property
    def state(self) -> Literal["queued", "running", "done"]:
        if self.chunks_done + self.chunks_failed == self.chunks:
            return "done"
        return (
            "running" if self.chunks_running or self.chunks_done or self.chunks_failed else "queued"
        )


def run_summary(session: Session, assortment: Assortment, run: int) -> RunSummary | None:
    """The run `run` of the assortment; None when there is none."""
    head = store.calibration_job(session, assortment.tenant_id, run)
    if head is None or head.params is None:
        return None
    params = json.loads(head.params)
    if params.get("run") != run or params.get("assortment") != assortment.id:
        return None
    jobs = store.jobs_by_id(session, params["jobs"])
    counts = dict.fromkeys(("calibrated", "unchanged", "skipped", "failed", "jobs_queued"), 0)
    failures: list[dict[str, str]] = []
    changes: list[dict[str, Any]] = []
    items = 0
    for job in jobs:
        chunk = json.loads(job.params or "{}")
        items += len(chunk.get("items", ()))
        if job.state == JobState.DONE and job.result is not None:
            report = json.loads(job.result)
            for name in counts:
                counts[name] += int(report[name])
            failures += report["failures"]
            changes += report["changes"]
        elif job.state == JobState.FAILED:
            counts["failed"] += len(chunk["items"])
            failures += [{"item": code, "reason": job.error or "failed"} for code in chunk["items"]]
    states = [job.state for job in jobs]
    finished = [job.finished_at for job in jobs if job.finished_at is not None]
    done = all(state in (JobState.DONE, JobState.FAILED) for state in states)
    return RunSummary(
        run=run,
        assortment_id=assortment.id,
        created_at=head.created_at,
        finished_at=max(finished) if done and finished else None,
        chunks=len(jobs),
        chunks_queued=states.count(JobState.QUEUED),
        chunks_running=states.count(JobState.RUNNING),
        chunks_done=states.count(JobState.DONE),
        chunks_failed=states.count(JobState.FAILED),
        items=items,
        failures=failures[:_FAILURES_LISTED],
        changes=sorted(changes, key=lambda change: -float(change["change"]))[:LARGEST_CHANGES],
        **counts,
    )
