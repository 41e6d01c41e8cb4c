"""Weekday-dependent networks: the specification, the periodic model and its exact solution.

Outside references: quantecon's DiscreteDP and MarkovChain (QuantEcon, PyPI package
``quantecon``) on the explicit (weekday, stock) state space, built by brute force from the
specification in tests/solver/reference.py with scipy.stats laws. The other checks compare a
weekly network with the stationary solver (already checked against quantecon in
test_reference_quantecon.py) or test behaviour stated in README.md ("The model").
"""

from __future__ import annotations

import copy
import itertools
from typing import Any

import numpy as np
import pytest
import quantecon as qe
from hypothesis import given, settings
from hypothesis import strategies as st
from numpy.testing import assert_allclose
from numpy.typing import NDArray
from pydantic import ValidationError

from solver import (
    Criterion,
    ModelTooLargeError,
    NetworkSpec,
    NotUnichainError,
    PolicyResult,
    SizeLimits,
    build_transfer_model,
    solve_network,
    solve_policy_iteration,
)
from solver.bellman import ActionTable
from solver.build import check_size
from solver.chains import every_policy_unichain, unichain_witness
from solver.evaluation import EvaluationMethod
from tests.solver.networks import (
    WEEK,
    location,
    negative_binomial,
    pmf,
    poisson,
    two_stores,
    weekly,
)
from tests.solver.reference import (
    BIAS_ATOL,
    BLACKWELL_GAIN_ATOL,
    GAIN_ATOL,
    NEAR_ONE,
    Case,
    assert_policy_is_optimal,
    assert_values_match,
    build_reference,
    rounding_slack,
    solve_reference,
    stationary_gain,
)

# The reference's best flow counts as untied when every other flow is worse by more than this.
UNTIED = 1e-6


def network(
    locations: list[dict[str, Any]],
    lanes: list[tuple[str, str, float, Any]],
    **fields: Any,
) -> NetworkSpec:
    return NetworkSpec.model_validate(
        {
            "name": fields.pop("name", "weekly test"),
            "locations": locations,
            "lanes": [
                {"from": a, "to": b, "unit_cost": cost, "max_units": limit}
                for a, b, cost, limit in lanes
            ],
            **fields,
        }
    )


def garden_pair() -> NetworkSpec:
    """Two garden centres sharing hedge trimmers. The van does not run on Sunday night, and only
    two units a night go towards the bigger centre on Friday and Saturday nights; the smaller
    centre is restocked on Tuesdays and Fridays only."""
    return network(
        [
            location(
                "meadow",
                4,
                weekly(*(poisson(m) for m in (1.0, 0.8, 1.2, 1.1, 1.9, 2.6, 0.7))),
                poisson(1.2),
                margin=12.0,
            ),
            location(
                "orchard",
                3,
                poisson(1.1),
                weekly(
                    pmf(1.0), pmf(0.2, 0.5, 0.3), pmf(1.0), pmf(1.0), poisson(1.4), *[pmf(1.0)] * 2
                ),
                margin=9.5,
                holding=0.35,
            ),
        ],
        [
            ("meadow", "orchard", 0.9, weekly(2, 2, 2, 2, 1, 1, 0)),
            ("orchard", "meadow", 0.6, weekly(2, 2, 2, 2, 2, 2, 0)),
        ],
        discount=0.95,
        max_units_per_night=3,
        timezone="Europe/Berlin",
    )


def surf_pair() -> NetworkSpec:
    """Two surf shops sharing wetsuit racks: the beach shop's weekend demand is heavy-tailed
    (negative binomial), the harbour shop's is steady; a lane both ways every night."""
    beach_weekday = poisson(0.9)
    return network(
        [
            location(
                "beach",
                5,
                weekly(
                    *[beach_weekday] * 5, negative_binomial(2.8, 6.5), negative_binomial(2.2, 5.0)
                ),
                poisson(1.3),
                margin=14.0,
                penalty=2.0,
            ),
            location("harbour", 3, poisson(1.0), pmf(0.3, 0.4, 0.3), margin=11.0, holding=0.1),
        ],
        [("beach", "harbour", 0.8, 2), ("harbour", "beach", 0.7, 2)],
        discount=0.97,
    )


