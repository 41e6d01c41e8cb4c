"""The whole policy table, for ERP import: stock levels, flows per lane, value. Streamed.

Every CSV row starts with the `version` and `criterion` of the policy served (so that a file
saved on its own still says what it is; any CSV reader takes them as two more columns). A weekly
network's policy has one table per weekday of the closing count: its rows go on with a
`weekday` column (mon .. sun), Monday's rows first; a stationary policy has no such column."""

from __future__ import annotations

import io
import json
from collections.abc import Iterator
from typing import Annotated, Any, Literal

import numpy as np
from fastapi import APIRouter, Query
from fastapi.responses import StreamingResponse

from service.api.deps import CacheDep, NetworkId, Reader, SessionDep, get_network
from service.policies import ServedPolicy, load_policy
from service.problems import POLICY_NOT_READY
from service.schemas import DEFAULT_CRITERION_RULE, CriterionName
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
        "with `columns`, `version`, `criterion` and `profit_per_day`.",
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
    criterion: Annotated[CriterionName | None, Query(description=DEFAULT_CRITERION_RULE)] = None,
) -> StreamingResponse:
    network = get_network(session, caller.tenant_id, network_id)
    served = load_policy(session, cache, network, criterion)
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
    return [*weekday, *ids, *lanes, "value"]


def _chunks(served: ServedPolicy) -> Iterator[tuple[list[str], np.ndarray, np.ndarray, np.ndarray]]:
    """Rows in blocks: (leading weekday cells, stock, units per lane, value)."""
    result = served.result
    for phase in range(result.phases):
        lead = [WEEKDAYS[phase]] if result.phases > 1 else []
        for start in range(0, result.n_states, _ROWS_PER_CHUNK):
            index = np.arange(start, min(start + _ROWS_PER_CHUNK, result.n_states))
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
    head = {
        "network_id": network_id,
        "version": served.version_number,
        "criterion": served.criterion,
        "profit_per_day": served.result.gain,
        "columns": _columns(served),
    }
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
