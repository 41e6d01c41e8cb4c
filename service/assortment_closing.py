"""Closing time for an assortment: each location's closing report carries every item, and once
the last location has reported, every item's moves are planned at once and kept as the night's
pick lists (one per location, read from the same plan).

Planning reads each item's policy (items with identical numbers share one) from an in-process
cache of decoded policies, and solver.assortment.assortment_moves turns all closing stocks into
moves with array operations; with trucks shared by the items on some lanes, their capacity is
shared out by the marginal value of each item's move (solver.sharing), and the pick list says
what the sharing costs tonight and how far from the best allocation it can be.

Corrections work as for a single network: once the night's pick lists are issued, a report
changes counts only as a correction; the plan is made again as the next revision and every
changed count is kept (who, when, old and new) and listed in every location's pick list.
"""

from __future__ import annotations

import json
import logging
import math
import time as clock
from collections.abc import Mapping
from dataclasses import dataclass
from datetime import date, datetime
from typing import Any

import numpy as np
from numpy.typing import NDArray
from sqlalchemy.orm import Session

from service.assortment_spec import Layout, lane_key
from service.assortments import criteria_of, layout_of
from service.codec import decode_policy
from service.db import assortment_closing as store
from service.db.assortments import CurrentItem, current_items, spec_texts
from service.db.base import utcnow
from service.db.tables import Assortment, PickList
from service.errors import (
    ClosingCountsError,
    CorruptPolicyError,
    PickListIssuedError,
    PickListNotReadyError,
)
from service.serving import CachedPolicy, PolicyCache, business_date_now
from solver.assortment import ItemPolicy, assortment_moves

__all__ = [
    "NightPlan",
    "ReportStored",
    "business_date_of",
    "closing_state",
    "location_pick_list",
    "plan_items",
    "recommend_items",
    "report_counts",
]

log = logging.getLogger(__name__)
audit = logging.getLogger("stockrelay.audit")

# Items named in a problem at most.
_NAMED = 20


def business_date_of(assortment: Assortment) -> date:
    """The assortment's current business date (its time zone and closing cut-off)."""
    return business_date_now(layout_of(assortment).timezone, assortment.closing_cutoff)


@dataclass(frozen=True)
class ReportStored:
    """What a report did: items counted, whether the night's pick lists are now issued (their
    revision), and the locations still to report."""

    items: int
    revision: int | None
    missing: list[str]
    corrected: int


def _capacities(
    session: Session, items: Mapping[str, CurrentItem], location: int
) -> dict[str, int]:
    """Each item's capacity at the location, from its current specification."""
    texts = spec_texts(session, [item.version_id for item in items.values()])
    return {
        code: int(json.loads(texts[item.version_id])["locations"][location]["capacity"])
        for code, item in items.items()
    }