REFERENCE_NETWORKS = {"garden-pair": garden_pair, "surf-pair": surf_pair}


@pytest.fixture(scope="module", params=sorted(REFERENCE_NETWORKS))
def case(request: pytest.FixtureRequest) -> Case:
    return solve_reference(REFERENCE_NETWORKS[request.param]())


def stacked_flows(result: PolicyResult) -> NDArray[np.int64]:
    """Units per lane in every (weekday, stock) state, shape (7 * S, L), index d * S + s."""
    flows = result.policy_flows()
    return flows.reshape(-1, flows.shape[-1])


def assert_untied_choices_match(result: PolicyResult, case: Case) -> None:
    """Where the reference's best flow is untied, the solver chose it."""
    reference = case.reference
    q = reference.pair_values(case.reference_values, case.spec.discount)
    best = reference.best_by_state(q)
    # Untied: every other flow allowed in the state is worse than the best by more than UNTIED.
    runner_up = np.array(
        [
            np.sort(q[reference.s_indices == state])[-2:][0] if state_flows > 1 else -np.inf
            for state, state_flows in enumerate(np.bincount(reference.s_indices))
        ]
    )
    untied = np.flatnonzero(best - runner_up > UNTIED)
    assert untied.size > reference.n_states // 2
    flows = stacked_flows(result)
    for state in untied:
        # Reference: quantecon.markov.DiscreteDP's optimal policy sigma (QuantEcon, PyPI).
        assert tuple(flows[state]) == tuple(reference.flows[case.reference_sigma[state]])


class TestAgainstQuantEcon:
    def test_discounted_values_match(self, case: Case) -> None:
        result = solve_network(case.spec)
        assert result.converged
        assert result.phases == 7
        # Against quantecon's DiscreteDP on the explicit (weekday, stock) states.
        assert_values_match(result.values, case)

    def test_discounted_policy_is_optimal_and_matches_where_untied(self, case: Case) -> None:
        result = solve_network(case.spec)
        assert_policy_is_optimal(result.policy_flows(), case)
        assert_untied_choices_match(result, case)

    @pytest.mark.parametrize("evaluation", ["successive", "krylov"])
    def test_either_evaluation_solves_the_cyclic_system(
        self, case: Case, evaluation: EvaluationMethod
    ) -> None:
        model = build_transfer_model(case.spec)
        result = solve_policy_iteration(model, evaluation=evaluation)
        assert result.converged
        assert_values_match(result.values, case)
        error = float(np.max(np.abs(result.values.reshape(-1) - case.reference_values)))
        # Reference: quantecon.markov.DiscreteDP policy iteration (QuantEcon, PyPI).
        assert error <= result.error_bound + rounding_slack(case)

    def test_gain_is_that_of_a_nearly_undiscounted_optimal_policy(self, case: Case) -> None:
        # For beta close enough to 1 a discounted-optimal policy is Blackwell optimal, hence
        # average optimal (Puterman 1994, Markov Decision Processes, ch. 10; from memory).
        # Reference policy: quantecon.markov.DiscreteDP at beta 0.99999 on the (weekday, stock)
        # states; its gain: the stationary distribution of its chain from quantecon.MarkovChain
        # (the chain is periodic with period 7; its stationary distribution is still unique).
        average = solve_network(case.spec, criterion="average")
        assert average.converged and average.gain is not None
        solution = case.reference.discrete_dp(NEAR_ONE).solve(method="policy_iteration")
        assert solution.num_iter < solution.max_iter
        reward, transition = case.reference.policy_chain(case.reference.flows[solution.sigma])
        gain, _ = stationary_gain(reward, transition)
        assert_allclose(average.gain, gain, rtol=0, atol=BLACKWELL_GAIN_ATOL)

    def test_gain_is_the_weekly_mean_profit_of_the_policy(self, case: Case) -> None:
        average = solve_network(case.spec, criterion="average")
        assert average.gain is not None
        reward, transition = case.reference.policy_chain(stacked_flows(average))
        # Reference: quantecon.MarkovChain(P).stationary_distributions (QuantEcon, PyPI).
        gain, pi = stationary_gain(reward, transition)
        assert_allclose(average.gain, gain, rtol=0, atol=GAIN_ATOL)
        # Every weekday carries 1/7 of the long-run mass: the gain is a per-day average over
        # the week, not Monday's profit.
        assert_allclose(pi.reshape(7, -1).sum(axis=1), np.full(7, 1 / 7), atol=1e-12)

    def test_bias_solves_the_weekly_optimality_equations(self, case: Case) -> None:
        # h_d(s) + g = max_f [r_d(s, f) + E_d h_{d+1}] with h_0(0) = 0 (average optimality
        # equation, Puterman 1994, ch. 8; from memory), the maximum over every flow of the
        # independent reference.
        average = solve_network(case.spec, criterion="average")
        assert average.gain is not None
        h = average.values.reshape(-1)
        assert h[0] == 0.0
        best = case.reference.best_by_state(case.reference.pair_values(h, 1.0))
        assert_allclose(best, h + average.gain, rtol=0, atol=BIAS_ATOL)


