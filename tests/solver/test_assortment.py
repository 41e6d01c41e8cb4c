"""Tonight's moves of a whole assortment (solver.assortment).

Scenario of our own: three hardware stores (harbour, hill, market) stock many items over one
set of lanes; items differ in capacities, margins, demand, lane limits (an item's own limit
below the layout's, or none: an item kept off a lane has a network without it, its lanes listed
in another order), floors, weekly demand, criterion and solving mode.

Checks: every item's moves and values equal its own policy's single-stock recommendation (the
per-item answer the service serves today), for exact stationary, average-criterion, weekly and
priced policies mixed in one call; bad input is refused with the item and location named; with
shared truck capacity the capacity is never exceeded (units and volumes), a capacity that does
not bind leaves the uncoupled moves exactly, and on small coupled instances the allocation and
its bound bracket the best assignment found by scipy.optimize.milp (HiGHS branch and bound, an
outside reference) over every flow the items could send tonight, enumerated here by brute force.
Items kept off a lane never move on it, even where an item of the same numbers on every lane
does, and the other items still share its truck.
"""

from __future__ import annotations

import dataclasses
import itertools
from functools import cache
from typing import Any

import numpy as np
import pytest
from numpy.typing import NDArray
from scipy.optimize import Bounds, LinearConstraint, milp

from solver import InvalidStockError, NetworkSpec, PolicyResult, PricedPolicy, solve_network
from solver.assortment import ItemPolicy, assortment_moves
from solver.priced import solve_priced
from tests.solver.networks import negative_binomial, poisson, weekly
from tests.solver.test_priced import QUICK

STORES = ("harbour", "hill", "market")
# (from, to, unit cost, layout limit, dispatch cost)
LANES = (
    ("harbour", "hill", 1.2, 3, 0.0),
    ("hill", "harbour", 1.0, 2, 0.0),
    ("hill", "market", 0.8, 2, 2.5),
    ("market", "hill", 0.9, 2, 0.0),
    ("harbour", "market", 1.6, 2, 0.0),
)
LAYOUT_LANES = tuple((a, b) for a, b, *_ in LANES)


def item_network(
    capacities: tuple[int, int, int],
    means: tuple[float, float, float],
    margins: tuple[float, float, float] = (9.0, 11.0, 10.0),
    *,
    limits: dict[int, Any] | None = None,
    floors: tuple[int, int, int] = (0, 0, 0),
    weekend_peak: bool = False,
    negative_binomial_at: int | None = None,
) -> NetworkSpec:
    """One item over the layout; `limits` replaces some lanes' limits for this item (never above
    the layout's)."""
    locations: list[dict[str, Any]] = []
    for i, store in enumerate(STORES):
        demand: dict[str, Any] = poisson(means[i])
        if i == negative_binomial_at:
            demand = negative_binomial(means[i], 2.5 * means[i])
        if weekend_peak and i == 0:
            demand = weekly(*(poisson(means[i] * f) for f in (0.7, 0.7, 0.8, 0.9, 1.4, 1.8, 1.2)))
        locations.append(
            {
                "id": store,
                "capacity": capacities[i],
                "unit_margin": margins[i],
                "holding_cost": 0.15,
                "stockout_penalty": 1.0,
                "demand": demand,
                "replenishment": poisson(round(0.9 * sum(means) / 3, 2)),
                "keep_at_least": floors[i],
            }
        )
    lanes = [
        {
            "from": a,
            "to": b,
            "unit_cost": cost,
            "max_units": (limits or {}).get(k, limit),
            "dispatch_cost": dispatch,
        }
        for k, (a, b, cost, limit, dispatch) in enumerate(LANES)
    ]
    return NetworkSpec.model_validate(
        {"name": "hardware item", "discount": 0.95, "locations": locations, "lanes": lanes}
    )


