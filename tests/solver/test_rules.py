"""Dispatch costs, floors (keep_at_least) and handling limits (max_units_out, max_units_in).

Outside references: quantecon's DiscreteDP (PyPI) on the explicit MDPs of tests/solver/reference.py,
which reads the rules straight from the specification and enumerates every flow within the lane
limits, without the solver's flow table, boxes or pruning. Networks are scenarios of our own.
"""

from __future__ import annotations

import dataclasses
import hashlib
import itertools
import json
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from numpy.testing import assert_allclose
from pydantic import ValidationError

from solver import NetworkSpec, PolicyResult, build_transfer_model, solve_network
from solver.bellman import ActionTable, greedy
from solver.simulation import simulate_policies
from tests.solver.networks import location, negative_binomial, pmf, poisson, weekly
from tests.solver.reference import (
    GAIN_ATOL,
    NEAR_ONE,
    all_flows,
    assert_policy_is_optimal,
    assert_values_match,
    build_reference,
    day_value,
    location_rules,
    solve_reference,
    stationary_gain,
    weekdays_of,
)

DEMO = Path(__file__).resolve().parents[2] / "service" / "data" / "demo_network.json"


def network(
    locations: list[dict[str, Any]],
    lanes: list[dict[str, Any]],
    *,
    discount: float = 0.93,
    max_units_per_night: int | None = None,
) -> NetworkSpec:
    return NetworkSpec.model_validate(
        {
            "name": "rules",
            "discount": discount,
            "max_units_per_night": max_units_per_night,
            "locations": locations,
            "lanes": lanes,
        }
    )


def lane(a: str, b: str, cost: float, limit: Any, dispatch: float = 0.0) -> dict[str, Any]:
    return {"from": a, "to": b, "unit_cost": cost, "max_units": limit, "dispatch_cost": dispatch}


def scaffold_pair() -> NetworkSpec:
    """Two scaffolding hire depots: a busy dock depot and a quiet inland one that must keep two
    towers for walk-in trade; a van costs a fixed amount per trip."""
    dock = location("dock", 6, negative_binomial(2.1, 3.4), poisson(1.2), margin=14.0)
    inland = location("inland", 5, poisson(0.8), poisson(1.6), margin=11.0, penalty=2.0)
    inland["keep_at_least"] = 2
    dock["max_units_in"] = 2
    return network(
        [dock, inland],
        [lane("dock", "inland", 0.6, 3, dispatch=2.5), lane("inland", "dock", 0.45, 3, 3.0)],
    )


def three_bike_shops() -> NetworkSpec:
    """Three bike shops sharing e-bike demonstrators; a floor at the flagship, handling limits
    at the small shop, vans with a fixed cost on some lanes."""
    flagship = location("flagship", 3, poisson(1.6), negative_binomial(1.0, 1.9), margin=9.0)
    corner = location("corner", 3, pmf(0.3, 0.4, 0.3), poisson(0.9), margin=7.5, holding=0.3)
    outlet = location("outlet", 2, poisson(0.6), pmf(0.2, 0.5, 0.3), margin=6.0, penalty=1.5)
    flagship["keep_at_least"] = 1
    corner["max_units_out"] = 1
    corner["max_units_in"] = 1
    return network(
        [flagship, corner, outlet],
        [
            lane("flagship", "corner", 0.3, 2, dispatch=1.2),
            lane("corner", "flagship", 0.35, 2),
            lane("corner", "outlet", 0.5, 2, dispatch=0.8),
            lane("outlet", "flagship", 0.4, 2, dispatch=0.6),
        ],
        discount=0.9,
        max_units_per_night=3,
    )


def weekly_ski_racks() -> NetworkSpec:
    """Two ski-hire huts: the valley hut keeps more racks before the weekend and the summit hut
    can unpack fewer on Friday and Saturday nights."""
    valley = location("valley", 4, poisson(1.4), poisson(1.1), margin=10.0, penalty=1.0)
    summit = location("summit", 3, weekly(*[poisson(0.7)] * 4, *[poisson(1.9)] * 3), pmf(0.5, 0.5))
    valley["keep_at_least"] = weekly(0, 0, 1, 2, 2, 1, 0)
    summit["max_units_in"] = weekly(3, 3, 3, 3, 1, 1, 2)
    summit["max_units_out"] = 1
    return network(
        [valley, summit],
        [lane("valley", "summit", 0.7, 3, dispatch=1.5), lane("summit", "valley", 0.5, 2)],
        discount=0.92,
    )


