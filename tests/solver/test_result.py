"""Recommendations read off a solved policy."""

from __future__ import annotations

import numpy as np
import pytest

from solver import InvalidStockError, PolicyResult, solve_network
from tests.solver.networks import two_stores


@pytest.fixture(scope="module")
def result() -> PolicyResult:
    return solve_network(two_stores(capacities=(7, 5)))


def test_recommendation_follows_the_policy(result: PolicyResult) -> None:
    for index in range(result.n_states):
        stock = [int(u) for u in np.unravel_index(index, result.shape)]
        recommendation = result.recommend(stock)
        assert recommendation.flows == tuple(result.policy_flows()[0, index])
        assert recommendation.expected_value == pytest.approx(result.values[0, index], rel=1e-9)
        moved = recommendation.flows[0] - recommendation.flows[1]
        assert recommendation.post_move_stock == (stock[0] - moved, stock[1] + moved)


def test_alternatives_are_feasible_and_no_better(result: PolicyResult) -> None:
    recommendation = result.recommend([7, 0])
    assert recommendation.flows != (0, 0)
    assert len(recommendation.alternatives) == 3
    values = [a.value for a in recommendation.alternatives]
    assert values == sorted(values, reverse=True)
    assert values[0] <= recommendation.expected_value
    for alternative in recommendation.alternatives:
        north_out, south_out = alternative.flows
        assert north_out <= 7 and south_out == 0  # south has nothing to send
        assert alternative.flows != recommendation.flows


def test_doing_nothing_is_valued_as_such(result: PolicyResult) -> None:
    recommendation = result.recommend([7, 0])
    nothing = [a for a in recommendation.alternatives if a.flows == (0, 0)]
    if nothing:
        assert nothing[0].value == pytest.approx(recommendation.value_without_transfers)
    assert recommendation.gain_from_transfers == pytest.approx(
        recommendation.expected_value - recommendation.value_without_transfers
    )


@pytest.mark.parametrize("stock", [[8, 0], [-1, 2], [1], [1, 2, 3]])
def test_stock_that_does_not_fit_is_refused(result: PolicyResult, stock: list[int]) -> None:
    with pytest.raises(InvalidStockError):
        result.recommend(stock)


def test_average_criterion_reports_relative_values() -> None:
    result = solve_network(two_stores(), criterion="average")
    recommendation = result.recommend([0, 0])
    assert recommendation.expected_value == pytest.approx(0.0, abs=1e-9)
