"""Tonight's moves for a whole assortment: many items over one layout, from cached policies.

Every item m of an assortment is its own network over the same N locations and the layout's L
lanes, or some of them (an item kept off a lane has a network without it); its solved policy
pi_m is a PolicyResult (exact) or a PricedPolicy, and items with identical parameters share one
policy object. With symbols as in solver.model, item m closes with stock s_m (N units) in phase
d_m = weekday mod P_m (the business date's weekday for a weekly policy, 0 for a stationary one).

A policy's lanes are found among the layout's by their ends (sender, receiver), not by
position. Flows below are over the item's own lanes; each item's flows are then placed over the
layout's lanes, 0 on a lane its policy does not have: an item is never moved on a lane it is
kept off, and takes no room on that lane's truck.

Uncoupled moves (no shared truck). For an exact policy, tonight's flow is the policy's action

    f_m = flows[action[d, idx(s_m)]],   idx the row-major index of the stock (ravel_multi_index),

its value the post-move value less the move's cost, and its value without moves the value of
moving nothing:

    value_m   = U_d(y_m) - cost(f_m) [- g],     y_m = s_m - out(f_m) + in(f_m),
    without_m = U_d(s_m) [- g],

U_d = post_move_values[d] (solver.bellman), g the gain under the average criterion (values on
the bias scale, as PolicyResult.recommend reports them). Because idx is linear in the stock,
idx(y) = idx(s) + shift(f) with shift(f) = (in(f) - out(f)) . strides, so the items of one policy
need one ravel_multi_index and fancy indexes into `action` and `post_move_values`: no Python
object per item. For a priced policy the flow is the nightly plan (PricedPolicy.plan_batch, one
call for all the policy's items) and the values are the relaxation's (PricedPolicy.move_values),
as PricedPolicy.recommend reports them. Either way each item's answer is bit for bit the one the
policy's single-stock recommendation gives.

Shared truck capacity. A lane l may carry at most cap_l a night over all items, counted in units
(every unit weighs 1; a fractional cap_l then holds its whole part) or in volume (a unit of item
m weighs w_m). Item m's candidates tonight
are flows k with a value q_k on the scale above, and solver.sharing.allocate_shared_capacity
picks one per item within the capacities (Lagrangian prices on the lanes, a feasible
allocation and a bound on the best one; see that module). The candidates:

* exact policy: every flow of the table allowed on night d and feasible at s_m (no location
  sends more than it holds or ends below its floor after sending, none ends above capacity:
  the boxes of solver.model.feasible_bounds), q_k = U_d(y_k) - cost(f_k) [- g], less those no
  candidate needs: a flow worth no more than some smaller flow g <= f (lane by lane, e.g.
  moving nothing) is dropped, since g uses no more of any truck, so f is needed neither in the
  best allocation nor in the bound D(pi) at any prices pi >= 0. The best smaller flow is found
  level by level over the table (units moved), taking one unit off one lane at a time (a
  smaller flow of an acyclic flow within the limits is acyclic and within them, so the table
  of solver.build normally holds it; where it does not, that chain is not followed and fewer
  flows are dropped). An item whose policy moves nothing has no candidate but moving nothing
  (see the cap below).
* priced policy: the plan, moving nothing, and for every lane the plan uses, the plan re-made
  with that lane closed tonight and with one unit less allowed on it (plan_batch with tighter
  lane limits; all of an item's variants in the same batch call). This is not every flow, so
  the allocation and bound are over these candidates only.

Only the items whose own move uses a lane that the uncoupled moves overload get these
candidates; every other item keeps its own move and moving nothing. Whatever the prices on the
overloaded lanes, its own move stays its best (it pays none of them), so D(pi) is unchanged,
and the allocation's repair only ever switches items that use an overloaded lane. When no lane
is overloaded, no candidate is built at all.

The policy's own move is the item's first candidate, and no other candidate of the item is
valued above it (q_k is capped at q_{f_m}). The policy is greedy in its values up to the
solver's tolerance, so the cap changes values by at most that tolerance; it makes the
allocation, when no capacity binds, exactly the uncoupled moves (the first of tied candidates
is taken). The values reported per item are the uncapped q.

Prices are sought until the bound is within 0.3% of the uncoupled moves' total gain over moving
nothing (solver.sharing's tolerance, relative to the bound, is set accordingly: the bound is
mostly the value of the stock itself, which no move changes much).

`sharing` of the result then holds the allocation: its value and bound (bound - value bounds
what the allocation may miss) and its sharing_cost (the uncoupled total less the allocation's,
what the shared truck costs tonight).
"""