def batching_pair(dispatch: float) -> NetworkSpec:
    """A builders' yard restocks a showroom by van: the van's fixed cost makes each trip worth
    several units."""
    yard = location("yard", 6, poisson(0.3), poisson(1.2), margin=4.0, holding=0.5, penalty=0.0)
    shop = location("shop", 5, poisson(1.1), pmf(1.0), margin=12.0, holding=0.1, penalty=1.0)
    return network([yard, shop], [lane("yard", "shop", 0.4, 4, dispatch)], discount=0.95)


NETWORKS: dict[str, Callable[[], NetworkSpec]] = {
    "scaffold-pair": scaffold_pair,
    "three-bike-shops": three_bike_shops,
    "weekly-ski-racks": weekly_ski_racks,
    "batching-pair": lambda: batching_pair(8.0),
}


@pytest.fixture(scope="module", params=sorted(NETWORKS))
def spec(request: pytest.FixtureRequest) -> NetworkSpec:
    built: NetworkSpec = NETWORKS[request.param]()
    return built


class TestAgainstQuantecon:
    def test_values_and_moves_match_the_explicit_mdp(self, spec: NetworkSpec) -> None:
        case = solve_reference(spec)
        result = solve_network(spec)
        assert result.converged
        # Reference: quantecon.markov.DiscreteDP policy iteration (QuantEcon, PyPI) on the
        # brute-force MDP with the rules read from the specification; values to 1e-8 absolute
        # + 1e-10 relative (tighter than 1e-6), chosen moves in the optimal set.
        assert_values_match(result.values, case)
        assert_policy_is_optimal(result.policy_flows(), case)

    def test_long_run_profit_matches_the_explicit_mdp(self, spec: NetworkSpec) -> None:
        reference = build_reference(spec)
        # A discounted-optimal policy for beta near 1 is Blackwell optimal, hence average
        # optimal (Puterman 1994, Markov Decision Processes, ch. 10; from memory).
        # Reference: quantecon.markov.DiscreteDP and quantecon.MarkovChain (PyPI).
        solution = reference.discrete_dp(NEAR_ONE).solve(method="policy_iteration")
        reward, transition = reference.policy_chain(reference.flows[solution.sigma])
        gain, _ = stationary_gain(reward, transition)
        result = solve_network(spec, criterion="average")
        assert result.gain is not None
        assert_allclose(result.gain, gain, rtol=0, atol=GAIN_ATOL * 10)

    def test_recommendations_report_the_cost_with_dispatch(self, spec: NetworkSpec) -> None:
        result = solve_network(spec)
        unit = np.array([ln.unit_cost for ln in spec.lanes])
        fixed = np.array([ln.dispatch_cost for ln in spec.lanes])
        for stock in itertools.product(*(range(loc.capacity + 1) for loc in spec.locations)):
            flows = np.array(result.recommend(stock).flows)
            # The rule of solver/spec.py: unit cost per unit plus the dispatch cost per lane used.
            expected = float(flows @ unit + (flows > 0) @ fixed)
            assert result.recommend(stock).transfer_cost == pytest.approx(expected, abs=1e-12)


def test_a_dispatch_cost_makes_the_optimal_policy_batch_units() -> None:
    free = batching_pair(0.0)
    costly = batching_pair(8.0)
    case = solve_reference(costly)
    result = solve_network(costly)
    # Reference: quantecon.markov.DiscreteDP on the brute-force MDP (QuantEcon, PyPI).
    assert_values_match(result.values, case)
    assert_policy_is_optimal(result.policy_flows(), case)
    moved = result.policy_flows()[0, :, 0]
    # With the van's fixed cost no night moves a single unit, yet some nights move several...
    assert not np.any(moved == 1)
    assert np.any(moved >= 2)
    # ... whereas without it single units are moved (the reference agrees on both networks).
    free_case = solve_reference(free)
    free_result = solve_network(free)
    assert_policy_is_optimal(free_result.policy_flows(), free_case)
    assert np.any(free_result.policy_flows()[0, :, 0] == 1)
    # Every batch is in quantecon's optimal set while a single unit is strictly worse there.
    reference = case.reference
    q = reference.pair_values(case.reference_values, costly.discount)
    best = reference.best_by_state(q)
    single = reference.flows[reference.a_indices, 0] == 1
    assert np.all(q[single] < best[reference.s_indices[single]] - 1e-6)


