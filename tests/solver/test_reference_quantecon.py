"""Agreement with an outside solver: quantecon's DiscreteDP on small networks.

The reference MDP is built independently from the specification (tests/solver/reference.py):
laws from scipy.stats, every integer flow within the lane limits (not the solver's pruned
table), and feasibility, transitions and rewards by brute force.

Reference: quantecon.markov.DiscreteDP (QuantEcon, PyPI package ``quantecon``), state-action pair
formulation DiscreteDP(R, Q, beta, s_indices, a_indices), solved with
solve(method="policy_iteration"); quantecon.MarkovChain for stationary distributions.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from numpy.testing import assert_allclose

from solver import (
    NetworkSpec,
    PolicyResult,
    build_transfer_model,
    solve_modified_policy_iteration,
    solve_network,
    solve_policy_iteration,
)
from tests.solver.networks import location, negative_binomial, pmf, poisson
from tests.solver.reference import (
    BIAS_ATOL,
    BLACKWELL_GAIN_ATOL,
    GAIN_ATOL,
    NEAR_ONE,
    Case,
    assert_policy_is_optimal,
    assert_values_match,
    make_network,
    rounding_slack,
    solve_reference,
    stationary_gain,
)


def _location(
    location_id: str,
    capacity: int,
    margin: float,
    holding: float,
    penalty: float,
    demand: dict[str, Any],
    replenishment: dict[str, Any],
) -> dict[str, Any]:
    return location(
        location_id,
        capacity,
        demand,
        replenishment,
        margin=margin,
        holding=holding,
        penalty=penalty,
    )


def drill_kit_pair() -> NetworkSpec:
    """Two hardware stores renting out drill kits; the quieter one is restocked in batches."""
    return make_network(
        "drill kits",
        [
            _location("harbour", 6, 11.0, 0.35, 1.5, poisson(2.3), negative_binomial(1.4, 2.6)),
            _location(
                "hillside", 5, 9.5, 0.6, 2.25, negative_binomial(1.6, 3.5), pmf(0.3, 0.4, 0.3)
            ),
        ],
        [(0, 1, 1.15, 3), (1, 0, 0.85, 2)],
        discount=0.93,
        max_units_per_night=3,
    )


def bakery_pair() -> NetworkSpec:
    """Two bakeries sharing cake stands, with demand known only as an empirical distribution."""
    return make_network(
        "cake stands",
        [
            _location("market", 4, 6.4, 0.15, 0.8, pmf(0.1, 0.3, 0.35, 0.25), poisson(1.1)),
            _location(
                "station", 7, 5.2, 0.25, 1.75, pmf(0.25, 0.2, 0.2, 0.15, 0.1, 0.1), poisson(2.4)
            ),
        ],
        [(0, 1, 0.4, 2), (1, 0, 0.55, 3)],
        discount=0.97,  # above 0.95, so the solver evaluates by GMRES
        max_units_per_night=4,
    )


def three_kiosks() -> NetworkSpec:
    """Three phone-repair kiosks sharing spare handsets, lanes both ways between every pair."""
    return make_network(
        "handset kiosks",
        [
            _location("quay", 3, 7.5, 0.3, 1.2, poisson(1.4), negative_binomial(1.1, 2.0)),
            _location(
                "mall", 4, 6.0, 0.5, 2.5, negative_binomial(1.8, 3.1), pmf(0.2, 0.45, 0.25, 0.1)
            ),
            _location("depot", 3, 8.25, 0.2, 0.7, pmf(0.15, 0.35, 0.3, 0.2), poisson(0.9)),
        ],
        [
            (0, 1, 0.6, 2),
            (1, 0, 0.8, 2),
            (1, 2, 0.5, 2),
            (2, 1, 0.45, 1),
            (0, 2, 1.3, 2),
            (2, 0, 0.9, 2),
        ],
        discount=0.92,
        max_units_per_night=3,
    )


def three_garden_centres() -> NetworkSpec:
    """Three garden centres passing lawn mowers round a one-way ring, plus one return lane."""
    return make_network(
        "mower ring",
        [
            _location("east", 4, 13.0, 0.9, 0.0, poisson(2.0), poisson(1.3)),
            _location("west", 3, 10.0, 0.4, 3.0, poisson(0.7), negative_binomial(0.9, 1.5)),
            _location("north", 4, 12.0, 0.0, 1.0, negative_binomial(1.2, 2.9), poisson(1.5)),
        ],
        [(0, 1, 0.7, 2), (1, 2, 0.65, 3), (2, 0, 1.05, 2), (1, 0, 0.2, 1)],
        discount=0.96,
        max_units_per_night=2,
    )


NETWORKS = {
    "drill-kit-pair": drill_kit_pair,
    "bakery-pair": bakery_pair,
    "three-kiosks": three_kiosks,
    "three-garden-centres": three_garden_centres,
}


@pytest.fixture(scope="module", params=sorted(NETWORKS))
def case(request: pytest.FixtureRequest) -> Case:
    return solve_reference(NETWORKS[request.param]())


@pytest.fixture(scope="module")
def average(case: Case) -> PolicyResult:
    result = solve_network(case.spec, criterion="average")
    assert result.converged
    assert result.gain is not None
    return result


@pytest.fixture(scope="module")
def kiosks() -> Case:
    return solve_reference(three_kiosks())


class TestDiscounted:
    def test_values_match_quantecon(self, case: Case) -> None:
        result = solve_network(case.spec)
        assert result.converged
        assert_values_match(result.values, case)

    def test_every_chosen_flow_is_in_the_optimal_set(self, case: Case) -> None:
        assert_policy_is_optimal(solve_network(case.spec).policy_flows(), case)

    def test_reported_error_bound_covers_the_actual_error(self, case: Case) -> None:
        result = solve_network(case.spec)
        error = float(np.max(np.abs(result.values[0] - case.reference_values)))
        # Reference: quantecon.markov.DiscreteDP policy iteration (QuantEcon, PyPI).
        assert error <= result.error_bound + rounding_slack(case)


class TestAverage:
    """quantecon's DiscreteDP has no average-reward solver, so the gain and bias are checked
    through quantecon.MarkovChain on the reference's transition matrices."""

    def test_gain_is_the_stationary_mean_reward_of_the_policy(
        self, case: Case, average: PolicyResult
    ) -> None:
        reward, transition = case.reference.policy_chain(average.policy_flows()[0])
        # Reference: quantecon.MarkovChain(P).stationary_distributions (QuantEcon, PyPI).
        gain, _ = stationary_gain(reward, transition)
        assert average.gain is not None
        assert_allclose(average.gain, gain, rtol=0, atol=GAIN_ATOL)

    def test_gain_equals_that_of_a_nearly_undiscounted_optimal_policy(
        self, case: Case, average: PolicyResult
    ) -> None:
        # For beta close enough to 1 a discounted-optimal policy is Blackwell optimal, and a
        # Blackwell-optimal policy is average optimal (Puterman 1994, Markov Decision Processes,
        # ch. 10; from memory). Reference policy: quantecon.markov.DiscreteDP at beta 0.99999.
        solution = case.reference.discrete_dp(NEAR_ONE).solve(method="policy_iteration")
        assert solution.num_iter < solution.max_iter
        reward, transition = case.reference.policy_chain(case.reference.flows[solution.sigma])
        # Reference: quantecon.MarkovChain(P).stationary_distributions (QuantEcon, PyPI).
        gain, _ = stationary_gain(reward, transition)
        assert average.gain is not None
        assert_allclose(average.gain, gain, rtol=0, atol=BLACKWELL_GAIN_ATOL)

    def test_bias_solves_the_evaluation_equations(self, case: Case, average: PolicyResult) -> None:
        # h + g = r_sigma + P_sigma h with h[0] = 0 (Puterman 1994, Markov Decision Processes,
        # ch. 8; from memory), with r_sigma and P_sigma from the independent reference.
        reward, transition = case.reference.policy_chain(average.policy_flows()[0])
        h = average.values[0]
        assert h[0] == 0.0
        assert average.gain is not None
        assert_allclose(h + average.gain, reward + transition @ h, rtol=0, atol=BIAS_ATOL)

    def test_gain_and_bias_solve_the_optimality_equation_over_all_flows(
        self, case: Case, average: PolicyResult
    ) -> None:
        # Average optimality equation g + h(s) = max_f [r(s, f) + sum_s' P(s' | s, f) h(s')]
        # (Puterman 1994, Markov Decision Processes, ch. 8; from memory), the maximum taken over
        # every feasible flow of the independent reference, not the solver's pruned table.
        assert average.gain is not None
        best = case.reference.best_by_state(case.reference.pair_values(average.values[0], 1.0))
        assert_allclose(best, average.values[0] + average.gain, rtol=0, atol=BIAS_ATOL)