def same_days(spec: NetworkSpec, *, lanes_too: bool = True) -> NetworkSpec:
    """`spec` with every demand, replenishment (and lane limit) written as a weekly field whose
    seven days are all the same."""
    document = spec.model_dump(by_alias=True)
    for loc in document["locations"]:
        for field in ("demand", "replenishment"):
            loc[field] = weekly(*[loc[field]] * 7)
    if lanes_too:
        for lane in document["lanes"]:
            lane["max_units"] = weekly(*[lane["max_units"]] * 7)
    return NetworkSpec.model_validate(document)


@pytest.mark.parametrize("criterion", ["discounted", "average"])
@pytest.mark.parametrize("lanes_too", [True, False], ids=["weekly-lanes", "weekly-laws"])
def test_identical_days_give_the_stationary_policy(criterion: Criterion, lanes_too: bool) -> None:
    # Seven identical days: V_d = V for every d solves the weekly equations, so the weekly
    # solution must repeat the stationary one (checked against quantecon elsewhere).
    base = two_stores(capacities=(6, 5), holding=(0.3, 0.1), penalty=(1.0, 0.5))
    stationary = solve_network(base, criterion=criterion)
    periodic = solve_network(same_days(base, lanes_too=lanes_too), criterion=criterion)
    assert (stationary.phases, periodic.phases) == (1, 7)
    assert periodic.converged
    for d in range(7):
        assert_allclose(periodic.values[d], stationary.values[0], rtol=1e-9, atol=1e-9)
        np.testing.assert_array_equal(periodic.action[d], stationary.action[0])
    if criterion == "average":
        assert periodic.gain == pytest.approx(stationary.gain, rel=1e-9)


def kayak_shops(*, weekend_peak: bool) -> NetworkSpec:
    """Two kayak hire shops: Lakeside is quiet on weekdays and busy at weekends, Town is steady.
    Without `weekend_peak`, Lakeside's demand is its weekly average every day."""
    quiet, busy = 0.6, 4.5
    days = [quiet] * 5 + [busy] * 2
    lakeside = weekly(*map(poisson, days)) if weekend_peak else poisson(sum(days) / 7)
    return network(
        [
            location("lakeside", 12, lakeside, poisson(0.5), margin=20.0),
            location("town", 12, poisson(1.5), poisson(2.5), margin=20.0),
        ],
        [("town", "lakeside", 1.0, 2), ("lakeside", "town", 1.0, 2)],
        discount=0.99,
    )