def _rule_networks() -> st.SearchStrategy[NetworkSpec]:
    @st.composite
    def build(draw: st.DrawFn) -> NetworkSpec:
        n = draw(st.integers(2, 3))
        week = draw(st.booleans())
        capacities = [draw(st.integers(1, 3)) for _ in range(n)]

        def count(top: int) -> Any:
            if week:
                return weekly(*(draw(st.integers(0, top)) for _ in range(7)))
            return draw(st.integers(0, top))

        locations = []
        for i, c in enumerate(capacities):
            loc = location(
                f"store{i}",
                c,
                draw(st.sampled_from([poisson(0.6), poisson(1.4), pmf(0.3, 0.3, 0.4)])),
                draw(st.sampled_from([poisson(0.9), pmf(0.5, 0.5), pmf(0.2, 0.3, 0.5)])),
                margin=draw(st.sampled_from([5.0, 9.0])),
                penalty=draw(st.sampled_from([0.0, 1.5])),
            )
            if draw(st.booleans()):
                loc["keep_at_least"] = count(c)
            if draw(st.booleans()):
                loc["max_units_out"] = count(2)
            if draw(st.booleans()):
                loc["max_units_in"] = count(2)
            locations.append(loc)
        ends = draw(
            st.lists(
                st.sampled_from([(a, b) for a in range(n) for b in range(n) if a != b]),
                min_size=1,
                max_size=4,
                unique=True,
            )
        )
        # No free lane: moving and not moving would tie exactly, and quantecon's policy iteration
        # can then alternate between tied policies on rounding noise instead of stopping.
        lanes = [
            lane(
                f"store{a}",
                f"store{b}",
                draw(st.sampled_from([0.15, 0.4, 1.5])),
                draw(st.integers(1, 3)),
                draw(st.sampled_from([0.0, 0.0, 1.0, 4.0])),
            )
            for a, b in ends
        ]
        return network(
            locations,
            lanes,
            discount=draw(st.sampled_from([0.6, 0.9])),
            max_units_per_night=draw(st.one_of(st.none(), st.integers(1, 4))),
        )

    return build()


@settings(max_examples=25, deadline=None)
@given(spec=_rule_networks())
def test_random_networks_with_rules_match_quantecon(spec: NetworkSpec) -> None:
    case = solve_reference(spec)
    result = solve_network(spec)
    assert result.converged
    # Reference: quantecon.markov.DiscreteDP on the brute-force MDP (QuantEcon, PyPI).
    assert_values_match(result.values, case)
    assert_policy_is_optimal(result.policy_flows(), case)


@settings(max_examples=25, deadline=None)
@given(spec=_rule_networks(), seed=st.integers(0, 2**32 - 1))
def test_pruned_flow_table_attains_the_best_of_every_flow(spec: NetworkSpec, seed: int) -> None:
    # build.py's argument: the pruned table loses nothing, for any post-move values U, against
    # the full action set (every flow within the lane limits, rules applied by brute force).
    model = build_transfer_model(spec)
    rng = np.random.default_rng(seed)
    u = rng.normal(scale=3.0, size=(model.n_phases, *model.shape))
    action, best = greedy(ActionTable.of(model), u, 0.0)

    flows, sent, received, costs = all_flows(spec)
    capacities = np.array([loc.capacity for loc in spec.locations])
    limits = np.array(
        [[day_value(ln.max_units, d) for ln in spec.lanes] for d in range(weekdays_of(spec))]
    )
    stocks = np.array(list(itertools.product(*(range(c + 1) for c in capacities))))
    post = stocks[:, None, :] - sent[None] + received[None]
    for d in range(model.n_phases):
        floors, most_out, most_in = location_rules(spec, d)
        fits = np.all(
            (sent[None] <= stocks[:, None, :])
            & (post <= capacities)
            & ((sent[None] == 0) | (post >= floors)),
            axis=2,
        )
        allowed = (
            np.all(flows <= limits[d], axis=1)
            & np.all(sent <= most_out, axis=1)
            & np.all(received <= most_in, axis=1)
        )
        q = np.where(
            fits & allowed,
            u[d][tuple(np.clip(post, 0, capacities).transpose(2, 0, 1))] - costs,
            -np.inf,
        )
        assert_allclose(best[d], q.max(axis=1), rtol=0, atol=1e-12)
        # The chosen row is itself one of the full set's best, and feasible.
        chosen = model.flows[action[d]]
        rows = {tuple(f): k for k, f in enumerate(flows.tolist())}
        picked = np.array([rows[tuple(f)] for f in chosen.tolist()])
        assert np.all(fits[np.arange(len(stocks)), picked] & allowed[picked])


