"""Monte Carlo simulation of policies given as plan functions, for networks too large for a
table over stock states (e.g. a priced policy's `plan_batch`).

The dynamics, the common random numbers and the intervals are those of solver.simulation: one
uniform per (day, replication, kind, location) mapped by inverse transform (draw_counts), so a
plan function that returns the flows of a table policy sees exactly the days that
simulate_policies gives that table with the same generator. Only the policy step differs:

    tonight    f_t = plan(s_t, phase_t),   y_t = s_t - out(f_t) + in(f_t)

with f_t units per lane (in the specification's lane order), checked to be whole, within the
lane limits of the night and the network's nightly limit, and feasible (no location sends more
than it holds or ends above its capacity). No TransferModel is built, so no flow table is
enumerated: memory is O(replications x (locations + lanes)).
"""

from __future__ import annotations

from collections.abc import Callable, Mapping, Sequence

import numpy as np
from numpy.typing import NDArray

from solver.simulation import (
    CONFIDENCE,
    PolicyOutcome,
    SimulationReport,
    _check_sizes,
    _ratio_interval,
    _t_interval,
    daily_laws,
    draw_counts,
)
from solver.spec import NetworkSpec

__all__ = ["PlanFunction", "do_nothing_plan", "simulate_plans"]

# stocks (B, N) closing stock, phase -> flows (B, L) units per lane.
PlanFunction = Callable[[NDArray[np.int64], int], NDArray[np.int64]]

# Uniforms drawn at once, as in solver.simulation: the draws do not depend on it.
_BLOCK_UNIFORMS = 1 << 20


def do_nothing_plan(spec: NetworkSpec) -> PlanFunction:
    """The plan that never moves anything."""
    lanes = len(spec.lanes)

    def plan(stocks: NDArray[np.int64], phase: int) -> NDArray[np.int64]:
        return np.zeros((stocks.shape[0], lanes), dtype=np.int64)

    return plan


