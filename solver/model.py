"""TransferModel: a transfer network as arrays, validated once.

Symbols (used throughout solver/):
    N         number of locations; C_i the capacity of location i
    s         closing stock, a state; s_i in 0..C_i; states are enumerated in row-major (C)
              order, location 0 varying slowest; S the number of stock states
    f         a flow vector, units moved along each of the L lanes tonight (an action)
    y         post-move stock, y_i = s_i - out_i(f) + in_i(f)
    P         number of phases: 1 for a stationary network, 7 for a weekly (periodic) one
    d         phase of a closing count, 0..P-1: with P = 7 the weekday of its business date
              (0 = Monday); with P = 1 always 0
    K_i^d     location i's kernel in phase d, K_i^d[y_i, s'_i] = P(next closing stock s'_i |
              post-move y_i), under the demand and replenishment of the next business day
    R_d(y)    expected reward of that next day at post-move stock y, before move costs
              (currency units)

Phases. From closing stock s in phase d, tonight's moves obey the lane limits of night d (the
evening of business day d); the next day is weekday (d + 1) mod 7, whose demand and
replenishment give K^d and R_d; the next closing stock is in phase (d + 1) mod P. The arrays of
phase d therefore hold day d + 1's laws: the builder does that shift once, so that the algorithms
only ever pair phase d's arrays with the values of phase d + 1. A stationary network is the case
P = 1, where phase 0 follows itself.

Given y, the locations evolve independently, so the transition law from y is the product of the
K_i^d; the solver never forms it.

    k_i^d     location i's floor on night d (keep_at_least): a location that sends anything
              must keep at least k_i^d units after the night's moves

A flow f is feasible at s in phase d iff, for every i, out_i(f) <= s_i, s_i - out_i(f) + in_i(f)
<= C_i and, when out_i(f) > 0, s_i - out_i(f) + in_i(f) >= k_i^d; i.e. iff s lies in the box

    lo_i <= s_i <= min(C_i, C_i - in_i + out_i),
    lo_i = out_i if out_i = 0, else max(out_i, k_i^d + out_i - in_i),

which may be empty. Network-wide limits (lane limits, units per night, each location's handling
limits on units sent and received) do not depend on s: they are applied when the flow table is
built, a flow being allowed on night d when it is within all of night d's limits (`allowed[d]`).

The cost of a flow is sum_l c_l f_l + sum_l F_l [f_l > 0], c_l the unit cost and F_l the
dispatch cost of lane l (paid once on a night the lane is used).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from functools import cached_property

import numpy as np
from numpy.typing import NDArray

from solver.errors import InvalidModelError

__all__ = [
    "TransferModel",
    "feasible_bounds",
    "feasible_counts",
    "flow_costs",
    "flow_endpoints",
    "lane_incidence",
]

_PROBABILITY_TOLERANCE = 1e-9

Box = tuple[slice, ...]


@dataclass(frozen=True, eq=False)
class TransferModel:
    """Arrays of one transfer network.

    location_ids: N names.
    capacities: shape (N,), C_i.
    lane_from, lane_to: shape (L,), location indices of each lane's ends.
    lane_costs: shape (L,), currency per unit moved.
    dispatch_costs: shape (L,), currency per night a lane moves one unit or more.
    flows: shape (A, L), the candidate flow vectors of every night, row 0 moving nothing, rows
        ordered by preference when values tie (fewer units, then lower cost).
    kernels: P tuples (one per phase) of N arrays of shape (C_i + 1, C_i + 1), rows summing
        to 1: kernels[d][i] = K_i^d.
    reward: shape (P, C_1 + 1, ..., C_N + 1), R_d(y) in currency per day.
    allowed: shape (P, A), whether each flow may be sent on night d; row 0 always may.
    discount: per-day discount factor for the discounted criterion.
    floors: shape (P, N), k_i^d in units (0 where a location has no floor).
    """

    location_ids: tuple[str, ...]
    capacities: NDArray[np.int64]
    lane_from: NDArray[np.int64]
    lane_to: NDArray[np.int64]
    lane_costs: NDArray[np.float64]
    flows: NDArray[np.int64]
    kernels: tuple[tuple[NDArray[np.float64], ...], ...]
    reward: NDArray[np.float64]
    allowed: NDArray[np.bool_]
    discount: float
    dispatch_costs: NDArray[np.float64]
    floors: NDArray[np.int64]
    flow_out: NDArray[np.int64] = field(init=False, repr=False)
    flow_in: NDArray[np.int64] = field(init=False, repr=False)
    flow_costs: NDArray[np.float64] = field(init=False, repr=False)
    flow_units: NDArray[np.int64] = field(init=False, repr=False)
    phase_flows: tuple[NDArray[np.int64], ...] = field(init=False, repr=False)

    def __post_init__(self) -> None:
        self._validate_shapes()
        out, inn = flow_endpoints(self.flows, self.lane_from, self.lane_to, self.n_locations)
        object.__setattr__(self, "flow_out", out)
        object.__setattr__(self, "flow_in", inn)
        object.__setattr__(
            self, "flow_costs", flow_costs(self.flows, self.lane_costs, self.dispatch_costs)
        )
        object.__setattr__(self, "flow_units", self.flows.sum(axis=1))
        # Indices of the flows allowed on each night, in preference order.
        phase_flows = tuple(np.flatnonzero(row).astype(np.int64) for row in self.allowed)
        object.__setattr__(self, "phase_flows", phase_flows)
        self._validate_probabilities()

    # -- sizes -------------------------------------------------------------------------------

    @property
    def n_locations(self) -> int:
        return len(self.location_ids)

    @property
    def n_phases(self) -> int:
        return len(self.kernels)

    @property
    def n_lanes(self) -> int:
        return int(self.lane_from.size)

    @property
    def n_flows(self) -> int:
        return int(self.flows.shape[0])

    # Cached: the evaluation asks for these on every one-day expectation.
    @cached_property
    def shape(self) -> tuple[int, ...]:
        return tuple(int(c) + 1 for c in self.capacities)

    @cached_property
    def n_states(self) -> int:
        """Stock states S of one phase (the model has S x P states in all)."""
        return int(np.prod(self.shape))

    @cached_property
    def strides(self) -> NDArray[np.int64]:
        """Flat-index step of one unit at each location, shape (N,)."""
        shape = np.array(self.shape, dtype=np.int64)
        return np.concatenate([np.cumprod(shape[::-1])[::-1][1:], [1]]).astype(np.int64)

    def box_sizes(self, phase: int = 0) -> NDArray[np.int64]:
        """Number of states at which each flow is feasible in `phase`, shape (A,)."""
        return feasible_counts(self.flow_out, self.flow_in, self.capacities, self.floors[phase])

    @property
    def n_pairs(self) -> int:
        """Number of feasible (phase, state, flow) pairs."""
        return int(sum(self.allowed[d] @ self.box_sizes(d) for d in range(self.n_phases)))

    # -- feasibility -------------------------------------------------------------------------

    def bounds(self, phase: int = 0) -> tuple[NDArray[np.int64], NDArray[np.int64]]:
        """(lo, hi), shapes (A, N): flow k is feasible in `phase` exactly at the closing stocks
        with lo[k] <= s <= hi[k] (empty when some lo exceeds hi)."""
        return feasible_bounds(self.flow_out, self.flow_in, self.capacities, self.floors[phase])

    def boxes(self, phase: int = 0) -> list[tuple[Box, Box]]:
        """For each flow, the slices of the states where it is feasible in `phase` and of their
        post-move stocks (same extent), as index tuples into arrays of shape `self.shape`; both
        empty where the flow is feasible nowhere."""
        lo, hi = self.bounds(phase)
        y_lo = lo - self.flow_out + self.flow_in
        empty = tuple(slice(0, 0) for _ in range(self.n_locations))
        return [
            (
                tuple(slice(int(a), int(b) + 1) for a, b in zip(lo[k], hi[k], strict=True)),
                tuple(
                    slice(int(a), int(a + b - c) + 1)
                    for a, b, c in zip(y_lo[k], hi[k], lo[k], strict=True)
                ),
            )
            if np.all(lo[k] <= hi[k])
            else (empty, empty)
            for k in range(self.n_flows)
        ]

    def flat_shift(self) -> NDArray[np.int64]:
        """Change of the flat state index caused by each flow, shape (A,)."""
        return (self.flow_in - self.flow_out) @ self.strides

    # -- validation --------------------------------------------------------------------------

    def _validate_shapes(self) -> None:
        n, n_lanes = self.n_locations, self.lane_from.size
        if n < 1 or self.capacities.shape != (n,) or np.any(self.capacities < 1):
            raise InvalidModelError("capacities must be one integer >= 1 per location")
        for name, arr in (
            ("lane_to", self.lane_to),
            ("lane_costs", self.lane_costs),
            ("dispatch_costs", self.dispatch_costs),
        ):
            if arr.shape != (n_lanes,):
                raise InvalidModelError(f"{name} has shape {arr.shape}, expected ({n_lanes},)")
        ends = np.concatenate([self.lane_from, self.lane_to])
        if ends.size and (ends.min() < 0 or ends.max() >= n):
            raise InvalidModelError("a lane names a location index outside 0..N-1")
        if self.flows.ndim != 2 or self.flows.shape[1] != n_lanes or self.flows.shape[0] < 1:
            raise InvalidModelError(f"flows must have shape (A >= 1, {n_lanes})")
        if np.any(self.flows < 0) or np.any(self.flows[0] != 0):
            raise InvalidModelError("flows must be nonnegative and row 0 must move nothing")
        phases = len(self.kernels)
        if phases < 1:
            raise InvalidModelError("a model needs at least one phase")
        for d, kernels in enumerate(self.kernels):
            where = "" if phases == 1 else f" in phase {d}"
            if len(kernels) != n:
                raise InvalidModelError(f"expected {n} kernels{where}, got {len(kernels)}")
            for i, kernel in enumerate(kernels):
                c = int(self.capacities[i]) + 1
                if kernel.shape != (c, c):
                    raise InvalidModelError(
                        f"kernel of location {self.location_ids[i]!r}{where} has shape "
                        f"{kernel.shape}, expected ({c}, {c})"
                    )
        if self.reward.shape != (phases, *self.shape):
            raise InvalidModelError(
                f"reward has shape {self.reward.shape}, expected {(phases, *self.shape)}"
            )
        if not np.all(np.isfinite(self.reward)):
            bad = np.unravel_index(int(np.argmin(np.isfinite(self.reward))), self.reward.shape)
            raise InvalidModelError(
                f"reward is not finite in phase {int(bad[0])} at post-move stock "
                f"{tuple(int(u) for u in bad[1:])}"
            )
        if self.allowed.shape != (phases, self.flows.shape[0]) or self.allowed.dtype != np.bool_:
            raise InvalidModelError(
                f"allowed must be booleans of shape {(phases, self.flows.shape[0])}"
            )
        if not np.all(self.allowed[:, 0]):
            raise InvalidModelError("moving nothing must be allowed on every night")
        if self.floors.shape != (phases, n) or np.any(self.floors < 0):
            raise InvalidModelError(f"floors must be integers >= 0 of shape {(phases, n)}")
        if np.any(self.floors > self.capacities):
            d, i = np.argwhere(self.floors > self.capacities)[0]
            raise InvalidModelError(
                f"floor of location {self.location_ids[i]!r} exceeds its capacity"
                + ("" if phases == 1 else f" in phase {d}")
            )
        if not 0.0 < self.discount < 1.0:
            raise InvalidModelError(f"discount must lie in (0, 1), got {self.discount}")

    def _validate_probabilities(self) -> None:
        for d, kernels in enumerate(self.kernels):
            where = "" if self.n_phases == 1 else f" in phase {d}"
            for location, kernel in zip(self.location_ids, kernels, strict=True):
                if np.any(kernel < 0) or not np.all(np.isfinite(kernel)):
                    y = int(np.argmax(np.any((kernel < 0) | ~np.isfinite(kernel), axis=1)))
                    raise InvalidModelError(
                        f"kernel of location {location!r}{where} has an invalid probability "
                        f"at post-move stock {y}"
                    )
                sums = kernel.sum(axis=1)
                bad = np.flatnonzero(np.abs(sums - 1.0) > _PROBABILITY_TOLERANCE)
                if bad.size:
                    raise InvalidModelError(
                        f"kernel of location {location!r}{where}: probabilities from post-move "
                        f"stock {int(bad[0])} sum to {sums[bad[0]]:.12g}, not 1"
                    )
        if np.any(self.box_sizes()[:1] != self.n_states):
            raise InvalidModelError("moving nothing must be feasible in every state")


def flow_endpoints(
    flows: NDArray[np.int64],
    lane_from: NDArray[np.int64],
    lane_to: NDArray[np.int64],
    n_locations: int,
) -> tuple[NDArray[np.int64], NDArray[np.int64]]:
    """Units sent out of and received by each location under each flow, shapes (A, N)."""
    out = np.zeros((flows.shape[0], n_locations), dtype=np.int64)
    inn = np.zeros_like(out)
    for lane in range(lane_from.size):
        out[:, lane_from[lane]] += flows[:, lane]
        inn[:, lane_to[lane]] += flows[:, lane]
    return out, inn


def lane_incidence(
    lane_from: NDArray[np.int64], lane_to: NDArray[np.int64], n_locations: int
) -> NDArray[np.int64]:
    """Shape (L, N): -1 at each lane's sender, +1 at its receiver; flows @ it is the change of
    stock the flows make at each location."""
    incidence = np.zeros((lane_from.size, n_locations), dtype=np.int64)
    lanes = np.arange(lane_from.size)
    incidence[lanes, lane_from] -= 1
    incidence[lanes, lane_to] += 1
    return incidence


def flow_costs(
    flows: NDArray[np.int64], lane_costs: NDArray[np.float64], dispatch_costs: NDArray[np.float64]
) -> NDArray[np.float64]:
    """Cost of each flow, shape (A,): units times unit cost, plus the dispatch cost of every lane
    used (currency)."""
    costs: NDArray[np.float64] = flows @ lane_costs + (flows > 0) @ dispatch_costs
    return costs


def feasible_bounds(
    out: NDArray[np.int64],
    inn: NDArray[np.int64],
    capacities: NDArray[np.int64],
    floors: NDArray[np.int64] | None = None,
) -> tuple[NDArray[np.int64], NDArray[np.int64]]:
    """(lo, hi), shapes (A, N): the box of closing stocks where each flow is feasible (see the
    module docstring); floors: shape (N,), units, default none."""
    lo = out if floors is None else np.where(out > 0, np.maximum(out, floors + out - inn), 0)
    hi = np.minimum(capacities, capacities - inn + out)
    return lo, hi


def feasible_counts(
    out: NDArray[np.int64],
    inn: NDArray[np.int64],
    capacities: NDArray[np.int64],
    floors: NDArray[np.int64] | None = None,
) -> NDArray[np.int64]:
    """Number of states at which each flow is feasible, shape (A,): the box volume
    prod_i max(0, hi_i - lo_i + 1) (see feasible_bounds)."""
    lo, hi = feasible_bounds(out, inn, capacities, floors)
    per_location = np.maximum(0, hi - lo + 1)
    counts: NDArray[np.int64] = np.prod(per_location, axis=1, dtype=np.int64)
    return counts
