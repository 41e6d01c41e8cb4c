"""The nightly plan (solver.transfer_plan) against scipy.optimize.milp (HiGHS) on random
instances of our own with concave per-store values."""

from __future__ import annotations

import numpy as np
from numpy.typing import NDArray
from scipy.optimize import Bounds, LinearConstraint, milp

from solver.transfer_plan import (
    PlanNetwork,
    PlanRules,
    concave_envelope,
    plan_flows,
    plan_objective,
)


def milp_optimum(
    network: PlanNetwork,
    values: NDArray[np.float64],
    stock: NDArray[np.int64],
    limits: NDArray[np.int64],
    network_limit: int | None,
) -> float:
    """max sum_i W_i(y_i) - c.f over integer flows, written as a MILP: lane flows plus one 0/1
    variable per unit step of each y_i (concave W: steps fill in order)."""
    caps = network.capacities
    n, n_lanes = caps.size, network.n_lanes
    steps = int(caps.sum())
    offsets = np.concatenate([[0], np.cumsum(caps)])
    marginal = np.concatenate([np.diff(values[i, : caps[i] + 1]) for i in range(n)])
    cost = np.concatenate([network.lane_costs, -marginal])
    rows, low, high = [], [], []
    for i in range(n):
        balance = np.zeros(n_lanes + steps)
        balance[n_lanes + offsets[i] : n_lanes + offsets[i + 1]] = 1.0
        balance[:n_lanes] += (network.lane_from == i).astype(float)
        balance[:n_lanes] -= (network.lane_to == i).astype(float)
        rows.append(balance)  # y_i = s_i - out_i + in_i
        low.append(stock[i])
        high.append(stock[i])
        sent = np.zeros(n_lanes + steps)
        sent[:n_lanes] = (network.lane_from == i).astype(float)
        rows.append(sent)  # out_i <= s_i
        low.append(0)
        high.append(stock[i])
    if network_limit is not None:
        total = np.zeros(n_lanes + steps)
        total[:n_lanes] = 1.0
        rows.append(total)
        low.append(0)
        high.append(network_limit)
    result = milp(
        cost,
        constraints=LinearConstraint(np.array(rows), low, high),
        integrality=np.ones(n_lanes + steps),
        bounds=Bounds(np.zeros(n_lanes + steps), np.concatenate([limits, np.ones(steps)])),
    )
    assert result.success
    return float(-result.fun + values[:, 0].sum())


def random_instance(
    rng: np.random.Generator,
) -> tuple[PlanNetwork, NDArray[np.float64], NDArray[np.int64]]:
    n = int(rng.integers(2, 6))
    caps = rng.integers(2, 9, size=n).astype(np.int64)
    pairs = [(a, b) for a in range(n) for b in range(n) if a != b]
    chosen = rng.choice(len(pairs), size=int(rng.integers(1, len(pairs) + 1)), replace=False)
    lane_from = np.array([pairs[k][0] for k in chosen], dtype=np.int64)
    lane_to = np.array([pairs[k][1] for k in chosen], dtype=np.int64)
    costs = rng.uniform(0, 3, size=chosen.size).round(2)
    if rng.random() < 0.2:
        costs[:] = 0.0
    values = np.zeros((n, int(caps.max()) + 1))
    for i in range(n):
        steps = np.sort(rng.uniform(-3, 10, size=caps[i]))[::-1]
        values[i, : caps[i] + 1] = np.concatenate([[0.0], np.cumsum(steps)])
    limits = rng.integers(1, 6, size=chosen.size).astype(np.int64)
    return PlanNetwork(caps, lane_from, lane_to, costs), values, limits


def _check_feasible(
    network: PlanNetwork,
    stock: NDArray[np.int64],
    flows: NDArray[np.int64],
    limits: NDArray[np.int64],
    network_limit: int | None,
) -> NDArray[np.int64]:
    n = network.capacities.size
    out = np.bincount(network.lane_from, weights=flows, minlength=n).astype(np.int64)
    inn = np.bincount(network.lane_to, weights=flows, minlength=n).astype(np.int64)
    post = stock - out + inn
    assert np.all(flows >= 0) and np.all(flows <= limits)
    assert np.all(out <= stock) and np.all(post >= 0) and np.all(post <= network.capacities)
    if network_limit is not None:
        assert flows.sum() <= network_limit
    return post


