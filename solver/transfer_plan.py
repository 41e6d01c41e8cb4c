"""Tonight's moves from per-store post-move values: a concave separable transportation problem,
solved for a whole batch of closing stocks at once.

Problem (symbols as in solver.model). Given closing stock s, per-store values W_i on post-move
stock 0..C_i (concave; see `concave_envelope`), lane costs c_l and tonight's lane limits u_l and
units-per-night limit U,

    maximise  sum_i W_i(y_i) - sum_l c_l f_l
    over integer f with 0 <= f_l <= u_l, out_i(f) <= s_i, y_i = s_i - out_i + in_i <= C_i,
              sum_l f_l <= U.

As a network: a node T; per store an "own stock" node O_i and a "post-move" node Y_i. Arcs
T -> O_i carry exactly s_i; O_i -> Y_i ("stay", unbounded, cost 0); O_i -> Y_j for lane
l = i -> j (capacity u_l, cost c_l); Y_i -> T carries y_i <= C_i with convex cost -W_i(y_i), one
unit segment at a time. A plan is a circulation; out_i <= s_i holds because a store only sends
units that reach O_i, i.e. its own closing stock (a unit received tonight is not sent on).

Algorithm: start from moving nothing (every unit stays) and repeatedly push units around the
most profitable cycle through T in the residual network: T -> Y_i (one unit less at i, losing
W_i(y_i) - W_i(y_i - 1)), a shortest path to some Y_j over residual stay, lane and reversed arcs
(Bellman-Ford from T), and Y_j -> T (one unit more at j, gaining W_j(y_j + 1) - W_j(y_j)), as
many units as stay profitable and fit the path's residual capacities; stop when no cycle gains
more than a tolerance. Invariant: the residual arcs not entering T have
non-negative reduced cost under the Bellman-Ford distances (true at the start, where the only
residual arcs are stays and lanes with c_l >= 0, and kept by augmenting along shortest paths,
as in successive shortest paths; concavity of W keeps T's arcs in order). Every negative cycle
then passes through T, so when the best one gains nothing the plan is optimal: the
negative-cycle optimality condition of min-cost flow with separable convex arc costs
(Ahuja, Magnanti & Orlin, Network Flows, 1993, sections 9.1 and 14.2; from memory). Without a
binding units-per-night limit the plan is therefore exact for concave W.

Units-per-night limit: each augmentation changes sum_l f_l by its number of forward lane arcs
minus reversed ones (usually +1). Cycles are taken only while they fit the remaining allowance;
when the best cycle does not fit, the best single-lane move that fits is taken instead, and the
plan stops when neither gains. This is the usual budgeted greedy: exact when the limit does not
bind or every useful cycle is a single move, otherwise a feasible plan that the tests compare
with scipy.optimize.milp.

Rules (solver.spec; `PlanRules`). With floors k_i, handling limits O_i (units sent) and I_i
(units received) and dispatch costs F_l, the problem adds: out_i > 0 only if y_i >= k_i;
out_i <= O_i; in_i <= I_i; and - sum_l F_l [f_l > 0] in the objective.
* A store at or above its floor (s_i >= k_i) keeps y_i >= k_i (sending or not, since without
  sending y_i >= s_i): a lower bound on the arc Y_i -> T. out_i = s_i - stay_i <= O_i is a lower
  bound s_i - O_i on the stay arc. Both are arc bounds of the same network, so the optimality
  argument above holds unchanged: exact for concave W.
* A store below its floor (s_i < k_i) sends nothing in the plan. The rule would let it send
  if it received enough to end at k_i (a relay through it); that disjunction is not convex and
  the plan gives it up.
* in_i <= I_i would need a node between the lanes and Y_i; instead a lane into a store that has
  taken I_i units is closed and every augmentation's units are capped by I_j - in_j for a lane
  arc entering Y_j. That keeps the limit (a path enters Y_j at most once) but can block a
  swap of one sender for another: exact whenever the limit does not bind.
* Dispatch costs make the problem non-convex (fixed charges). Heuristic: plan (a) without them
  and (b) with F_l spread over a full lane (c_l + F_l / u_l per unit); from each, repeatedly
  close the used, charged lane whose closing (and re-planning) gains most, while one gains,
  trying per round the CLOSE_TRIALS lanes whose units earn least beside their dispatch cost
  (their flow taken off, the rest kept: a screen; trying every used lane found nothing better
  on the tests' instances and on a 12-store network, at twice the time);
  beside these, the best move along one lane alone (all its unit counts tried); keep the best
  of the three by the true objective, or nothing if that is better. Measured against
  scipy.optimize.milp with 0/1 lane-use variables in tests/solver/test_transfer_plan.py.

Everything is vectorised over the batch (numpy, no flow vectors are enumerated); rows that have
finished drop out of the loop. Each row's arithmetic is independent of the other rows, so a
stock gets the same plan alone or in any batch; rows may even plan on different value tables
(plan_flows's `tables`: the trade limit's candidates of solver.priced, simulated together).
Opposite flows on a lane pair are netted at the end (same post-move stock, no higher cost), as
the exact solver's flow table does.
"""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np
from numpy.typing import NDArray

