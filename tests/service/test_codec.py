"""Stored policies round-trip bit-exactly, and corruption is detected."""

from __future__ import annotations

import hashlib
import json
import zlib

import numpy as np
import pytest

from service.codec import decode_policy, encode_policy
from service.errors import CorruptPolicyError
from solver import NetworkSpec, PolicyResult, solve_network
from tests.service.api_support import weekly_document
from tests.solver.networks import two_stores


@pytest.fixture(scope="module", params=["discounted", "average"])
def result(request: pytest.FixtureRequest) -> PolicyResult:
    return solve_network(two_stores(capacities=(9, 7)), criterion=request.param)


def test_round_trip_is_bit_exact(result: PolicyResult) -> None:
    encoded = encode_policy(result)
    decoded = decode_policy(encoded.arrays, encoded.layout, encoded.checksum, encoded.meta)
    assert isinstance(decoded, PolicyResult)
    for name in ("action", "flows", "values", "post_move_values", "lane_costs"):
        original, restored = getattr(result, name), getattr(decoded, name)
        assert restored.shape == original.shape
        assert restored.tobytes() == original.astype(restored.dtype).tobytes()
        assert np.array_equal(restored, original)
    assert decoded.values.tobytes() == result.values.tobytes()
    for name in ("criterion", "location_ids", "capacities", "lanes", "gain", "iterations"):
        assert getattr(decoded, name) == getattr(result, name)
    assert decoded.recommend([9, 0]) == result.recommend([9, 0])


def test_integer_arrays_are_stored_narrow(result: PolicyResult) -> None:
    layout = {entry["name"]: entry for entry in json.loads(encode_policy(result).layout)}
    assert layout["action"]["dtype"] == "|u1"
    assert layout["values"]["dtype"] == "<f8"


@pytest.mark.parametrize("position", [0, 17, -1])
def test_a_flipped_byte_is_detected(result: PolicyResult, position: int) -> None:
    encoded = encode_policy(result)
    damaged = bytearray(encoded.arrays)
    damaged[position] ^= 0x01
    with pytest.raises(CorruptPolicyError, match="checksum"):
        decode_policy(bytes(damaged), encoded.layout, encoded.checksum, encoded.meta)


def test_a_layout_that_does_not_fit_is_detected(result: PolicyResult) -> None:
    encoded = encode_policy(result)
    layout = json.loads(encoded.layout)
    layout[0]["shape"] = [10**6]
    with pytest.raises(CorruptPolicyError, match="cannot be decoded"):
        decode_policy(encoded.arrays, json.dumps(layout), encoded.checksum, encoded.meta)


def test_weekly_policy_round_trips_with_its_phases() -> None:
    result = solve_network(NetworkSpec.model_validate(weekly_document()))
    encoded = encode_policy(result)
    assert json.loads(encoded.meta)["phases"] == 7
    decoded = decode_policy(encoded.arrays, encoded.layout, encoded.checksum, encoded.meta)
    assert isinstance(decoded, PolicyResult)
    assert decoded.phases == 7
    for name in ("action", "values", "post_move_values", "allowed"):
        restored, original = getattr(decoded, name), getattr(result, name)
        assert restored.shape == original.shape
        assert np.array_equal(restored, original)
    assert not decoded.allowed[6, 1:].any()  # no moves on Sunday night
    for phase in range(7):
        assert decoded.recommend([14, 0], phase=phase) == result.recommend([14, 0], phase=phase)


def test_policy_stored_before_weekly_networks_decodes_as_one_phase(result: PolicyResult) -> None:
    # What encode_policy wrote before phases existed: 1-D per-state arrays, no `allowed`
    # array, no `phases` in meta.
    arrays = {
        "action": result.action[0].astype("<u1"),
        "flows": result.flows.astype("<u1"),
        "values": result.values[0],
        "post_move_values": result.post_move_values[0],
        "lane_costs": result.lane_costs,
    }
    layout, parts, offset = [], [], 0
    for name, array in arrays.items():
        data = np.ascontiguousarray(array).tobytes()
        layout.append(
            {"name": name, "dtype": array.dtype.str, "shape": list(array.shape), "offset": offset}
        )
        parts.append(data)
        offset += len(data)
    blob = zlib.compress(b"".join(parts))
    meta = json.loads(encode_policy(result).meta)
    del meta["phases"]
    decoded = decode_policy(
        blob, json.dumps(layout), hashlib.sha256(blob).hexdigest(), json.dumps(meta)
    )
    assert isinstance(decoded, PolicyResult)
    assert decoded.phases == 1
    assert decoded.action.shape == decoded.values.shape == (1, result.n_states)
    assert decoded.allowed.shape == (1, result.n_flows) and decoded.allowed.all()
    assert np.array_equal(decoded.values, result.values)
    assert decoded.recommend([9, 0]) == result.recommend([9, 0])