def test_plan_equals_milp_without_a_network_limit() -> None:
    # Outside reference: scipy.optimize.milp (HiGHS). Exact for concave values: the
    # negative-cycle optimality condition (solver.transfer_plan docstring).
    rng = np.random.default_rng(7)
    for _ in range(60):
        network, values, limits = random_instance(rng)
        stocks = np.array([rng.integers(0, c + 1, size=4) for c in network.capacities]).T
        flows = plan_flows(network, stocks, values, limits, None, 1e-9)
        for stock, plan in zip(stocks, flows, strict=True):
            post = _check_feasible(network, stock, plan, limits, None)
            ours = values[np.arange(post.size), post].sum() - network.lane_costs @ plan
            assert abs(ours - milp_optimum(network, values, stock, limits, None)) <= 1e-7


def test_plan_with_a_network_limit_is_feasible_and_nearly_optimal() -> None:
    # Outside reference: scipy.optimize.milp. With a binding units-per-night limit the plan is
    # the budgeted greedy of solver.transfer_plan: never better than the optimum (a check of
    # feasibility), equal to it in at least 90% of these instances, and at least 75% of the
    # optimum's gain over moving nothing in every one (the worst seen here is about 84%).
    rng = np.random.default_rng(8)
    equal = total = 0
    for _ in range(60):
        network, values, limits = random_instance(rng)
        budget = int(rng.integers(1, 5))
        stocks = np.array([rng.integers(0, c + 1, size=4) for c in network.capacities]).T
        flows = plan_flows(network, stocks, values, limits, budget, 1e-9)
        for stock, plan in zip(stocks, flows, strict=True):
            post = _check_feasible(network, stock, plan, limits, budget)
            ours = values[np.arange(post.size), post].sum() - network.lane_costs @ plan
            best = milp_optimum(network, values, stock, limits, budget)
            idle = values[np.arange(stock.size), stock].sum()
            assert ours <= best + 1e-7
            assert ours - idle >= 0.75 * (best - idle) - 1e-7
            equal += abs(ours - best) <= 1e-7
            total += 1
    assert equal >= 0.9 * total


def test_a_stock_gets_the_same_plan_alone_and_in_a_batch() -> None:
    rng = np.random.default_rng(9)
    network, values, limits = random_instance(rng)
    stocks = np.array([rng.integers(0, c + 1, size=50) for c in network.capacities]).T
    together = plan_flows(network, stocks, values, limits, 3, 1e-9)
    for stock, plan in zip(stocks, together, strict=True):
        alone = plan_flows(network, stock[None, :], values, limits, 3, 1e-9)[0]
        assert np.array_equal(alone, plan)


def test_concave_envelope_is_the_least_concave_majorant() -> None:
    # Checked against its definition: concave, above the values, touching them at the hull's
    # points (and equal where the values are already concave).
    rng = np.random.default_rng(10)
    for _ in range(50):
        values = rng.normal(size=int(rng.integers(2, 30))).cumsum()
        envelope = concave_envelope(values)
        assert np.all(envelope >= values - 1e-12)
        assert np.all(np.diff(envelope, 2) <= 1e-9)
        assert np.isclose(envelope[0], values[0]) and np.isclose(envelope[-1], values[-1])
        concave = np.concatenate([[0.0], np.cumsum(np.sort(rng.normal(size=10))[::-1])])
        np.testing.assert_allclose(concave_envelope(concave), concave, rtol=0, atol=1e-12)


# -- rules: floors, handling limits, dispatch costs ------------------------------------------