def simulate_plans(
    spec: NetworkSpec,
    plans: Mapping[str, PlanFunction],
    *,
    days: int,
    replications: int,
    rng: np.random.Generator,
    start_stock: Sequence[int] | None = None,
    warmup_days: int = 0,
    reference: str | None = None,
    start_phase: int = 0,
    confidence: float = CONFIDENCE,
) -> SimulationReport:
    """Simulate every plan on the same draws and compare them; the report of
    solver.simulation.simulate_policies.

    plans: name -> plan function; called once per policy and day with the closing stocks of
        every replication, shape (R, N), and the phase of the night (0 for a stationary
        network, the weekday of the closing count 0..6 for a weekly one).
    Other arguments as for simulate_policies. Raises ValueError for a plan that returns flows
    of the wrong shape, fractional or negative units, more than a lane's or the network's
    limit, or moves that are not feasible at the stock.
    """
    if not plans:
        raise ValueError("no policies to simulate")
    if reference is not None and reference not in plans:
        raise ValueError(
            f"reference {reference!r} is not one of the policies "
            f"({', '.join(repr(name) for name in plans)})"
        )
    _check_sizes(days, replications, warmup_days, start_phase, confidence)
    ids = tuple(spec.location_ids)
    index = {location: i for i, location in enumerate(ids)}
    n, n_lanes = len(ids), len(spec.lanes)
    capacities = np.array([loc.capacity for loc in spec.locations], dtype=np.int64)
    start = _start_stock(ids, capacities, start_stock)
    # leave[l, i] = 1 where lane l leaves location i; arrive likewise.
    leave = np.zeros((n_lanes, n), dtype=np.int64)
    arrive = np.zeros((n_lanes, n), dtype=np.int64)
    for lane_index, lane in enumerate(spec.lanes):
        leave[lane_index, index[lane.from_]] = 1
        arrive[lane_index, index[lane.to]] = 1
    lane_costs = np.array([lane.unit_cost for lane in spec.lanes], dtype=np.float64)
    phases = 7 if spec.is_periodic else 1
    lane_limits = np.array(
        [[lane.max_units_on(day) for lane in spec.lanes] for day in range(phases)],
        dtype=np.int64,
    ).reshape(phases, n_lanes)
    network_limit = spec.max_units_per_night

    laws = daily_laws(spec)
    margin = np.array([loc.unit_margin for loc in spec.locations])
    holding = np.array([loc.holding_cost for loc in spec.locations])
    penalty = np.array([loc.stockout_penalty for loc in spec.locations])

    names = list(plans)
    k, r = len(names), replications
    profit = np.zeros((k, r))
    units = np.zeros((k, r))
    move_cost = np.zeros((k, r))
    sold_total = np.zeros((k, r, n))
    short_total = np.zeros((k, r, n))
    demanded = np.zeros((r, n))

    stock = np.broadcast_to(start, (k, r, n)).copy()
    total_days = warmup_days + days
    block = max(1, _BLOCK_UNIFORMS // (r * 2 * n))
    done = 0
    while done < total_days:
        count = min(block, total_days - done)
        demand_block, replenishment_block = draw_counts(
            laws, rng, count, r, first_phase=start_phase + done
        )
        for b in range(count):
            t = done + b
            phase = (start_phase + t) % phases
            flows = np.stack(
                [
                    _checked(
                        name,
                        plans[name](stock[j].copy(), phase),
                        stock[j],
                        leave,
                        arrive,
                        capacities,
                        lane_limits[phase],
                        network_limit,
                        ids,
                    )
                    for j, name in enumerate(names)
                ]
            )
            post = stock - flows @ leave + flows @ arrive
            demand = demand_block[b]
            sold = np.minimum(post, demand)
            lost = demand - sold
            stock = np.minimum(post - sold + replenishment_block[b], capacities)
            cost = flows @ lane_costs
            day_profit = (sold * margin - post * holding - lost * penalty).sum(axis=-1) - cost
            if t < warmup_days:
                continue
            profit += day_profit
            units += flows.sum(axis=-1)
            move_cost += cost
            sold_total += sold
            short_total += lost > 0
            demanded += demand
        done += count

    per_day = profit / days
    outcomes = []
    for j, name in enumerate(names):
        difference = None
        if reference is not None:
            difference = _t_interval(per_day[j] - per_day[names.index(reference)], confidence)
        outcomes.append(
            PolicyOutcome(
                name=name,
                profit_per_day=_t_interval(per_day[j], confidence),
                fill_rate=_ratio_interval(
                    sold_total[j].sum(axis=1), demanded.sum(axis=1), confidence
                ),
                fill_rate_by_location={
                    location: _ratio_interval(sold_total[j, :, i], demanded[:, i], confidence)
                    for i, location in enumerate(ids)
                },
                stockout_days=_t_interval(short_total[j].sum(axis=1) / (days * n), confidence),
                stockout_days_by_location={
                    location: _t_interval(short_total[j, :, i] / days, confidence)
                    for i, location in enumerate(ids)
                },
                units_moved_per_night=_t_interval(units[j] / days, confidence),
                move_cost_per_day=_t_interval(move_cost[j] / days, confidence),
                difference_to_reference=difference,
            )
        )
    return SimulationReport(
        location_ids=ids,
        days=days,
        replications=replications,
        warmup_days=warmup_days,
        start_stock=tuple(int(u) for u in start),
        confidence=confidence,
        reference=reference,
        outcomes=tuple(outcomes),
    )


def _checked(
    name: str,
    flows: NDArray[np.int64],
    stock: NDArray[np.int64],
    leave: NDArray[np.int64],
    arrive: NDArray[np.int64],
    capacities: NDArray[np.int64],
    lane_limits: NDArray[np.int64],
    network_limit: int | None,
    ids: tuple[str, ...],
) -> NDArray[np.int64]:
    """`flows` as int64 after checking them against the stock of every replication."""
    array = np.asarray(flows)
    expected = (stock.shape[0], leave.shape[0])
    if array.shape != expected:
        raise ValueError(f"plan {name!r} returned shape {array.shape}, expected {expected}")
    if not np.issubdtype(array.dtype, np.integer) and not np.array_equal(array, np.round(array)):
        raise ValueError(f"plan {name!r} returned fractional units")
    whole = array.astype(np.int64)
    if (whole < 0).any():
        raise ValueError(f"plan {name!r} returned a negative number of units")
    if (whole > lane_limits).any():
        raise ValueError(f"plan {name!r} moves more than a lane's limit on this night")
    if network_limit is not None and (whole.sum(axis=1) > network_limit).any():
        raise ValueError(f"plan {name!r} moves more than the network's nightly limit")
    out, inn = whole @ leave, whole @ arrive
    bad = np.any((out > stock) | (stock - out + inn > capacities), axis=1)
    if bad.any():
        row = int(np.argmax(bad))
        held = ", ".join(f"{i}={int(u)}" for i, u in zip(ids, stock[row], strict=True))
        raise ValueError(
            f"plan {name!r} is not feasible at closing stock ({held}): it sends more than is on "
            "hand or fills a location beyond capacity"
        )
    return whole


def _start_stock(
    ids: tuple[str, ...], capacities: NDArray[np.int64], start_stock: Sequence[int] | None
) -> NDArray[np.int64]:
    if start_stock is None:
        return capacities // 2
    stock = np.asarray(start_stock)
    if stock.shape != (len(ids),) or not np.issubdtype(stock.dtype, np.integer):
        raise ValueError(
            f"start stock must be {len(ids)} whole numbers of units, one per location "
            f"({', '.join(ids)}), got {list(start_stock)}"
        )
    for location, units, capacity in zip(ids, stock, capacities, strict=True):
        if not 0 <= units <= capacity:
            raise ValueError(f"start stock at {location!r} is {int(units)}, outside 0..{capacity}")
    return stock.astype(np.int64)