@cache
def policies() -> tuple[ItemPolicy, ...]:
    """Exact stationary (two), average criterion, floors and a lowered lane limit, weekly,
    and priced; different capacities per item."""
    return (
        solve_network(item_network((5, 4, 5), (1.2, 0.6, 1.5))),
        solve_network(item_network((4, 6, 3), (0.5, 1.8, 0.9), (14.0, 8.0, 12.0))),
        solve_network(
            item_network((5, 5, 4), (1.0, 1.0, 0.4), negative_binomial_at=2), criterion="average"
        ),
        solve_network(
            item_network((6, 4, 4), (1.5, 0.3, 1.1), limits={0: 1, 4: 1}, floors=(2, 1, 0))
        ),
        solve_network(
            item_network(
                (4, 4, 4),
                (0.9, 0.6, 1.0),
                weekend_peak=True,
                limits={0: weekly(3, 3, 3, 3, 2, 2, 0)},
            )
        ),
        solve_priced(item_network((6, 5, 5), (1.4, 0.5, 1.2)), options=QUICK),
    )


def kept_off(spec: NetworkSpec, lane: int) -> NetworkSpec:
    """The item's network without one lane of the layout (the item is kept off it), its other
    lanes listed in reverse order: assortment_moves must match lanes by their ends."""
    document = spec.model_dump(mode="json", by_alias=True)
    document["lanes"] = [own for k, own in enumerate(document["lanes"]) if k != lane][::-1]
    return NetworkSpec.model_validate(document)


@cache
def kept_off_policies() -> tuple[ItemPolicy, ...]:
    """Exact and priced items kept off harbour -> hill, with the numbers of policies()[0] and
    policies()[5] (which may use every lane)."""
    return (
        solve_network(kept_off(item_network((5, 4, 5), (1.2, 0.6, 1.5)), 0)),
        solve_priced(kept_off(item_network((6, 5, 5), (1.4, 0.5, 1.2)), 0), options=QUICK),
    )


def on_layout(policy: ItemPolicy, flow: tuple[int, ...] | NDArray[np.int64]) -> NDArray[np.int64]:
    """A flow over the policy's own lanes placed over the layout's lanes, by the lanes' ends."""
    ids = policy.location_ids
    placed = np.zeros(len(LANES), dtype=np.int64)
    for (a, b), units in zip(policy.lanes, flow, strict=True):
        placed[LAYOUT_LANES.index((ids[a], ids[b]))] = units
    return placed


def own_lanes(policy: ItemPolicy, flow: NDArray[np.int64]) -> NDArray[np.int64]:
    """A flow over the layout's lanes taken back to the policy's own lanes."""
    ids = policy.location_ids
    return np.array([flow[LAYOUT_LANES.index((ids[a], ids[b]))] for a, b in policy.lanes])


def random_stocks(
    rng: np.random.Generator, pols: tuple[ItemPolicy, ...], policy_of: NDArray[np.int64]
) -> NDArray[np.int64]:
    caps = np.array([p.capacities for p in pols])[policy_of]
    stocks: NDArray[np.int64] = rng.integers(0, caps + 1)
    return stocks


def assert_matches_recommendations(
    pols: tuple[ItemPolicy, ...],
    policy_of: NDArray[np.int64],
    stocks: NDArray[np.int64],
    weekday: int,
    lanes: tuple[tuple[str, str], ...] | None = None,
) -> None:
    moves = assortment_moves(pols, policy_of, stocks, weekday=weekday, lanes=lanes)
    assert moves.sharing is None
    for m, (p, stock) in enumerate(zip(policy_of, stocks, strict=True)):
        policy = pols[p]
        single = policy.recommend(tuple(int(u) for u in stock), phase=policy.phase_of(weekday))
        np.testing.assert_array_equal(moves.flows[m], on_layout(policy, single.flows), str(m))
        assert tuple(moves.post_move_stock[m]) == single.post_move_stock, m
        np.testing.assert_allclose(moves.value[m], single.expected_value, rtol=1e-12, atol=1e-9)
        np.testing.assert_allclose(
            moves.value_without_moves[m], single.value_without_transfers, rtol=1e-12, atol=1e-9
        )
        np.testing.assert_allclose(
            moves.transfer_cost[m], single.transfer_cost, rtol=1e-12, atol=1e-12
        )
        np.testing.assert_allclose(moves.gain[m], single.gain_from_transfers, atol=1e-9)


