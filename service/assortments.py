"""Use cases of assortments: create one from its layout, store an upload of items.

Items are networks composed from the layout (service.assortment_spec); uploads are parsed by
service.item_upload and stored by service.db.assortments, all or nothing.
"""

from __future__ import annotations

import json
from collections.abc import Sequence
from dataclasses import dataclass
from datetime import date, time
from typing import Any

from sqlalchemy.orm import Session

from service.assortment_spec import ItemSpec, Layout, compose_spec, lane_key
from service.db import assortments as store
from service.db import reporting
from service.db.networks import canonical_spec
from service.db.reporting import CriterionSolve
from service.db.tables import Assortment
from service.errors import AssortmentExistsError, ItemUploadError
from service.item_upload import ParsedItem
from service.modes import resolve_method
from service.serving import business_date_now
from service.vocabulary import SolveStatus
from solver import ModelTooLargeError, SizeLimits

__all__ = [
    "ITEM_STATES",
    "Assortment",
    "ItemSolve",
    "ItemsStored",
    "Standing",
    "create_assortment",
    "criteria_of",
    "find_assortment",
    "item_solves",
    "item_state",
    "layout_of",
    "list_assortments",
    "standings",
    "store_items",
    "update_layout",
]


def find_assortment(session: Session, tenant_id: int, assortment_id: int) -> Assortment | None:
    """The tenant's live assortment; None when missing, archived or another tenant's."""
    assortment = store.get_assortment(session, tenant_id, assortment_id)
    return None if assortment is None or assortment.archived else assortment


def list_assortments(session: Session, tenant_id: int) -> Sequence[Assortment]:
    return store.list_assortments(session, tenant_id)


@dataclass(frozen=True)
class ItemSolve:
    """An item, its network and current version, and where its solves stand: `ready` (every
    criterion of the assortment solved), `failed` (a solve failed: `error`), `waiting` (one
    queued or running) or `not_requested`."""

    item: str
    network_id: int
    version: int
    spec_hash: str
    method: str
    state: str
    error: str | None


def item_solves(session: Session, assortment: Assortment) -> list[ItemSolve]:
    """Every item of the assortment in code order (three statements in all)."""
    criteria = criteria_of(assortment)
    out = []
    for solves in reporting.solve_states(
        session, tenant_id=assortment.tenant_id, assortment_id=assortment.id
    ):
        state, error = item_state(solves.solves, criteria)
        out.append(
            ItemSolve(
                item=solves.network.item_code or "",
                network_id=solves.network.id,
                version=solves.version.number,
                spec_hash=solves.version.spec_hash,
                method=solves.version.method,
                state=state,
                error=error,
            )
        )
    return sorted(out, key=lambda item: item.item)


def item_state(solves: Sequence[CriterionSolve], criteria: Sequence[str]) -> tuple[str, str | None]:
    """An item's state (ItemSolve.state) from its criteria's solves, and the failed one's
    error."""
    mine = [s for s in solves if s.criterion in criteria]
    failed = next((s for s in mine if s.state == SolveStatus.FAILED), None)
    if failed is not None:
        return "failed", failed.error
    if all(s.state == SolveStatus.READY for s in mine):
        return "ready", None
    if any(s.state in (SolveStatus.QUEUED, SolveStatus.RUNNING) for s in mine):
        return "waiting", None
    return "not_requested", None


ITEM_STATES = ("ready", "waiting", "failed", "not_requested")


@dataclass(frozen=True)
class Standing:
    """Where an assortment stands tonight: its items by state (ITEM_STATES), the current
    business date (the layout's time zone and the closing cut-off) and, per location of the
    layout, how many items it has counted for that date."""

    assortment: Assortment
    items: int
    states: dict[str, int]
    business_date: date
    reported: dict[str, int]


def standings(session: Session, tenant_id: int | None) -> list[Standing]:
    """Every live assortment of `tenant_id` (None: of every tenant): the item states in three
    statements for all of them (service.db.reporting), one more per assortment for tonight's
    closing counts."""
    chosen = {a.id: a for a in store.all_assortments(session, tenant_id)}
    if not chosen:
        return []
    states = {a: dict.fromkeys(ITEM_STATES, 0) for a in chosen}
    for row in reporting.solve_states(session, tenant_id=tenant_id):
        if row.network.assortment_id in chosen:
            assortment = chosen[row.network.assortment_id]
            state, _ = item_state(row.solves, criteria_of(assortment))
            states[assortment.id][state] += 1
    out = []
    for assortment_id, assortment in chosen.items():
        layout = layout_of(assortment)
        tonight = business_date_now(layout.timezone, assortment.closing_cutoff)
        counted = store.closing_reports_by_location(session, assortment_id, tonight)
        out.append(
            Standing(
                assortment=assortment,
                items=sum(states[assortment_id].values()),
                states=states[assortment_id],
                business_date=tonight,
                reported={location: counted.get(location, 0) for location in layout.location_ids},
            )
        )
    return out


def layout_of(assortment: Assortment) -> Layout:
    return Layout.model_validate_json(assortment.layout_json)


