"""Shared lane capacity over items (solver.sharing) against the exact assignment.

Independent reference: the coupled assignment solved exactly as a 0-1 integer program by
scipy.optimize.milp (HiGHS branch and bound): one binary per candidate, one candidate per item,
the capacity of every shared lane.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pytest
from numpy.typing import NDArray
from scipy.optimize import Bounds, LinearConstraint, milp

from solver.sharing import ItemChoices, _best, _fit, _improve, _slack, allocate_shared_capacity


def random_choices(rng: np.random.Generator, items: int, lanes: int, rows: int) -> ItemChoices:
    """Items with a do-nothing candidate first and moves worth roughly their units."""
    item, flows, value = [], [], []
    for m in range(items):
        base = rng.normal(0.0, 5.0)
        item.append(m)
        flows.append(np.zeros(lanes, dtype=np.int64))
        value.append(base)
        for _ in range(rows - 1):
            flow = rng.integers(0, 3, size=lanes) * (rng.random(lanes) < 0.5)
            item.append(m)
            flows.append(flow)
            value.append(base + flow.sum() * rng.uniform(0.5, 3.0) - rng.uniform(0.0, 2.0))
    return ItemChoices(
        np.array(item, dtype=np.int64), np.array(flows, dtype=np.int64), np.array(value)
    )


def best_assignment(
    choices: ItemChoices, volume: NDArray[np.float64], capacity: NDArray[np.float64]
) -> float:
    """Reference: the optimal value by scipy.optimize.milp (HiGHS)."""
    k, m = choices.item.size, choices.n_items
    one_each = np.zeros((m, k))
    one_each[choices.item, np.arange(k)] = 1.0
    use = choices.flows * volume[choices.item][:, None]
    shared = np.isfinite(capacity)
    constraints = [LinearConstraint(one_each, 1.0, 1.0)]
    if shared.any():
        constraints.append(LinearConstraint(use[:, shared].T, -np.inf, capacity[shared]))
    result = milp(
        -choices.value, constraints=constraints, integrality=np.ones(k), bounds=Bounds(0, 1)
    )
    assert result.status == 0
    return float(-result.fun)


def instances(count: int) -> list[tuple[ItemChoices, NDArray[np.float64], NDArray[np.float64]]]:
    rng = np.random.default_rng(2026)
    cases = []
    for _ in range(count):
        lanes = int(rng.integers(1, 5))
        choices = random_choices(rng, int(rng.integers(3, 40)), lanes, int(rng.integers(2, 8)))
        volume = rng.choice([1.0, 0.5, 2.0], size=choices.n_items)
        capacity = rng.uniform(0.0, 10.0, size=lanes)
        capacity[rng.random(lanes) < 0.2] = np.inf
        cases.append((choices, volume, capacity))
    return cases


def test_bound_and_allocation_bracket_the_best_assignment() -> None:
    losses = []
    for choices, volume, capacity in instances(40):
        allocation = allocate_shared_capacity(choices, volume, capacity)
        best = best_assignment(choices, volume, capacity)
        scale = max(1.0, abs(best))
        # Reference: scipy.optimize.milp's optimum lies between the allocation and the bound.
        assert allocation.bound >= best - 1e-7 * scale
        assert allocation.value <= best + 1e-7 * scale
        assert np.all(allocation.load <= capacity + 1e-9)
        used = allocation.flows * volume[:, None]
        np.testing.assert_allclose(used.sum(axis=0), allocation.load)
        # Every item's flow is one of its own candidates.
        assert np.array_equal(choices.item[allocation.chosen], np.arange(choices.n_items))
        assert allocation.sharing_cost >= -1e-9
        losses.append((best - allocation.value) / scale)
    # The priced allocation is usually the best one outright, and never far from it here.
    assert np.median(losses) <= 1e-9
    assert max(losses) <= 0.15


def test_capacity_that_does_not_bind_leaves_every_item_its_best_move() -> None:
    for choices, volume, _ in instances(10):
        capacity = np.full(choices.flows.shape[1], 1e6)
        allocation = allocate_shared_capacity(choices, volume, capacity)
        starts = choices.starts
        best = np.maximum.reduceat(choices.value, starts)
        np.testing.assert_allclose(choices.value[allocation.chosen], best)
        assert allocation.sharing_cost == pytest.approx(0.0, abs=1e-9)
        assert allocation.gap == pytest.approx(0.0, abs=1e-9)
        assert not allocation.prices.any()


def test_no_capacity_moves_nothing() -> None:
    choices, volume, _ = instances(1)[0]
    closed = np.zeros(choices.flows.shape[1])
    allocation = allocate_shared_capacity(choices, volume, closed)
    assert not allocation.flows.any()
    # Reference: with nothing allowed to move, milp's best assignment is the do-nothing one.
    assert allocation.value == pytest.approx(best_assignment(choices, volume, closed))
    assert allocation.bound >= allocation.value


def test_a_scarce_truck_goes_to_the_item_that_values_it_most() -> None:
    # Two items, one lane with room for 2 units: item 0 gains 10 a unit, item 1 gains 4.
    choices = ItemChoices(
        np.array([0, 0, 0, 1, 1, 1]),
        np.array([[0], [1], [2], [0], [1], [2]]),
        np.array([0.0, 10.0, 20.0, 0.0, 4.0, 8.0]),
    )
    allocation = allocate_shared_capacity(choices, np.ones(2), np.array([2.0]))
    assert allocation.flows.tolist() == [[2], [0]]
    assert allocation.value == pytest.approx(20.0)
    assert allocation.sharing_cost == pytest.approx(8.0)
    assert 4.0 <= allocation.prices[0] <= 10.0


def test_bulky_items_use_more_of_the_truck() -> None:
    # The same two items, but item 0 fills 3 units of capacity per unit moved. On a truck of 3,
    # by hand: one unit of item 0 (10) beats three... item 1 has only two units (8): item 0.
    choices = ItemChoices(
        np.array([0, 0, 0, 1, 1, 1]),
        np.array([[0], [1], [2], [0], [1], [2]]),
        np.array([0.0, 10.0, 20.0, 0.0, 4.0, 8.0]),
    )
    allocation = allocate_shared_capacity(choices, np.array([3.0, 1.0]), np.array([3.0]))
    assert allocation.flows.tolist() == [[1], [0]]
    # With room for 4, item 0's one unit (3) and item 1's one unit (1) both fit.
    allocation = allocate_shared_capacity(choices, np.array([3.0, 1.0]), np.array([4.0]))
    assert allocation.flows.tolist() == [[1], [1]]


@pytest.mark.parametrize(
    ("item", "flows", "value", "message"),
    [
        ([0, 0], [[1], [2]], [1.0, 2.0], "no candidate that moves nothing"),
        ([0, 2], [[0], [0]], [1.0, 2.0], "grouped by item"),
        ([0, 0], [[0], [-1]], [1.0, 2.0], "non-negative"),
    ],
)
def test_malformed_choices_are_refused(
    item: list[int], flows: list[list[int]], value: list[float], message: str
) -> None:
    with pytest.raises(ValueError, match=message):
        ItemChoices(np.array(item), np.array(flows), np.array(value))


def test_capacity_and_volume_are_checked() -> None:
    choices = ItemChoices(np.array([0, 0]), np.array([[0], [1]]), np.array([0.0, 1.0]))
    with pytest.raises(ValueError, match="positive numbers"):
        allocate_shared_capacity(choices, np.array([0.0]), np.array([1.0]))
    with pytest.raises(ValueError, match="numbers >= 0"):
        allocate_shared_capacity(choices, np.array([1.0]), np.array([-1.0]))


def scan_fit(choices: ItemChoices, use: NDArray[np.float64], cap: NDArray[np.float64]) -> Any:
    """The repair by its definition: each time, over every candidate, the switch that frees
    over-capacity load at the least loss per unit freed and overloads no other lane."""
    chosen = _best(choices.value, choices.starts)
    item, limit = choices.item, cap + _slack(cap)
    load = use[chosen].sum(axis=0)
    while (over := load > limit).any():
        delta = use[chosen[item]] - use
        freed = np.where(over, delta, 0.0).sum(axis=1)
        fits = np.all((load - delta <= limit) | over, axis=1)
        ok = (freed > 0) & fits
        if not ok.any():
            break
        loss = choices.value[chosen[item]] - choices.value
        k = int(np.argmin(np.where(ok, loss / np.where(ok, freed, 1.0), np.inf)))
        load -= delta[k]
        chosen[item[k]] = k
    return chosen


def scan_improve(
    choices: ItemChoices, use: NDArray[np.float64], cap: NDArray[np.float64], chosen: Any
) -> Any:
    """Improvement by its definition: each time, the best gaining switch over every candidate
    that fits."""
    chosen = chosen.copy()
    item, limit = choices.item, cap + _slack(cap)
    load = use[chosen].sum(axis=0)
    while True:
        delta = use - use[chosen[item]]
        fits = np.all(load + delta <= limit, axis=1)
        gain = np.where(fits, choices.value - choices.value[chosen[item]], -np.inf)
        k = int(np.argmax(gain))
        if not gain[k] > 1e-9 * max(1.0, abs(float(choices.value[k]))):
            return chosen
        load += delta[k]
        chosen[item[k]] = k


def test_queued_switches_are_the_switches_of_a_full_scan() -> None:
    # _fit and _improve take switches from a queue instead of scanning every candidate per
    # switch; they must make the very same switches as the scan.
    rng = np.random.default_rng(77)
    for _ in range(60):
        lanes = int(rng.integers(1, 6))
        choices = random_choices(rng, int(rng.integers(5, 150)), lanes, int(rng.integers(2, 9)))
        volume = rng.choice([1.0, 0.5, 2.0], size=choices.n_items)
        capacity = rng.uniform(0.0, 30.0, size=lanes)
        use = choices.flows * volume[choices.item][:, None]
        start = _best(choices.value, choices.starts)
        fitted = _fit(choices, use, capacity, start, locked=-1)
        np.testing.assert_array_equal(fitted, scan_fit(choices, use, capacity))
        np.testing.assert_array_equal(
            _improve(choices, use, capacity, fitted), scan_improve(choices, use, capacity, fitted)
        )