def report_counts(
    session: Session,
    cache: PolicyCache,
    assortment: Assortment,
    location: str,
    business_date: date,
    counts: Mapping[str, tuple[str, int]],
    *,
    correction: bool,
    key_prefix: str,
) -> ReportStored:
    """Store a location's closing report: `counts` maps each item's code to (where it was
    given, units). Every item of the assortment must be counted, once, within its capacity at
    the location (ClosingCountsError otherwise). Issues the pick lists when this completes the
    night; a correction of an issued night issues the next revision."""
    layout = layout_of(assortment)
    where = layout.location_ids.index(location)
    items = current_items(session, assortment.id)
    problems: list[tuple[str, str]] = []
    unknown = [(at, code) for code, (at, _) in counts.items() if code not in items]
    problems += [
        (at, f"no item {code!r} in assortment {assortment.name!r}") for at, code in unknown
    ]
    missing = sorted(code for code in items if code not in counts)
    if missing:
        shown = ", ".join(missing[:_NAMED]) + (" ..." if len(missing) > _NAMED else "")
        problems.append(
            (
                "",
                f"{len(missing)} item(s) not counted at {location!r}: {shown}; a closing "
                "report counts every item of the assortment (0 for none on hand)",
            )
        )
    capacity = _capacities(session, items, where)
    for code, (at, units) in counts.items():
        if code in items and not 0 <= units <= capacity[code]:
            problems.append(
                (
                    at,
                    f"item {code!r} at {location!r}: {units} units, outside 0..{capacity[code]} "
                    "(a larger stockroom needs a new item upload first)",
                )
            )
    if problems:
        raise ClosingCountsError(problems[:100])

    issued = store.latest_pick_list(session, assortment.id, business_date)
    if issued is not None and not correction:
        raise PickListIssuedError(
            f"the pick lists of {business_date} are issued (revision {issued.revision}); send "
            "the report with correction=true to change counts, which issues the next revision"
        )
    by_network = {items[code].network_id: units for code, (_, units) in counts.items()}
    now = utcnow()
    changes: dict[int, tuple[int, int]] = {}
    if issued is not None:
        before = store.counts_of(session, assortment.id, business_date, location).get(location, {})
        changes = {
            network_id: (before.get(network_id, 0), units)
            for network_id, units in by_network.items()
            if before.get(network_id) != units
        }
        if not changes:
            return ReportStored(len(counts), issued.revision, [], 0)
    store.store_counts(session, assortment.id, location, business_date, by_network, now)
    # A location is done once it has counted every current item (items uploaded after its
    # report need its count too).
    reported = {
        report.location
        for report in store.reports_of(session, assortment.id, business_date)
        if report.items >= len(items)
    }
    still = [loc for loc in layout.location_ids if loc not in reported]
    if still:
        return ReportStored(len(counts), None, still, 0)
    revision = 1 if issued is None else issued.revision + 1
    if changes:
        store.correct_counts(session, location, business_date, changes, revision, key_prefix, now)
        codes = {item.network_id: code for code, item in items.items()}
        for network_id, (old, new) in changes.items():
            audit.info(
                "closing count corrected",
                extra={
                    "assortment_id": assortment.id,
                    "item": codes[network_id],
                    "location": location,
                    "business_date": business_date.isoformat(),
                    "old_units": old,
                    "new_units": new,
                    "revision": revision,
                    "key_prefix": key_prefix,
                },
            )
    _issue(session, cache, assortment, layout, items, business_date, revision)
    return ReportStored(len(counts), revision, [], len(changes))


def _policies(
    session: Session,
    cache: PolicyCache,
    tenant_id: int,
    keys: set[tuple[str, str]],
    criterion: str,
) -> dict[tuple[str, str], ItemPolicy]:
    """Decoded policies of (hash, method) pairs, from the cache or the database."""
    heads = store.policy_heads(session, tenant_id, keys, criterion)
    found: dict[tuple[str, str], ItemPolicy] = {}
    wanted: list[int] = []
    for key, head in heads.items():
        entry = cache.get((head.id, criterion))
        if entry is None:
            wanted.append(head.id)
        else:
            found[key] = entry.result
    for row in store.policy_rows(session, wanted):
        try:
            result = decode_policy(row.arrays, row.layout, row.checksum, row.meta)
        except CorruptPolicyError as exc:
            log.error("policy %d is corrupt (%s); its items get no moves tonight", row.id, exc)
            continue
        cache.put((row.id, criterion), CachedPolicy(result, row.solved_at))
        found[(row.spec_hash, row.method)] = result
    return found


@dataclass(frozen=True)
class NightPlan:
    """Every item's moves from its closing stock: `lines` (one per item, in code order, with
    moves as [from index, to index, units] over `locations`) and the night's `summary`."""

    locations: list[str]
    lines: list[dict[str, Any]]
    summary: dict[str, Any]


def _money(amount: float) -> float:
    """Currency as answers give it: cents."""
    return round(float(amount), 2)