from __future__ import annotations

import itertools
import weakref
from collections.abc import Sequence
from dataclasses import dataclass
from functools import cached_property

import numpy as np
from numpy.typing import ArrayLike, NDArray

from solver.errors import InvalidStockError
from solver.model import feasible_bounds, flow_costs, flow_endpoints, lane_incidence
from solver.priced_result import PricedPolicy
from solver.result import PolicyResult, phase_of_weekday
from solver.sharing import ItemChoices, SharedAllocation, allocate_shared_capacity

__all__ = ["AssortmentMoves", "ItemPolicy", "assortment_moves", "derived_bytes"]

ItemPolicy = PolicyResult | PricedPolicy

# Pricing of shared trucks stops when the bound is within this share of the uncoupled moves'
# total gain (over moving nothing) of its cutting-plane estimate.
_PRICING_SHARE = 3e-3
# Candidates of a chunk of items are computed as (items, flows) arrays, a few of them at once;
# chunks keep each near this many elements.
_CHUNK_ELEMENTS = 1_000_000


@dataclass(frozen=True, eq=False)
class AssortmentMoves:
    """Tonight's moves of M items over N locations and L lanes.

    flows: shape (M, L), units per lane, in the layout's lane order (0 on the lanes an item's
        policy does not have).
    post_move_stock: shape (M, N), units per location after the moves.
    value: shape (M,), each item's value with its moves (post-move value less move costs);
        value_without_moves: shape (M,), the same moving nothing. Currency, on the scale of
        each item's single-stock recommendation (expected_value, value_without_transfers).
    transfer_cost: shape (M,), unit and dispatch costs of each item's moves (currency).
    sharing: the allocation of shared truck capacity (None when no capacity was given).
    candidates: the flows the allocation chose among, with their values capped as the module
        docs say (None when no capacity was given, or no items).
    """

    flows: NDArray[np.int64]
    post_move_stock: NDArray[np.int64]
    value: NDArray[np.float64]
    value_without_moves: NDArray[np.float64]
    transfer_cost: NDArray[np.float64]
    sharing: SharedAllocation | None
    candidates: ItemChoices | None = None

    @property
    def gain(self) -> NDArray[np.float64]:
        """value - value_without_moves, shape (M,)."""
        gain: NDArray[np.float64] = self.value - self.value_without_moves
        return gain


@dataclass(frozen=True)
class _Layout:
    """What every item's policy shares: the locations, and the lanes (each policy's lanes are
    some of them: `columns[p]` holds the layout position of each lane of policy p)."""

    location_ids: tuple[str, ...]
    lanes: tuple[tuple[int, int], ...]
    incidence: NDArray[np.int64]  # (L, N): -1 at a lane's sender, +1 at its receiver
    columns: tuple[NDArray[np.int64], ...]

    @property
    def n_locations(self) -> int:
        return len(self.location_ids)


@dataclass
class _Candidates:
    """One group's candidates, in the order the allocation prefers them within an item."""

    item: NDArray[np.int64]
    rank: NDArray[np.int64]
    flows: NDArray[np.int64]
    value: NDArray[np.float64]  # uncapped q
    capped: NDArray[np.float64]
    cost: NDArray[np.float64]


@dataclass(frozen=True)
class _Group:
    """The items of one policy: their stocks, phase, the layout position of each of the
    policy's lanes, and (exact policies) table, actions and stock indexes."""

    policy: ItemPolicy
    phase: int
    columns: NDArray[np.int64]
    items: NDArray[np.int64]
    stocks: NDArray[np.int64]
    exact: tuple[_Tables, NDArray[np.int64], NDArray[np.int64]] | None