@settings(max_examples=20, deadline=None)
@given(spec=_rule_networks(), raise_at=st.integers(0, 2), extra=st.integers(1, 3))
def test_raising_a_floor_never_raises_the_optimal_value(
    spec: NetworkSpec, raise_at: int, extra: int
) -> None:
    document = spec.model_dump(mode="json", by_alias=True)
    target = document["locations"][raise_at % len(document["locations"])]
    old = target.get("keep_at_least", 0)
    capacity = target["capacity"]
    if isinstance(old, dict):
        target["keep_at_least"] = {
            "weekly": {day: min(capacity, k + extra) for day, k in old["weekly"].items()}
        }
    else:
        target["keep_at_least"] = min(capacity, old + extra)
    stricter = NetworkSpec.model_validate(document)
    # A stricter floor removes actions and adds none, so no state can gain (common practice for
    # constrained MDPs: a maximum over a subset is no larger).
    loose, tight = solve_network(spec), solve_network(stricter)
    assert np.all(tight.values <= loose.values + 1e-7 * max(1.0, float(np.abs(loose.values).max())))


@settings(max_examples=20, deadline=None)
@given(spec=_rule_networks())
def test_no_recommendation_breaks_a_floor_or_a_handling_limit(spec: NetworkSpec) -> None:
    result = solve_network(spec)
    _assert_rules_kept(spec, result)


def test_weekly_rules_are_kept_on_every_night() -> None:
    spec = weekly_ski_racks()
    result = solve_network(spec)
    assert result.phases == 7
    _assert_rules_kept(spec, result)
    # The Thursday floor of 2 at the valley binds: from 2 units it sends nothing that night.
    thursday = result.recommend([2, 0], phase=3)
    assert thursday.flows[0] == 0


def _assert_rules_kept(spec: NetworkSpec, result: PolicyResult) -> None:
    """Every recommendation and alternative, at every stock and phase, against the rules read
    from the specification."""
    ids = [loc.id for loc in spec.locations]
    for phase in range(result.phases):
        weekday = phase
        for stock in itertools.product(*(range(loc.capacity + 1) for loc in spec.locations)):
            rec = result.recommend(stock, phase=phase, n_alternatives=100)
            for flows in (rec.flows, *(alt.flows for alt in rec.alternatives)):
                sent = [0] * len(ids)
                received = [0] * len(ids)
                for units, ln in zip(flows, spec.lanes, strict=True):
                    sent[ids.index(ln.from_)] += units
                    received[ids.index(ln.to)] += units
                for i, loc in enumerate(spec.locations):
                    after = stock[i] - sent[i] + received[i]
                    assert 0 <= after <= loc.capacity
                    if sent[i]:
                        assert after >= day_value(loc.keep_at_least, weekday), (stock, flows)
                    if loc.max_units_out is not None:
                        assert sent[i] <= day_value(loc.max_units_out, weekday)
                    if loc.max_units_in is not None:
                        assert received[i] <= day_value(loc.max_units_in, weekday)