def criteria_of(assortment: Assortment) -> list[str]:
    criteria: list[str] = json.loads(assortment.criteria)
    return criteria


def create_assortment(
    session: Session,
    tenant_id: int,
    layout: Layout,
    criteria: Sequence[str],
    *,
    mode: str,
    closing_cutoff: time | None,
) -> Assortment:
    if store.assortment_by_name(session, tenant_id, layout.name) is not None:
        raise AssortmentExistsError(f"an assortment named {layout.name!r} exists already")
    return store.create_assortment(
        session,
        tenant_id,
        layout.name,
        layout.model_dump_json(by_alias=True),
        criteria,
        mode=mode,
        closing_cutoff=closing_cutoff,
    )


@dataclass(frozen=True)
class ItemsStored:
    """What an upload did: items created, given a new version, left as they were; distinct
    specifications among the uploaded items; solve jobs queued."""

    received: int
    created: int
    updated: int
    unchanged: int
    specifications: int
    jobs: list[int]


def store_items(
    session: Session,
    assortment: Assortment,
    items: Sequence[ParsedItem],
    limits: SizeLimits,
) -> ItemsStored:
    """Store every item of a parsed upload, or none: an item too large for the assortment's
    solving mode refuses the upload (ItemUploadError, naming the item's line)."""
    methods: dict[str, str] = {}
    rows: list[store.ItemRow] = []
    problems: list[tuple[str, str]] = []
    for item in items:
        text, digest = canonical_spec(item.network)
        if digest not in methods:
            try:
                methods[digest] = resolve_method(item.network, assortment.mode, limits)
            except ModelTooLargeError as exc:
                problems.append((item.where, f"item {item.spec.item!r}: {exc}"))
                methods[digest] = ""
                continue
        if not methods[digest]:
            problems.append((item.where, f"item {item.spec.item!r} is too large as well"))
            continue
        rows.append(
            store.ItemRow(
                item_code=item.spec.item,
                network_name=f"{assortment.name}/{item.spec.item}",
                spec_json=text,
                spec_hash=digest,
                method=methods[digest],
                unit_volume=item.spec.unit_volume,
            )
        )
    if problems:
        raise ItemUploadError(problems)
    stored = store.store_items(
        session,
        assortment.tenant_id,
        assortment.id,
        assortment.mode,
        rows,
        criteria_of(assortment),
    )
    return ItemsStored(
        received=len(items),
        created=stored.created,
        updated=stored.updated,
        unchanged=stored.unchanged,
        specifications=len(methods),
        jobs=stored.jobs,
    )


def _item_of(code: str, spec: dict[str, Any], old: Layout, unit_volume: float | None) -> ItemSpec:
    """The item's own numbers back from its composed specification: its locations, and the lane
    limits it set below the old layout's (0 for a lane of the old layout that its
    specification leaves out: the item was kept off it)."""
    layout_limits = {lane_key(lane.from_, lane.to): lane.max_units for lane in old.lanes}
    own = {lane_key(lane["from"], lane["to"]): lane["max_units"] for lane in spec["lanes"]}
    lane_limits = {key: 0 for key in layout_limits if key not in own}
    for key, units in own.items():
        if isinstance(units, int) and units != layout_limits.get(key):
            lane_limits[key] = units
    return ItemSpec.model_validate(
        {
            "item": code,
            "unit_volume": unit_volume or 1.0,
            "locations": {
                location["id"]: {k: v for k, v in location.items() if k != "id"}
                for location in spec["locations"]
            },
            "lane_limits": lane_limits,
        }
    )


def update_layout(
    session: Session, assortment: Assortment, layout: Layout, limits: SizeLimits
) -> ItemsStored:
    """The assortment's next layout, and every item composed on it (a new version where its
    specification changes; ItemUploadError naming the items that no longer fit). The stores
    and the name stay: items hold their numbers per store, and the name is part of every
    item's specification."""
    old = layout_of(assortment)
    if layout.name != old.name:
        raise ItemUploadError([("/name", f"the name stays {old.name!r}; create a new assortment")])
    if sorted(layout.location_ids) != sorted(old.location_ids):
        raise ItemUploadError(
            [("/locations", f"the stores stay {', '.join(old.location_ids)} (in any order)")]
        )
    keys = set(layout.lane_keys)
    items = store.current_items(session, assortment.id)
    texts = store.spec_texts(session, [item.version_id for item in items.values()])
    parsed: list[ParsedItem] = []
    problems: list[tuple[str, str]] = []
    for code, current in sorted(items.items()):
        spec = json.loads(texts[current.version_id])
        own = _item_of(code, spec, old, current.unit_volume)
        kept = {key: units for key, units in own.lane_limits.items() if key in keys}
        own = own.model_copy(update={"lane_limits": kept})
        try:
            parsed.append(ParsedItem(f"/items/{code}", own, compose_spec(layout, own)))
        except ValueError as exc:
            problems.append((f"/items/{code}", str(exc)))
    if problems:
        raise ItemUploadError(problems[:100])
    assortment.layout_json = layout.model_dump_json(by_alias=True)
    assortment.layout_version += 1
    return store_items(session, assortment, parsed, limits)