def assortment_moves(
    policies: Sequence[ItemPolicy],
    policy_of: ArrayLike,
    stocks: ArrayLike,
    *,
    lanes: Sequence[tuple[str, str]] | None = None,
    weekday: int = 0,
    truck_capacity: ArrayLike | None = None,
    unit_volume: ArrayLike | None = None,
    item_ids: Sequence[str] | None = None,
) -> AssortmentMoves:
    """Tonight's moves of every item from its closing stock (module docs).

    policies: the distinct policies (each item's network solved), all over one layout.
    policy_of: shape (M,), index into `policies` of each item's policy.
    stocks: shape (M, N), integer closing stock of each item at each location.
    lanes: the layout's L lanes as (sender, receiver) location ids, the order of the flows;
        every policy's lanes must be among them (a policy may leave some out: its items are
        never moved on those). None: every policy has the same lanes in the same order, and
        those are the layout's.
    weekday: weekday of the business date of the closing counts (0 = Monday .. 6 = Sunday);
        each policy's phase is policy.phase_of(weekday), i.e. 0 for a stationary policy.
    truck_capacity: shape (L,), what each lane carries a night over all items (inf: not
        shared); None: no shared capacity, each item takes its own policy's move.
    unit_volume: shape (M,), capacity one unit of each item uses (> 0); None counts units.
    item_ids: optional names of the items, used in error messages.
    Raises InvalidStockError for a stock of the wrong shape or type, negative or above the
    item's capacity (naming the first such item and location), ValueError for policies that do
    not share one layout (other locations, or a lane not among `lanes`), bad `lanes`, a bad
    policy index, weekday, capacity or volume.
    """
    if not policies:
        raise ValueError("at least one policy is needed")
    layout = _layout(policies, lanes)
    index = np.asarray(policy_of)
    if index.ndim != 1 or not (index.size == 0 or np.issubdtype(index.dtype, np.integer)):
        raise ValueError("policy_of must be a 1-D integer array, one policy index per item")
    if index.size and (index.min() < 0 or index.max() >= len(policies)):
        bad = int(np.argmax((index < 0) | (index >= len(policies))))
        raise ValueError(
            f"item {_name(bad, item_ids)} refers to policy {int(index[bad])}, but there are "
            f"{len(policies)}"
        )
    index = index.astype(np.int64)
    if item_ids is not None and len(item_ids) != index.size:
        raise ValueError(f"item_ids must name {index.size} items, got {len(item_ids)}")
    if not 0 <= weekday <= 6:
        raise ValueError(f"weekday must be 0 (Monday) to 6 (Sunday), got {weekday}")
    s = _check_stocks(policies, layout, index, stocks, item_ids)

    m, n_lanes = index.size, len(layout.lanes)
    flows = np.zeros((m, n_lanes), dtype=np.int64)
    value = np.zeros(m)
    without = np.zeros(m)
    cost = np.zeros(m)
    groups: list[_Group] = []
    for p, items in _groups(index):
        policy, columns = policies[p], layout.columns[p]
        phase = phase_of_weekday(weekday, policy.phases)
        sg = s[items]
        if isinstance(policy, PolicyResult):
            tables = _exact_tables(policy)
            f, v, v0, c, action, idx = _exact_moves(policy, tables, sg, phase)
            groups.append(_Group(policy, phase, columns, items, sg, (tables, action, idx)))
        else:
            f, v, v0, c = _priced_moves(policy, sg, phase)
            groups.append(_Group(policy, phase, columns, items, sg, None))
        flows[np.ix_(items, columns)] = f
        value[items], without[items], cost[items] = v, v0, c

    sharing, choices = None, None
    if truck_capacity is not None:
        volume, capacity = _check_sharing(m, n_lanes, truck_capacity, unit_volume)
        # Lanes the uncoupled moves overload; an item that uses none of them keeps its best
        # move at any prices on them, so it needs no other candidate (module docs).
        load = (flows * volume[:, None]).sum(axis=0)
        # (A hair below capacity counts too: solver.sharing sums the same loads its own way.)
        binding: NDArray[np.bool_] = np.isfinite(capacity) & (load > capacity * (1 - 1e-9) - 1e-9)
        contested = np.flatnonzero(np.any(flows[:, binding] > 0, axis=1))
        parts = _candidates(groups, contested, flows, value, without, cost)
        if m:
            choices, real, costs = _choices(parts, n_lanes)
            # solver.sharing stops pricing at a tolerance relative to the bound, which here is
            # mostly the value of the stock itself; measure it against what the moves gain.
            moves_gain = float(np.sum(value - without))
            scale = max(1.0, abs(float(np.sum(value))))
            tolerance = max(1e-12, _PRICING_SHARE * moves_gain / scale)
            sharing = allocate_shared_capacity(choices, volume, capacity, tolerance=tolerance)
            flows, value, cost = sharing.flows, real[sharing.chosen], costs[sharing.chosen]
        else:
            sharing = _no_items(n_lanes)
    return AssortmentMoves(
        flows=flows,
        post_move_stock=s + flows @ layout.incidence,
        value=value,
        value_without_moves=without,
        transfer_cost=cost,
        sharing=sharing,
        candidates=choices,
    )