class TestDefaults:
    def test_zero_dispatch_cost_and_floor_give_the_policy_without_them(self) -> None:
        plain = NetworkSpec.model_validate_json(DEMO.read_text())
        document = plain.model_dump(mode="json", by_alias=True)
        for entry in document["lanes"]:
            entry["dispatch_cost"] = 0.0
        for entry in document["locations"]:
            entry["keep_at_least"] = 0
        explicit = NetworkSpec.model_validate(document)
        assert explicit == plain
        a, b = solve_network(plain), solve_network(explicit)
        assert np.array_equal(a.flows, b.flows) and np.array_equal(a.action, b.action)
        assert np.array_equal(a.values, b.values)

    @settings(max_examples=15, deadline=None)
    @given(spec=_rule_networks())
    def test_dispatch_cost_zero_is_the_unit_cost_model(self, spec: NetworkSpec) -> None:
        document = spec.model_dump(mode="json", by_alias=True)
        for entry in document["lanes"]:
            entry["dispatch_cost"] = 0.0
        free = NetworkSpec.model_validate(document)
        model = build_transfer_model(free)
        assert_allclose(model.flow_costs, model.flows @ model.lane_costs, rtol=0, atol=0)
        # Reference: quantecon.markov.DiscreteDP on the brute-force MDP (QuantEcon, PyPI).
        case = solve_reference(free)
        result = solve_network(free)
        assert_values_match(result.values, case)
        assert_policy_is_optimal(result.policy_flows(), case)

    def test_a_network_without_the_new_fields_keeps_its_serialised_form_and_hash(self) -> None:
        document = json.loads(DEMO.read_text())
        spec = NetworkSpec.model_validate(document)
        dumped = spec.model_dump(mode="json", by_alias=True)
        assert set(dumped) == {"name", "discount", "locations", "lanes", "max_units_per_night"}
        assert all(
            set(loc) == set(given)
            for loc, given in zip(dumped["locations"], document["locations"], strict=True)
        )
        assert all(
            set(ln) == set(given)
            for ln, given in zip(dumped["lanes"], document["lanes"], strict=True)
        )
        text = json.dumps(dumped, sort_keys=True, separators=(",", ":"))
        # The demo's hash as stored before these fields existed (README, "Networks": 49bad527a6b4).
        assert hashlib.sha256(text.encode()).hexdigest().startswith("49bad527a6b4")


class TestValidation:
    @staticmethod
    def problems(document: dict[str, Any]) -> list[tuple[str, str]]:
        with pytest.raises(ValidationError) as raised:
            NetworkSpec.model_validate(document)
        return [
            (".".join(str(part) for part in error["loc"]), error["msg"])
            for error in raised.value.errors()
        ]

    def base(self) -> dict[str, Any]:
        return scaffold_pair().model_dump(mode="json", by_alias=True)

    def test_a_floor_above_capacity_is_named(self) -> None:
        document = self.base()
        document["locations"][1]["keep_at_least"] = 9
        ((where, message),) = self.problems(document)
        assert where == "locations.1.keep_at_least"
        assert "keep_at_least (9) exceeds the capacity (5)" in message

    def test_a_weekly_floor_names_its_night(self) -> None:
        document = self.base()
        document["locations"][1]["keep_at_least"] = weekly(0, 0, 0, 0, 0, 7, 0)
        ((where, message),) = self.problems(document)
        assert where == "locations.1.keep_at_least" and "on sat (7)" in message

    @pytest.mark.parametrize(
        ("field", "value"),
        [
            ("keep_at_least", -1),
            ("max_units_out", -2),
            ("max_units_in", 1.5),
            ("max_units_in", {"weekly": {"mon": 1, "tue": 1}}),
        ],
    )
    def test_bad_counts_are_refused_where_they_are(self, field: str, value: Any) -> None:
        document = self.base()
        document["locations"][0][field] = value
        problems = self.problems(document)
        assert problems and all(where.startswith(f"locations.0.{field}") for where, _ in problems)

    def test_a_negative_dispatch_cost_is_refused(self) -> None:
        document = self.base()
        document["lanes"][0]["dispatch_cost"] = -1.0
        ((where, _),) = self.problems(document)
        assert where == "lanes.0.dispatch_cost"

    def test_rules_round_trip_and_make_a_network_weekly(self) -> None:
        spec = weekly_ski_racks()
        assert spec.is_periodic and spec.has_rules
        again = NetworkSpec.model_validate_json(spec.model_dump_json(by_alias=True))
        assert again == spec
        assert again.locations[0].keep_at_least_on(3) == 2
        assert again.locations[1].max_units_in_on(4) == 1
        relaxed = spec.without_rules()
        assert not relaxed.has_rules and relaxed.lanes[0].dispatch_cost == 1.5