from solver.model import lane_incidence

__all__ = ["PlanNetwork", "PlanRules", "concave_envelope", "plan_flows", "plan_objective"]

_NONE = -1  # predecessor of a node reached straight from T
_UNBOUNDED = np.iinfo(np.int64).max // 4  # residual capacity of an arc without a bound
# Dispatch costs: lanes tried for closing per row and round (module docstring).
CLOSE_TRIALS = 2


def concave_envelope(values: NDArray[np.float64]) -> NDArray[np.float64]:
    """The least concave majorant of `values` on 0..n-1, at the same points, shape (n,).

    Equal to `values` where they are already concave (up to rounding)."""
    n = values.size
    hull: list[int] = []
    for k in range(n):
        while len(hull) >= 2:
            a, b = hull[-2], hull[-1]
            # b lies on or below the chord from a to k: drop it.
            if (values[b] - values[a]) * (k - a) <= (values[k] - values[a]) * (b - a):
                hull.pop()
            else:
                break
        hull.append(k)
    points = np.array(hull)
    envelope: NDArray[np.float64] = np.interp(np.arange(n), points, values[points])
    envelope[points] = values[points]
    return envelope


@dataclass(frozen=True, eq=False)
class PlanNetwork:
    """Fixed geometry of the nightly problem: N stores, L lanes (arcs of the residual network
    in a fixed order: stays, un-stays, lanes, reversed lanes)."""

    capacities: NDArray[np.int64]
    lane_from: NDArray[np.int64]
    lane_to: NDArray[np.int64]
    lane_costs: NDArray[np.float64]

    @property
    def n_stores(self) -> int:
        return int(self.capacities.size)

    @property
    def n_lanes(self) -> int:
        return int(self.lane_from.size)

    def arcs(self) -> tuple[NDArray[np.int64], NDArray[np.int64], NDArray[np.float64]]:
        """(tail, head, cost) of the residual arcs; nodes O_i = i, Y_i = N + i."""
        n = self.n_stores
        stores = np.arange(n, dtype=np.int64)
        tail = np.concatenate([stores, n + stores, self.lane_from, n + self.lane_to])
        head = np.concatenate([n + stores, stores, n + self.lane_to, self.lane_from])
        cost = np.concatenate([np.zeros(2 * n), self.lane_costs, -self.lane_costs]).astype(
            np.float64
        )
        return tail, head, cost

    def incidence(self) -> NDArray[np.int64]:
        """(L, N): -1 at each lane's sender, +1 at its receiver (solver.model.lane_incidence)."""
        return lane_incidence(self.lane_from, self.lane_to, self.n_stores)

    def stock_change(self, flows: NDArray[np.int64]) -> NDArray[np.int64]:
        """flows @ incidence(), shape (B, N) for flows (B, L): the change of stock the flows
        make at each store."""
        return _integer_product(flows, self.incidence())


def _integer_product(a: NDArray[np.int64], b: NDArray[np.int64]) -> NDArray[np.int64]:
    """a @ b for integer matrices, computed in float64: numpy multiplies integer matrices
    without BLAS, several times slower on the plan's batches. Exact while every partial sum
    stays below 2**53 in magnitude, as unit counts and stocks do by far."""
    product: NDArray[np.int64] = (a.astype(np.float64) @ b.astype(np.float64)).astype(np.int64)
    return product