# -- checks ----------------------------------------------------------------------------------


def _name(item: int, item_ids: Sequence[str] | None) -> str:
    return repr(item_ids[item]) if item_ids is not None else str(item)


def _layout(policies: Sequence[ItemPolicy], lanes: Sequence[tuple[str, str]] | None) -> _Layout:
    first = policies[0]
    ids = first.location_ids
    for k, policy in enumerate(policies):
        if policy.location_ids != ids:
            raise ValueError(
                f"policy {k} is over other locations than policy 0: the items of an assortment "
                "share one layout"
            )
        if lanes is None and policy.lanes != first.lanes:
            raise ValueError(
                f"policy {k} is over other lanes than policy 0: give the layout's `lanes` when "
                "items are kept off some of them"
            )
    pairs = first.lanes if lanes is None else _lane_pairs(ids, lanes)
    position = {pair: lane for lane, pair in enumerate(pairs)}
    columns = []
    for k, policy in enumerate(policies):
        strange = [pair for pair in policy.lanes if pair not in position]
        if strange:
            a, b = strange[0]
            raise ValueError(
                f"policy {k} has a lane {ids[a]!r} -> {ids[b]!r}, which is not a lane of the layout"
            )
        columns.append(np.array([position[pair] for pair in policy.lanes], dtype=np.int64))
    ends = np.array(pairs, dtype=np.int64).reshape(-1, 2)
    incidence = lane_incidence(ends[:, 0], ends[:, 1], len(ids))
    return _Layout(ids, tuple(pairs), incidence, tuple(columns))


def _lane_pairs(
    location_ids: tuple[str, ...], lanes: Sequence[tuple[str, str]]
) -> tuple[tuple[int, int], ...]:
    """The layout's lanes as (from, to) location indices."""
    index = {location: i for i, location in enumerate(location_ids)}
    pairs: dict[tuple[int, int], None] = {}
    for a, b in lanes:
        for end in (a, b):
            if end not in index:
                raise ValueError(f"lane {a!r} -> {b!r}: unknown location {end!r}")
        if a == b:
            raise ValueError(f"lane from {a!r} to itself")
        if (index[a], index[b]) in pairs:
            raise ValueError(f"duplicate lane {a!r} -> {b!r}")
        pairs[index[a], index[b]] = None
    if not pairs:
        raise ValueError("the layout needs at least one lane")
    return tuple(pairs)


def _check_stocks(
    policies: Sequence[ItemPolicy],
    layout: _Layout,
    index: NDArray[np.int64],
    stocks: ArrayLike,
    item_ids: Sequence[str] | None,
) -> NDArray[np.int64]:
    s = np.asarray(stocks)
    n = layout.n_locations
    if s.shape != (index.size, n):
        raise InvalidStockError(
            f"expected closing stocks of shape ({index.size}, {n}) (items, locations), got "
            f"{s.shape}"
        )
    if s.size and not np.issubdtype(s.dtype, np.integer):
        raise InvalidStockError(f"closing stocks must be whole units, got {s.dtype} numbers")
    s = s.astype(np.int64)
    capacities = np.array([policy.capacities for policy in policies], dtype=np.int64)[index]
    bad = (s < 0) | (s > capacities)
    if bad.any():
        item = int(np.argmax(bad.any(axis=1)))
        location = int(np.argmax(bad[item]))
        raise InvalidStockError(
            f"stock of item {_name(item, item_ids)} at {layout.location_ids[location]!r} is "
            f"{int(s[item, location])}, outside 0..{int(capacities[item, location])}"
        )
    return s


