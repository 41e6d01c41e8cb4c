"""Simulation of plan functions: a plan that returns a table policy's flows sees the same days
as solver.simulation's table simulation, and infeasible plans are refused."""

from __future__ import annotations

import numpy as np
import pytest
from numpy.typing import NDArray

from solver import NetworkSpec, PolicyResult, build_transfer_model, solve_network
from solver.heuristics import do_nothing_plan
from solver.simulation import Plan as PlanFunction
from solver.simulation import do_nothing_policy, simulate_plans, simulate_policies
from tests.solver.networks import poisson, two_stores, weekly


def table_plan(result: PolicyResult) -> PlanFunction:
    """The plan function of a solved table policy: its flows at each stock."""
    flows = result.policy_flows()  # (P, S, L)

    def plan(stocks: NDArray[np.int64], phase: int) -> NDArray[np.int64]:
        index = np.ravel_multi_index(tuple(stocks.T), result.shape)
        chosen: NDArray[np.int64] = flows[phase % result.phases, index]
        return chosen

    return plan


def dispatched(spec: NetworkSpec, *, unit_cost: float, dispatch_cost: float) -> NetworkSpec:
    """`spec` with every lane at these unit and dispatch costs."""
    document = spec.model_dump(mode="json", by_alias=True)
    for lane in document["lanes"]:
        lane.update(unit_cost=unit_cost, dispatch_cost=dispatch_cost)
    return NetworkSpec.model_validate(document)


@pytest.mark.parametrize(
    "spec",
    [
        two_stores(capacities=(9, 7)),
        two_stores(
            capacities=(8, 6),
            demand=(
                poisson(2.0),
                {
                    "weekly": {
                        d: poisson(m)
                        for d, m in zip(
                            ("mon", "tue", "wed", "thu", "fri", "sat", "sun"),
                            (1.0, 1.0, 1.5, 1.5, 2.5, 3.5, 3.0),
                            strict=True,
                        )
                    }
                },
            ),
        ),
        dispatched(two_stores(capacities=(9, 7)), unit_cost=0.5, dispatch_cost=2.0),
    ],
    ids=["stationary", "weekly", "dispatch-cost"],
)
def test_a_table_policy_as_a_plan_matches_the_table_simulation(spec: NetworkSpec) -> None:
    result = solve_network(spec)
    model = build_transfer_model(spec)
    arguments = {"days": 60, "replications": 6, "warmup_days": 4, "reference": "optimal"}
    tables = simulate_policies(
        spec,
        model,
        {"optimal": result.action, "do_nothing": do_nothing_policy(model)},
        rng=np.random.default_rng(11),
        **arguments,  # type: ignore[arg-type]
    )
    plans = simulate_plans(
        spec,
        {"optimal": table_plan(result), "do_nothing": do_nothing_plan(spec)},
        rng=np.random.default_rng(11),
        **arguments,  # type: ignore[arg-type]
    )
    for name in ("optimal", "do_nothing"):
        table, plan = tables.outcome(name), plans.outcome(name)
        fields = (
            "profit_per_day",
            "fill_rate",
            "stockout_days",
            "units_moved_per_night",
            "move_cost_per_day",
        )
        for field in fields:
            expected, got = getattr(table, field), getattr(plan, field)
            assert got.mean == pytest.approx(expected.mean, rel=1e-12, abs=1e-12)
            assert got.low == pytest.approx(expected.low, rel=1e-9, abs=1e-9)
    assert plans.start_stock == tables.start_stock
    moved = plans.outcome("optimal")
    unit_costs = {lane.unit_cost for lane in spec.lanes}
    if any(lane.dispatch_cost for lane in spec.lanes):
        # Every night a lane is used costs its dispatch on top of the units.
        [unit_cost] = unit_costs
        assert moved.units_moved_per_night.mean > 0
        assert moved.move_cost_per_day.mean > unit_cost * moved.units_moved_per_night.mean


def test_infeasible_plans_are_refused() -> None:
    spec = two_stores(capacities=(4, 4))

    def greedy(stocks: NDArray[np.int64], phase: int) -> NDArray[np.int64]:
        flows = np.zeros((stocks.shape[0], len(spec.lanes)), dtype=np.int64)
        flows[:, 0] = 1  # a unit along the first lane, whatever is on hand
        return flows

    with pytest.raises(ValueError, match="more than is on hand"):
        simulate_plans(
            spec,
            {"greedy": greedy},
            days=5,
            replications=2,
            rng=np.random.default_rng(0),
            start_stock=[0, 0],
        )


def test_weekly_lane_limits_bind_the_plan() -> None:
    spec = two_stores(capacities=(6, 6))
    document = spec.model_dump(mode="json", by_alias=True)
    for lane in document["lanes"]:
        lane["max_units"] = weekly(0, 0, 0, 0, 0, 0, 1)  # closed on Monday night, the first
    closed = NetworkSpec.model_validate(document)

    def one_unit(stocks: NDArray[np.int64], phase: int) -> NDArray[np.int64]:
        flows = np.zeros((stocks.shape[0], len(closed.lanes)), dtype=np.int64)
        flows[:, 0] = 1
        return flows

    with pytest.raises(ValueError, match="more units on a lane than its limit"):
        simulate_plans(
            closed, {"one": one_unit}, days=3, replications=2, rng=np.random.default_rng(0)
        )


def test_a_plan_of_the_wrong_shape_is_refused() -> None:
    spec = two_stores(capacities=(4, 4))

    def short(stock: NDArray[np.int64], phase: int) -> NDArray[np.int64]:
        return np.zeros((stock.shape[0], 1), dtype=np.int64)

    with pytest.raises(ValueError, match="one row per stock and a column per lane"):
        simulate_plans(spec, {"short": short}, days=1, replications=1, rng=np.random.default_rng(0))