@dataclass(frozen=True, eq=False)
class PlanRules:
    """Tonight's rules, shape (N,) each: floors k_i (keep_at_least), most units sent and
    received (the capacity where there is no limit); dispatch_costs: (L,), F_l."""

    floors: NDArray[np.int64]
    most_out: NDArray[np.int64]
    most_in: NDArray[np.int64]
    dispatch_costs: NDArray[np.float64]


def plan_flows(
    network: PlanNetwork,
    stocks: NDArray[np.int64],
    values: NDArray[np.float64],
    lane_limits: NDArray[np.int64],
    network_limit: int | None,
    tolerance: float | NDArray[np.float64],
    rules: PlanRules | None = None,
    tables: NDArray[np.int64] | None = None,
) -> NDArray[np.int64]:
    """Units per lane for every closing stock of the batch, shape (B, L).

    stocks: shape (B, N), 0 <= s_i <= C_i.
    values: shape (N, max C + 1), row i holding a concave W_i on 0..C_i (entries beyond C_i
        are ignored); or (G, N, max C + 1), G such tables, row b planning on tables[b].
    lane_limits: shape (L,) or (B, L), units per lane tonight.
    network_limit: units over all lanes tonight, None for no limit.
    tolerance: a cycle must gain more than this (currency) to be taken; with G tables, shape
        (G,), one per table.
    rules: tonight's floors and handling limits and the lanes' dispatch costs (module
        docstring, "Rules"); None for none.
    tables: shape (B,), the value table of each row (only with G tables).
    """
    stocks = np.asarray(stocks, dtype=np.int64)
    batch, n = stocks.shape[0], network.n_stores
    if values.ndim == 2:
        values = values[None]
        table = np.zeros(batch, dtype=np.int64)
    elif tables is None:
        raise ValueError("tables is required with several value tables")
    else:
        table = np.asarray(tables, dtype=np.int64)
    # The G tables stacked as one of G N rows; row b looks W_i up at row offsets[b] + i.
    offsets = table * n
    row_tolerance = np.broadcast_to(np.asarray(tolerance, dtype=np.float64), (values.shape[0],))
    row_tolerance = row_tolerance[table]
    limits = np.broadcast_to(
        np.asarray(lane_limits, dtype=np.int64), (batch, network.n_lanes)
    ).copy()
    if rules is None:
        floors = np.zeros((batch, n), dtype=np.int64)
        # No handling limit: more than a store can ever take.
        most_in = np.full((batch, n), int(network.capacities.sum()) + 1, dtype=np.int64)
        low_stay = np.zeros((batch, n), dtype=np.int64)
    else:
        # A store below its floor sends nothing (the relay it could make by receiving up to its
        # floor is given up); at or above it, it ends at its floor or higher.
        below = stocks < rules.floors[None, :]
        limits[below[:, network.lane_from]] = 0
        floors = np.minimum(stocks, rules.floors[None, :])
        most_in = np.broadcast_to(rules.most_in, (batch, n))
        # out_i = s_i - stay_i <= most_out_i: a lower bound on the stay arc.
        low_stay = np.maximum(stocks - rules.most_out[None, :], 0)
    night = _Batch(
        network,
        values.reshape(-1, values.shape[2]),
        network_limit,
        row_tolerance,
        offsets,
        stocks,
        limits,
        floors,
        low_stay,
        most_in,
    )
    if rules is None or not np.any(rules.dispatch_costs > 0):
        return _plan(night)
    # Two starts: the plan without dispatch costs, and the plan with each lane's dispatch cost
    # spread over a full lane (per unit); lanes that do not pay are closed from each, and the
    # better result is kept (ties: the first). Both starts run as one batch of 2B rows (each
    # row's arithmetic is its own).
    spread = network.lane_costs[None, :] + rules.dispatch_costs[None, :] / np.maximum(limits, 1)
    costs = np.concatenate([np.broadcast_to(network.lane_costs, spread.shape), spread])
    both = night.twice()
    closed = _close_unpaid_lanes(both, rules.dispatch_costs, _plan(both, costs))
    candidates = [closed[:batch], closed[batch:], _best_single_lane(night)]
    best_flows = candidates[0]
    best_value = np.full(batch, -np.inf)
    for closed in candidates:
        value = night.objective(closed, rules.dispatch_costs)
        better = value > best_value + row_tolerance
        best_flows = np.where(better[:, None], closed, best_flows)
        best_value = np.where(better, value, best_value)
    return best_flows