@pytest.mark.parametrize("weekday", [0, 4, 5])
def test_every_item_moves_as_its_own_policy_recommends(weekday: int) -> None:
    pols = policies()
    assert sum(isinstance(p, PricedPolicy) for p in pols) == 1
    assert sum(isinstance(p, PolicyResult) and p.phases == 7 for p in pols) == 1
    rng = np.random.default_rng(16 + weekday)
    policy_of = rng.integers(0, len(pols), size=600)
    assert set(policy_of) == set(range(len(pols)))
    assert_matches_recommendations(pols, policy_of, random_stocks(rng, pols, policy_of), weekday)


def test_every_stock_of_every_exact_policy_matches() -> None:
    pols = policies()
    policy_of, stocks = [], []
    for p, policy in enumerate(pols):
        if isinstance(policy, PolicyResult):
            for stock in itertools.product(*(range(c + 1) for c in policy.capacities)):
                policy_of.append(p)
                stocks.append(stock)
    order = np.random.default_rng(3).permutation(len(stocks))  # items of a policy interleaved
    assert_matches_recommendations(
        pols, np.array(policy_of)[order], np.array(stocks, dtype=np.int64)[order], 5
    )


def test_the_weekday_picks_the_weekly_policys_night() -> None:
    pols = policies()
    weekly_policy = pols[4]
    assert isinstance(weekly_policy, PolicyResult) and weekly_policy.phases == 7
    stocks = np.array(list(itertools.product(range(5), repeat=3)), dtype=np.int64)
    nights = [
        assortment_moves(pols, np.full(len(stocks), 4), stocks, weekday=d).flows for d in range(7)
    ]
    # The weekend peak at the harbour makes some nights' moves differ from others'.
    assert any(not np.array_equal(nights[0], other) for other in nights[1:])


def test_no_items() -> None:
    moves = assortment_moves(policies(), np.zeros(0, dtype=np.int64), np.zeros((0, 3), np.int64))
    assert moves.flows.shape == (0, len(LANES))
    assert moves.value.shape == (0,)


# -- errors ------------------------------------------------------------------------------------


def test_a_negative_stock_names_the_item_and_location() -> None:
    stocks = np.array([[1, 1, 1], [2, -1, 0], [0, -3, 0]])
    with pytest.raises(InvalidStockError, match=r"item 'SAW-7' at 'hill' is -1, outside 0\.\.4"):
        assortment_moves(policies(), [0, 0, 0], stocks, item_ids=["DRL-18V", "SAW-7", "TAPE"])


def test_a_stock_above_the_items_own_capacity_is_refused() -> None:
    pols = policies()
    # Market holds 5 units of item 0 but only 3 of item 1.
    assortment_moves(pols, [0, 1], [[0, 0, 5], [0, 0, 3]])
    with pytest.raises(InvalidStockError, match=r"item 1 at 'market' is 5, outside 0\.\.3"):
        assortment_moves(pols, [0, 1], [[0, 0, 5], [0, 0, 5]])


@pytest.mark.parametrize(
    ("stocks", "message"),
    [
        ([[1, 1], [1, 1]], r"shape \(2, 3\)"),
        ([[1.0, 1.0, 1.0], [1.5, 0.0, 0.0]], "whole units"),
    ],
)
def test_malformed_stocks_are_refused(stocks: list[list[float]], message: str) -> None:
    with pytest.raises(InvalidStockError, match=message):
        assortment_moves(policies(), [0, 1], stocks)


