"""Model building: location kernels and rewards, the flow table, and size limits."""

from __future__ import annotations

import itertools
from typing import Any

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from numpy.testing import assert_allclose
from numpy.typing import NDArray
from scipy import stats

from solver import (
    ModelTooLargeError,
    NetworkSpec,
    SizeLimits,
    build_transfer_model,
    solve_network,
)
from solver.build import location_kernel, location_reward
from solver.spec import LocationSpec
from tests.solver.reference import (
    all_flows,
    build_reference,
    make_network,
    scipy_law,
    stationary_gain,
)

DRAWS = 200_000
# Monte Carlo agreement: within five standard errors. For a cell probability p the standard
# error of its frequency is sqrt(p (1 - p) / n); 1 / n more is allowed so that a cell whose
# probability is too small to resolve may still be hit once.
STANDARD_ERRORS = 5.0


def _location(**fields: Any) -> LocationSpec:
    return LocationSpec.model_validate({"id": "shop", "unit_margin": 1.0, **fields})


def _draw(dist: dict[str, Any], size: int, rng: np.random.Generator) -> NDArray[np.int64]:
    """Independent draws of a count law given in specification form, with numpy's samplers."""
    if dist["dist"] == "poisson":
        return rng.poisson(dist["mean"], size)
    if dist["dist"] == "negative_binomial":
        # numpy counts failures before n successes with success probability p, as scipy's
        # nbinom does: n = mu^2 / (v - mu), p = mu / v give mean mu and variance v.
        mu, var = dist["mean"], dist["variance"]
        return rng.negative_binomial(mu * mu / (var - mu), mu / var, size)
    p = np.asarray(dist["p"])
    return rng.choice(p.size, size=size, p=p)


# Sampled locations: heavy-tailed demand, batch replenishment, and a pmf longer than capacity.
SAMPLED: dict[str, dict[str, Any]] = {
    "nbinom-demand": {
        "capacity": 6,
        "unit_margin": 8.0,
        "holding_cost": 0.45,
        "stockout_penalty": 2.5,
        "demand": {"dist": "negative_binomial", "mean": 2.6, "variance": 5.9},
        "replenishment": {"dist": "poisson", "mean": 1.7},
    },
    "pmf-demand": {
        "capacity": 4,
        "unit_margin": 5.5,
        "holding_cost": 0.2,
        "stockout_penalty": 1.25,
        "demand": {"dist": "pmf", "p": [0.05, 0.2, 0.25, 0.2, 0.15, 0.1, 0.05]},
        "replenishment": {"dist": "negative_binomial", "mean": 1.2, "variance": 2.2},
    },
    "poisson-both": {
        "capacity": 5,
        "unit_margin": 3.0,
        "holding_cost": 0.1,
        "stockout_penalty": 0.6,
        "demand": {"dist": "poisson", "mean": 3.4},
        "replenishment": {"dist": "pmf", "p": [0.5, 0.0, 0.3, 0.2]},
    },
}