@settings(max_examples=30, deadline=None)
@given(spec=_rule_networks(), seed=st.integers(0, 2**32 - 1))
def test_skipping_dominated_flows_changes_no_greedy_choice(spec: NetworkSpec, seed: int) -> None:
    # bellman.undominated: the improvement step scans fewer flows; scanning every allowed flow
    # must give the same flows and values, ties included.
    model = build_transfer_model(spec)
    table = ActionTable.of(model)
    every = dataclasses.replace(table, candidates=table.phase_flows)
    rng = np.random.default_rng(seed)
    # Values on a coarse grid, so that exact ties between flows are common.
    u = rng.integers(-3, 4, size=(model.n_phases, *model.shape)).astype(np.float64)
    for tolerance in (0.0, 0.5):
        fast, full = greedy(table, u, tolerance), greedy(every, u, tolerance)
        assert np.array_equal(fast[0], full[0]) and np.array_equal(fast[1], full[1])


def test_relays_dearer_than_the_direct_lane_are_skipped() -> None:
    # Three stores, lanes both ways: a relay a -> b -> c moves what a -> c moves, at more cost.
    ids = ("a", "b", "c")
    costs = {("a", "b"): 1.0, ("b", "a"): 1.0, ("b", "c"): 1.0, ("c", "b"): 1.0}
    costs |= {("a", "c"): 1.5, ("c", "a"): 2.5}
    spec = network(
        [location(i, 3, poisson(1.0), poisson(1.0)) for i in ids],
        [lane(a, b, cost, 2) for (a, b), cost in costs.items()],
    )
    model = build_transfer_model(spec)
    table = ActionTable.of(model)
    skipped = {
        tuple(model.flows[k]) for k in np.setdiff1d(table.phase_flows[0], table.candidates[0])
    }
    lanes = list(costs)
    relay_ac = [0] * len(lanes)
    relay_ac[lanes.index(("a", "b"))] = relay_ac[lanes.index(("b", "c"))] = 1
    relay_ca = [0] * len(lanes)
    relay_ca[lanes.index(("c", "b"))] = relay_ca[lanes.index(("b", "a"))] = 1
    assert tuple(relay_ac) in skipped  # 2.0 > 1.5 direct
    assert tuple(relay_ca) not in skipped  # 2.0 < 2.5 direct: the relay is cheaper
    # And scanning only the candidates chooses what scanning every flow chooses.
    every = dataclasses.replace(table, candidates=table.phase_flows)
    u = np.random.default_rng(7).normal(scale=4.0, size=(1, *model.shape))
    fast, full = greedy(table, u, 0.0), greedy(every, u, 0.0)
    assert np.array_equal(fast[0], full[0]) and np.array_equal(fast[1], full[1])


def test_a_simulated_policy_that_breaks_a_floor_is_refused() -> None:
    spec = scaffold_pair()  # inland keeps 2
    model = build_transfer_model(spec)
    # One unit inland -> dock (lane 1), chosen where inland holds 2: it would keep only 1.
    flow = int(np.flatnonzero((model.flows[:, 0] == 0) & (model.flows[:, 1] == 1))[0])
    policy = np.zeros(model.n_states, dtype=np.int64)
    policy[np.ravel_multi_index((0, 2), model.shape)] = flow
    with pytest.raises(ValueError, match="below its floor"):
        simulate_policies(
            spec, model, {"bad": policy}, days=1, replications=1, rng=np.random.default_rng(0)
        )
    # Where inland holds 3 the same move keeps 2 and is accepted.
    policy[np.ravel_multi_index((0, 2), model.shape)] = 0
    policy[np.ravel_multi_index((0, 3), model.shape)] = flow
    simulate_policies(
        spec, model, {"ok": policy}, days=1, replications=1, rng=np.random.default_rng(0)
    )