def test_policies_must_share_one_layout() -> None:
    document = item_network((3, 3, 3), (1.0, 1.0, 1.0)).model_dump(mode="json", by_alias=True)
    one_lane = {"from": "harbour", "to": "hill", "unit_cost": 1.0, "max_units": 1}
    other = solve_network(NetworkSpec.model_validate({**document, "lanes": [one_lane]}))
    with pytest.raises(ValueError, match="policy 1 is over other lanes than policy 0"):
        assortment_moves([policies()[0], other], [0, 1], [[0, 0, 0], [0, 0, 0]])
    # The same stores in another order: the stocks' columns would mean other stores.
    document["locations"].reverse()
    turned = solve_network(NetworkSpec.model_validate(document))
    with pytest.raises(ValueError, match="policy 1 is over other locations than policy 0"):
        assortment_moves(
            [policies()[0], turned], [0, 1], [[0, 0, 0], [0, 0, 0]], lanes=LAYOUT_LANES
        )


def test_bad_policy_index_weekday_and_names_are_refused() -> None:
    pols = policies()
    with pytest.raises(ValueError, match="item 1 refers to policy 6, but there are 6"):
        assortment_moves(pols, [0, 6], [[0, 0, 0], [0, 0, 0]])
    with pytest.raises(ValueError, match="weekday"):
        assortment_moves(pols, [0], [[0, 0, 0]], weekday=7)
    with pytest.raises(ValueError, match="item_ids must name 1"):
        assortment_moves(pols, [0], [[0, 0, 0]], item_ids=["A", "B"])
    with pytest.raises(ValueError, match="policy_of"):
        assortment_moves(pols, [0.5], [[0, 0, 0]])


# -- shared truck capacity ---------------------------------------------------------------------


def mixed_assortment(seed: int, items: int) -> tuple[NDArray[np.int64], NDArray[np.int64]]:
    rng = np.random.default_rng(seed)
    pols = policies()
    policy_of = rng.integers(0, len(pols), size=items)
    return policy_of, random_stocks(rng, pols, policy_of)


@pytest.mark.parametrize("weekday", [2, 5])
def test_a_capacity_that_does_not_bind_gives_the_uncoupled_moves(weekday: int) -> None:
    pols = policies()
    policy_of, stocks = mixed_assortment(7, 400)
    free = assortment_moves(pols, policy_of, stocks, weekday=weekday)
    loads = free.flows.sum(axis=0)
    assert loads.min() > 0
    for capacity in (np.full(len(LANES), np.inf), loads.astype(float), loads + 10.0):
        shared = assortment_moves(pols, policy_of, stocks, weekday=weekday, truck_capacity=capacity)
        assert shared.sharing is not None
        np.testing.assert_array_equal(shared.flows, free.flows)
        np.testing.assert_array_equal(shared.value, free.value)
        np.testing.assert_array_equal(shared.transfer_cost, free.transfer_cost)
        np.testing.assert_array_equal(shared.post_move_stock, free.post_move_stock)
        assert shared.sharing.sharing_cost == 0.0
        assert shared.sharing.gap == pytest.approx(0.0, abs=1e-9)
        np.testing.assert_allclose(shared.sharing.value, free.value.sum(), rtol=1e-12)


def feasible_tonight(policy: ItemPolicy, stock: NDArray[np.int64], flow: NDArray[np.int64]) -> bool:
    """Brute force from the rules: units sent held, floors kept after sending, capacity kept."""
    out = np.zeros(3, dtype=np.int64)
    inn = np.zeros(3, dtype=np.int64)
    for (a, b), units in zip(policy.lanes, flow, strict=True):
        out[a] += units
        inn[b] += units
    after = stock - out + inn
    caps = np.array(policy.capacities)
    floors = policy.floors[0]
    return bool(
        np.all(out <= stock) and np.all(after <= caps) and np.all((out == 0) | (after >= floors))
    )