def milp_with_rules(
    network: PlanNetwork,
    values: NDArray[np.float64],
    stock: NDArray[np.int64],
    limits: NDArray[np.int64],
    rules: PlanRules,
) -> float:
    """The exact nightly optimum under the rules as a MILP: milp_optimum's variables, plus per
    store a 0/1 "sends tonight" z_i (out_i <= s_i z_i, y_i >= k_i z_i: the floor binds only a
    sender, as solver/spec.py states it) and per lane a 0/1 "dispatched" u_l (f_l <= u_l u_max,
    dispatch cost F_l u_l)."""
    caps = network.capacities
    n, n_lanes = caps.size, network.n_lanes
    steps = int(caps.sum())
    offsets = np.concatenate([[0], np.cumsum(caps)])
    marginal = np.concatenate([np.diff(values[i, : caps[i] + 1]) for i in range(n)])
    width = n_lanes + steps + n + n_lanes
    z0, u0 = n_lanes + steps, n_lanes + steps + n
    cost = np.concatenate([network.lane_costs, -marginal, np.zeros(n), rules.dispatch_costs])
    rows, low, high = [], [], []

    def row() -> NDArray[np.float64]:
        return np.zeros(width)

    for i in range(n):
        sends = (network.lane_from == i).astype(float)
        takes = (network.lane_to == i).astype(float)
        balance = row()
        balance[n_lanes + offsets[i] : n_lanes + offsets[i + 1]] = 1.0
        balance[:n_lanes] += sends - takes
        rows.append(balance)  # y_i = s_i - out_i + in_i
        low.append(stock[i])
        high.append(stock[i])
        sent = row()
        sent[:n_lanes] = sends
        sent[z0 + i] = -float(stock[i])
        rows.append(sent)  # out_i <= s_i z_i
        low.append(-np.inf)
        high.append(0)
        floor = row()
        floor[n_lanes + offsets[i] : n_lanes + offsets[i + 1]] = 1.0
        floor[z0 + i] = -float(rules.floors[i])
        rows.append(floor)  # y_i >= k_i z_i
        low.append(0)
        high.append(np.inf)
        out_limit, in_limit = row(), row()
        out_limit[:n_lanes], in_limit[:n_lanes] = sends, takes
        rows += [out_limit, in_limit]
        low += [0, 0]
        high += [rules.most_out[i], rules.most_in[i]]
    for lane in range(n_lanes):
        used = row()
        used[lane] = 1.0
        used[u0 + lane] = -float(limits[lane])
        rows.append(used)  # f_l <= u_l limit_l
        low.append(-np.inf)
        high.append(0)
    upper = np.concatenate([limits, np.ones(steps + n + n_lanes)])
    result = milp(
        cost,
        constraints=LinearConstraint(np.array(rows), low, high),
        integrality=np.ones(width),
        bounds=Bounds(np.zeros(width), upper),
    )
    assert result.success
    return float(-result.fun + values[:, 0].sum())


def random_rules(rng: np.random.Generator, network: PlanNetwork, dispatch: bool) -> PlanRules:
    caps = network.capacities
    n = caps.size
    floors = np.where(rng.random(n) < 0.6, rng.integers(0, caps + 1), 0).astype(np.int64)
    big = int(caps.sum()) + 1
    most_out = np.where(rng.random(n) < 0.5, rng.integers(0, 4, size=n), big).astype(np.int64)
    most_in = np.where(rng.random(n) < 0.5, rng.integers(0, 4, size=n), big).astype(np.int64)
    costs = rng.uniform(0, 6, size=network.n_lanes).round(2) if dispatch else None
    return PlanRules(
        floors, most_out, most_in, np.zeros(network.n_lanes) if costs is None else costs
    )


def _check_rules(
    network: PlanNetwork, stock: NDArray[np.int64], flows: NDArray[np.int64], rules: PlanRules
) -> None:
    n = network.capacities.size
    out = np.bincount(network.lane_from, weights=flows, minlength=n).astype(np.int64)
    inn = np.bincount(network.lane_to, weights=flows, minlength=n).astype(np.int64)
    post = stock - out + inn
    assert np.all((out == 0) | (post >= rules.floors)), (stock, flows)
    assert np.all(out <= rules.most_out) and np.all(inn <= rules.most_in), (stock, flows)


