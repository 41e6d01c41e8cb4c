"""Compact, checksummed storage of a solved policy.

The arrays of a PolicyResult are stored raw (little-endian, the narrowest integer type that holds
them), concatenated, and zlib-compressed into one blob. `layout` records each array's name,
dtype, shape and offset; `checksum` is the SHA-256 of the stored blob, checked before anything is
decoded, so a corrupt policy is never served. Round trips are bit-exact.

Per-state arrays have shape (phases, states); `meta` records `phases` (1 or 7). Policies stored
before weekly networks existed have 1-D per-state arrays, no `allowed` array and no `phases`:
they decode as one phase in which every flow of the table is allowed. Policies stored before
dispatch costs and floors existed have no `dispatch_costs` (a lane's cost was its unit cost
times the units) and no `floors` array: they decode with both at zero, which is what they were
solved with.

A priced policy (solver.PricedPolicy: prices, per-store values, certificate) is stored the same
way from its own `to_arrays()`; its meta says `"kind": "priced"` and holds the policy's own meta
under `priced`, and each array's layout entry keeps the dtype it had (`was`), so that
`PricedPolicy.from_arrays` gets back exactly what it gave. Meta without `kind` is an exact
PolicyResult, as every policy stored before priced ones existed.
"""

from __future__ import annotations

import hashlib
import json
import zlib
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import NDArray

from service.errors import CorruptPolicyError
from solver import PolicyResult
from solver.priced_result import PricedPolicy

__all__ = [
    "EncodedPolicy",
    "StoredPolicy",
    "decode_policy",
    "encode_policy",
]

StoredPolicy = PolicyResult | PricedPolicy

_ARRAYS = (
    "action",
    "flows",
    "values",
    "post_move_values",
    "lane_costs",
    "allowed",
    "dispatch_costs",
    "floors",
)
_PER_STATE = ("action", "values", "post_move_values")


@dataclass(frozen=True)
class EncodedPolicy:
    arrays: bytes
    layout: str
    checksum: str
    meta: str


def encode_policy(result: StoredPolicy) -> EncodedPolicy:
    if isinstance(result, PricedPolicy):
        arrays, priced_meta = result.to_arrays()
        return _encode(arrays, {"kind": "priced", "priced": priced_meta}, keep_dtype=True)
    meta = {
        "criterion": result.criterion,
        "method": result.method,
        "location_ids": list(result.location_ids),
        "capacities": list(result.capacities),
        "lanes": [list(lane) for lane in result.lanes],
        "phases": result.phases,
        "discount": result.discount,
        "gain": result.gain,
        "iterations": result.iterations,
        "evaluation_sweeps": result.evaluation_sweeps,
        "residual": result.residual,
        "error_bound": result.error_bound,
        "converged": result.converged,
        "seconds": dict(result.seconds),
    }
    return _encode({name: getattr(result, name) for name in _ARRAYS}, meta, keep_dtype=False)


def _encode(
    arrays: dict[str, NDArray[Any]], meta: dict[str, Any], *, keep_dtype: bool
) -> EncodedPolicy:
    parts: list[bytes] = []
    layout: list[dict[str, Any]] = []
    offset = 0
    for name, original in arrays.items():
        array = _narrow(np.asarray(original))
        data = array.tobytes(order="C")
        entry = {
            "name": name,
            "dtype": array.dtype.str,
            "shape": list(array.shape),
            "offset": offset,
        }
        if keep_dtype:
            entry["was"] = np.asarray(original).dtype.str
        layout.append(entry)
        parts.append(data)
        offset += len(data)
    blob = zlib.compress(b"".join(parts), level=6)
    return EncodedPolicy(
        arrays=blob,
        layout=json.dumps(layout, separators=(",", ":")),
        checksum=hashlib.sha256(blob).hexdigest(),
        meta=json.dumps(meta, separators=(",", ":")),
    )


def decode_policy(arrays: bytes, layout: str, checksum: str, meta: str) -> StoredPolicy:
    """Rebuild the PolicyResult or PricedPolicy; CorruptPolicyError when the blob does not match
    its checksum or its layout."""
    if hashlib.sha256(arrays).hexdigest() != checksum:
        raise CorruptPolicyError("stored policy does not match its checksum")
    try:
        raw = zlib.decompress(arrays)
        entries = json.loads(layout)
        decoded = {
            entry["name"]: _read(raw, entry["dtype"], entry["shape"], entry["offset"])
            for entry in entries
        }
        info = json.loads(meta)
        if info.get("kind") == "priced":
            restored = {
                entry["name"]: decoded[entry["name"]].astype(np.dtype(entry["was"]))
                for entry in entries
            }
            return PricedPolicy.from_arrays(restored, info["priced"])
        phases = int(info.get("phases", 1))
        per_state = {name: decoded[name].reshape(phases, -1) for name in _PER_STATE}
        flows = decoded["flows"].astype(np.int64)
        allowed = decoded.get("allowed")
        allowed = (
            np.ones((phases, flows.shape[0]), dtype=np.bool_)
            if allowed is None
            else allowed.astype(np.bool_).reshape(phases, flows.shape[0])
        )
        lane_costs = decoded["lane_costs"]
        dispatch_costs = decoded.get("dispatch_costs")
        floors = decoded.get("floors")
        n_locations = len(info["capacities"])
        return PolicyResult(
            criterion=info["criterion"],
            method=info["method"],
            location_ids=tuple(info["location_ids"]),
            capacities=tuple(info["capacities"]),
            lanes=tuple((int(a), int(b)) for a, b in info["lanes"]),
            lane_costs=lane_costs,
            dispatch_costs=np.zeros_like(lane_costs)
            if dispatch_costs is None
            else dispatch_costs.reshape(lane_costs.shape),
            flows=flows,
            phases=phases,
            allowed=allowed,
            floors=np.zeros((phases, n_locations), dtype=np.int64)
            if floors is None
            else floors.astype(np.int64).reshape(phases, n_locations),
            action=per_state["action"].astype(np.int64),
            values=per_state["values"],
            post_move_values=per_state["post_move_values"],
            discount=info["discount"],
            gain=info["gain"],
            iterations=info["iterations"],
            evaluation_sweeps=info["evaluation_sweeps"],
            residual=info["residual"],
            error_bound=info["error_bound"],
            converged=info["converged"],
            seconds=info["seconds"],
        )
    except (zlib.error, ValueError, KeyError, TypeError, IndexError) as exc:
        raise CorruptPolicyError(f"stored policy cannot be decoded: {exc}") from exc


def _narrow(array: NDArray[Any]) -> NDArray[Any]:
    """Integers in the narrowest unsigned type that holds them; booleans as one byte each;
    floats as little-endian f8."""
    if array.dtype == np.bool_:
        return array
    if np.issubdtype(array.dtype, np.integer):
        top = int(array.max()) if array.size else 0
        if array.size and int(array.min()) < 0:
            return array.astype("<i8")
        for dtype in ("<u1", "<u2", "<u4"):
            if top <= np.iinfo(np.dtype(dtype)).max:
                return array.astype(dtype)
        return array.astype("<u8")
    return np.ascontiguousarray(array, dtype="<f8")


def _read(raw: bytes, dtype: str, shape: list[int], offset: int) -> NDArray[Any]:
    count = int(np.prod(shape)) if shape else 1
    array = np.frombuffer(raw, dtype=np.dtype(dtype), count=count, offset=offset)
    return array.reshape(shape).copy()
