"""Stored policies round-trip bit-exactly, and corruption is detected."""

from __future__ import annotations

import json

import numpy as np
import pytest

from service.codec import CorruptPolicyError, decode_policy, encode_policy
from solver import PolicyResult, solve_network
from tests.solver.networks import two_stores


@pytest.fixture(scope="module", params=["discounted", "average"])
def result(request: pytest.FixtureRequest) -> PolicyResult:
    return solve_network(two_stores(capacities=(9, 7)), criterion=request.param)


def test_round_trip_is_bit_exact(result: PolicyResult) -> None:
    encoded = encode_policy(result)
    decoded = decode_policy(encoded.arrays, encoded.layout, encoded.checksum, encoded.meta)
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