def plan_objective(
    network: PlanNetwork,
    stocks: NDArray[np.int64],
    values: NDArray[np.float64],
    flows: NDArray[np.int64],
    dispatch_costs: NDArray[np.float64] | None = None,
) -> NDArray[np.float64]:
    """sum_i W_i(y_i) - c.f - F.[f > 0] of each row, shape (B,) (values (N, max C + 1) as in
    plan_flows)."""
    return _objective(
        network, stocks, values, np.zeros(stocks.shape[0], dtype=np.int64), flows, dispatch_costs
    )


def _objective(
    network: PlanNetwork,
    stocks: NDArray[np.int64],
    values: NDArray[np.float64],
    offsets: NDArray[np.int64],
    flows: NDArray[np.int64],
    dispatch_costs: NDArray[np.float64] | None,
) -> NDArray[np.float64]:
    """plan_objective on stacked value tables: row b looks W_i up at values[offsets[b] + i]."""
    post = stocks + network.stock_change(flows)
    stores = offsets[:, None] + np.arange(network.n_stores)[None, :]
    total: NDArray[np.float64] = values[stores, post].sum(axis=1)
    total = total - flows @ network.lane_costs
    if dispatch_costs is not None:
        total = total - (flows > 0) @ dispatch_costs
    return total


@dataclass(frozen=True, eq=False)
class _Batch:
    """B rows of tonight's problem on one network, as plan_flows takes them with the rules
    turned into bounds. network_limit as in plan_flows; values (G N, max C + 1), G value tables
    stacked; tolerance (B,), each row's; offsets (B,), row b's W_i is values[offsets[b] + i];
    stocks (B, N); limits (B, L), units per lane; floors (B, N), least post-move stock;
    low_stay (B, N), least units kept back (handling limit out); most_in (B, N), handling
    limit in."""

    network: PlanNetwork
    values: NDArray[np.float64]
    network_limit: int | None
    tolerance: NDArray[np.float64]
    offsets: NDArray[np.int64]
    stocks: NDArray[np.int64]
    limits: NDArray[np.int64]
    floors: NDArray[np.int64]
    low_stay: NDArray[np.int64]
    most_in: NDArray[np.int64]

    def take(self, rows: NDArray[np.int64]) -> _Batch:
        """The given rows (an index array), in that order."""
        return replace(
            self,
            tolerance=self.tolerance[rows],
            offsets=self.offsets[rows],
            stocks=self.stocks[rows],
            limits=self.limits[rows],
            floors=self.floors[rows],
            low_stay=self.low_stay[rows],
            most_in=self.most_in[rows],
        )

    def twice(self) -> _Batch:
        """Every row twice: rows 0..B-1, then the same again."""
        return self.take(np.tile(np.arange(self.stocks.shape[0]), 2))

    def objective(
        self, flows: NDArray[np.int64], dispatch_costs: NDArray[np.float64]
    ) -> NDArray[np.float64]:
        """plan_objective of each row's flows, shape (B,)."""
        return _objective(
            self.network, self.stocks, self.values, self.offsets, flows, dispatch_costs
        )