def _compare_with_milp(seed: int, dispatch: bool, count: int) -> tuple[int, int, float]:
    """(plans equal to the MILP optimum, plans, worst share of the optimum's gain over moving
    nothing that the plan gets)."""
    rng = np.random.default_rng(seed)
    equal = total = 0
    worst = 1.0
    for _ in range(count):
        network, values, limits = random_instance(rng)
        rules = random_rules(rng, network, dispatch)
        stocks = np.array([rng.integers(0, c + 1, size=4) for c in network.capacities]).T
        flows = plan_flows(network, stocks, values, limits, None, 1e-9, rules)
        objective = plan_objective(network, stocks, values, flows, rules.dispatch_costs)
        for stock, plan, ours in zip(stocks, flows, objective, strict=True):
            _check_feasible(network, stock, plan, limits, None)
            _check_rules(network, stock, plan, rules)
            best = milp_with_rules(network, values, stock, limits, rules)
            idle = values[np.arange(stock.size), stock].sum()
            assert ours <= best + 1e-7  # the plan is feasible, so never above the optimum
            if best - idle > 1e-7:
                worst = min(worst, (ours - idle) / (best - idle))
            equal += abs(ours - best) <= 1e-7
            total += 1
    return equal, total, worst


def test_plan_with_floors_and_handling_limits_is_feasible_and_matches_milp() -> None:
    # Outside reference: scipy.optimize.milp (HiGHS) with a 0/1 "sends tonight" per store. The
    # plan keeps every floor and handling limit at every stock (_check_rules), never beats the
    # optimum, and equals it in nearly every instance: floors at or below the stock and the
    # limit on units sent are bounds on arcs (exact); the limit on units received is kept
    # conservatively and a store below its floor relays nothing (solver.transfer_plan). Seen
    # here: 320 of 320 equal (and 1,433 of 1,440 over seeds 30 to 35).
    equal, total, worst = _compare_with_milp(21, dispatch=False, count=80)
    assert equal >= 0.97 * total
    assert worst >= 0.5


def test_plan_with_dispatch_costs_is_feasible_and_nearly_optimal() -> None:
    # Outside reference: scipy.optimize.milp with a 0/1 "dispatched" per lane. Dispatch costs
    # make the problem non-convex; the plan is the documented heuristic (close lanes that do
    # not pay, from two starts, beside the best single-lane move). Seen here: 632 of 640
    # equal; the misses are mostly a store below its floor that the optimum uses as a relay.
    equal = total = 0
    for seed in (22, 23):
        e, t, _ = _compare_with_milp(seed, dispatch=True, count=80)
        equal, total = equal + e, total + t
    assert equal >= 0.95 * total


def test_with_rules_a_stock_gets_the_same_plan_alone_and_in_a_batch() -> None:
    # The served plan (one stock) and the simulated and evaluated plans (batches) must be one
    # function of the stock.
    rng = np.random.default_rng(11)
    for _ in range(5):
        network, values, limits = random_instance(rng)
        rules = random_rules(rng, network, dispatch=True)
        stocks = np.array([rng.integers(0, c + 1, size=30) for c in network.capacities]).T
        together = plan_flows(network, stocks, values, limits, 3, 1e-9, rules)
        for stock, plan in zip(stocks, together, strict=True):
            alone = plan_flows(network, stock[None, :], values, limits, 3, 1e-9, rules)[0]
            assert np.array_equal(alone, plan)


def test_rows_on_stacked_value_tables_get_each_table_plan() -> None:
    # Several value tables in one batch (the trade limit's candidates, solver.priced): each row
    # must get exactly the plan of its own table and tolerance planned alone, with and without
    # rules (dispatch costs included).
    rng = np.random.default_rng(12)
    for dispatch in (False, True, None):
        network, values, limits = random_instance(rng)
        rules = None if dispatch is None else random_rules(rng, network, dispatch)
        tables = np.stack(
            [values, values + rng.normal(0.0, 2.0, values.shape).cumsum(axis=1), 0.5 * values]
        )
        tolerances = np.array([1e-9, 1e-6, 1e-3])
        stocks = np.array([rng.integers(0, c + 1, size=40) for c in network.capacities]).T
        which = rng.integers(0, 3, size=40)
        together = plan_flows(network, stocks, tables, limits, 3, tolerances, rules, tables=which)
        for g in range(3):
            alone = plan_flows(
                network, stocks[which == g], tables[g], limits, 3, tolerances[g], rules
            )
            assert np.array_equal(alone, together[which == g])