class TestLocationKernel:
    @pytest.mark.parametrize("name", sorted(SAMPLED))
    def test_kernel_matches_monte_carlo(self, name: str) -> None:
        fields = SAMPLED[name]
        capacity = fields["capacity"]
        kernel = location_kernel(_location(**fields))
        rng = np.random.default_rng(20_240_611)
        for y in (0, 1, capacity // 2, capacity):
            demand = _draw(fields["demand"], DRAWS, rng)
            supply = _draw(fields["replenishment"], DRAWS, rng)
            # The model's rule: sell what demand allows, then add the day's replenishment, and
            # refuse what does not fit.
            nxt = np.minimum(y - np.minimum(demand, y) + supply, capacity)
            frequency = np.bincount(nxt, minlength=capacity + 1) / DRAWS
            p = kernel[y]
            bound = STANDARD_ERRORS * np.sqrt(p * (1 - p) / DRAWS) + 1 / DRAWS
            assert np.all(np.abs(frequency - p) <= bound), (y, frequency, p)

    @pytest.mark.parametrize("name", sorted(SAMPLED))
    def test_rows_sum_to_one(self, name: str) -> None:
        kernel = location_kernel(_location(**SAMPLED[name]))
        assert np.all(kernel >= 0)
        assert_allclose(kernel.sum(axis=1), 1.0, rtol=0, atol=1e-12)

    def test_pmf_kernel_matches_hand_computation(self) -> None:
        kernel = location_kernel(
            _location(
                capacity=2,
                demand={"dist": "pmf", "p": [0.5, 0.5]},
                replenishment={"dist": "pmf", "p": [0.25, 0.75]},
            )
        )
        # Demand 0 or 1 (1/2 each), replenishment 0 (1/4) or 1 (3/4), capacity 2.
        # y = 0: nothing to sell, leftover 0; next = R: 0 w.p. 1/4, 1 w.p. 3/4.
        # y = 1: leftover 1 (D = 0) or 0 (D = 1), each 1/2.
        #   next 0: D = 1, R = 0: 1/2 * 1/4 = 1/8
        #   next 1: D = 1, R = 1 or D = 0, R = 0: 1/2 * 3/4 + 1/2 * 1/4 = 1/2
        #   next 2: D = 0, R = 1: 1/2 * 3/4 = 3/8
        # y = 2: leftover 2 (D = 0) or 1 (D = 1).
        #   next 1: D = 1, R = 0: 1/8
        #   next 2: D = 0 (2 + R capped at 2): 1/2, or D = 1, R = 1: 3/8; total 7/8
        expected = np.array(
            [
                [1 / 4, 3 / 4, 0.0],
                [1 / 8, 1 / 2, 3 / 8],
                [0.0, 1 / 8, 7 / 8],
            ]
        )
        assert_allclose(kernel, expected, rtol=0, atol=1e-15)

    def test_capacity_one_refuses_overflow(self) -> None:
        # With capacity 1 and replenishment of 2 or more units with certainty, every
        # post-move stock leads to a full stockroom.
        kernel = location_kernel(
            _location(
                capacity=1,
                demand={"dist": "poisson", "mean": 0.8},
                replenishment={"dist": "pmf", "p": [0.0, 0.0, 1.0]},
            )
        )
        assert_allclose(kernel, [[0.0, 1.0], [0.0, 1.0]], rtol=0, atol=1e-15)


class TestLocationReward:
    @pytest.mark.parametrize("name", sorted(SAMPLED))
    def test_reward_matches_monte_carlo(self, name: str) -> None:
        fields = SAMPLED[name]
        reward = location_reward(_location(**fields))
        rng = np.random.default_rng(7_130_502)
        demand = _draw(fields["demand"], DRAWS, rng)
        for y in range(fields["capacity"] + 1):
            profit = (
                fields["unit_margin"] * np.minimum(demand, y)
                - fields["holding_cost"] * y
                - fields["stockout_penalty"] * np.maximum(demand - y, 0)
            )
            standard_error = profit.std(ddof=1) / np.sqrt(DRAWS)
            # Within five standard errors of the sample mean (at y = 0 with zero penalty the
            # profit is constant, so a tiny absolute allowance is added).
            assert abs(profit.mean() - reward[y]) <= STANDARD_ERRORS * standard_error + 1e-12

    @pytest.mark.parametrize("mean", [0.4, 3.7, 11.0])
    def test_expected_shortfall_of_poisson_demand_matches_scipy(self, mean: float) -> None:
        capacity = 9
        # Margin 0, holding 0, penalty 1: the reward is minus the expected units short.
        shortfall = -location_reward(
            _location(
                capacity=capacity,
                unit_margin=0.0,
                stockout_penalty=1.0,
                demand={"dist": "poisson", "mean": mean},
                replenishment={"dist": "poisson", "mean": 1.0},
            )
        )
        # Reference: scipy.stats.poisson.pmf, E (D - y)^+ = sum_k (k - y)^+ P(D = k) on 0..399
        # (the omitted tail is below 1e-200 for these means).
        k = np.arange(400)
        pmf = stats.poisson.pmf(k, mean)
        y = np.arange(capacity + 1)
        expected = np.maximum(k[None, :] - y[:, None], 0) @ pmf
        assert_allclose(shortfall, expected, rtol=1e-12, atol=1e-14)

    @pytest.mark.parametrize(
        "demand",
        [
            {"dist": "poisson", "mean": 2.9},
            {"dist": "negative_binomial", "mean": 1.9, "variance": 6.5},
        ],
        ids=["poisson", "negative-binomial"],
    )
    def test_expected_sales_match_the_tail_sum_identity_and_direct_summation(
        self, demand: dict[str, Any]
    ) -> None:
        capacity = 8
        location = _location(
            capacity=capacity,
            unit_margin=1.0,
            demand=demand,
            replenishment={"dist": "poisson", "mean": 1.0},
        )
        sales = location_reward(location)
        law = scipy_law(location.demand)
        # Reference: scipy.stats pmf and sf. E min(D, y) = sum_k min(k, y) P(D = k), summed on
        # 0..2999 (omitted tail below 1e-60), and the textbook tail-sum identity
        # E min(D, y) = sum_{k < y} P(D > k).
        k = np.arange(3000)
        y = np.arange(capacity + 1)
        direct = np.minimum(k[None, :], y[:, None]) @ law.pmf(k)
        tail_sum = np.concatenate([[0.0], np.cumsum(law.sf(np.arange(capacity)))])
        assert_allclose(tail_sum, direct, rtol=1e-12, atol=1e-14)
        assert_allclose(sales, direct, rtol=1e-12, atol=1e-14)

    def test_pmf_demand_beyond_capacity_counts_all_units_short(self) -> None:
        # Demand 0..5 units against a stockroom of 2: shortfalls at 3, 4, 5 units of demand must
        # all be counted. By hand, with p = [0.1, 0.2, 0.3, 0.2, 0.1, 0.1]:
        #   E (D - 0)^+ = E D = 0.2 + 0.6 + 0.6 + 0.4 + 0.5 = 2.3
        #   E (D - 1)^+ = 0.3 + 0.4 + 0.3 + 0.4 = 1.4
        #   E (D - 2)^+ = 0.2 + 0.2 + 0.3 = 0.7
        # E min(D, y) = E D - E (D - y)^+ = 0, 0.9, 1.6. Margin 2, holding 0.5, penalty 3:
        #   r = 2 * [0, 0.9, 1.6] - 0.5 * [0, 1, 2] - 3 * [2.3, 1.4, 0.7] = [-6.9, -2.9, 0.1]
        reward = location_reward(
            _location(
                capacity=2,
                unit_margin=2.0,
                holding_cost=0.5,
                stockout_penalty=3.0,
                demand={"dist": "pmf", "p": [0.1, 0.2, 0.3, 0.2, 0.1, 0.1]},
                replenishment={"dist": "poisson", "mean": 1.0},
            )
        )
        assert_allclose(reward, [-6.9, -2.9, 0.1], rtol=0, atol=1e-12)

    def test_hand_computed_small_case(self) -> None:
        # Demand 0 or 1 (1/2 each): E min(D, y) = 0, 1/2, 1/2 and E (D - y)^+ = 1/2, 0, 0 for
        # y = 0, 1, 2. Margin 4, holding 0.5, penalty 3:
        #   r = [0 - 0 - 1.5, 2 - 0.5 - 0, 2 - 1 - 0] = [-1.5, 1.5, 1.0]
        reward = location_reward(
            _location(
                capacity=2,
                unit_margin=4.0,
                holding_cost=0.5,
                stockout_penalty=3.0,
                demand={"dist": "pmf", "p": [0.5, 0.5]},
                replenishment={"dist": "pmf", "p": [0.25, 0.75]},
            )
        )
        assert_allclose(reward, [-1.5, 1.5, 1.0], rtol=0, atol=1e-15)


def _loc(location_id: str, capacity: int, margin: float, demand: float, supply: float) -> Any:
    return {
        "id": location_id,
        "capacity": capacity,
        "unit_margin": margin,
        "holding_cost": 0.25,
        "stockout_penalty": 1.0,
        "demand": {"dist": "poisson", "mean": demand},
        "replenishment": {"dist": "poisson", "mean": supply},
    }


def three_tool_libraries() -> NetworkSpec:
    """Three community tool libraries lending pressure washers, lanes both ways between every
    pair; two lanes are free, so cycles of moves tie with moving less."""
    return make_network(
        "tool libraries",
        [
            _loc("elm", 3, 6.0, 1.9, 0.6),
            _loc("oak", 4, 4.5, 0.5, 1.8),
            _loc("ash", 3, 7.0, 1.2, 0.9),
        ],
        [
            (0, 1, 0.3, 3),
            (1, 0, 0.0, 2),
            (1, 2, 0.0, 3),
            (2, 1, 0.4, 1),
            (0, 2, 0.8, 2),
            (2, 0, 0.35, 3),
        ],
        discount=0.9,
        max_units_per_night=4,
    )


def _lane_ends(spec: NetworkSpec) -> list[tuple[int, int]]:
    index = {loc.id: i for i, loc in enumerate(spec.locations)}
    return [(index[lane.from_], index[lane.to]) for lane in spec.lanes]


def _has_directed_cycle(flow: NDArray[np.int64], ends: list[tuple[int, int]], n: int) -> bool:
    """Whether the lanes with positive units contain a directed cycle: repeatedly remove
    locations that no used lane enters (Kahn's topological sort); a cycle is what remains."""
    edges = {ends[lane] for lane in np.flatnonzero(flow)}
    alive = set(range(n))
    while True:
        sources = {v for v in alive if not any(b == v and a in alive for a, b in edges)}
        if not sources:
            return bool(alive)
        alive -= sources


def _expected_table(spec: NetworkSpec) -> set[tuple[int, ...]]:
    """The flows build.py's docstring promises: within the limits, with no directed cycle of
    positive units, sending out of and into each location at most its capacity."""
    flows, sent, received, _ = all_flows(spec)
    capacities = np.array([loc.capacity for loc in spec.locations])
    ends = _lane_ends(spec)
    return {
        tuple(int(x) for x in flow)
        for flow, out, inn in zip(flows, sent, received, strict=True)
        if np.all(out <= capacities)
        and np.all(inn <= capacities)
        and not _has_directed_cycle(flow, ends, len(capacities))
    }


class TestFlowTable:
    @pytest.fixture(scope="class")
    @classmethod
    def spec(cls) -> NetworkSpec:
        return three_tool_libraries()

    def test_row_zero_moves_nothing(self, spec: NetworkSpec) -> None:
        flows = build_transfer_model(spec).flows
        assert np.all(flows[0] == 0)
        assert np.all(flows[1:].sum(axis=1) > 0)

    def test_flows_obey_lane_and_nightly_limits(self, spec: NetworkSpec) -> None:
        flows = build_transfer_model(spec).flows
        limits = np.array([lane.max_units for lane in spec.lanes])
        assert np.all(flows >= 0)
        assert np.all(flows <= limits)
        assert spec.max_units_per_night is not None
        assert np.all(flows.sum(axis=1) <= spec.max_units_per_night)
        assert len({tuple(f) for f in flows.tolist()}) == flows.shape[0]

    def test_no_flow_uses_a_lane_and_its_reverse(self, spec: NetworkSpec) -> None:
        flows = build_transfer_model(spec).flows
        ends = _lane_ends(spec)
        for lane, (a, b) in enumerate(ends):
            reverse = ends.index((b, a))
            assert not np.any((flows[:, lane] > 0) & (flows[:, reverse] > 0))

    def test_no_flow_moves_units_round_a_triangle(self, spec: NetworkSpec) -> None:
        flows = build_transfer_model(spec).flows
        ends = _lane_ends(spec)
        triangles = [
            (i, j, k)
            for i, j, k in itertools.permutations(range(len(ends)), 3)
            if ends[i][1] == ends[j][0] and ends[j][1] == ends[k][0] and ends[k][1] == ends[i][0]
        ]
        assert len(triangles) == 6  # two directions round the triangle, three starting lanes
        for i, j, k in triangles:
            assert not np.any((flows[:, i] > 0) & (flows[:, j] > 0) & (flows[:, k] > 0))

    def test_rows_are_ordered_by_units_then_cost(self, spec: NetworkSpec) -> None:
        model = build_transfer_model(spec)
        keys = list(zip(model.flow_units.tolist(), model.flow_costs.tolist(), strict=True))
        assert keys == sorted(keys)

    def test_table_is_exactly_the_acyclic_flows_that_fit(self, spec: NetworkSpec) -> None:
        table = {tuple(f) for f in build_transfer_model(spec).flows.tolist()}
        assert table == _expected_table(spec)

    def test_every_pruned_flow_is_dominated_by_a_kept_one(self, spec: NetworkSpec) -> None:
        # Dominated: same change of stock, no more units out of or into any location (so
        # feasible wherever the pruned flow is), no higher cost, fewer units.
        model = build_transfer_model(spec)
        kept = {tuple(f) for f in model.flows.tolist()}
        flows, sent, received, costs = all_flows(spec)
        capacities = model.capacities
        for flow, out, inn, cost in zip(flows, sent, received, costs, strict=True):
            if tuple(flow.tolist()) in kept or np.any(out > capacities) or np.any(inn > capacities):
                continue
            dominating = (
                np.all(model.flow_in - model.flow_out == inn - out, axis=1)
                & np.all(model.flow_out <= out, axis=1)
                & np.all(model.flow_in <= inn, axis=1)
                & (model.flow_costs <= cost + 1e-12)
                & (model.flow_units < flow.sum())
            )
            assert dominating.any(), flow

    def test_pruning_loses_no_optimal_value(self, spec: NetworkSpec) -> None:
        reference = build_reference(spec)
        solution = reference.discrete_dp().solve(method="policy_iteration")
        assert solution.num_iter < solution.max_iter
        result = solve_network(spec)
        # Reference: quantecon.markov.DiscreteDP policy iteration (QuantEcon, PyPI) over every
        # flow within the lane limits; values agree to 1e-8 + 1e-10 relative.
        assert_allclose(result.values[0], solution.v, rtol=1e-10, atol=1e-8)

    def test_pruning_loses_no_long_run_profit(self, spec: NetworkSpec) -> None:
        reference = build_reference(spec)
        # A discounted-optimal policy for beta near 1 is Blackwell optimal, hence average
        # optimal (Puterman 1994, Markov Decision Processes, ch. 10; from memory).
        # Reference: quantecon.markov.DiscreteDP at beta 0.99999 and quantecon.MarkovChain.
        solution = reference.discrete_dp(0.99999).solve(method="policy_iteration")
        reward, transition = reference.policy_chain(reference.flows[solution.sigma])
        gain, _ = stationary_gain(reward, transition)
        result = solve_network(spec, criterion="average")
        assert result.gain is not None
        assert_allclose(result.gain, gain, rtol=0, atol=1e-7)


@settings(max_examples=40, deadline=None)
@given(
    lanes=st.lists(
        st.tuples(
            st.sampled_from(list(itertools.permutations(range(3), 2))),
            st.integers(1, 3),
            st.sampled_from([0.0, 0.5, 1.25]),
        ),
        min_size=1,
        max_size=6,
        unique_by=lambda lane: lane[0],
    ),
    capacities=st.tuples(st.integers(1, 3), st.integers(1, 3), st.integers(1, 3)),
    per_night=st.one_of(st.none(), st.integers(1, 5)),
)
def test_flow_table_matches_its_definition_on_random_lane_sets(
    lanes: list[tuple[tuple[int, int], int, float]],
    capacities: tuple[int, int, int],
    per_night: int | None,
) -> None:
    spec = make_network(
        "random lanes",
        [_loc(f"site{i}", c, 1.0, 1.0, 1.0) for i, c in enumerate(capacities)],
        [(a, b, cost, limit) for (a, b), limit, cost in lanes],
        discount=0.9,
        max_units_per_night=per_night,
    )
    model = build_transfer_model(spec)
    assert {tuple(f) for f in model.flows.tolist()} == _expected_table(spec)
    assert np.all(model.flows[0] == 0)
    keys = list(zip(model.flow_units.tolist(), model.flow_costs.tolist(), strict=True))
    assert keys == sorted(keys)


class TestSizeLimits:
    def test_too_many_states_names_the_count_and_the_limit(self) -> None:
        spec = make_network(
            "large",
            [_loc(name, 10, 1.0, 1.0, 1.0) for name in ("a", "b", "c")],
            [(0, 1, 1.0, 1)],
            discount=0.9,
        )
        # 11 * 11 * 11 = 1,331 stock states.
        with pytest.raises(ModelTooLargeError) as caught:
            build_transfer_model(spec, SizeLimits(max_states=1_330))
        assert "1,331" in str(caught.value)
        assert "1,330" in str(caught.value)
        assert caught.value.states == 1_331
        assert caught.value.pairs is None
        assert build_transfer_model(spec, SizeLimits(max_states=1_331)).n_states == 1_331

    def test_too_many_pairs_names_the_counts_and_the_limit(self) -> None:
        spec = three_tool_libraries()
        # Count feasible (stock, flow) pairs by brute force over the table's definition.
        capacities = np.array([loc.capacity for loc in spec.locations])
        ends = _lane_ends(spec)
        table = np.array(sorted(_expected_table(spec)))
        out = np.zeros((table.shape[0], 3), dtype=np.int64)
        inn = np.zeros_like(out)
        for lane, (a, b) in enumerate(ends):
            out[:, a] += table[:, lane]
            inn[:, b] += table[:, lane]
        pairs = sum(
            int(np.sum(np.all((out <= stock) & (stock - out + inn <= capacities), axis=1)))
            for stock in itertools.product(*(range(c + 1) for c in capacities))
        )
        states = int(np.prod(capacities + 1))
        with pytest.raises(ModelTooLargeError) as caught:
            build_transfer_model(spec, SizeLimits(max_pairs=pairs - 1))
        message = str(caught.value)
        assert f"{pairs:,}" in message
        assert f"{pairs - 1:,}" in message
        assert f"{states:,}" in message
        assert caught.value.states == states
        assert caught.value.pairs == pairs
        assert build_transfer_model(spec, SizeLimits(max_pairs=pairs)).n_pairs == pairs

    def test_too_many_flows_is_refused_while_enumerating(self) -> None:
        spec = three_tool_libraries()
        with pytest.raises(ModelTooLargeError) as caught:
            build_transfer_model(spec, SizeLimits(max_flows=10))
        assert "10" in str(caught.value)
        assert caught.value.states == 4 * 5 * 4
        assert caught.value.pairs is None