def _groups(index: NDArray[np.int64]) -> list[tuple[int, NDArray[np.int64]]]:
    """(policy, its items in increasing order) for every policy used."""
    order = np.argsort(index, kind="stable")
    ordered = index[order]
    starts = np.flatnonzero(np.r_[True, ordered[1:] != ordered[:-1]]) if order.size else ()
    bounds = [int(b) for b in starts] + [order.size]
    return [(int(ordered[a]), order[a:b]) for a, b in itertools.pairwise(bounds)]


# -- exact policies --------------------------------------------------------------------------


@dataclass(frozen=True)
class _Tables:
    """Derived from an exact policy's flow table (A flows): shift (A,), the change of the flat
    stock index under each flow; cost (A,), currency. The candidates of shared capacity also
    use `smaller`, built on first use and kept, and `endpoints`."""

    flows: NDArray[np.int64]
    lane_from: NDArray[np.int64]
    lane_to: NDArray[np.int64]
    n_locations: int
    shift: NDArray[np.int64]
    cost: NDArray[np.float64]

    def endpoints(self) -> tuple[NDArray[np.int64], NDArray[np.int64]]:
        """Units sent out of and received by each location under each flow, (A, N) each
        (cheap: not kept)."""
        return flow_endpoints(self.flows, self.lane_from, self.lane_to, self.n_locations)

    @cached_property
    def smaller(self) -> tuple[NDArray[np.int32], tuple[NDArray[np.int32], ...]]:
        """(A, L): the row moving one unit less on each lane (A where that flow is not in the
        table); and the rows of each number of units moved, fewest first (the table is sorted
        by units), skipping moving nothing."""
        n_flows, n_lanes = self.flows.shape
        row_of: dict[bytes, int] = {row.tobytes(): k for k, row in enumerate(self.flows)}
        less = np.full((n_flows, n_lanes), n_flows, dtype=np.int32)
        for k, row in enumerate(self.flows):
            for lane in np.flatnonzero(row):
                fewer = row.copy()
                fewer[lane] -= 1
                found = row_of.get(fewer.tobytes())
                less[k, lane] = n_flows if found is None else found
        units = self.flows.sum(axis=1)
        levels = tuple(
            np.flatnonzero(units == n).astype(np.int32) for n in np.unique(units) if n > 0
        )
        return less, levels

    @property
    def nbytes(self) -> int:
        """Bytes of the arrays derived so far (the flow table itself belongs to the policy)."""
        total = self.shift.nbytes + self.cost.nbytes
        derived = self.__dict__
        if "smaller" in derived:
            less, levels = self.smaller
            total += less.nbytes + sum(rows.nbytes for rows in levels)
        return total


# Derived once per cached policy object (policies are immutable; entries go with them).
_TABLES: weakref.WeakKeyDictionary[PolicyResult, _Tables] = weakref.WeakKeyDictionary()


def derived_bytes(policy: ItemPolicy) -> int:
    """Bytes this module keeps beside a policy once it has served moves (0 for a priced policy
    or one not used yet)."""
    tables = _TABLES.get(policy) if isinstance(policy, PolicyResult) else None
    return 0 if tables is None else tables.nbytes


def _exact_tables(policy: PolicyResult) -> _Tables:
    tables = _TABLES.get(policy)
    if tables is None:
        flows = policy.flows
        lane_from, lane_to = policy.lane_ends
        n_locations = len(policy.location_ids)
        out, inn = flow_endpoints(flows, lane_from, lane_to, n_locations)
        strides = np.cumprod((1, *policy.shape[:0:-1]))[::-1].astype(np.int64)
        tables = _Tables(
            flows=flows,
            lane_from=lane_from,
            lane_to=lane_to,
            n_locations=n_locations,
            shift=(inn - out) @ strides,
            cost=flow_costs(flows, policy.lane_costs, policy.dispatch_costs),
        )
        _TABLES[policy] = tables
    return tables