def plan_items(
    session: Session,
    cache: PolicyCache,
    assortment: Assortment,
    items: Mapping[str, CurrentItem],
    codes: list[str],
    stocks: NDArray[np.int64],
    business_date: date,
) -> NightPlan:
    """The moves of the items `codes` (stocks: (len(codes), N) in the layout's location order)
    from their current policies, with the layout's shared trucks; items without a policy yet
    get none, and an item kept off a lane none on it. Raises InvalidStockError for a stock
    outside an item's capacity."""
    started = clock.perf_counter()
    layout = layout_of(assortment)
    criterion = criteria_of(assortment)[0]
    keys = [(items[c].spec_hash, items[c].method) for c in codes]
    policies = _policies(session, cache, assortment.tenant_id, set(keys), criterion)
    order = {key: k for k, key in enumerate(policies)}
    rows = np.array([k for k, key in enumerate(keys) if key in order], dtype=np.int64)
    solved = [codes[k] for k in rows]
    plan = None
    if solved:
        trucks = (
            np.array(
                [
                    math.inf if lane.truck_capacity is None else lane.truck_capacity
                    for lane in layout.lanes
                ]
            )
            if layout.has_trucks
            else None
        )
        volume = (
            np.array([items[c].unit_volume or 1.0 for c in solved])
            if layout.truck_capacity_unit == "volume"
            else None
        )
        plan = assortment_moves(
            list(policies.values()),
            np.array([order[keys[k]] for k in rows], dtype=np.int64),
            stocks[rows],
            # An item kept off a lane has a policy without it: lanes are matched by their ends.
            lanes=[(lane.from_, lane.to) for lane in layout.lanes],
            weekday=business_date.weekday(),
            truck_capacity=trucks,
            unit_volume=volume,
            item_ids=solved,
        )
    locations = layout.location_ids
    lanes = [(locations.index(lane.from_), locations.index(lane.to)) for lane in layout.lanes]
    position = {int(k): p for p, k in enumerate(rows)}
    lines: list[dict[str, Any]] = []
    for k, code in enumerate(codes):
        item = items[code]
        line: dict[str, Any] = {
            "item": code,
            "network_id": item.network_id,
            "version": item.version,
            "stock": stocks[k].tolist(),
        }
        p = position.get(k)
        if p is None or plan is None:
            line.update(
                state="not_solved",
                moves=[],
                value=None,
                value_without_moves=None,
                transfer_cost=0.0,
            )
        else:
            flows = plan.flows[p]
            line.update(
                state="planned",
                moves=[
                    [lanes[lane][0], lanes[lane][1], int(flows[lane])]
                    for lane in np.flatnonzero(flows)
                ],
                value=_money(plan.value[p]),
                value_without_moves=_money(plan.value_without_moves[p]),
                transfer_cost=_money(plan.transfer_cost[p]),
            )
        lines.append(line)
    sharing = plan.sharing if plan is not None else None
    summary = {
        "criterion": criterion,
        "items": len(codes),
        "planned": len(solved),
        "not_solved": len(codes) - len(solved),
        "units_moved": int(plan.flows.sum()) if plan is not None else 0,
        "gain": _money(plan.gain.sum()) if plan is not None else 0.0,
        "transfer_cost": _money(plan.transfer_cost.sum()) if plan is not None else 0.0,
        "sharing": None
        if sharing is None
        else {
            "value": _money(sharing.value),
            "bound": _money(sharing.bound),
            "unconstrained_value": _money(sharing.unconstrained_value),
            "sharing_cost": _money(sharing.sharing_cost),
            "gap": _money(sharing.gap),
            "lane_load": [round(float(x), 6) for x in sharing.load],
        },
        "seconds": round(clock.perf_counter() - started, 6),
    }
    return NightPlan(locations, lines, summary)


def _issue(
    session: Session,
    cache: PolicyCache,
    assortment: Assortment,
    layout: Layout,
    items: Mapping[str, CurrentItem],
    business_date: date,
    revision: int,
) -> PickList:
    codes = sorted(items)
    counts = store.counts_of(session, assortment.id, business_date)
    stocks = np.array(
        [[counts[loc][items[c].network_id] for loc in layout.location_ids] for c in codes],
        dtype=np.int64,
    ).reshape(len(codes), len(layout.location_ids))
    plan = plan_items(session, cache, assortment, items, codes, stocks, business_date)
    return store.add_pick_list(
        session,
        assortment.id,
        business_date,
        revision,
        json.dumps(
            {
                "locations": plan.locations,
                # Unit costs as they were tonight: a later layout may change or drop a lane.
                "unit_costs": {
                    lane_key(lane.from_, lane.to): lane.unit_cost for lane in layout.lanes
                },
                "lines": plan.lines,
            },
            separators=(",", ":"),
        ),
        json.dumps(plan.summary),
    )