class TestSolverOptions:
    """Every algorithm the solver offers, on one network with lanes both ways on three sides."""

    @pytest.mark.parametrize("sweeps", [0, 20], ids=["value-iteration", "modified-20"])
    def test_modified_policy_iteration_is_within_its_error_bound(
        self, kiosks: Case, sweeps: int
    ) -> None:
        result = solve_modified_policy_iteration(build_transfer_model(kiosks.spec), sweeps=sweeps)
        assert result.converged
        assert result.error_bound < 1e-6
        error = np.abs(result.values[0] - kiosks.reference_values)
        # Reference: quantecon.markov.DiscreteDP policy iteration (QuantEcon, PyPI).
        assert np.max(error) <= result.error_bound + rounding_slack(kiosks)

    @pytest.mark.parametrize("evaluation", ["successive", "krylov"])
    def test_policy_iteration_matches_with_either_evaluation(
        self, kiosks: Case, evaluation: str
    ) -> None:
        model = build_transfer_model(kiosks.spec)
        result = solve_policy_iteration(model, evaluation=evaluation)  # type: ignore[arg-type]
        assert result.converged
        assert result.method == f"howard/{evaluation}"
        assert_values_match(result.values, kiosks)
        assert_policy_is_optimal(result.policy_flows(), kiosks)