@pytest.mark.parametrize("volumes", [False, True])
def test_a_binding_capacity_is_never_exceeded(volumes: bool) -> None:
    pols = policies()
    policy_of, stocks = mixed_assortment(11, 500)
    free = assortment_moves(pols, policy_of, stocks)
    rng = np.random.default_rng(5)
    volume = (
        rng.choice([0.5, 1.0, 2.5], size=policy_of.size) if volumes else np.ones(policy_of.size)
    )
    loads = (free.flows * volume[:, None]).sum(axis=0)
    capacity = np.floor(loads * np.array([0.3, 0.6, 0.0, 1.5, 0.5]))
    capacity[3] = np.inf
    shared = assortment_moves(
        pols,
        policy_of,
        stocks,
        truck_capacity=capacity,
        unit_volume=volume if volumes else None,
    )
    allocation = shared.sharing
    assert allocation is not None
    used = (shared.flows * volume[:, None]).sum(axis=0)
    assert np.all(used <= capacity + 1e-9)
    np.testing.assert_allclose(allocation.load, used)
    assert not shared.flows[:, 2].any()  # no room at all on hill -> market
    assert allocation.value <= allocation.unconstrained_value
    assert allocation.sharing_cost > 0.0
    assert allocation.bound >= allocation.value
    np.testing.assert_allclose(allocation.unconstrained_value, free.value.sum(), rtol=1e-9)
    # Every item still makes a move its own rules allow, valued on its own scale, and no item
    # is worse off than moving nothing.
    for m, p in enumerate(policy_of):
        assert feasible_tonight(pols[p], stocks[m], shared.flows[m]), m
    assert np.all(shared.value >= shared.value_without_moves - 1e-9)
    exact = np.array([isinstance(pols[p], PolicyResult) for p in policy_of])
    stationary = exact & np.array([pols[p].phases == 1 for p in policy_of])
    for m in np.flatnonzero(stationary)[:60]:
        policy = pols[policy_of[m]]
        assert isinstance(policy, PolicyResult)
        post = tuple(int(u) for u in shared.post_move_stock[m])
        u = policy.post_move_values[0, policy.state_index(post)] - (policy.gain or 0.0)
        np.testing.assert_allclose(shared.value[m], u - shared.transfer_cost[m], atol=1e-9)


def every_candidate(
    policy: PolicyResult, stock: NDArray[np.int64]
) -> tuple[NDArray[np.int64], NDArray[np.float64]]:
    """Every flow an item could send tonight (all integer flows within the lane limits, by
    brute force rather than the policy's table) and its value U(y) - cost."""
    limits = [int(np.max(policy.flows[:, lane])) for lane in range(len(policy.lanes))]
    flows, values = [], []
    for flow in itertools.product(*(range(u + 1) for u in limits)):
        f = np.array(flow, dtype=np.int64)
        if not feasible_tonight(policy, stock, f):
            continue
        out = np.zeros(3, dtype=np.int64)
        for (a, b), units in zip(policy.lanes, f, strict=True):
            out[a] -= units
            out[b] += units
        post = tuple(int(u) for u in stock + out)
        cost = float(f @ policy.lane_costs + (f > 0) @ policy.dispatch_costs)
        flows.append(f)
        values.append(
            policy.post_move_values[0, policy.state_index(post)] - cost - (policy.gain or 0.0)
        )
    return np.array(flows), np.array(values)


