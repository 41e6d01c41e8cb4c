"""The whole policy table, for ERP import: stock levels, flows per lane, value. Streamed.

Every CSV row starts with the `version` and `criterion` of the policy served (so that a file
saved on its own still says what it is; any CSV reader takes them as two more columns). A weekly
network's policy has one table per weekday of the closing count: its rows go on with a
`weekday` column (mon .. sun), Monday's rows first; a stationary policy has no such column.

A priced policy has no stored table: its JSON export gives its lane prices, per-store values and
certificate, and the rows (the plan and the upper bound at every stock, computed on the fly) only
when its stock states fit the export limit (service.priced.FULL_TABLE_MAX_STATES); its CSV export
is the table, and refused beyond that limit."""

from __future__ import annotations

import io
import json
from collections.abc import Iterator
from typing import Annotated, Any, Literal

import numpy as np
from fastapi import APIRouter, Query
from fastapi.responses import StreamingResponse

from service.api.deps import CacheDep, NetworkId, Reader, SessionDep, get_network
from service.api.schemas.common import DEFAULT_CRITERION_RULE
from service.api.views import certificate_out
from service.priced import FULL_TABLE_MAX_STATES, all_stocks
from service.problems import POLICY_NOT_READY, InvalidInput
from service.serving import ServedPolicy, load_policy
from solver import Criterion
from solver.priced_result import PricedPolicy
from solver.spec import WEEKDAYS

router = APIRouter(tags=["policies"])

_ROWS_PER_CHUNK = 4096

_EXPORT_DOC: dict[int | str, dict[str, Any]] = {
    **POLICY_NOT_READY,
    200: {
        "description": "The policy table. CSV: one row per closing stock, columns: the "
        "policy's `version` and `criterion` (the same on every row), the stock of each "
        "location, the units on each lane (`from->to`), the value; for a network with weekly "
        "fields the stock is preceded by the `weekday` of the closing count (mon .. sun), one "
        "table per weekday. JSON: the same rows (without version and criterion) under `rows`, "
        "with `columns`, `version`, `criterion` and `profit_per_day`. A priced network (`method` "
        "priced) has the plan at each stock and its `upper_bound` in place of the value, "
        "`prices`, `network_price`, `store_values` and its `certificate`; its `rows` only when "
        f"it has at most {FULL_TABLE_MAX_STATES:,} stock states (CSV: refused beyond).",
        "content": {"text/csv": {"schema": {"type": "string"}}, "application/json": {}},
    },
}


@router.get(
    "/v1/networks/{network_id}/policy", response_class=StreamingResponse, responses=_EXPORT_DOC
)
def export_policy(
    network_id: NetworkId,
    session: SessionDep,
    cache: CacheDep,
    caller: Reader,
    format: Annotated[Literal["json", "csv"], Query()] = "json",
    criterion: Annotated[Criterion | None, Query(description=DEFAULT_CRITERION_RULE)] = None,
) -> StreamingResponse:
    network = get_network(session, caller.tenant_id, network_id)
    served = load_policy(session, cache, network, criterion)
    result = served.result
    fits = result.n_states * result.phases <= FULL_TABLE_MAX_STATES
    if isinstance(result, PricedPolicy) and format == "csv" and not fits:
        raise InvalidInput(
            f"network {network_id} is priced and has {result.n_states:,} stock states, more "
            f"than the {FULL_TABLE_MAX_STATES:,} a table lists; format=json gives its prices "
            "and per-store values",
            [("query:/format", "csv lists every stock state; use json")],
        )
    headers = {
        "X-Policy-Version": str(served.version_number),
        "Content-Disposition": f'attachment; filename="network-{network_id}-policy.{format}"',
    }
    if format == "csv":
        return StreamingResponse(_csv(served), media_type="text/csv", headers=headers)
    return StreamingResponse(
        _json(served, network_id), media_type="application/json", headers=headers
    )


def _columns(served: ServedPolicy) -> list[str]:
    result = served.result
    ids = result.location_ids
    lanes = [f"{ids[a]}->{ids[b]}" for a, b in result.lanes]
    weekday = ["weekday"] if result.phases > 1 else []
    last = "upper_bound" if isinstance(result, PricedPolicy) else "value"
    return [*weekday, *ids, *lanes, last]


def _chunks(served: ServedPolicy) -> Iterator[tuple[list[str], np.ndarray, np.ndarray, np.ndarray]]:
    """Rows in blocks: (leading weekday cells, stock, units per lane, value)."""
    result = served.result
    for phase in range(result.phases):
        lead: list[str] = [WEEKDAYS[phase]] if result.phases > 1 else []
        for start in range(0, result.n_states, _ROWS_PER_CHUNK):
            stop = min(start + _ROWS_PER_CHUNK, result.n_states)
            if isinstance(result, PricedPolicy):
                stock = all_stocks(result, start, stop)
                bounds = [result.upper_bound(s, phase=phase) for s in stock.tolist()]
                yield lead, stock, result.plan_batch(stock, phase=phase), np.array(bounds)
                continue
            index = np.arange(start, stop)
            stock = np.stack(np.unravel_index(index, result.shape), axis=1)
            flows = result.flows[result.action[phase, index]]
            yield lead, stock, flows, result.values[phase, index]


def _csv(served: ServedPolicy) -> Iterator[str]:
    yield ",".join(["version", "criterion", *_columns(served)]) + "\n"
    for lead, stock, flows, values in _chunks(served):
        buffer = io.StringIO()
        for s, f, v in zip(stock.tolist(), flows.tolist(), values.tolist(), strict=True):
            cells = (served.version_number, served.criterion, *lead, *s, *f)
            buffer.write(",".join(map(str, cells)) + f",{v!r}\n")
        yield buffer.getvalue()


def _json(served: ServedPolicy, network_id: NetworkId) -> Iterator[str]:
    result = served.result
    head: dict[str, Any] = {
        "network_id": network_id,
        "version": served.version_number,
        "criterion": served.criterion,
        "profit_per_day": result.gain,
        "columns": _columns(served),
    }
    if isinstance(result, PricedPolicy):
        head |= _priced_head(result)
        if result.n_states * result.phases > FULL_TABLE_MAX_STATES:
            yield json.dumps(head)
            return
    yield json.dumps(head)[:-1] + ', "rows": ['
    first = True
    for lead, stock, flows, values in _chunks(served):
        rows = [
            [*lead, *s, *f, v]
            for s, f, v in zip(stock.tolist(), flows.tolist(), values.tolist(), strict=True)
        ]
        text = json.dumps(rows)[1:-1]
        yield text if first else "," + text
        first = False
    yield "]}"


def _priced_head(result: PricedPolicy) -> dict[str, Any]:
    """A priced policy's prices (per phase, per lane and for the network limit; currency per
    unit), each store's values by stock (per phase; index = units on hand) and certificate."""
    return {
        "method": "priced",
        "prices": np.asarray(result.prices).tolist(),
        "network_price": np.asarray(result.network_price).tolist(),
        "store_values": {
            location: np.asarray(values).tolist()
            for location, values in zip(result.location_ids, result.store_values, strict=True)
        },
        "certificate": certificate_out(result).model_dump(mode="json"),
        "rows_omitted": result.n_states * result.phases > FULL_TABLE_MAX_STATES,
    }