@pytest.mark.parametrize("criterion", ["discounted", "average"])
def test_weekend_peak_pulls_stock_to_the_busy_shop_before_the_weekend(
    criterion: Criterion,
) -> None:
    # Measured: units sent from Town to Lakeside minus units sent back, from balanced stock
    # (6, 6). The stationary approximation (weekly-average demand) cannot tell the days apart;
    # the weekly policy must send more on Thursday night, ahead of the weekend, and nothing
    # more on Sunday night, when a quiet week follows.
    periodic = solve_network(kayak_shops(weekend_peak=True), criterion=criterion)
    stationary = solve_network(kayak_shops(weekend_peak=False), criterion=criterion)

    def toward_lakeside(result: PolicyResult, weekday: int, stock: list[int]) -> int:
        flows = result.recommend(stock, phase=result.phase_of(weekday)).flows
        return flows[0] - flows[1]

    thursday, sunday = WEEK.index("thu"), WEEK.index("sun")
    assert toward_lakeside(periodic, thursday, [6, 6]) > toward_lakeside(
        stationary, thursday, [6, 6]
    )
    assert toward_lakeside(periodic, sunday, [6, 6]) <= toward_lakeside(stationary, sunday, [6, 6])
    # Over every balanced stock, Thursday's moves toward Lakeside exceed the stationary ones.
    balanced = [[k, k] for k in range(13)]
    assert sum(toward_lakeside(periodic, thursday, s) for s in balanced) > sum(
        toward_lakeside(stationary, thursday, s) for s in balanced
    )


class TestRecommendations:
    @pytest.fixture(scope="class")
    @classmethod
    def result(cls) -> PolicyResult:
        return solve_network(garden_pair())

    def test_weekday_maps_to_its_phase(self, result: PolicyResult) -> None:
        assert [result.phase_of(day) for day in range(7)] == list(range(7))
        stationary = solve_network(two_stores())
        assert [stationary.phase_of(day) for day in range(7)] == [0] * 7
        with pytest.raises(ValueError, match="weekday"):
            result.phase_of(7)

    def test_recommendation_follows_the_phase_policy(self, result: PolicyResult) -> None:
        assert result.policy_flows().shape == (7, result.n_states, 2)
        for phase, index in itertools.product(range(7), range(result.n_states)):
            stock = [int(u) for u in np.unravel_index(index, result.shape)]
            recommendation = result.recommend(stock, phase=phase)
            assert recommendation.flows == tuple(result.policy_flows()[phase, index])
            assert recommendation.expected_value == pytest.approx(
                result.values[phase, index], rel=1e-9
            )

    def test_sunday_night_offers_no_moves(self, result: PolicyResult) -> None:
        # Both lanes are closed on Sunday night: nothing is recommended, and no alternative is
        # offered, whatever the stock.
        sunday = result.phase_of(6)
        assert not result.policy_flows()[sunday].any()
        recommendation = result.recommend([4, 0], phase=sunday)
        assert recommendation.flows == (0, 0)
        assert recommendation.alternatives == ()

    def test_choices_offered_obey_that_nights_limits(self, result: PolicyResult) -> None:
        # From (meadow 4, orchard 0) only meadow can send: up to 2 units on Monday night, 1 on
        # Friday night.
        def offered(phase: int) -> set[tuple[int, ...]]:
            recommendation = result.recommend([4, 0], phase=phase, n_alternatives=20)
            return {recommendation.flows, *(a.flows for a in recommendation.alternatives)}

        assert offered(0) == {(0, 0), (1, 0), (2, 0)}
        assert offered(4) == {(0, 0), (1, 0)}

    def test_phase_outside_the_week_is_refused(self, result: PolicyResult) -> None:
        with pytest.raises(ValueError, match="phase"):
            result.recommend([1, 1], phase=7)
        with pytest.raises(ValueError, match="phase"):
            solve_network(two_stores()).recommend([1, 1], phase=1)