_distributions = st.one_of(
    st.builds(poisson, st.sampled_from([0.0, 0.4, 1.5, 3.2])),
    st.builds(
        negative_binomial,
        st.sampled_from([0.6, 1.8]),
        st.sampled_from([2.0, 9.0]),
    ),
    st.sampled_from([pmf(1.0), pmf(0.3, 0.7), pmf(0.1, 0.2, 0.3, 0.25, 0.15)]),
)


@st.composite
def _small_networks(draw: st.DrawFn) -> NetworkSpec:
    """Two or three locations with random laws, economics and lanes (ids s0, s1, s2)."""
    n = draw(st.integers(2, 3))
    amounts = st.sampled_from([0.0, 0.5, 2.0, 7.5])
    locations = [
        _location(
            f"s{i}",
            draw(st.integers(1, 4 if n == 2 else 3)),
            draw(amounts),
            draw(amounts),
            draw(amounts),
            draw(_distributions),
            draw(_distributions),
        )
        for i in range(n)
    ]
    ends = draw(
        st.lists(
            st.sampled_from([(a, b) for a in range(n) for b in range(n) if a != b]),
            min_size=1,
            max_size=4,
            unique=True,
        )
    )
    lanes = [
        (a, b, draw(st.sampled_from([0.0, 0.3, 2.5])), draw(st.integers(1, 3))) for a, b in ends
    ]
    return make_network(
        "random",
        locations,
        lanes,
        discount=draw(st.sampled_from([0.5, 0.9, 0.97])),
        max_units_per_night=draw(st.one_of(st.none(), st.integers(1, 3))),
    )


@settings(max_examples=30, deadline=None)
@given(spec=_small_networks())
def test_random_small_networks_match_quantecon(spec: NetworkSpec) -> None:
    case = solve_reference(spec)
    result = solve_network(spec)
    assert result.converged
    assert_values_match(result.values, case)
    assert_policy_is_optimal(result.policy_flows(), case)