def test_allocation_and_bound_bracket_the_best_assignment_by_milp() -> None:
    pols = policies()
    exact = [p for p, policy in enumerate(pols) if isinstance(policy, PolicyResult)]
    stationary = [p for p in exact if pols[p].phases == 1]
    rng = np.random.default_rng(2026)
    misses: list[float] = []
    for trial in range(10):
        policy_of = rng.choice(stationary, size=int(rng.integers(4, 9)))
        stocks = random_stocks(rng, pols, policy_of)
        free = assortment_moves(pols, policy_of, stocks)
        loads = free.flows.sum(axis=0)
        if not loads.any():
            continue
        capacity = np.floor(loads * rng.uniform(0.2, 0.8, size=len(LANES)))
        volume = rng.choice([1.0, 2.0], size=policy_of.size)
        shared = assortment_moves(
            pols, policy_of, stocks, truck_capacity=capacity, unit_volume=volume
        )
        allocation = shared.sharing
        assert allocation is not None

        # Reference: scipy.optimize.milp (HiGHS) on one binary per item and brute-force flow,
        # one flow per item, the shared capacity of every lane.
        item, flows, values = [], [], []
        for m, p in enumerate(policy_of):
            policy = pols[p]
            assert isinstance(policy, PolicyResult)
            f, q = every_candidate(policy, stocks[m])
            item += [m] * len(q)
            flows.append(f)
            values.append(q)
        f_all = np.vstack(flows)
        q_all = np.concatenate(values)
        one_each = np.zeros((policy_of.size, q_all.size))
        one_each[item, np.arange(q_all.size)] = 1.0
        use = f_all * volume[item][:, None]
        result = milp(
            -q_all,
            constraints=[
                LinearConstraint(one_each, 1.0, 1.0),
                LinearConstraint(use.T, -np.inf, capacity),
            ],
            integrality=np.ones(q_all.size),
            bounds=Bounds(0, 1),
            options={"mip_rel_gap": 1e-10},  # HiGHS stops at 1e-4 of the value by default
        )
        assert result.status == 0
        best = float(-result.fun)
        scale = max(1.0, abs(best))
        assert allocation.bound >= best - 1e-7 * scale, trial
        assert allocation.value <= best + 1e-7 * scale, trial
        assert allocation.sharing_cost > 0.0, trial
        misses.append((best - allocation.value) / allocation.sharing_cost)
    assert len(misses) >= 8
    # The allocation is usually the best assignment outright, and never far from it here.
    assert np.median(misses) <= 1e-9
    assert max(misses) <= 0.05


def test_a_free_truck_never_overrides_the_policys_own_move() -> None:
    # A policy stopped early may not be greedy in its own values; the shared truck allocates
    # capacity, it does not re-solve the item: with room for everything each item keeps the
    # move its policy serves (here: a policy that always moves nothing).
    policy = policies()[0]
    assert isinstance(policy, PolicyResult)
    idle = dataclasses.replace(policy, action=np.zeros_like(policy.action), converged=False)
    stocks = np.array(list(itertools.product(range(6), range(5), range(6))), dtype=np.int64)
    which = np.zeros(len(stocks), dtype=np.int64)
    greedy = assortment_moves([policy], which, stocks)
    assert greedy.flows.any()
    shared = assortment_moves([idle], which, stocks, truck_capacity=np.full(len(LANES), 1e9))
    assert not shared.flows.any()
    np.testing.assert_array_equal(shared.value, shared.value_without_moves)
    assert shared.sharing is not None and shared.sharing.sharing_cost == 0.0


def test_items_off_the_busy_lane_keep_their_own_moves() -> None:
    pols = policies()
    policy_of, stocks = mixed_assortment(23, 400)
    free = assortment_moves(pols, policy_of, stocks)
    busy = 0  # harbour -> hill
    capacity = np.full(len(LANES), np.inf)
    capacity[busy] = np.floor(free.flows[:, busy].sum() / 3)
    shared = assortment_moves(pols, policy_of, stocks, truck_capacity=capacity)
    assert shared.sharing is not None and shared.sharing.sharing_cost > 0.0
    assert shared.flows[:, busy].sum() <= capacity[busy]
    off = free.flows[:, busy] == 0
    assert off.sum() > 100
    np.testing.assert_array_equal(shared.flows[off], free.flows[off])
    # Items on the busy lane give way: some send less on it, and none is made to send more.
    assert np.all(shared.flows[:, busy] <= free.flows[:, busy])
    assert np.any(shared.flows[~off, busy] < free.flows[~off, busy])


def test_no_items_with_a_truck() -> None:
    moves = assortment_moves(
        policies(), np.zeros(0, np.int64), np.zeros((0, 3), np.int64), truck_capacity=np.ones(5)
    )
    assert moves.sharing is not None
    assert moves.sharing.value == 0.0 and moves.sharing.flows.shape == (0, len(LANES))


