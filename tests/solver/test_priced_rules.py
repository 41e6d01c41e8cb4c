"""The priced method (solver.priced) on networks with dispatch costs, floors (keep_at_least)
and handling limits (max_units_out, max_units_in).

Outside references: the exact optimum of solver.solve_network, which tests/solver/test_rules.py
checks against quantecon's DiscreteDP on explicit MDPs; quantecon's DiscreteDP directly on the
brute-force MDP of tests/solver/reference.py (which reads the rules straight from the
specification); the brute-force feasibility of every flow by the rules of solver/spec.py.
Networks are random ones of our own.
"""

from __future__ import annotations

import itertools
import json
from typing import Any

import numpy as np
import pytest

from solver import NetworkSpec, solve_network
from solver.priced import evaluate_plan_average, evaluate_plan_exactly, solve_priced
from solver.priced_result import PricedPolicy
from tests.solver.reference import all_flows, build_reference, location_rules
from tests.solver.test_priced import QUICK, random_network


def ruled_network(seed: int, capacities: tuple[int, ...], **kwargs: Any) -> NetworkSpec:
    """random_network with floors, handling limits and dispatch costs added at random."""
    spec = random_network(seed, capacities, **kwargs)
    rng = np.random.default_rng(seed + 1000)
    document = spec.model_dump(mode="json", by_alias=True)
    for loc in document["locations"]:
        c = loc["capacity"]
        if rng.random() < 0.6:
            loc["keep_at_least"] = int(rng.integers(1, max(2, c // 2)))
        if rng.random() < 0.4:
            loc["max_units_out"] = int(rng.integers(1, 4))
        if rng.random() < 0.4:
            loc["max_units_in"] = int(rng.integers(1, 4))
    for lane in document["lanes"]:
        if rng.random() < 0.7:
            lane["dispatch_cost"] = round(float(rng.uniform(0.5, 8.0)), 2)
    return NetworkSpec.model_validate(document)


# (seed, capacities, keyword arguments of random_network): 2 to 4 stores, lane and network
# limits, a weekly network.
CASES: list[tuple[int, tuple[int, ...], dict[str, Any]]] = [
    (1, (10, 8), {}),
    (2, (15, 20), {"network_limit": True}),
    (3, (25, 18), {"discount": 0.98}),
    (4, (9, 11), {"max_limit": 6}),
    (7, (8, 9), {"weekly": True}),
    (10, (12, 12, 12), {"lane_share": 0.6}),
    (11, (10, 8, 12), {"network_limit": True}),
    (13, (8, 8, 8, 8), {"lane_share": 0.4}),
    (14, (7, 8, 6, 8), {"lane_share": 0.5, "network_limit": True}),
]


def _stocks(policy: PricedPolicy) -> list[tuple[int, ...]]:
    return list(itertools.product(*(range(c + 1) for c in policy.capacities)))


@pytest.fixture(scope="module")
def solved() -> list[dict[str, Any]]:
    out = []
    for seed, capacities, kwargs in CASES:
        spec = ruled_network(seed, capacities, **kwargs)
        assert spec.has_rules and any(lane.dispatch_cost > 0 for lane in spec.lanes)
        exact = solve_network(spec)
        policy = solve_priced(spec, options=QUICK)
        values = evaluate_plan_exactly(spec, policy, "discounted")
        out.append({"spec": spec, "exact": exact, "policy": policy, "values": values})
    return out


def test_bound_is_above_the_optimal_value_at_every_state(solved: list[dict[str, Any]]) -> None:
    # Outside reference: exact policy iteration with the rules (checked against quantecon's
    # DiscreteDP in tests/solver/test_rules.py). A theorem (solver.priced docstring): any
    # violation beyond rounding is a bug.
    for case in solved:
        policy, exact = case["policy"], case["exact"]
        stocks = _stocks(policy)
        bounds = np.array(
            [[policy.upper_bound(s, phase=d) for s in stocks] for d in range(policy.phases)]
        )
        scale = float(np.abs(exact.values).max())
        assert np.all(bounds >= exact.values - 1e-9 * scale), case["spec"].name


def test_plan_is_close_to_optimal(solved: list[dict[str, Any]]) -> None:
    # Loss at a state: (V*(s) - V_plan(s)) / mean_s |V*(s)|, both exact (the plan's value from
    # the exact evaluator, dispatch costs paid). Seen here: worst 1.06% (4 stores), median 0.05%.
    losses = []
    for case in solved:
        exact = case["exact"]
        scale = float(np.abs(exact.values).mean())
        losses.append(((exact.values - case["values"]) / scale).reshape(-1))
    every = np.concatenate(losses)
    assert every.min() > -1e-9  # nothing beats the optimum (a check of the evaluation)
    assert float(np.median(every)) <= 0.005
    assert float(every.max()) <= 0.025


def test_plan_never_breaks_a_rule_at_any_stock(solved: list[dict[str, Any]]) -> None:
    # Outside reference: the brute-force feasibility of tests/solver/reference.py: every flow
    # within the lane limits, the rules read from the specification (solver/spec.py's field
    # descriptions). The plan at every stock and night must be one of the feasible flows.
    for case in solved:
        spec, policy = case["spec"], case["policy"]
        flows, sent, received, _ = all_flows(spec)
        capacities = np.array([loc.capacity for loc in spec.locations])
        stocks = np.array(_stocks(policy), dtype=np.int64)
        rows = {tuple(f): k for k, f in enumerate(flows.tolist())}
        for d in range(policy.phases):
            floors, most_out, most_in = location_rules(spec, d)
            lane_limits = np.array([lane.max_units_on(d) for lane in spec.lanes])
            plans = policy.plan_batch(stocks, phase=d)
            for stock, plan in zip(stocks, plans.tolist(), strict=True):
                k = rows[tuple(plan)]  # within the lane and network limits
                post = stock - sent[k] + received[k]
                assert np.all(flows[k] <= lane_limits)
                assert np.all(sent[k] <= stock) and np.all(post <= capacities)
                assert np.all((sent[k] == 0) | (post >= floors)), (stock, plan)
                assert np.all(sent[k] <= most_out) and np.all(received[k] <= most_in)


def test_bound_and_plan_against_quantecon_on_explicit_matrices() -> None:
    # Outside reference: quantecon's DiscreteDP (policy iteration) on the brute-force MDP of
    # tests/solver/reference.py, rules and dispatch costs included.
    for seed, capacities in [(31, (6, 5)), (32, (4, 5, 3))]:
        spec = ruled_network(seed, capacities, network_limit=seed == 32)
        reference = build_reference(spec)
        optimum = reference.discrete_dp().solve(method="policy_iteration")
        policy = solve_priced(spec, options=QUICK)
        stocks = _stocks(policy)
        bounds = np.array([policy.upper_bound(s) for s in stocks])
        assert np.all(bounds >= optimum.v - 1e-9 * np.abs(optimum.v).max())
        flows = policy.plan_batch(reference.states)
        pairs = reference.pair_indices(flows)  # fails if a plan is not a feasible action
        rewards, transitions = reference.rewards[pairs], reference.transitions[pairs]
        value = np.linalg.solve(np.eye(len(pairs)) - spec.discount * transitions, rewards)
        assert np.all(value <= optimum.v + 1e-8 * np.abs(optimum.v).max())
        assert float(((optimum.v - value) / np.abs(optimum.v).mean()).max()) <= 0.025


def test_recommendation_charges_the_dispatch_cost(solved: list[dict[str, Any]]) -> None:
    charged = 0
    for case in solved:
        policy = case["policy"]
        for stock in _stocks(policy)[::7]:
            rec = policy.recommend(stock)
            flows = np.array(rec.flows)
            cost = flows @ policy.lane_costs + (flows > 0) @ policy.dispatch_costs
            assert rec.transfer_cost == pytest.approx(float(cost))
            charged += bool(((flows > 0) @ policy.dispatch_costs) > 0)
    assert charged > 0


def test_round_trip_keeps_the_rules_and_older_policies_decode_without_them() -> None:
    spec = ruled_network(61, (8, 9, 7), weekly=True, network_limit=True)
    policy = solve_priced(spec, options=QUICK)
    arrays, meta = policy.to_arrays()
    again = PricedPolicy.from_arrays(arrays, json.loads(json.dumps(meta)))
    for name in ("dispatch_costs", "floors", "most_out", "most_in"):
        assert np.array_equal(getattr(again, name), getattr(policy, name))
    stocks = np.array(_stocks(policy))
    assert np.array_equal(policy.plan_batch(stocks, phase=3), again.plan_batch(stocks, phase=3))
    # A policy stored before the rules existed has none of their arrays.
    older = {
        k: v
        for k, v in arrays.items()
        if k not in ("dispatch_costs", "floors", "most_out", "most_in")
    }
    old = PricedPolicy.from_arrays(older, meta)
    assert not old.dispatch_costs.any() and not old.floors.any()
    assert np.array_equal(old.most_out[0], np.array(policy.capacities))


def test_average_criterion_bound_and_plan_with_rules() -> None:
    # Outside reference: the exact optimal gain (Howard's policy iteration, average criterion,
    # checked against quantecon in tests/solver/test_rules.py); the gain bound is a theorem
    # (solver.priced), and the plan's exact gain lies below the optimum.
    for seed, capacities in [(81, (12, 10)), (82, (8, 9, 7))]:
        spec = ruled_network(seed, capacities)
        exact = solve_network(spec, criterion="average")
        policy = solve_priced(spec, criterion="average", options=QUICK)
        assert exact.gain is not None and policy.gain is not None
        assert policy.gain >= exact.gain - 1e-9 * abs(exact.gain)
        gain, _ = evaluate_plan_average(spec, policy)
        assert gain <= exact.gain + 1e-8 * abs(exact.gain)
        assert (exact.gain - gain) / abs(exact.gain) <= 0.01  # seen: 0.03% and 0.14%
