"""Results of a solve: the optimal transfer policy, its values, and recommendations from it."""

from __future__ import annotations

from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from functools import cached_property
from typing import Literal, get_args

import numpy as np
from numpy.typing import NDArray

from solver.errors import InvalidStockError
from solver.model import flow_costs, flow_endpoints

__all__ = [
    "CRITERIA",
    "Alternative",
    "Criterion",
    "PolicyResult",
    "Progress",
    "ProgressCallback",
    "Recommendation",
    "SolvedNetwork",
]

Criterion = Literal["discounted", "average"]
# Every criterion, in the order a request that names none tries them (the first the network's
# current version is solved or being solved for: the same rule for recommendations, closing
# instructions, exports and pictures).
CRITERIA: tuple[Criterion, ...] = get_args(Criterion)


@dataclass(frozen=True)
class Progress:
    """Where a running solve stands after one of its iterations, for a caller to report.

    iteration: policies evaluated (Howard) or sweeps done (modified policy iteration), from 1.
    residual: ||T v - v||_inf of the current values in currency units, i.e. the most any
        state could still gain by changing its move (Howard: before its improvement step).
    seconds: wall-clock seconds since the algorithm started.
    """

    iteration: int
    residual: float
    seconds: float


ProgressCallback = Callable[[Progress], None]


def check_stock(
    location_ids: Sequence[str], capacities: Sequence[int], stock: Sequence[int]
) -> NDArray[np.int64]:
    """`stock` (units per location, in network order) as an array; InvalidStockError when it
    has the wrong length or a count outside 0..capacity."""
    if len(stock) != len(capacities):
        raise InvalidStockError(f"expected stock for {len(capacities)} locations, got {len(stock)}")
    for location, units, capacity in zip(location_ids, stock, capacities, strict=True):
        if not 0 <= units <= capacity:
            raise InvalidStockError(f"stock at {location!r} is {units}, outside 0..{capacity}")
    return np.array([int(u) for u in stock], dtype=np.int64)


def stock_problems(
    location_ids: Sequence[str], capacities: Sequence[int], stock: Mapping[str, int]
) -> list[tuple[str, str]]:
    """What is wrong with closing stock given by location id, as (location, what) pairs:
    locations missing (in network order), unknown ones (in the order given), then counts
    outside 0..capacity (in network order). Empty when the stock fits the network."""
    problems = [(location, "missing") for location in location_ids if location not in stock]
    problems += [
        (location, "unknown location") for location in stock if location not in location_ids
    ]
    for location, capacity in zip(location_ids, capacities, strict=True):
        units = stock.get(location)
        if units is not None and not 0 <= units <= capacity:
            problems.append((location, f"{units} units is outside 0..{capacity}"))
    return problems


def phase_of_weekday(weekday: int, phases: int) -> int:
    """The phase of a closing count whose business date has this weekday (0 = Monday .. 6 =
    Sunday, as datetime.date.weekday()): the weekday itself for a weekly policy (7 phases), 0
    for a stationary one."""
    if not 0 <= weekday <= 6:
        raise ValueError(f"weekday must be 0 (Monday) to 6 (Sunday), got {weekday}")
    return weekday % phases


@dataclass(frozen=True)
class Alternative:
    """Another feasible set of moves tonight and its value (same units as the recommendation)."""

    flows: tuple[int, ...]
    value: float


@dataclass(frozen=True)
class Recommendation:
    """What to move tonight from one closing stock.

    flows: units per lane, in the network's lane order.
    post_move_stock: stock per location after the moves.
    expected_value: value of following the policy from this stock (discounted profit; for the
        average criterion the bias, relative to the all-empty stock).
    value_without_transfers: the same, but moving nothing tonight and following the policy
        from tomorrow on.
    gain_from_transfers: expected_value - value_without_transfers (>= 0).
    alternatives: the next-best feasible choices, best first.
    """

    stock: tuple[int, ...]
    flows: tuple[int, ...]
    post_move_stock: tuple[int, ...]
    transfer_cost: float
    expected_value: float
    value_without_transfers: float
    gain_from_transfers: float
    alternatives: tuple[Alternative, ...]


def lane_pairs(
    lane_from: NDArray[np.int64], lane_to: NDArray[np.int64]
) -> tuple[tuple[int, int], ...]:
    """The lanes as (from, to) location indices, the form a result keeps them in."""
    return tuple((int(a), int(b)) for a, b in zip(lane_from, lane_to, strict=True))


@dataclass(frozen=True, eq=False)
class SolvedNetwork:
    """What every solved policy keeps of its network, first among its fields: the criterion
    and method it was solved with, the location ids, capacities C_i, lanes as (from, to)
    location indices and lane_costs, shape (L,), currency per unit."""

    criterion: Criterion
    method: str
    location_ids: tuple[str, ...]
    capacities: tuple[int, ...]
    lanes: tuple[tuple[int, int], ...]
    lane_costs: NDArray[np.float64]

    @property
    def shape(self) -> tuple[int, ...]:
        """Stock levels per location, C_i + 1 each."""
        return tuple(c + 1 for c in self.capacities)

    @property
    def lane_ends(self) -> tuple[NDArray[np.int64], NDArray[np.int64]]:
        """Each lane's sender and receiver (location indices), shape (L,) each."""
        lanes = np.array(self.lanes, dtype=np.int64).reshape(-1, 2)
        return lanes[:, 0], lanes[:, 1]