@pytest.mark.parametrize(
    ("capacity", "volume", "message"),
    [
        ([1.0, 1.0], None, "truck_capacity must hold 5 numbers"),
        ([1.0, -1.0, 1.0, 1.0, 1.0], None, "truck_capacity must hold 5 numbers >= 0"),
        ([1.0] * 5, [1.0], "unit_volume must hold 2 positive numbers"),
        ([1.0] * 5, [1.0, 0.0], "unit_volume must hold 2 positive numbers"),
    ],
)
def test_bad_truck_capacity_or_volume_is_refused(
    capacity: list[float], volume: list[float] | None, message: str
) -> None:
    with pytest.raises(ValueError, match=message):
        assortment_moves(
            policies(), [0, 1], [[1, 1, 1], [2, 2, 2]], truck_capacity=capacity, unit_volume=volume
        )


def test_a_truck_counted_in_units_holds_whole_units() -> None:
    pols = policies()
    policy_of, stocks = mixed_assortment(31, 200)
    free = assortment_moves(pols, policy_of, stocks)
    whole = np.floor(free.flows.sum(axis=0) * 0.5)
    a = assortment_moves(pols, policy_of, stocks, truck_capacity=whole + 0.7)
    b = assortment_moves(pols, policy_of, stocks, truck_capacity=whole)
    assert a.sharing is not None and b.sharing is not None
    np.testing.assert_array_equal(a.flows, b.flows)
    assert a.sharing.bound == b.sharing.bound
    assert np.all(a.flows.sum(axis=0) <= whole)


# -- items kept off a lane ---------------------------------------------------------------------


def test_the_layouts_lane_order_is_the_order_of_the_flows() -> None:
    pols = policies()
    policy_of, stocks = mixed_assortment(29, 300)
    free = assortment_moves(pols, policy_of, stocks, weekday=3)
    same = assortment_moves(pols, policy_of, stocks, weekday=3, lanes=LAYOUT_LANES)
    np.testing.assert_array_equal(same.flows, free.flows)
    turned = assortment_moves(pols, policy_of, stocks, weekday=3, lanes=LAYOUT_LANES[::-1])
    assert free.flows.any(axis=0).all()
    np.testing.assert_array_equal(turned.flows, free.flows[:, ::-1])
    np.testing.assert_array_equal(turned.post_move_stock, free.post_move_stock)
    np.testing.assert_array_equal(turned.value, free.value)


@pytest.mark.parametrize("weekday", [1, 5])
def test_items_kept_off_a_lane_move_as_their_own_policies_recommend(weekday: int) -> None:
    pols = policies() + kept_off_policies()
    rng = np.random.default_rng(41 + weekday)
    policy_of = rng.integers(0, len(pols), size=700)
    assert set(policy_of) == set(range(len(pols)))
    stocks = random_stocks(rng, pols, policy_of)
    assert_matches_recommendations(pols, policy_of, stocks, weekday, LAYOUT_LANES)


def test_an_item_kept_off_a_lane_never_moves_on_it_where_it_would_pay() -> None:
    every_lane, off = policies()[0], kept_off_policies()[0]
    assert isinstance(every_lane, PolicyResult) and isinstance(off, PolicyResult)
    assert len(off.lanes) == len(LANES) - 1
    stocks = np.array(
        list(itertools.product(*(range(c + 1) for c in every_lane.capacities))), dtype=np.int64
    )
    n = len(stocks)
    moves = assortment_moves(
        [every_lane, off], np.repeat([0, 1], n), np.vstack([stocks, stocks]), lanes=LAYOUT_LANES
    )
    # The same numbers on every lane send harbour -> hill from many stocks: it pays there.
    pays = moves.flows[:n, 0] > 0
    assert pays.sum() >= 10
    assert not moves.flows[n:, 0].any()
    assert moves.flows[n:, 4].any()  # the item still moves, on the lanes it may use
    # Fewer lanes are worth no more (both policies optimal), and less where the lane pays.
    assert np.all(moves.value[n:] <= moves.value[:n] + 1e-7)
    assert np.all(moves.value[n:][pays] < moves.value[:n][pays])


