"""Build a TransferModel from a NetworkSpec.

Per location i, with demand D and replenishment R (independent counts):

    sales     = min(D, y)
    leftover  L = y - sales, so P(L = j) = P(D = y - j) for 1 <= j <= y and P(L = 0) = P(D >= y)
    s'        = min(L + R, C)                  (overflow beyond capacity is refused)
    K[y, k]   = sum_j P(L = j) P(R = k - j)     for k < C
    K[y, C]   = sum_j P(L = j) P(R >= C - j)    (all tail mass; nothing is truncated)
    r(y)      = m E min(D, y) - h y - p E (D - y)^+

and R(y) = sum_i r_i(y_i).

Weekly networks (solver.spec) have P = 7 phases, one per weekday of the closing count. Phase d
takes its kernels and rewards from the laws of business day (d + 1) mod 7, the day that follows
tonight's moves, and its allowed flows from the lane limits of night d (solver.model). A
network without weekly fields has the single phase 0, built from its one set of laws.

Rules (solver.spec): a lane's dispatch cost F_l enters the flow's cost (solver.model); a
location's floor k_i^d enters the feasibility box of phase d; the handling limits (most units
sent or received by location i on night d) go into `allowed[d]` with the lane limits.

Flow table: every integer flow vector within the lane limits (on weekly lanes, the largest
limit of any night), the units-per-night limit and the handling limits (the largest of any
night), except flows that can never be the preferred optimal action:
  * a flow that sends more than C_i out of, or into, location i is feasible nowhere, and so is
    one that is not allowed on any night or whose box is empty on every night it is allowed;
  * a flow with positive units around a directed cycle (e.g. both ways along a pair of lanes).

Why the second pruning stays exact with dispatch costs, floors and handling limits. Let f carry
at least one unit on every lane of a simple directed cycle Z (distinct locations i_1 -> i_2 ->
... -> i_1) and let g = f - 1_Z, one unit less on each lane of Z. Then, on every night d:
  1. g moves the same post-move stock: each location of Z sends one unit less and receives one
     unit less, so out_i - in_i, hence y_i = s_i - out_i + in_i, is unchanged for every i.
  2. g costs no more: the unit costs fall by sum_{l in Z} c_l >= 0, and [g_l > 0] <= [f_l > 0]
     on every lane, so no dispatch cost is added (F_l >= 0; the dispatch cost of a lane of Z
     that carried one unit is saved). A fixed cost never makes the cycle cheaper, because
     taking a unit off a lane can only remove a dispatch, never create one.
  3. g is allowed whenever f is: g <= f lane by lane (lane limits), it moves fewer units (units
     per night), and out_i(g) <= out_i(f), in_i(g) <= in_i(f) for every i (handling limits).
  4. g is feasible wherever f is: out_i(g) <= out_i(f) <= s_i; y is the same, so y_i <= C_i;
     and if out_i(g) > 0 then out_i(f) > 0, so the floor y_i >= k_i^d that f obeys is the one g
     must obey, at the same y.
Hence Q_d(s, g) >= Q_d(s, f) wherever f is feasible and allowed, and g moves fewer units, so it
precedes f in the table's order (units, then cost) and wins every tie: f is never the flow the
solver recommends. Repeating the argument on g (units fall at each step) ends at an acyclic flow
that is in the table. The argument needs only that y depends on f through in - out, that costs
are nondecreasing in each lane's units, and that every limit is monotone (a smaller flow stays
within it); relays through a third store and several units on one lane are not cycles and are
kept. tests/solver/test_rules.py checks the pruned table against the full action set (the best
value over every flow, for arbitrary post-move values), by brute force, on small networks with
every rule.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from solver.distributions import count_law
from solver.errors import ModelTooLargeError
from solver.model import TransferModel, feasible_counts, flow_costs, flow_endpoints
from solver.spec import WEEKDAYS, LocationSpec, NetworkSpec

__all__ = [
    "SizeLimits",
    "build_transfer_model",
    "check_size",
    "location_kernel",
    "location_reward",
]


@dataclass(frozen=True)
class SizeLimits:
    """Largest networks the solver accepts."""

    max_states: int = 2_000_000
    max_pairs: int = 50_000_000
    max_flows: int = 1_000_000


@dataclass(frozen=True)
class _Layout:
    capacities: NDArray[np.int64]
    lane_from: NDArray[np.int64]
    lane_to: NDArray[np.int64]
    lane_costs: NDArray[np.float64]
    dispatch_costs: NDArray[np.float64]
    flows: NDArray[np.int64]
    allowed: NDArray[np.bool_]
    floors: NDArray[np.int64]
    n_states: int
    n_pairs: int


def n_phases(spec: NetworkSpec) -> int:
    """7 for a network with weekly fields (one phase per weekday), else 1."""
    return len(WEEKDAYS) if spec.is_periodic else 1


def check_size(spec: NetworkSpec, limits: SizeLimits | None = None) -> tuple[int, int]:
    """(states, feasible state-transfer pairs) of `spec`, without building its kernels; both
    count every phase (stock states x 7 for a weekly network).

    Raises ModelTooLargeError, giving the sizes, when the network exceeds `limits`.
    """
    layout = _layout(spec, limits or SizeLimits())
    return layout.n_states, layout.n_pairs


def build_transfer_model(spec: NetworkSpec, limits: SizeLimits | None = None) -> TransferModel:
    """Turn a validated specification into model arrays.

    Raises ModelTooLargeError, giving the sizes, when the network exceeds `limits`.
    """
    layout = _layout(spec, limits or SizeLimits())
    capacities = layout.capacities
    ids = spec.location_ids
    phases = n_phases(spec)
    # Phase d is followed by business day d + 1 (solver.model); with one phase, by day 0.
    days = [(d + 1) % phases for d in range(phases)]
    # Per location, its kernel and reward in each phase; computed once when it has no weekly law.
    by_location = [
        [(location_kernel(loc, weekday=day), location_reward(loc, weekday=day)) for day in days]
        if loc.is_weekly
        else [(location_kernel(loc), location_reward(loc))] * phases
        for loc in spec.locations
    ]
    kernels = tuple(tuple(per_phase[d][0] for per_phase in by_location) for d in range(phases))
    reward = np.zeros((phases, *(int(c) + 1 for c in capacities)))
    for i, per_phase in enumerate(by_location):
        axis_shape = [1] * len(ids)
        axis_shape[i] = -1
        for d, (_, location_rewards) in enumerate(per_phase):
            reward[d] += location_rewards.reshape(axis_shape)

    return TransferModel(
        location_ids=tuple(ids),
        capacities=capacities,
        lane_from=layout.lane_from,
        lane_to=layout.lane_to,
        lane_costs=layout.lane_costs,
        flows=layout.flows,
        kernels=kernels,
        reward=reward,
        allowed=layout.allowed,
        discount=spec.discount,
        dispatch_costs=layout.dispatch_costs,
        floors=layout.floors,
    )


def _layout(spec: NetworkSpec, limits: SizeLimits) -> _Layout:
    """Sizes and the flow table, checked against `limits` (states first: that check is free)."""
    index = {location_id: i for i, location_id in enumerate(spec.location_ids)}
    capacities = np.array([loc.capacity for loc in spec.locations], dtype=np.int64)
    phases = n_phases(spec)
    # Counted in floating point: a product of many capacities may overflow int64.
    n_states = int(np.prod(capacities + 1, dtype=np.float64)) * phases
    sizes = f"{n_states:,} stock states"
    if phases > 1:
        sizes = f"{n_states // phases:,} stock states x {phases} weekdays = {n_states:,} states"
    if n_states > limits.max_states:
        raise ModelTooLargeError(
            f"network has {sizes}, more than the limit of "
            f"{limits.max_states:,} (capacities {', '.join(map(str, capacities))}); "
            "use mode 'priced' for networks this large",
            states=n_states,
            pairs=None,
        )

    lane_from = np.array([index[lane.from_] for lane in spec.lanes], dtype=np.int64)
    lane_to = np.array([index[lane.to] for lane in spec.lanes], dtype=np.int64)
    lane_costs = np.array([lane.unit_cost for lane in spec.lanes], dtype=np.float64)
    dispatch_costs = np.array([lane.dispatch_cost for lane in spec.lanes], dtype=np.float64)
    # night_limits[d, l]: most units on lane l on the evening of business day d.
    night_limits = np.array(
        [[lane.max_units_on(day) for lane in spec.lanes] for day in range(phases)],
        dtype=np.int64,
    )
    # Per night d and location i (shape (P, N)): floor, most units sent, most units received
    # (a location without a handling limit can send or receive its capacity at most).
    floors = np.array(
        [[loc.keep_at_least_on(day) for loc in spec.locations] for day in range(phases)],
        dtype=np.int64,
    ).reshape(phases, len(index))
    most_out = _handling_limits(spec, phases, capacities, "out")
    most_in = _handling_limits(spec, phases, capacities, "in")

    flows = _enumerate_flows(
        lane_from,
        lane_to,
        lane_costs,
        dispatch_costs,
        night_limits.max(axis=0),
        capacities,
        spec.max_units_per_night,
        limits,
        most_out.max(axis=0),
        most_in.max(axis=0),
    )
    out, inn = flow_endpoints(flows, lane_from, lane_to, len(index))
    allowed = (
        np.all(flows[None, :, :] <= night_limits[:, None, :], axis=2)
        & np.all(out[None, :, :] <= most_out[:, None, :], axis=2)
        & np.all(inn[None, :, :] <= most_in[:, None, :], axis=2)
    )
    counts = np.stack([feasible_counts(out, inn, capacities, floors[d]) for d in range(phases)])
    allowed &= counts > 0
    usable = allowed.any(axis=0)
    flows, allowed, counts = flows[usable], allowed[:, usable], counts[:, usable]
    n_pairs = int((allowed * counts).sum())
    if n_pairs > limits.max_pairs:
        raise ModelTooLargeError(
            f"network has {sizes} and {n_pairs:,} feasible state-transfer pairs, more than "
            f"the limit of {limits.max_pairs:,} pairs; lower lane limits or capacities, set "
            "max_units_per_night, or use mode 'priced' for networks this large",
            states=n_states,
            pairs=n_pairs,
        )
    return _Layout(
        capacities,
        lane_from,
        lane_to,
        lane_costs,
        dispatch_costs,
        flows,
        allowed,
        floors,
        n_states,
        n_pairs,
    )


def _handling_limits(
    spec: NetworkSpec, phases: int, capacities: NDArray[np.int64], direction: str
) -> NDArray[np.int64]:
    """Most units each location sends ("out") or receives ("in") on each night, shape (P, N);
    its capacity where it has no limit."""
    limits = np.empty((phases, capacities.size), dtype=np.int64)
    for i, loc in enumerate(spec.locations):
        for d in range(phases):
            units = loc.max_units_out_on(d) if direction == "out" else loc.max_units_in_on(d)
            limits[d, i] = capacities[i] if units is None else min(units, int(capacities[i]))
    return limits


def location_kernel(location: LocationSpec, *, weekday: int = 0) -> NDArray[np.float64]:
    """K[y, k] = P(next closing stock k | post-move stock y) under the laws of business day
    `weekday` (0 = Monday; ignored by a location without weekly laws), shape (C + 1, C + 1)."""
    c = location.capacity
    demand = count_law(location.demand_on(weekday), c + 1)
    supply = count_law(location.replenishment_on(weekday), c + 1)

    y = np.arange(c + 1)[:, None]
    j = np.arange(c + 1)[None, :]
    # leftover[y, j] = P(L = j | y): demand y - j for 1 <= j <= y, demand >= y for j = 0.
    lag = y - j
    leftover = np.where((j >= 1) & (lag >= 0), demand.pmf[np.clip(lag, 0, c)], 0.0)
    at_least_y = np.concatenate([[1.0], demand.sf[:-1]])  # P(D >= y) = P(D > y - 1)
    leftover[:, 0] = at_least_y

    # arrivals[j, k] = P(j + R = k) for k < C, and P(j + R >= C) in the last column.
    k = np.arange(c + 1)[None, :]
    gap = k - j.T
    arrivals = np.where(gap >= 0, supply.pmf[np.clip(gap, 0, c)], 0.0)
    # P(R >= C - j) = P(R > C - j - 1); for j = C that is 1.
    need = c - np.arange(c + 1)
    arrivals[:, c] = np.where(need >= 1, supply.sf[np.clip(need - 1, 0, c)], 1.0)
    kernel: NDArray[np.float64] = leftover @ arrivals
    return kernel


def location_reward(location: LocationSpec, *, weekday: int = 0) -> NDArray[np.float64]:
    """r(y) = m E min(D, y) - h y - p E (D - y)^+ for y = 0..C under the demand of business
    day `weekday` (0 = Monday; ignored without weekly demand), currency per day."""
    demand = count_law(location.demand_on(weekday), location.capacity + 1)
    y = np.arange(location.capacity + 1, dtype=np.float64)
    reward: NDArray[np.float64] = (
        location.unit_margin * demand.expected_min()
        - location.holding_cost * y
        - location.stockout_penalty * demand.expected_excess()
    )
    return reward


def _enumerate_flows(
    lane_from: NDArray[np.int64],
    lane_to: NDArray[np.int64],
    lane_costs: NDArray[np.float64],
    dispatch_costs: NDArray[np.float64],
    lane_limits: NDArray[np.int64],
    capacities: NDArray[np.int64],
    max_per_night: int | None,
    limits: SizeLimits,
    most_out: NDArray[np.int64],
    most_in: NDArray[np.int64],
) -> NDArray[np.int64]:
    """Candidate flows, shape (A, L), ordered by (units, cost with dispatch costs,
    lexicographic); most_out, most_in: shape (N,), the largest handling limits of any night."""
    n_locations, n_lanes = capacities.size, lane_from.size
    flows = np.zeros((1, 0), dtype=np.int64)
    out = np.zeros((1, n_locations), dtype=np.int64)
    inn = np.zeros((1, n_locations), dtype=np.int64)
    for lane in range(n_lanes):
        a, b = int(lane_from[lane]), int(lane_to[lane])
        top = int(min(lane_limits[lane], capacities[a], capacities[b]))
        if max_per_night is not None:
            top = min(top, max_per_night)
        units = np.arange(top + 1, dtype=np.int64)
        n_old = flows.shape[0]
        flows = np.hstack([np.repeat(flows, units.size, axis=0), np.tile(units, n_old)[:, None]])
        out = np.repeat(out, units.size, axis=0)
        inn = np.repeat(inn, units.size, axis=0)
        out[:, a] += flows[:, -1]
        inn[:, b] += flows[:, -1]
        keep = (out[:, a] <= most_out[a]) & (inn[:, b] <= most_in[b])
        if max_per_night is not None:
            keep &= flows.sum(axis=1) <= max_per_night
        # A lane and its reverse both used: a two-lane cycle, dominated.
        for other in np.flatnonzero((lane_from[:lane] == b) & (lane_to[:lane] == a)):
            keep &= (flows[:, other] == 0) | (flows[:, -1] == 0)
        flows, out, inn = flows[keep], out[keep], inn[keep]
        if flows.shape[0] > limits.max_flows:
            raise ModelTooLargeError(
                f"lanes allow more than {limits.max_flows:,} combinations of moves in one "
                "night; lower lane limits, set max_units_per_night, or use mode 'priced' for "
                "networks this large",
                states=int(np.prod(capacities + 1)),
                pairs=None,
            )

    flows = flows[~_has_cycle(flows, lane_from, lane_to, n_locations)]
    costs = flow_costs(flows, lane_costs, dispatch_costs)
    units = flows.sum(axis=1)
    # np.lexsort sorts by the last key first.
    order = np.lexsort((*flows.T[::-1], costs, units))
    return np.ascontiguousarray(flows[order])


def _has_cycle(
    flows: NDArray[np.int64],
    lane_from: NDArray[np.int64],
    lane_to: NDArray[np.int64],
    n_locations: int,
) -> NDArray[np.bool_]:
    """Whether the lanes a flow uses contain a directed cycle, shape (A,)."""
    adjacency = np.zeros((flows.shape[0], n_locations, n_locations), dtype=np.int64)
    for lane in range(lane_from.size):
        adjacency[:, lane_from[lane], lane_to[lane]] |= (flows[:, lane] > 0).astype(np.int64)
    reach = adjacency.copy()
    for _ in range(n_locations - 1):
        reach = np.minimum(reach + reach @ adjacency, 1)
    result: NDArray[np.bool_] = np.trace(reach, axis1=1, axis2=2) > 0
    return result