class TestSpecification:
    BASE: dict[str, Any] = garden_pair().model_dump(mode="json", by_alias=True)

    def errors_of(self, document: dict[str, Any]) -> list[tuple[str, str]]:
        with pytest.raises(ValidationError) as info:
            NetworkSpec.model_validate(document)
        return [(".".join(map(str, e["loc"])), e["msg"]) for e in info.value.errors()]

    def test_weekly_network_round_trips_through_json(self) -> None:
        spec = garden_pair()
        assert spec.is_periodic
        assert spec.timezone == "Europe/Berlin"
        again = NetworkSpec.model_validate_json(spec.model_dump_json(by_alias=True))
        assert again == spec
        assert again.locations[1].replenishment_on(1).model_dump() == pmf(0.2, 0.5, 0.3)
        assert again.lanes[0].max_units_on(6) == 0

    def test_network_without_weekly_fields_serialises_as_before(self) -> None:
        # The default time zone is left out, so a network stored before weekly fields existed
        # keeps its canonical JSON (and its hash in the policy store).
        spec = two_stores()
        assert not spec.is_periodic
        dumped = spec.model_dump(mode="json", by_alias=True)
        assert set(dumped) == {"name", "discount", "locations", "lanes", "max_units_per_night"}
        assert dumped["lanes"][0]["max_units"] == 3
        explicit = NetworkSpec.model_validate({**dumped, "timezone": "UTC"})
        assert explicit == spec
        assert explicit.model_dump(mode="json", by_alias=True) == dumped

    def test_a_missing_day_is_named(self) -> None:
        document = copy.deepcopy(self.BASE)
        del document["locations"][0]["demand"]["weekly"]["wed"]
        problems = self.errors_of(document)
        assert len(problems) == 1
        where, message = problems[0]
        assert where.startswith("locations.0.demand")
        assert "missing wed" in message and "seven days" in message

    def test_an_unknown_day_is_named(self) -> None:
        document = copy.deepcopy(self.BASE)
        document["lanes"][1]["max_units"]["weekly"]["funday"] = 1
        ((where, message),) = self.errors_of(document)
        assert where.startswith("lanes.1.max_units")
        assert "unknown 'funday'" in message

    def test_every_night_closed_is_refused(self) -> None:
        document = copy.deepcopy(self.BASE)
        document["lanes"][0]["max_units"] = weekly(*[0] * 7)
        ((where, message),) = self.errors_of(document)
        assert where.startswith("lanes.0.max_units")
        assert "no night allows moves" in message

    def test_negative_night_limit_is_refused(self) -> None:
        document = copy.deepcopy(self.BASE)
        document["lanes"][0]["max_units"]["weekly"]["tue"] = -1
        ((where, message),) = self.errors_of(document)
        assert where.startswith("lanes.0.max_units") and where.endswith("tue")
        assert "greater than or equal to 0" in message

    def test_a_bad_day_law_is_reported_at_its_day(self) -> None:
        document = copy.deepcopy(self.BASE)
        document["locations"][0]["demand"]["weekly"]["sat"] = {"dist": "poisson", "mean": -2}
        ((where, message),) = self.errors_of(document)
        assert where.startswith("locations.0.demand") and "sat" in where
        assert "greater than or equal to 0" in message

    def test_neither_a_law_nor_a_week_is_refused(self) -> None:
        document = copy.deepcopy(self.BASE)
        document["locations"][1]["demand"] = {"daily": 3}
        ((where, message),) = self.errors_of(document)
        assert where == "locations.1.demand"
        assert "weekly" in message

    @pytest.mark.parametrize(
        "zone", ["", "Europe/", "/Berlin", "Europe Berlin", "Europe/Berlin/Mitte/Ost", "1Zone"]
    )
    def test_badly_formed_timezone_is_refused(self, zone: str) -> None:
        document = {**copy.deepcopy(self.BASE), "timezone": zone}
        problems = self.errors_of(document)
        assert [where for where, _ in problems] == ["timezone"]

    @pytest.mark.parametrize(
        "zone", ["UTC", "Europe/Berlin", "America/Argentina/Buenos_Aires", "Etc/GMT+5"]
    )
    def test_well_formed_timezones_are_accepted(self, zone: str) -> None:
        assert NetworkSpec.model_validate({**self.BASE, "timezone": zone}).timezone == zone


