"""Baseline transfer rules as plans (solver.simulation.Plan), for networks of any size.

Each rule decides tonight's flows f from closing stock s, a batch of stocks at a time, by moving
one unit at a time, each time along the lane with the best score for that unit, until no lane
scores above zero (symbols as in solver.model):

    a unit may go along lane l = (i -> j) while f_l < u_l(night), sent_i < s_i (a location sends
    only what it had at closing), y_j < C_j, the reverse lane (j -> i) carries nothing,
    sum f < the nightly limit, y_i > keep_at_least_i (the sender stays at or above its floor)
    and the night's handling limits of i (units out) and j (units in) are not reached;
    y = s - out(f) + in(f) is updated after every unit. The first unit on a lane also pays the
    lane's dispatch cost, so a lane is opened only when one unit pays for the truck.

The rules differ in the score of one more unit on lane l at the tentative post-move stock y:

  * do_nothing_plan: never moves.
  * balance_cover_plan: the rule of thumb of solver.simulation.balance_cover_policy, unit by unit:
    the drop in the imbalance J(y) = sum_i (y_i / mu_i - c)^2 (days of cover squared, c the
    network-wide cover, unchanged by moves), among units that pay for themselves tomorrow:
    r_i(y_i - 1) + r_j(y_j + 1) - r_i(y_i) - r_j(y_j) > c_l, r the one-day expected profit of
    solver.build.location_reward.
  * pairwise_index_plan: an index from a pairwise decomposition in the spirit of Archibald,
    Black & Glazebrook, "An index heuristic for transshipment decisions in multi-location
    inventory systems based on a pairwise decomposition", EJOR 192(1), 2009 (from memory: the
    network is split into two-location problems solved exactly, whose values price a
    transshipment between the pair). Here: for every pair {i, j} joined by a lane, the exact
    optimal post-move value U_ij of the two-location network made of i, j and their lanes
    (solver.solve_network, same criterion and nightly limit); the index of one more unit on
    i -> j is U_ij(y_i - 1, y_j + 1) - U_ij(y_i, y_j) - c_l. The greedy unit-by-unit
    application is our own reading.

Phases follow solver.model: a count in phase d is followed by business day (d + 1) mod 7.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence

import numpy as np
from numpy.typing import NDArray

from solver import solve_network
from solver.build import location_reward, n_phases
from solver.result import Criterion
from solver.simulation import Plan, mean_demands
from solver.spec import LaneSpec, LocationSpec, NetworkSpec

__all__ = ["balance_cover_plan", "do_nothing_plan", "pairwise_index_plan"]

# Scores at or below this fraction of the score scale count as no improvement.
_RELATIVE_TOLERANCE = 1e-9

# score(post, phase, lane_ok) -> shape (B, L): the value of one more unit on each lane at the
# tentative post-move stock `post` (B, N); only entries where lane_ok is True are read.
_Score = Callable[[NDArray[np.int64], int, NDArray[np.bool_]], NDArray[np.float64]]


class _Lanes:
    """The lane arrays of a specification, shared by every rule."""

    def __init__(self, spec: NetworkSpec) -> None:
        index = {location_id: i for i, location_id in enumerate(spec.location_ids)}
        self.n_phases = n_phases(spec)
        self.capacities = np.array([loc.capacity for loc in spec.locations], dtype=np.int64)
        self.sender = np.array([index[lane.from_] for lane in spec.lanes], dtype=np.int64)
        self.receiver = np.array([index[lane.to] for lane in spec.lanes], dtype=np.int64)
        self.costs = np.array([lane.unit_cost for lane in spec.lanes], dtype=np.float64)
        self.limits = np.array(
            [[lane.max_units_on(d) for lane in spec.lanes] for d in range(self.n_phases)],
            dtype=np.int64,
        )
        self.dispatch = np.array([lane.dispatch_cost for lane in spec.lanes], dtype=np.float64)
        self.network_limit = spec.max_units_per_night
        unlimited = int(self.capacities.sum())

        def per_night(value: Callable[[LocationSpec, int], int | None]) -> NDArray[np.int64]:
            return np.array(
                [
                    [unlimited if (v := value(loc, d)) is None else v for loc in spec.locations]
                    for d in range(self.n_phases)
                ],
                dtype=np.int64,
            )

        self.floors = per_night(lambda loc, d: loc.keep_at_least_on(d))
        self.most_out = per_night(lambda loc, d: loc.max_units_out_on(d))
        self.most_in = per_night(lambda loc, d: loc.max_units_in_on(d))
        ends = [(int(a), int(b)) for a, b in zip(self.sender, self.receiver, strict=True)]
        lane_of = {pair: lane for lane, pair in enumerate(ends)}
        self.reverse = np.array(
            [lane_of.get((b, a), -1) for a, b in ends],
            dtype=np.int64,
        )

    def greedy(self, stock: NDArray[np.int64], phase: int, score: _Score) -> NDArray[np.int64]:
        """Flows, shape (B, L), moving one unit at a time along the best-scoring lane."""
        stock = np.asarray(stock, dtype=np.int64)
        batch, n_lanes = stock.shape[0], self.sender.size
        flows = np.zeros((batch, n_lanes), dtype=np.int64)
        post = stock.copy()
        sent = np.zeros_like(stock)
        night = phase % self.n_phases
        limits = self.limits[night]
        floors, most_out, most_in = self.floors[night], self.most_out[night], self.most_in[night]
        received = np.zeros_like(stock)
        rows = np.arange(batch)
        has_reverse = self.reverse >= 0
        budget = int(limits.sum()) if self.network_limit is None else self.network_limit
        active = np.ones(batch, dtype=bool)
        for _ in range(budget):
            ok = (
                (flows < limits)
                & (sent[:, self.sender] < stock[:, self.sender])
                & (sent[:, self.sender] < most_out[self.sender])
                & (post[:, self.sender] > floors[self.sender])
                & (post[:, self.receiver] < self.capacities[self.receiver])
                & (received[:, self.receiver] < most_in[self.receiver])
            )
            ok[:, has_reverse] &= flows[:, self.reverse[has_reverse]] == 0
            ok &= active[:, None]
            if not ok.any():
                break
            # The first unit on a lane pays its dispatch cost.
            values = np.where(ok, score(post, phase, ok) - self.dispatch * (flows == 0), -np.inf)
            best = np.argmax(values, axis=1)
            gain = values[rows, best]
            scale = np.abs(np.where(np.isfinite(values), values, 0.0)).max(axis=1)
            active &= gain > _RELATIVE_TOLERANCE * np.maximum(1.0, scale)
            if not active.any():
                break
            take, lane = rows[active], best[active]
            flows[take, lane] += 1
            post[take, self.sender[lane]] -= 1
            post[take, self.receiver[lane]] += 1
            sent[take, self.sender[lane]] += 1
            received[take, self.receiver[lane]] += 1
        return flows


def do_nothing_plan(spec: NetworkSpec) -> Plan:
    """The plan that never moves anything."""
    n_lanes = len(spec.lanes)

    def plan(stock: NDArray[np.int64], phase: int) -> NDArray[np.int64]:
        return np.zeros((np.shape(stock)[0], n_lanes), dtype=np.int64)

    return plan


def _one_day_rewards(spec: NetworkSpec, phases: int) -> list[NDArray[np.float64]]:
    """Per phase, shape (N, C_max + 1): r_i(y) of the day after a count in that phase (0 past
    C_i, never read)."""
    top = max(loc.capacity for loc in spec.locations) + 1
    tables = []
    for d in range(phases):
        table = np.zeros((len(spec.locations), top))
        for i, loc in enumerate(spec.locations):
            table[i, : loc.capacity + 1] = location_reward(loc, weekday=(d + 1) % 7)
        tables.append(table)
    return tables


def balance_cover_plan(
    spec: NetworkSpec, demand_means: Sequence[float] | NDArray[np.float64] | None = None
) -> Plan:
    """Move units toward equal days of cover when they pay for themselves tomorrow (module
    docs). demand_means: mu_i, units per day, all > 0; default mean_demands(spec)."""
    lanes = _Lanes(spec)
    mu = mean_demands(spec) if demand_means is None else np.asarray(demand_means, dtype=float)
    idle = [loc.id for loc, m in zip(spec.locations, mu, strict=True) if not m > 0]
    if idle:
        raise ValueError(
            "days of cover needs a positive mean demand at every location, not at "
            + ", ".join(repr(location) for location in idle)
        )
    rewards = _one_day_rewards(spec, lanes.n_phases)
    i, j = lanes.sender, lanes.receiver

    def plan(stock: NDArray[np.int64], phase: int) -> NDArray[np.int64]:
        stock = np.asarray(stock, dtype=np.int64)
        cover = (stock.sum(axis=1) / mu.sum())[:, None]
        r = rewards[phase % lanes.n_phases]

        def score(post: NDArray[np.int64], _: int, ok: NDArray[np.bool_]) -> NDArray[np.float64]:
            yi, yj = post[:, i], post[:, j]
            before = (yi / mu[i] - cover) ** 2 + (yj / mu[j] - cover) ** 2
            after = ((yi - 1) / mu[i] - cover) ** 2 + ((yj + 1) / mu[j] - cover) ** 2
            # Units that cannot move are scored at their own stock and never read.
            down, up = np.where(ok, yi - 1, yi), np.where(ok, yj + 1, yj)
            payback = r[i, down] + r[j, up] - r[i, yi] - r[j, yj] - lanes.costs
            tolerance = _RELATIVE_TOLERANCE * max(1.0, float(np.abs(r).max()))
            pays = payback > tolerance
            drop: NDArray[np.float64] = np.where(pays, before - after, -np.inf)
            return drop

        return lanes.greedy(stock, phase, score)

    return plan


def pairwise_index_plan(spec: NetworkSpec, *, criterion: Criterion = "discounted") -> Plan:
    """Move units by the pairwise index (module docs). Solves one two-location network per pair
    of locations joined by a lane, each exactly: sum over pairs of (C_i + 1)(C_j + 1) states."""
    lanes = _Lanes(spec)
    by_pair: dict[frozenset[int], list[int]] = {}
    for lane, (a, b) in enumerate(zip(lanes.sender, lanes.receiver, strict=True)):
        by_pair.setdefault(frozenset((int(a), int(b))), []).append(lane)

    # U of every lane's pair, oriented (sender, receiver) and flattened: value of post-move
    # stock (y_i, y_j) of lane l in phase d at u[d, offset[l] + y_i * width[l] + y_j].
    offset = np.zeros(lanes.sender.size, dtype=np.int64)
    width = lanes.capacities[lanes.receiver] + 1
    blocks: list[NDArray[np.float64]] = []
    size = 0
    for members in by_pair.values():
        a, b = sorted(int(x) for x in {lanes.sender[members[0]], lanes.receiver[members[0]]})
        pair_spec = _pair_network(spec, a, b, [spec.lanes[lane] for lane in members])
        result = solve_network(pair_spec, criterion=criterion)
        u = result.post_move_values.reshape(result.phases, *result.shape)
        for lane in members:
            oriented = u if lanes.sender[lane] == a else u.transpose(0, 2, 1)
            full = np.stack([oriented[d % result.phases] for d in range(lanes.n_phases)])
            offset[lane] = size
            blocks.append(full.reshape(lanes.n_phases, -1))
            size += blocks[-1].shape[1]
    u_flat = np.concatenate(blocks, axis=1) if blocks else np.zeros((lanes.n_phases, 0))
    i, j = lanes.sender, lanes.receiver

    def score(post: NDArray[np.int64], phase: int, ok: NDArray[np.bool_]) -> NDArray[np.float64]:
        row = u_flat[phase % lanes.n_phases]
        yi, yj = post[:, i], post[:, j]
        here = offset + yi * width + yj
        # (y_i - 1, y_j + 1) where the unit can move; elsewhere the entry is never read.
        moved = np.where(ok, here - width + 1, here)
        index: NDArray[np.float64] = row[moved] - row[here] - lanes.costs
        return index

    def plan(stock: NDArray[np.int64], phase: int) -> NDArray[np.int64]:
        return lanes.greedy(np.asarray(stock, dtype=np.int64), phase, score)

    return plan


def _pair_network(spec: NetworkSpec, a: int, b: int, pair_lanes: list[LaneSpec]) -> NetworkSpec:
    """The two-location network of locations a < b and the lanes between them."""
    data = spec.model_dump(mode="json", by_alias=True)
    data["name"] = f"{spec.locations[a].id} and {spec.locations[b].id}"
    data["locations"] = [data["locations"][a], data["locations"][b]]
    data["lanes"] = [lane.model_dump(mode="json", by_alias=True) for lane in pair_lanes]
    return NetworkSpec.model_validate(data)