def _best_single_lane(night: _Batch) -> NDArray[np.int64]:
    """Per row, the best move along one lane alone (any number of units within the rules,
    dispatch cost not counted: every candidate pays exactly one), shape (B, L)."""
    network, stocks, values = night.network, night.stocks, night.values
    batch, n_lanes = stocks.shape[0], network.n_lanes
    sender, receiver = network.lane_from, network.lane_to
    caps = network.capacities
    top = int(night.limits.max(initial=0))
    if night.network_limit is not None:
        top = min(top, night.network_limit)
    units = np.arange(1, top + 1)[None, None, :]  # (1, 1, U)
    s_from, s_to = stocks[:, sender][:, :, None], stocks[:, receiver][:, :, None]
    most = np.minimum(
        night.limits,
        np.minimum(
            s_from[:, :, 0] - np.maximum(night.floors[:, sender], night.low_stay[:, sender]),
            np.minimum(caps[receiver] - s_to[:, :, 0], night.most_in[:, receiver]),
        ),
    )
    fits = units <= most[:, :, None]
    y_from = np.clip(s_from - units, 0, caps[sender][None, :, None])
    y_to = np.clip(s_to + units, 0, caps[receiver][None, :, None])
    at = night.offsets[:, None, None]
    gain = (
        values[at + sender[None, :, None], y_from]
        - values[at + sender[None, :, None], s_from]
        + values[at + receiver[None, :, None], y_to]
        - values[at + receiver[None, :, None], s_to]
        - network.lane_costs[None, :, None] * units
    )
    gain = np.where(fits, gain, -np.inf).reshape(batch, -1)
    flows = np.zeros((batch, n_lanes), dtype=np.int64)
    if gain.shape[1] == 0:
        return flows
    best = gain.argmax(axis=1)
    ok = np.isfinite(gain[np.arange(batch), best])
    rows = np.flatnonzero(ok)
    flows[rows, best[rows] // top] = best[rows] % top + 1
    return flows


def _closing_candidates(
    network: PlanNetwork,
    stocks: NDArray[np.int64],
    values: NDArray[np.float64],
    offsets: NDArray[np.int64],
    flows: NDArray[np.int64],
    charged: NDArray[np.bool_],
) -> tuple[NDArray[np.int64], NDArray[np.int64]]:
    """(row, lane) pairs to try closing: per row, the CLOSE_TRIALS used, charged lanes whose
    units earn least beside their dispatch cost (their flow removed, the rest kept: a screen
    only, which may not be feasible), in row order. Row b's W_i is values[offsets[b] + i]."""
    used = (flows > 0) & charged[None, :]
    sender, receiver = network.lane_from, network.lane_to
    post = stocks + network.stock_change(flows)
    units = flows
    to, by = offsets[:, None] + receiver[None, :], offsets[:, None] + sender[None, :]
    earn = (
        values[to, post[:, receiver]]
        - values[to, np.maximum(post[:, receiver] - units, 0)]
        - values[by, np.minimum(post[:, sender] + units, network.capacities[sender])]
        + values[by, post[:, sender]]
        - network.lane_costs[None, :] * units
    )
    earn = np.where(used, earn, np.inf)
    keep = np.argsort(earn, axis=1, kind="stable")[:, :CLOSE_TRIALS]
    rows = np.repeat(np.arange(flows.shape[0]), keep.shape[1])
    lanes = keep.reshape(-1)
    ok = used[rows, lanes]
    return rows[ok], lanes[ok]


def _close_unpaid_lanes(
    night: _Batch, dispatch_costs: NDArray[np.float64], flows: NDArray[np.int64]
) -> NDArray[np.int64]:
    """Dispatch costs (module docstring): close, one at a time, the used lane whose closing
    (and re-planning) gains most, while one gains more than `tolerance`; then keep moving
    nothing if that is better still."""
    network, stocks, values, tolerance = night.network, night.stocks, night.values, night.tolerance
    flows = flows.copy()
    limits = night.limits.copy()
    best = night.objective(flows, dispatch_costs)
    charged = dispatch_costs > 0
    active = np.flatnonzero(np.any((flows > 0) & charged[None, :], axis=1))
    while active.size:
        rows, lanes = _closing_candidates(
            network, stocks[active], values, night.offsets[active], flows[active], charged
        )
        rows = active[rows]
        trial_limits = limits[rows].copy()
        trial_limits[np.arange(rows.size), lanes] = 0
        trial_night = replace(night.take(rows), limits=trial_limits)
        trial = _plan(trial_night)
        worth = trial_night.objective(trial, dispatch_costs)
        # The best closing of each row (rows come sorted, candidates in lane order).
        order = np.lexsort((-worth, rows))
        first = order[np.r_[True, rows[order][1:] != rows[order][:-1]]]
        row = rows[first]
        better = worth[first] > best[row] + tolerance[row]
        row, pick = row[better], first[better]
        flows[row] = trial[pick]
        limits[row] = trial_limits[pick]
        best[row] = worth[pick]
        active = row[np.any((flows[row] > 0) & charged[None, :], axis=1)]
    nothing = night.objective(np.zeros_like(flows), dispatch_costs)
    flows[nothing > best + tolerance] = 0
    return flows


def _plan(night: _Batch, lane_costs: NDArray[np.float64] | None = None) -> NDArray[np.int64]:
    """The augmenting-cycle plan (module docstring) without dispatch costs; lane_costs: (B, L)
    unit costs per row (default the network's)."""
    network, stocks, values = night.network, night.stocks, night.values
    network_limit = night.network_limit
    n, n_lanes = network.n_stores, network.n_lanes
    batch = stocks.shape[0]
    caps = network.capacities
    into = np.zeros((n_lanes, n), dtype=np.int64)
    into[np.arange(n_lanes), network.lane_to] = 1
    unit_costs = np.broadcast_to(
        network.lane_costs if lane_costs is None else lane_costs, (batch, n_lanes)
    )
    tail, _, _ = network.arcs()
    n_nodes = 2 * n
    # Arc ids by (sender a, receiver j): into Y_j from O_a (stay when a == j, else lane a -> j)
    # and into O_a from Y_j (un-stay when a == j, else the reversed lane a -> j); -1: none.
    lane_id = np.full((n, n), -1, dtype=np.int64)
    lane_id[network.lane_from, network.lane_to] = np.arange(n_lanes)
    has_lane = lane_id >= 0
    into_y = np.where(has_lane, 2 * n + lane_id, _NONE)
    into_o = np.where(has_lane, 2 * n + n_lanes + lane_id, _NONE)
    diagonal = np.arange(n)
    into_y[diagonal, diagonal] = diagonal
    into_o[diagonal, diagonal] = n + diagonal
    width_c = values.shape[1]
    # Marginal values: up[i, y] = W_i(y + 1) - W_i(y) for y < C_i (per stacked table).
    up = np.full((values.shape[0], width_c + 1), -np.inf)
    for i in range(values.shape[0]):
        c = int(caps[i % n])
        up[i, :c] = np.diff(values[i, : c + 1])
    store_rows = np.arange(n)

    flows = np.zeros((batch, n_lanes), dtype=np.int64)
    stay = stocks.astype(np.int64).copy()
    post = stocks.astype(np.int64).copy()
    used = np.zeros(batch, dtype=np.int64)
    budget = np.iinfo(np.int64).max if network_limit is None else int(network_limit)
    active = np.arange(batch)
    while active.size:
        y, st, f, lim = post[active], stay[active], flows[active], night.limits[active]
        lo, keep, most = night.floors[active], night.low_stay[active], night.most_in[active]
        lane_cost = unit_costs[active]
        at, tol = night.offsets[active], night.tolerance[active]
        inn = _integer_product(f, into)  # (b, N) units received so far
        b = active.size
        rows = np.arange(b)[:, None]
        stores = at[:, None] + store_rows[None, :]
        gain = up[stores, y]  # (b, N): value of one more unit, -inf when full
        loss = np.where(y > lo, up[stores, np.maximum(y - 1, 0)], np.inf)
        # Residual arc costs as (b, receiver, sender) matrices into Y (so that both half-steps
        # below reduce over the last axis) and (b, sender, receiver) into O, inf where
        # unavailable. A lane into a store that has taken its most tonight is closed
        # (conservative: module docstring, "Rules").
        open_in = inn < most
        forward = np.full((b, n, n), np.inf)
        forward[:, network.lane_to, network.lane_from] = np.where(
            (f < lim) & open_in[:, network.lane_to], lane_cost, np.inf
        )
        forward[:, diagonal, diagonal] = 0.0
        backward = np.full((b, n, n), np.inf)
        backward[:, network.lane_from, network.lane_to] = np.where(f > 0, -lane_cost, np.inf)
        backward[:, diagonal, diagonal] = np.where(st > keep, 0.0, np.inf)
        dist_y = loss.copy()
        dist_o = np.full((b, n), np.inf)
        pred_y = np.full((b, n), _NONE, dtype=np.int64)
        pred_o = np.full((b, n), _NONE, dtype=np.int64)
        live = np.arange(b)
        # Bellman-Ford in alternating half-steps (O from Y, then Y from O; the residual network
        # is bipartite between the two), only on rows whose distances still change.
        for _ in range(n_nodes):
            changed = np.zeros(live.size, dtype=np.bool_)
            whole = live.size == b  # (indexing by live would copy the matrices)
            row_of = np.arange(live.size)[:, None]
            candidate = dist_y[live][:, None, :] + (backward if whole else backward[live])
            # (l, a, j); the minimum read at the argmin (the first on ties): .min() without a
            # second pass.
            best = candidate.argmin(axis=2)
            value = candidate[row_of, diagonal[None, :], best]
            better = value < _threshold(dist_o[live])
            if better.any():
                changed |= better.any(axis=1)
                dist_o[live] = np.where(better, value, dist_o[live])
                pred_o[live] = np.where(better, into_o[diagonal[None, :], best], pred_o[live])
            candidate = dist_o[live][:, None, :] + (forward if whole else forward[live])
            best = candidate.argmin(axis=2)  # (l, j, a)
            value = candidate[row_of, diagonal[None, :], best]
            better = value < _threshold(dist_y[live])
            if better.any():
                changed |= better.any(axis=1)
                dist_y[live] = np.where(better, value, dist_y[live])
                pred_y[live] = np.where(better, into_y[best, diagonal[None, :]], pred_y[live])
            live = live[changed]
            if not live.size:
                break
        dist = np.concatenate([dist_o, dist_y], axis=1)
        pred = np.concatenate([pred_o, pred_y], axis=1)
        cycle = dist[:, n:] - gain  # (b, N): cost of the best cycle ending at Y_j
        j = cycle.argmin(axis=1)
        profit = -cycle[rows[:, 0], j]
        take = profit > tol
        # Walk each path back to T: lane count, then apply (only rows that take it).
        node = n + j
        r = rows[:, 0]
        delta_lanes = np.zeros(b, dtype=np.int64)
        room = np.full(b, _UNBOUNDED, dtype=np.int64)
        path: list[NDArray[np.int64]] = []
        for _ in range(n_nodes + 1):
            arc = pred[r, node]
            live = arc != _NONE
            if not live.any():
                break
            safe = np.where(live, arc, 0)
            kind_unstay = live & (safe >= n) & (safe < 2 * n)
            kind_lane = live & (safe >= 2 * n) & (safe < 2 * n + n_lanes)
            kind_back = live & (safe >= 2 * n + n_lanes)
            delta_lanes += kind_lane.astype(np.int64) - kind_back.astype(np.int64)
            # (np.minimum and np.maximum: np.clip costs several times more on small arrays.)
            lane = np.minimum(np.maximum(safe - 2 * n, 0), n_lanes - 1)
            back = np.minimum(np.maximum(safe - 2 * n - n_lanes, 0), n_lanes - 1)
            store = np.minimum(np.maximum(safe - n, 0), n - 1)
            residual = np.where(kind_unstay, st[r, store] - keep[r, store], room)
            receiver = network.lane_to[lane]
            residual = np.where(
                kind_lane,
                np.minimum(lim[r, lane] - f[r, lane], most[r, receiver] - inn[r, receiver]),
                residual,
            )
            residual = np.where(kind_back, f[r, back], residual)
            room = np.minimum(room, residual)
            path.append(np.where(live, arc, _NONE))
            node = np.where(live, tail[safe], node)
        start = node - n  # the store that gives up units (T -> Y_start)
        # A path that does not lead back to T (only on rounding-level cycles) is not taken.
        take &= (node >= n) & (pred[r, node] == _NONE) & (start != j)
        start = np.clip(start, 0, n - 1)
        # Units pushed around the same cycle: the internal path keeps its cost and every
        # internal residual arc keeps a non-negative reduced cost (so the invariant holds for
        # any amount); the k-th unit gains W_j(y_j + k) - W_j(y_j + k - 1) and loses
        # W_i(y_i - k + 1) - W_i(y_i - k), which fall with k by concavity.
        k = np.arange(1, width_c + 1)[None, :]
        y_start, y_end = y[r, start], y[r, j]
        internal = dist[r, n + j] - up[at + start, np.maximum(y_start - 1, 0)]
        lose = np.where(
            k <= (y_start - lo[r, start])[:, None],
            up[(at + start)[:, None], np.maximum(y_start[:, None] - k, 0)],
            np.inf,
        )
        win = up[(at + j)[:, None], np.minimum(y_end[:, None] + k - 1, width_c)]
        worth = (win - lose - internal[:, None] > tol[:, None]) & (k <= room[:, None])
        units = worth.sum(axis=1)
        if network_limit is not None:
            spare = budget - used[active]
            units = np.where(
                delta_lanes > 0, np.minimum(units, spare // np.maximum(delta_lanes, 1)), units
            )
        fits = units >= 1
        full_take = take & fits
        units = np.where(full_take, units, 0)
        # Rows whose best cycle does not fit: the best single-lane move that fits, if any.
        fallback = take & ~fits & (used[active] < budget)
        lane_take = np.zeros(b, dtype=np.bool_)
        lane_choice = np.zeros(b, dtype=np.int64)
        if fallback.any():
            sender, receiver = network.lane_from, network.lane_to
            direct = gain[:, receiver] - loss[:, sender] - lane_cost
            ok = (
                (f < lim)
                & (st[:, sender] > keep[:, sender])
                & (y[:, sender] > lo[:, sender])
                & (y[:, receiver] < caps[receiver])
                & open_in[:, receiver]
            )
            direct = np.where(ok, direct, -np.inf)
            lane_choice = direct.argmax(axis=1)
            lane_take = fallback & (direct[rows[:, 0], lane_choice] > tol)
        # Apply full cycles.
        for arc in path:
            on = full_take & (arc != _NONE)
            if not on.any():
                continue
            idx = np.flatnonzero(on)
            a = arc[idx]
            stay_arc = a < n
            unstay_arc = (a >= n) & (a < 2 * n)
            lane_arc = (a >= 2 * n) & (a < 2 * n + n_lanes)
            back_arc = a >= 2 * n + n_lanes
            u = units[idx]
            np.add.at(st, (idx[stay_arc], a[stay_arc]), u[stay_arc])
            np.add.at(st, (idx[unstay_arc], a[unstay_arc] - n), -u[unstay_arc])
            np.add.at(f, (idx[lane_arc], a[lane_arc] - 2 * n), u[lane_arc])
            np.add.at(f, (idx[back_arc], a[back_arc] - 2 * n - n_lanes), -u[back_arc])
        idx = np.flatnonzero(full_take)
        np.add.at(y, (idx, start[idx]), -units[idx])
        np.add.at(y, (idx, j[idx]), units[idx])
        # Apply single-lane fallbacks.
        idx = np.flatnonzero(lane_take)
        lanes = lane_choice[idx]
        np.add.at(f, (idx, lanes), 1)
        np.add.at(st, (idx, network.lane_from[lanes]), -1)
        np.add.at(y, (idx, network.lane_from[lanes]), -1)
        np.add.at(y, (idx, network.lane_to[lanes]), 1)
        post[active], stay[active], flows[active] = y, st, f
        used[active] += units * delta_lanes + lane_take.astype(np.int64)
        active = active[full_take | lane_take]
    return _net_opposite(flows, network)


def _threshold(dist: NDArray[np.float64]) -> NDArray[np.float64]:
    """Distances a candidate must beat: strictly, beyond rounding, so that zero-cost cycles
    never update anything."""
    finite = np.isfinite(dist)
    margin = 1e-12 * (1.0 + np.abs(np.where(finite, dist, 0.0)))
    result: NDArray[np.float64] = np.where(finite, dist - margin, np.inf)
    return result


def _net_opposite(flows: NDArray[np.int64], network: PlanNetwork) -> NDArray[np.int64]:
    """Cancel units sent both ways between two stores (lanes are distinct pairs, solver.spec)."""
    n = network.n_stores
    lane_id = np.full((n, n), -1, dtype=np.int64)
    lane_id[network.lane_from, network.lane_to] = np.arange(network.n_lanes)
    reverse = lane_id[network.lane_to, network.lane_from]
    # Each pair once: the lane listed first, and its reverse.
    first = np.flatnonzero(reverse > np.arange(network.n_lanes))
    other = reverse[first]
    both = np.minimum(flows[:, first], flows[:, other])
    flows[:, first] -= both
    flows[:, other] -= both
    return flows