def _exact_moves(
    policy: PolicyResult, tables: _Tables, stocks: NDArray[np.int64], phase: int
) -> tuple[
    NDArray[np.int64],
    NDArray[np.float64],
    NDArray[np.float64],
    NDArray[np.float64],
    NDArray[np.int64],
    NDArray[np.int64],
]:
    """flows (G, L), value, value without moves, cost (G,), action and state index (G,)."""
    idx = np.ravel_multi_index(tuple(stocks.T), policy.shape).astype(np.int64)
    action = policy.action[phase, idx]
    u = policy.post_move_values[phase]
    cost = tables.cost[action]
    # The same operations in the same order as PolicyResult.recommend: equal bit for bit.
    value = u[idx + tables.shift[action]] - cost
    without = u[idx] - tables.cost[0]
    value -= policy.gain or 0.0
    without -= policy.gain or 0.0
    return policy.flows[action], value, without, cost, action, idx


def _exact_candidates(
    policy: PolicyResult,
    tables: _Tables,
    items: NDArray[np.int64],
    stocks: NDArray[np.int64],
    phase: int,
    action: NDArray[np.int64],
    idx: NDArray[np.int64],
    without: NDArray[np.float64],
) -> _Candidates:
    """The policy's action (rank 0), moving nothing (rank 1) and every other allowed flow
    feasible at the item's stock and worth more than every smaller flow (rank 2, table order;
    see _best_smaller); for an item that the policy leaves in place, moving nothing only."""
    n_flows = policy.n_flows
    capacities = np.array(policy.capacities, dtype=np.int64)
    out, inn = tables.endpoints()
    lo, hi = feasible_bounds(out, inn, capacities, policy.floors[phase])
    # Per location i, whether each stock 0..C_i lies in each flow's box: (C_i + 1, A).
    inside = [
        (np.arange(c + 1)[:, None] >= lo[:, i]) & (np.arange(c + 1)[:, None] <= hi[:, i])
        for i, c in enumerate(policy.capacities)
    ]
    inside[0] &= policy.allowed[phase]
    u = policy.post_move_values[phase]
    gain = policy.gain or 0.0
    chosen_value = u[idx + tables.shift[action]] - tables.cost[action] - gain

    # An item whose policy moves nothing tonight needs no other candidate: every other flow's
    # value is capped at moving nothing's, and moving nothing uses no truck.
    moving = np.flatnonzero(action != 0)
    pick_item: list[NDArray[np.int64]] = [np.zeros(0, np.int64)]
    pick_row: list[NDArray[np.int64]] = [np.zeros(0, np.int64)]
    pick_value: list[NDArray[np.float64]] = [np.zeros(0)]
    chunk = max(1, _CHUNK_ELEMENTS // max(1, n_flows))
    for start in range(0, moving.size, chunk):
        part = moving[start : start + chunk]
        fits = inside[0][stocks[part, 0]]
        for i in range(1, len(inside)):
            fits &= inside[i][stocks[part, i]]
        post = np.where(fits, idx[part][:, None] + tables.shift, 0)
        q = u[post] - tables.cost
        q -= gain
        q = np.where(fits, q, -np.inf)
        keep = (q > _best_smaller(q, tables)) & (np.arange(n_flows) != action[part][:, None])
        g, k = np.nonzero(keep)
        pick_item.append(part[g])
        pick_row.append(k)
        pick_value.append(q[g, k])

    g = np.concatenate(pick_item)
    row = np.concatenate(pick_row)
    q = np.concatenate(pick_value)
    table_rows = np.concatenate([action, np.zeros(moving.size, dtype=np.int64), row])
    return _ranked(
        items,
        moving,
        g,
        policy.flows[table_rows],
        np.concatenate([chosen_value, without[moving], q]),
        tables.cost[table_rows],
    )


def _best_smaller(q: NDArray[np.float64], tables: _Tables) -> NDArray[np.float64]:
    """Per item and flow f, the best value of a flow g <= f lane by lane, g != f, reached from
    f by taking one unit off a lane at a time within the table; shape (G, A), -inf where none
    (row 0, moving nothing). Such a g uses no more of any truck than f, so f is never needed
    when it is worth no more than g: not in the best allocation, nor at any prices in the
    bound. Computed level by level (units moved), one gather per lane and level."""
    best = np.full((q.shape[0], q.shape[1] + 1), -np.inf)
    reach = np.full_like(best, -np.inf)  # max(q, best): the best flow <= f, f included
    reach[:, 0] = q[:, 0]
    less, levels = tables.smaller
    for rows in levels:
        smaller = less[rows]
        top = reach[:, smaller[:, 0]]
        for lane in range(1, smaller.shape[1]):
            np.maximum(top, reach[:, smaller[:, lane]], out=top)
        best[:, rows] = top
        reach[:, rows] = np.maximum(top, q[:, rows])
    result: NDArray[np.float64] = best[:, :-1]
    return result


# -- priced policies -------------------------------------------------------------------------


def _priced_moves(
    policy: PricedPolicy, stocks: NDArray[np.int64], phase: int
) -> tuple[NDArray[np.int64], NDArray[np.float64], NDArray[np.float64], NDArray[np.float64]]:
    """flows (G, L), value, value without moves, cost (G,)."""
    flows = policy.plan_batch(stocks, phase=phase)
    value = policy.move_values(stocks, flows, phase=phase)
    without = policy.move_values(stocks, np.zeros_like(flows), phase=phase)
    cost = flow_costs(flows, policy.lane_costs, policy.dispatch_costs)
    return flows, value, without, cost


def _priced_candidates(
    policy: PricedPolicy,
    items: NDArray[np.int64],
    stocks: NDArray[np.int64],
    phase: int,
    plan: NDArray[np.int64],
    plan_value: NDArray[np.float64],
    without: NDArray[np.float64],
    plan_cost: NDArray[np.float64],
) -> _Candidates:
    """The plan (rank 0), moving nothing (rank 1), and the plan re-made with each used lane
    closed or allowed one unit less (rank 2), when worth more than moving nothing."""
    used_item, used_lane = np.nonzero(plan)
    units = plan[used_item, used_lane]
    fewer = units >= 2
    g = np.concatenate([used_item, used_item[fewer]])
    lane = np.concatenate([used_lane, used_lane[fewer]])
    cut = np.concatenate([np.zeros(units.size, np.int64), units[fewer] - 1])
    limits = np.repeat(policy.lane_limits[phase][None, :], g.size, axis=0)
    limits[np.arange(g.size), lane] = cut
    if g.size:
        variants = policy.plan_batch(stocks[g], phase=phase, lane_limits=limits)
        q = policy.move_values(stocks[g], variants, phase=phase)
    else:
        variants, q = np.zeros((0, plan.shape[1]), np.int64), np.zeros(0)
    keep = (q > without[g]) & np.any(variants != plan[g], axis=1)
    g, variants, q = g[keep], variants[keep], q[keep]
    moving = np.flatnonzero(plan.any(axis=1))
    return _ranked(
        items,
        moving,
        g,
        np.concatenate([plan, np.zeros((moving.size, plan.shape[1]), np.int64), variants]),
        np.concatenate([plan_value, without[moving], q]),
        np.concatenate(
            [
                plan_cost,
                np.zeros(moving.size),
                flow_costs(variants, policy.lane_costs, policy.dispatch_costs),
            ]
        ),
    )


def _ranked(
    items: NDArray[np.int64],
    moving: NDArray[np.int64],
    others: NDArray[np.int64],
    flows: NDArray[np.int64],
    value: NDArray[np.float64],
    cost: NDArray[np.float64],
) -> _Candidates:
    """Candidates of `items` in three ranks: each item's own move (rank 0), moving nothing for
    the items at positions `moving` (rank 1), then more moves of the items at positions
    `others` (rank 2); flows, value and cost list them in that order. Each capped value is at
    most the item's own move's value."""
    local = np.concatenate([np.arange(items.size), moving, others])
    return _Candidates(
        item=items[local],
        rank=np.concatenate(
            [
                np.zeros(items.size, np.int64),
                np.ones(moving.size, np.int64),
                np.full(others.size, 2),
            ]
        ),
        flows=flows,
        value=value,
        capped=np.minimum(value, value[: items.size][local]),
        cost=cost,
    )


# -- sharing ---------------------------------------------------------------------------------


def _check_sharing(
    m: int, n_lanes: int, truck_capacity: ArrayLike, unit_volume: ArrayLike | None
) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    capacity = np.asarray(truck_capacity, dtype=np.float64)
    if capacity.shape != (n_lanes,) or np.any(np.isnan(capacity)) or np.any(capacity < 0):
        raise ValueError(
            f"truck_capacity must hold {n_lanes} numbers >= 0, one per lane (inf: not shared)"
        )
    if unit_volume is None:
        # Loads in units are whole numbers: a fractional capacity holds its whole part, and
        # saying so tightens the bound.
        capacity = np.where(np.isfinite(capacity), np.floor(capacity + 1e-9), capacity)
    volume = np.ones(m) if unit_volume is None else np.asarray(unit_volume, dtype=np.float64)
    if volume.shape != (m,) or not np.all(np.isfinite(volume) & (volume > 0)):
        raise ValueError(f"unit_volume must hold {m} positive numbers, one per item")
    return volume, capacity


def _candidates(
    groups: list[_Group],
    contested: NDArray[np.int64],
    flows: NDArray[np.int64],
    value: NDArray[np.float64],
    without: NDArray[np.float64],
    cost: NDArray[np.float64],
) -> list[_Candidates]:
    """Every item's candidates, flows over the layout's lanes: all of them for the `contested`
    items, the item's own move and moving nothing for the others."""
    is_contested = np.zeros(flows.shape[0], dtype=bool)
    is_contested[contested] = True
    parts = [_settled(flows, value, without, cost, np.flatnonzero(~is_contested))]
    for group in groups:
        sub = np.flatnonzero(is_contested[group.items])
        if not sub.size:
            continue
        items, stocks = group.items[sub], group.stocks[sub]
        if group.exact is not None:
            assert isinstance(group.policy, PolicyResult)
            tables, action, idx = group.exact
            part = _exact_candidates(
                group.policy,
                tables,
                items,
                stocks,
                group.phase,
                action[sub],
                idx[sub],
                without[items],
            )
        else:
            assert isinstance(group.policy, PricedPolicy)
            part = _priced_candidates(
                group.policy,
                items,
                stocks,
                group.phase,
                flows[np.ix_(items, group.columns)],
                value[items],
                without[items],
                cost[items],
            )
        own = part.flows
        part.flows = np.zeros((own.shape[0], flows.shape[1]), dtype=np.int64)
        part.flows[:, group.columns] = own
        parts.append(part)
    return parts


def _settled(
    flows: NDArray[np.int64],
    value: NDArray[np.float64],
    without: NDArray[np.float64],
    cost: NDArray[np.float64],
    items: NDArray[np.int64],
) -> _Candidates:
    """Items that keep their own move: it (rank 0) and moving nothing (rank 1) when it moves."""
    moving = items[flows[items].any(axis=1)]
    both = np.concatenate([items, moving])
    return _Candidates(
        item=both,
        rank=np.concatenate([np.zeros(items.size, np.int64), np.ones(moving.size, np.int64)]),
        flows=np.concatenate([flows[items], np.zeros((moving.size, flows.shape[1]), np.int64)]),
        value=np.concatenate([value[items], without[moving]]),
        capped=np.concatenate([value[items], without[moving]]),
        cost=np.concatenate([cost[items], np.zeros(moving.size)]),
    )


def _no_items(n_lanes: int) -> SharedAllocation:
    return SharedAllocation(
        chosen=np.zeros(0, np.int64),
        flows=np.zeros((0, n_lanes), np.int64),
        value=0.0,
        unconstrained_value=0.0,
        bound=0.0,
        prices=np.zeros(n_lanes),
        load=np.zeros(n_lanes),
        iterations=0,
        converged=True,
    )


def _choices(
    parts: list[_Candidates], n_lanes: int
) -> tuple[ItemChoices, NDArray[np.float64], NDArray[np.float64]]:
    """Every group's candidates grouped by item (the order within an item kept), as the
    allocation takes them; with the uncapped values and the costs in the same order."""
    item = np.concatenate([part.item for part in parts])
    rank = np.concatenate([part.rank for part in parts])
    order = np.lexsort((rank, item))  # stable: table order kept within a rank
    flows = np.concatenate([part.flows for part in parts]).reshape(-1, n_lanes)[order]
    real = np.concatenate([part.value for part in parts])[order]
    capped = np.concatenate([part.capped for part in parts])[order]
    cost = np.concatenate([part.cost for part in parts])[order]
    return ItemChoices(item[order], flows, capped), real, cost