@dataclass(frozen=True, eq=False)
class PolicyResult(SolvedNetwork):
    """An optimal transfer policy and how it was found.

    The policy has `phases` phases: 1 for a stationary network, 7 for a weekly one, phase d
    being the weekday of the business date of the closing count (0 = Monday; see
    solver.model). Arrays over states have shape (P, S): one row per phase, stock states flat in
    row-major order of closing stock (location 0 slowest).
    flows: shape (A, L), the candidate flow table; action: shape (P, S), index into it.
    lane_costs, dispatch_costs: shape (L,), currency per unit and per night a lane is used.
    allowed: shape (P, A), whether each flow may be sent on the night of each phase (lane and
        handling limits).
    floors: shape (P, N), units a location that sends anything keeps after the night's moves.
    values: shape (P, S), discounted value, or for the average criterion the bias with
        values[0, 0] = 0 (currency units).
    post_move_values: shape (P, S), U_d(y) at post-move stock y in phase d (see solver.bellman).
    gain: long-run profit per day under the average criterion (averaged over the week for a
        weekly network), else None.
    residual: Bellman residual ||T v - v||_inf (discounted) or its span (average).
    error_bound: bound on the distance of `values` (discounted) or `gain` (average) from the
        optimum implied by the residual (Puterman 1994, sections 6.3 and 8.5).
    seconds: wall-clock seconds per phase ("build", "evaluate", "improve", "total").
    """

    dispatch_costs: NDArray[np.float64]
    flows: NDArray[np.int64]
    phases: int
    allowed: NDArray[np.bool_]
    floors: NDArray[np.int64]
    action: NDArray[np.int64]
    values: NDArray[np.float64]
    post_move_values: NDArray[np.float64]
    discount: float | None
    gain: float | None
    iterations: int
    evaluation_sweeps: int
    residual: float
    error_bound: float
    converged: bool
    seconds: Mapping[str, float]

    @property
    def n_states(self) -> int:
        """Stock states S of one phase."""
        return int(self.action.shape[1])

    @property
    def n_flows(self) -> int:
        return int(self.flows.shape[0])

    def phase_of(self, weekday: int) -> int:
        """The phase whose policy applies to a closing count of a business date with this
        weekday (0 = Monday .. 6 = Sunday, as datetime.date.weekday()): the weekday itself for a
        weekly policy, 0 for a stationary one."""
        return phase_of_weekday(weekday, self.phases)

    def policy_flows(self) -> NDArray[np.int64]:
        """Units per lane in every phase and state, shape (P, S, L)."""
        return self.flows[self.action]

    def state_index(self, stock: Sequence[int]) -> int:
        """Flat index of a closing stock; InvalidStockError when it does not fit the network."""
        checked = check_stock(self.location_ids, self.capacities, stock)
        return int(np.ravel_multi_index(tuple(int(u) for u in checked), self.shape))

    def recommend(
        self, stock: Sequence[int], *, phase: int = 0, n_alternatives: int = 3
    ) -> Recommendation:
        """Tonight's moves from closing `stock` (units per location, in network order) counted
        in `phase` (see phase_of); alternatives are the flows allowed on that night."""
        if not 0 <= phase < self.phases:
            raise ValueError(f"phase must lie in 0..{self.phases - 1}, got {phase}")
        s = np.array(stock, dtype=np.int64)
        index = self.state_index(stock)
        out, inn = self._endpoints
        capacities = np.array(self.capacities, dtype=np.int64)
        after = s - out + inn
        fits = np.all(
            (out <= s) & (after <= capacities) & ((out == 0) | (after >= self.floors[phase])),
            axis=1,
        )
        feasible = np.flatnonzero(fits & self.allowed[phase])
        posts = after[feasible]
        post_index = np.ravel_multi_index(tuple(posts.T), self.shape)
        q = self.post_move_values[phase, post_index] - self.flow_costs[feasible]

        # Under the average criterion Q(s, f) = h(s) + g at the best f: report on the bias scale.
        q -= self.gain or 0.0

        chosen = int(self.action[phase, index])
        # `feasible` is sorted and always holds row 0 (moving nothing) and the chosen row.
        position = {k: int(np.searchsorted(feasible, k)) for k in (0, chosen)}
        others = [p for p in np.argsort(-q, kind="stable") if feasible[p] != chosen]
        alternatives = tuple(
            Alternative(tuple(int(x) for x in self.flows[feasible[p]]), float(q[p]))
            for p in others[:n_alternatives]
        )
        # Row 0 of the flow table moves nothing and is feasible everywhere.
        expected = float(q[position[chosen]])
        without = float(q[position[0]])
        return Recommendation(
            stock=tuple(int(u) for u in s),
            flows=tuple(int(x) for x in self.flows[chosen]),
            post_move_stock=tuple(int(u) for u in posts[position[chosen]]),
            transfer_cost=float(self.flow_costs[chosen]),
            expected_value=expected,
            value_without_transfers=without,
            gain_from_transfers=expected - without,
            alternatives=alternatives,
        )

    @cached_property
    def flow_costs(self) -> NDArray[np.float64]:
        """Cost of every flow of the table, shape (A,): unit costs plus the dispatch cost of
        every lane it uses (currency)."""
        return flow_costs(self.flows, self.lane_costs, self.dispatch_costs)

    @cached_property
    def _endpoints(self) -> tuple[NDArray[np.int64], NDArray[np.int64]]:
        # Computed once per result: recommendations are served from it many times.
        return flow_endpoints(self.flows, *self.lane_ends, len(self.capacities))