def recommend_items(
    session: Session,
    cache: PolicyCache,
    assortment: Assortment,
    stocks: Mapping[str, Mapping[str, int]],
    business_date: date,
) -> NightPlan:
    """Moves for the items of `stocks` (item code -> location -> units), nothing stored.
    ClosingCountsError names unknown items and missing or unknown locations."""
    layout = layout_of(assortment)
    locations = layout.location_ids
    items = current_items(session, assortment.id)
    problems: list[tuple[str, str]] = []
    for code, stock in stocks.items():
        if code not in items:
            problems.append(
                (f"/stocks/{code}", f"no item {code!r} in assortment {assortment.name!r}")
            )
            continue
        wrong = sorted(set(stock) ^ set(locations))
        if wrong:
            problems.append(
                (
                    f"/stocks/{code}",
                    f"give the stock at every location ({', '.join(locations)}) "
                    f"and no other; wrong: {', '.join(wrong)}",
                )
            )
    if problems:
        raise ClosingCountsError(problems[:100])
    codes = list(stocks)
    array = np.array(
        [[stocks[c][loc] for loc in locations] for c in codes], dtype=np.int64
    ).reshape(len(codes), len(locations))
    return plan_items(session, cache, assortment, items, codes, array, business_date)


@dataclass(frozen=True)
class ClosingState:
    business_date: date
    reported: list[store.LocationReport]
    missing: list[str]
    pick_list: PickList | None


def closing_state(session: Session, assortment: Assortment, business_date: date) -> ClosingState:
    layout = layout_of(assortment)
    reported = store.reports_of(session, assortment.id, business_date)
    done = {report.location for report in reported}
    return ClosingState(
        business_date,
        reported,
        [loc for loc in layout.location_ids if loc not in done],
        store.latest_pick_list(session, assortment.id, business_date),
    )


@dataclass(frozen=True)
class LocationPickList:
    """One location's part of the night's plan."""

    location: str
    business_date: date
    revision: int
    computed_at: datetime
    lines: list[dict[str, Any]]
    summary: dict[str, Any]
    corrections: list[dict[str, Any]]


def location_pick_list(
    session: Session, assortment: Assortment, location: str, business_date: date
) -> LocationPickList:
    """Per item moving at `location` tonight: what it sends to whom, receives from whom, and
    what the item's moves are worth. PickListNotReadyError until every location reported."""
    state = closing_state(session, assortment, business_date)
    if state.pick_list is None:
        raise PickListNotReadyError(
            f"the pick lists of {business_date} are made once every location has reported; "
            f"still to report: {', '.join(state.missing)}",
            state.missing,
        )
    pick_list = state.pick_list
    body = json.loads(store.pick_list_body(pick_list))
    codes = {line["network_id"]: line["item"] for line in body["lines"]}
    locations: list[str] = body["locations"]
    here = locations.index(location)
    costs: dict[str, float] = body.get("unit_costs") or {
        lane_key(lane.from_, lane.to): lane.unit_cost for lane in layout_of(assortment).lanes
    }
    lines = []
    for line in body["lines"]:
        sends = [
            {
                "to": locations[b],
                "units": units,
                "unit_cost": costs.get(lane_key(location, locations[b]), 0.0),
            }
            for a, b, units in line["moves"]
            if a == here
        ]
        receives = [
            {
                "from": locations[a],
                "units": units,
                "unit_cost": costs.get(lane_key(locations[a], location), 0.0),
            }
            for a, b, units in line["moves"]
            if b == here
        ]
        if not sends and not receives:
            continue
        lines.append(
            {
                "item": line["item"],
                "network_id": line["network_id"],
                "version": line["version"],
                "closing_stock": line["stock"][here],
                "sends": sends,
                "receives": receives,
                "gain": _money(line["value"] - line["value_without_moves"]),
                "item_transfer_cost": line["transfer_cost"],
            }
        )
    return LocationPickList(
        location=location,
        business_date=business_date,
        revision=pick_list.revision,
        computed_at=pick_list.computed_at,
        lines=lines,
        summary=json.loads(pick_list.summary),
        corrections=[
            {
                "item": codes.get(row.network_id, "?"),
                "location": row.location_id,
                "old_units": row.old_units,
                "new_units": row.new_units,
                "revision": row.revision,
                "key_prefix": row.key_prefix,
                "corrected_at": row.corrected_at,
            }
            for row in store.corrections_of(session, assortment.id, business_date)
        ],
    )
