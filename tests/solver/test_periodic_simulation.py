"""Weekly networks in the simulation: the periodic optimal policy earns the solver's gain, and
beats the policy of the stationary approximation (each weekday's demand replaced by the week's
average) on the same simulated days.

Networks are our own scenarios. The checks are Monte Carlo against the solver (an independent
computation: the simulation draws days and never solves an equation) and a property of the
model: the periodic optimum is optimal for the weekly network, so no stationary policy can earn
more per day there.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pytest

from solver import NetworkSpec, build_transfer_model, solve_network
from solver.simulation import simulate_policies
from solver.spec import WEEKDAYS

# A paint shop whose weekend trade is three times its weekday trade, and a quiet depot.
WEEKEND_PEAK = (1.2, 1.2, 1.2, 1.4, 2.0, 4.2, 3.6)


def shops(weekly: bool) -> NetworkSpec:
    if weekly:
        demand: Any = {
            "weekly": {
                d: {"dist": "poisson", "mean": m}
                for d, m in zip(WEEKDAYS, WEEKEND_PEAK, strict=True)
            }
        }
    else:
        demand = {"dist": "poisson", "mean": float(np.mean(WEEKEND_PEAK))}
    return NetworkSpec.model_validate(
        {
            "name": "paint shop and depot",
            "discount": 0.95,
            "locations": [
                {
                    "id": "shop",
                    "capacity": 9,
                    "unit_margin": 30.0,
                    "holding_cost": 0.4,
                    "stockout_penalty": 4.0,
                    "demand": demand,
                    "replenishment": {"dist": "poisson", "mean": 1.0},
                },
                {
                    "id": "depot",
                    "capacity": 9,
                    "unit_margin": 30.0,
                    "holding_cost": 0.2,
                    "demand": {"dist": "poisson", "mean": 0.8},
                    "replenishment": {"dist": "poisson", "mean": 1.4},
                },
            ],
            "lanes": [
                {"from": "depot", "to": "shop", "unit_cost": 1.5, "max_units": 4},
                {"from": "shop", "to": "depot", "unit_cost": 1.5, "max_units": 4},
            ],
        }
    )


@pytest.fixture(scope="module")
def weekly() -> NetworkSpec:
    return shops(weekly=True)


def test_periodic_policy_earns_the_solver_gain(weekly: NetworkSpec) -> None:
    model = build_transfer_model(weekly)
    result = solve_network(weekly, criterion="average")
    report = simulate_policies(
        weekly,
        model,
        {"periodic": result.action},
        days=7 * 400,
        replications=40,
        warmup_days=7 * 10,
        rng=np.random.default_rng(20261202),
        confidence=0.999,
    )
    # Whole weeks after whole weeks of warm-up: the mean is the weekly average the gain is.
    assert result.gain is not None
    assert result.gain in report.outcome("periodic").profit_per_day


def test_periodic_policy_beats_the_stationary_approximation(weekly: NetworkSpec) -> None:
    model = build_transfer_model(weekly)
    periodic = solve_network(weekly, criterion="average")
    stationary = solve_network(shops(weekly=False), criterion="average")
    # Same locations, capacities and lanes: the flow tables agree, so the stationary policy's
    # indices mean the same moves in the weekly network.
    assert np.array_equal(stationary.flows, model.flows)
    report = simulate_policies(
        weekly,
        model,
        {"periodic": periodic.action, "stationary": stationary.action[0]},
        days=7 * 200,
        replications=60,
        warmup_days=7 * 4,
        rng=np.random.default_rng(7),
        reference="periodic",
    )
    difference = report.outcome("stationary").difference_to_reference
    assert difference is not None
    # Common random numbers make the paired interval tight; it must exclude zero.
    assert difference.high < 0, difference
    # The weekly policy moves stock toward the shop before its weekend, not on the weekend.
    shop_before_friday = periodic.recommend([3, 6], phase=periodic.phase_of(4)).flows[0]
    shop_flat = stationary.recommend([3, 6]).flows[0]
    assert shop_before_friday > shop_flat
