"""Howard's policy iteration: a published example, hand-checkable structure, and properties."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from numpy.testing import assert_allclose
from numpy.typing import NDArray

from solver import (
    NetworkSpec,
    NotUnichainError,
    PolicyResult,
    Progress,
    build_transfer_model,
    solve_network,
    solve_policy_iteration,
)
from tests.solver.networks import published_two_location_example, two_stores
from tests.solver.reference import assert_values_match, solve_reference


def net_moves(result_flows: NDArray[np.int64], shape: tuple[int, ...]) -> NDArray[np.int64]:
    """Units moved from the first location to the second, by (first stock, second stock)."""
    return (result_flows[:, 0] - result_flows[:, 1]).reshape(shape)


class TestPublishedExample:
    """Sutton and Barto (2018), Reinforcement Learning: An Introduction, 2nd ed., Example 4.2 and
    Figure 4.2, under our rule that a move may not overfill a location."""

    @pytest.fixture(scope="class")
    @classmethod
    def result(cls) -> PolicyResult:
        return solve_network(published_two_location_example())

    def test_policy_is_stable_after_four_improvements(self, result: PolicyResult) -> None:
        # Figure 4.2 shows policies pi_0 (move nothing) .. pi_4, pi_4 being optimal: four
        # improvements, and a fifth evaluation that finds no change.
        assert result.converged
        assert result.iterations - 1 == 4

    def test_values_match_an_outside_solver(self, result: PolicyResult) -> None:
        # The example's values, checked against quantecon's DiscreteDP (QuantEcon, PyPI) solving
        # the same problem built by brute force from the specification (tests/solver/reference.py)
        # rather than against numbers read off Figure 4.2's value surface.
        assert_values_match(result.values, solve_reference(published_two_location_example()))

    def test_policy_has_the_published_shape(self, result: PolicyResult) -> None:
        net = net_moves(result.policy_flows()[0], result.shape)
        # Figure 4.2 (pi_4): the full first location with an empty second sends the most allowed;
        # an empty first location with a full second receives units; balanced stock moves nothing.
        assert net[20, 0] == 5
        assert net[0, 20] < 0
        assert net[10, 10] == 0
        # Moves out of the first location grow with its stock and shrink with the second's.
        assert np.all(np.diff(np.maximum(net, 0), axis=0) >= 0)
        assert np.all(np.diff(np.maximum(net, 0), axis=1) <= 0)


def test_evaluation_methods_agree() -> None:
    model = build_transfer_model(two_stores(discount=0.97))
    successive = solve_policy_iteration(model, evaluation="successive")
    krylov = solve_policy_iteration(model, evaluation="krylov")
    assert_allclose(successive.values, krylov.values, rtol=1e-9)
    np.testing.assert_array_equal(successive.action, krylov.action)


def test_residual_and_bound_are_small_and_consistent() -> None:
    result = solve_network(two_stores())
    assert result.converged
    assert result.residual < 1e-6
    assert result.error_bound == pytest.approx(result.residual / (1 - 0.95))


def test_free_moves_to_an_identical_store_equalise_stock() -> None:
    # Identical stores, free and unlimited moves, nothing gained by moving apart from balance:
    # by symmetry and concavity of expected sales the optimal post-move stock is balanced.
    spec = two_stores(
        capacities=(6, 6),
        demand=({"dist": "poisson", "mean": 2.0}, {"dist": "poisson", "mean": 2.0}),
        replenishment=({"dist": "poisson", "mean": 2.0}, {"dist": "poisson", "mean": 2.0}),
        margins=(10.0, 10.0),
        costs=(0.0, 0.0),
        limits=(6, 6),
    )
    result = solve_network(spec)
    flows = result.policy_flows()[0]
    for index in range(result.n_states):
        first, second = np.unravel_index(index, result.shape)
        moved = flows[index, 0] - flows[index, 1]
        assert abs((first - moved) - (second + moved)) <= 1


def test_expensive_lanes_are_never_used() -> None:
    # A move costing more than the whole margin of a sale can never pay for itself.
    result = solve_network(two_stores(costs=(50.0, 50.0)))
    assert not result.policy_flows().any()


def test_units_per_night_limit_is_respected() -> None:
    result = solve_network(two_stores(limits=(5, 5), capacities=(8, 8), max_units_per_night=2))
    assert result.policy_flows()[0].sum(axis=1).max() <= 2


def test_average_criterion_gain_is_limit_of_discounted_values() -> None:
    # (1 - beta) v_beta -> g as beta -> 1 (Puterman 1994, Markov Decision Processes, section 8.2,
    # from memory); at beta = 0.9999 the difference is O(1 - beta) times the bias span.
    average = solve_network(two_stores(), criterion="average")
    discounted = solve_network(two_stores(discount=0.9999))
    assert average.gain is not None
    assert average.values[0, 0] == 0.0
    assert_allclose((1 - 0.9999) * discounted.values, average.gain, rtol=2e-3)


def test_multichain_network_is_refused_under_average_criterion() -> None:
    # Exactly one unit sold and one received every day: total stock never changes, so each
    # total is its own closed class.
    one = {"dist": "pmf", "p": [0.0, 1.0]}
    spec = two_stores(demand=(one, one), replenishment=(one, one))
    with pytest.raises(NotUnichainError, match="never reach"):
        solve_network(spec, criterion="average")
    assert solve_network(spec).converged


def test_max_iter_is_reported_not_hidden() -> None:
    result = solve_policy_iteration(build_transfer_model(two_stores()), max_iter=1)
    assert not result.converged
    assert result.iterations == 1


def _random_two_store(draw: st.DrawFn, *, holding: bool) -> NetworkSpec:
    means = st.floats(0.2, 4.0)
    caps = st.integers(1, 6)
    return two_stores(
        capacities=(draw(caps), draw(caps)),
        demand=({"dist": "poisson", "mean": draw(means)}, {"dist": "poisson", "mean": draw(means)}),
        replenishment=(
            {"dist": "poisson", "mean": draw(means)},
            {"dist": "poisson", "mean": draw(means)},
        ),
        margins=(draw(st.floats(1.0, 20.0)), draw(st.floats(1.0, 20.0))),
        holding=(draw(st.floats(0.0, 2.0)), draw(st.floats(0.0, 2.0))) if holding else (0.0, 0.0),
        penalty=(draw(st.floats(0.0, 5.0)), draw(st.floats(0.0, 5.0))),
        costs=(draw(st.floats(0.0, 6.0)), draw(st.floats(0.0, 6.0))),
        limits=(draw(st.integers(1, 4)), draw(st.integers(1, 4))),
        discount=draw(st.floats(0.5, 0.98)),
    )


@st.composite
def networks_without_holding_cost(draw: st.DrawFn) -> NetworkSpec:
    return _random_two_store(draw, holding=False)


@st.composite
def networks(draw: st.DrawFn) -> NetworkSpec:
    return _random_two_store(draw, holding=True)


_PROPERTY_SETTINGS = settings(
    max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow]
)


@_PROPERTY_SETTINGS
@given(networks_without_holding_cost())
def test_value_never_decreases_with_more_stock(spec: NetworkSpec) -> None:
    # Common practice (and a coupling argument): with no holding cost an extra unit can always be
    # kept, or sent where there is room, at no loss.
    result = solve_network(spec)
    values = result.values.reshape(result.shape)
    scale = np.abs(values).max()
    for axis in range(2):
        assert np.all(np.diff(values, axis=axis) >= -1e-9 * scale)


@_PROPERTY_SETTINGS
@given(networks())
def test_listing_locations_in_the_other_order_mirrors_the_policy(spec: NetworkSpec) -> None:
    mirrored = spec.model_copy(update={"locations": spec.locations[::-1]})
    result = solve_network(spec)
    mirror = solve_network(mirrored)
    swap = np.arange(mirror.n_states).reshape(mirror.shape).T.reshape(-1)
    assert_allclose(mirror.values[0][swap], result.values[0], rtol=1e-9, atol=1e-9)
    np.testing.assert_array_equal(mirror.policy_flows()[0][swap], result.policy_flows()[0])


@_PROPERTY_SETTINGS
@given(networks())
def test_every_recommended_move_earns_something(spec: NetworkSpec) -> None:
    result = solve_network(spec)
    for index in np.flatnonzero(result.action):
        stock = np.unravel_index(index, result.shape)
        recommendation = result.recommend([int(u) for u in stock])
        assert recommendation.gain_from_transfers > 0.0
        assert recommendation.expected_value > recommendation.value_without_transfers


def test_max_iter_below_one_is_refused() -> None:
    with pytest.raises(ValueError, match="max_iter"):
        solve_policy_iteration(build_transfer_model(two_stores()), max_iter=0)


@pytest.mark.parametrize(
    ("criterion", "method"),
    [("discounted", "howard"), ("average", "howard"), ("discounted", "value-iteration")],
)
def test_progress_reports_every_iteration_and_the_final_residual(
    criterion: str, method: str
) -> None:
    spec = NetworkSpec.model_validate(two_stores())
    reports: list[Progress] = []
    result = solve_network(spec, criterion=criterion, method=method, progress=reports.append)  # type: ignore[arg-type]
    quiet = solve_network(spec, criterion=criterion, method=method)  # type: ignore[arg-type]

    # Reporting changes nothing about the solve.
    np.testing.assert_array_equal(result.action, quiet.action)
    assert [r.iteration for r in reports] == list(range(1, result.iterations + 1))
    seconds = [r.seconds for r in reports]
    assert seconds == sorted(seconds) and seconds[-1] <= result.seconds["total"]
    assert all(r.residual >= 0 for r in reports)
    if method == "howard":
        # The last policy is the one no state can improve on (beyond the tie tolerance).
        assert reports[-1].residual <= 1e-6 * max(1.0, float(np.abs(result.values).max()))
        assert reports[0].residual > reports[-1].residual
    else:
        assert reports[-1].residual == pytest.approx(result.residual)