def lane_limits_of(policy: ItemPolicy) -> NDArray[np.int64]:
    """Most units per lane of the policy's own lanes, over every night."""
    if isinstance(policy, PolicyResult):
        most: NDArray[np.int64] = policy.flows.max(axis=0)
    else:
        most = np.asarray(policy.lane_limits).max(axis=0)
    return most


@pytest.mark.parametrize("volumes", [False, True])
def test_items_kept_off_a_lane_leave_its_truck_to_the_others(volumes: bool) -> None:
    pols = policies() + kept_off_policies()
    is_off = np.arange(len(pols)) >= len(policies())
    rng = np.random.default_rng(43)
    policy_of = rng.integers(0, len(pols), size=500)
    stocks = random_stocks(rng, pols, policy_of)
    volume = rng.choice([0.5, 1.0, 2.5], size=policy_of.size) if volumes else None
    weight = np.ones(policy_of.size) if volume is None else volume
    free = assortment_moves(pols, policy_of, stocks, lanes=LAYOUT_LANES)
    loads = (free.flows * weight[:, None]).sum(axis=0)
    capacity = np.full(len(LANES), np.inf)
    capacity[0] = np.floor(loads[0] / 3)  # harbour -> hill, which some items are kept off
    capacity[4] = np.floor(loads[4] / 2)  # harbour -> market, which every item may use
    shared = assortment_moves(
        pols,
        policy_of,
        stocks,
        lanes=LAYOUT_LANES,
        truck_capacity=capacity,
        unit_volume=volume,
    )
    assert shared.sharing is not None and shared.candidates is not None
    off = is_off[policy_of]
    assert not shared.flows[off, 0].any()
    assert not shared.candidates.flows[off[shared.candidates.item], 0].any()
    used = (shared.flows * weight[:, None]).sum(axis=0)
    assert np.all(used <= capacity + 1e-9)
    np.testing.assert_allclose(shared.sharing.load, used)
    # The other items still share the truck the kept-off items cannot use ...
    assert used[0] >= 0.8 * capacity[0] > 0
    # ... and the kept-off items (exact and priced) give way on the lanes they share with them.
    for p in np.flatnonzero(is_off):
        mine = policy_of == p
        assert np.any(shared.flows[mine] != free.flows[mine]), p
    assert np.all(shared.value >= shared.value_without_moves - 1e-9)
    for m, p in enumerate(policy_of):
        policy = pols[p]
        own = own_lanes(policy, shared.flows[m])
        assert own.sum() == shared.flows[m].sum(), m
        assert np.all(own <= lane_limits_of(policy)), m
        assert feasible_tonight(policy, stocks[m], own), m
        if isinstance(policy, PolicyResult) and policy.phases == 1:
            post = tuple(int(u) for u in shared.post_move_stock[m])
            u = policy.post_move_values[0, policy.state_index(post)] - (policy.gain or 0.0)
            np.testing.assert_allclose(shared.value[m], u - shared.transfer_cost[m], atol=1e-9)


def test_lanes_that_do_not_fit_the_policies_are_refused() -> None:
    every_lane, off = policies()[0], kept_off_policies()[0]
    nothing = [[0, 0, 0], [0, 0, 0]]
    with pytest.raises(ValueError, match="give the layout's `lanes` when items are kept off"):
        assortment_moves([every_lane, off], [0, 1], nothing)
    with pytest.raises(ValueError, match="policy 0 has a lane 'harbour' -> 'hill', which is not"):
        assortment_moves([every_lane, off], [0, 1], nothing, lanes=LAYOUT_LANES[1:])
    for lanes, message in [
        ((*LAYOUT_LANES, ("harbour", "attic")), "lane 'harbour' -> 'attic': unknown location"),
        ((*LAYOUT_LANES, LAYOUT_LANES[2]), "duplicate lane 'hill' -> 'market'"),
        ((*LAYOUT_LANES, ("hill", "hill")), "lane from 'hill' to itself"),
        ((), "at least one lane"),
    ]:
        with pytest.raises(ValueError, match=message):
            assortment_moves([off], [0], [[0, 0, 0]], lanes=lanes)