class TestSizeLimits:
    def test_states_count_every_weekday(self) -> None:
        spec = garden_pair()
        stocks = 5 * 4
        assert check_size(spec, SizeLimits(max_states=7 * stocks))[0] == 7 * stocks
        with pytest.raises(ModelTooLargeError) as caught:
            check_size(spec, SizeLimits(max_states=7 * stocks - 1))
        assert caught.value.states == 7 * stocks
        assert "20 stock states x 7 weekdays = 140 states" in str(caught.value)

    def test_pairs_count_each_night_with_its_own_limits(self) -> None:
        spec = garden_pair()
        # Brute force: on each night, the (stock, flow) pairs within that night's lane limits,
        # the units-per-night limit and the stock rules (README.md, "The model"), less the
        # moves both ways at once, which the flow table leaves out (solver/build.py).
        capacities = (4, 3)
        pairs = 0
        for day in range(7):
            top = [lane.max_units_on(day) for lane in spec.lanes]
            for there, back in itertools.product(range(top[0] + 1), range(top[1] + 1)):
                if there + back > 3 or (there > 0 and back > 0):
                    continue
                for meadow, orchard in itertools.product(range(5), range(4)):
                    after = (meadow - there + back, orchard + there - back)
                    if there <= meadow and back <= orchard and after[0] <= 4 and after[1] <= 3:
                        pairs += 1
        assert capacities == tuple(loc.capacity for loc in spec.locations)
        assert check_size(spec) == (140, pairs)
        assert build_transfer_model(spec).n_pairs == pairs
        with pytest.raises(ModelTooLargeError) as caught:
            build_transfer_model(spec, SizeLimits(max_pairs=pairs - 1))
        assert caught.value.pairs == pairs

    def test_sunday_night_adds_one_pair_per_stock(self) -> None:
        # With both lanes closed on Sunday night, only "move nothing" is allowed then.
        model = build_transfer_model(garden_pair())
        assert model.allowed[6].sum() == 1
        assert model.allowed[6, 0]


class TestUnichain:
    def test_conserved_stock_on_every_day_is_refused_naming_weekdays(self) -> None:
        # Exactly one unit sold and one received every day: total stock never changes, so each
        # total is its own closed class of the weekly chain.
        one = pmf(0.0, 1.0)
        spec = same_days(two_stores(demand=(one, one), replenishment=(one, one)))
        assert not every_policy_unichain(build_transfer_model(spec))
        with pytest.raises(NotUnichainError, match=r"on (mon|tue|wed|thu|fri|sat|sun)"):
            solve_network(spec, criterion="average")
        assert solve_network(spec).converged

    @settings(max_examples=25, deadline=None)
    @given(
        st.lists(
            st.sampled_from([pmf(1.0), pmf(0.0, 1.0), pmf(0.5, 0.5), pmf(0.0, 0.0, 1.0)]),
            min_size=7,
            max_size=7,
        ),
        st.lists(
            st.sampled_from([pmf(1.0), pmf(0.0, 1.0), pmf(0.5, 0.0, 0.5)]), min_size=7, max_size=7
        ),
        st.integers(0, 10_000),
    )
    def test_witness_agrees_with_quantecon_on_weekly_chains(
        self, demand: list[dict[str, Any]], replenishment: list[dict[str, Any]], seed: int
    ) -> None:
        spec = two_stores(
            capacities=(3, 2),
            demand=(weekly(*demand), pmf(0.0, 1.0)),
            replenishment=(weekly(*replenishment), pmf(1.0)),
        )
        model = build_transfer_model(spec)
        # A random policy: a random flow among those feasible in each (weekday, stock).
        rng = np.random.default_rng(seed)
        table = ActionTable.of(model)
        action = np.zeros((7, model.n_states), dtype=np.int64)
        for d in range(7):
            for k in table.phase_flows[d]:
                mask = np.zeros(model.shape, dtype=bool)
                mask[table.boxes[d][k][0]] = True
                action[d, mask.reshape(-1) & (rng.random(model.n_states) < 0.4)] = k
        post = table.post_move_index(action)

        # Reference: quantecon.MarkovChain on the explicit transition matrix of the same policy
        # over the (weekday, stock) states, built by brute force in tests/solver/reference.py.
        reference = build_reference(spec)
        _, transition = reference.policy_chain(model.flows[action].reshape(-1, 2))
        chain = qe.MarkovChain(transition)

        witness = unichain_witness(model, post)
        assert (witness is None) == (chain.num_recurrent_classes == 1)
        if witness is not None:
            z, w = witness
            assert any(z in members for members in chain.recurrent_classes)
            assert not any(z in m and w in m for m in chain.recurrent_classes)
        if every_policy_unichain(model):
            assert chain.num_recurrent_classes == 1
