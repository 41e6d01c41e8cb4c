"""An independent brute-force reference for transfer networks, built straight from a NetworkSpec.

Nothing here uses solver.build, solver.distributions or solver.model: the laws come from
scipy.stats, every integer flow vector within the lane limits is enumerated (no pruning), and
feasibility and transitions are worked out from the model rules stated in the docstrings of
solver/build.py and solver/model.py:

    y_i  = s_i - out_i(f) + in_i(f)            post-move stock, feasible iff 0 <= out_i <= s_i and
                                               y_i <= C_i for every i, and total units <= the
                                               network's units-per-night limit
    s'_i = min(y_i - min(D_i, y_i) + R_i, C_i) independent across locations
    r    = sum_i [m_i E min(D_i, y_i) - h_i y_i - p_i E (D_i - y_i)^+] - sum_l c_l f_l

The result is a state-action pair MDP in the form quantecon's DiscreteDP takes
(R, Q, beta, s_indices, a_indices), with actions numbered by their row in the full flow table.
"""

from __future__ import annotations

import itertools
import math
from dataclasses import dataclass
from typing import Any

import numpy as np
import quantecon as qe
from numpy.typing import NDArray
from scipy import stats

from solver.spec import (
    Distribution,
    LocationSpec,
    NegativeBinomialDemand,
    NetworkSpec,
    PmfDemand,
    PoissonDemand,
)

__all__ = [
    "ReferenceMDP",
    "all_flows",
    "build_reference",
    "count_atoms",
    "location_rewards_by_summation",
    "location_transition_by_enumeration",
    "make_network",
    "scipy_law",
    "stationary_gain",
]

# Probability mass beyond the summed support; far below every tolerance the tests use.
_TAIL_MASS = 1e-16


def scipy_law(dist: Distribution) -> Any:
    """The frozen scipy.stats distribution of a Poisson or negative binomial count."""
    if isinstance(dist, PoissonDemand):
        return stats.poisson(dist.mean)
    if isinstance(dist, NegativeBinomialDemand):
        # Mean mu, variance v: scipy nbinom(n = mu^2 / (v - mu), p = mu / v).
        mu, var = dist.mean, dist.variance
        return stats.nbinom(mu * mu / (var - mu), mu / var)
    raise TypeError(f"no scipy law for {dist!r}")


def count_atoms(dist: Distribution, capacity: int) -> tuple[NDArray[np.int64], NDArray[np.float64]]:
    """Values and probabilities of a count, summed on a support 0..K with K >= capacity.

    For scipy laws K is large enough that P(X > K) < 1e-16; that tail mass is kept as one extra
    atom at K + 1 > capacity, which is where a demand sells everything and a replenishment
    fills the stockroom, so no probability is lost.
    """
    if isinstance(dist, PmfDemand):
        p = np.asarray(dist.p, dtype=np.float64)
        return np.arange(p.size, dtype=np.int64), p
    law = scipy_law(dist)
    top = capacity + 1
    while law.sf(top) >= _TAIL_MASS:
        top *= 2
    values = np.arange(top + 2, dtype=np.int64)
    probs = np.append(law.pmf(values[:-1]), law.sf(top))
    return values, probs


def location_transition_by_enumeration(location: LocationSpec) -> NDArray[np.float64]:
    """T[y, k] = P(next closing stock k | post-move stock y), by summing over every (D, R) pair."""
    c = location.capacity
    d, pd = count_atoms(location.demand, c)
    r, pr = count_atoms(location.replenishment, c)
    joint = pd[:, None] * pr[None, :]
    out = np.zeros((c + 1, c + 1))
    for y in range(c + 1):
        nxt = np.minimum(y - np.minimum(d, y)[:, None] + r[None, :], c)
        for k in range(c + 1):
            # Heavy tails give up to millions of tiny terms; math.fsum keeps their sum correctly
            # rounded, so the reference's own summation error stays below the tolerances.
            out[y, k] = math.fsum(joint[nxt == k])
    return out


def location_rewards_by_summation(location: LocationSpec) -> NDArray[np.float64]:
    """r(y) = m E min(D, y) - h y - p E (D - y)^+ for y = 0..C, each expectation a direct sum."""
    d, pd = count_atoms(location.demand, location.capacity)
    y = np.arange(location.capacity + 1)
    sold = np.minimum(d[None, :], y[:, None]) @ pd
    short = np.maximum(d[None, :] - y[:, None], 0) @ pd
    rewards: NDArray[np.float64] = (
        location.unit_margin * sold - location.holding_cost * y - location.stockout_penalty * short
    )
    return rewards


@dataclass(frozen=True)
class ReferenceMDP:
    """A transfer network as an explicit state-action pair MDP.

    states: shape (S, N), closing stocks in row-major order (location 0 slowest).
    flows: shape (A, L), every integer flow vector within the lane and units-per-night limits.
    s_indices, a_indices: shape (P,), the feasible (state, flow row) pairs, sorted.
    rewards: shape (P,), expected one-day profit of each pair, currency units.
    transitions: shape (P, S), next-state probabilities of each pair.
    """

    states: NDArray[np.int64]
    flows: NDArray[np.int64]
    s_indices: NDArray[np.int64]
    a_indices: NDArray[np.int64]
    rewards: NDArray[np.float64]
    transitions: NDArray[np.float64]
    discount: float

    @property
    def n_states(self) -> int:
        return int(self.states.shape[0])

    def discrete_dp(self, discount: float | None = None) -> qe.markov.DiscreteDP:
        """quantecon's DiscreteDP in the state-action pair formulation."""
        beta = self.discount if discount is None else discount
        return qe.markov.DiscreteDP(
            self.rewards, self.transitions, beta, self.s_indices, self.a_indices
        )

    def pair_indices(self, flows: NDArray[np.int64]) -> NDArray[np.int64]:
        """Index of the pair (s, flows[s]) for every state s; flows: shape (S, L).

        Raises AssertionError when some flows[s] is not a feasible flow at s.
        """
        lookup = {
            (int(s), tuple(int(x) for x in self.flows[a])): p
            for p, (s, a) in enumerate(zip(self.s_indices, self.a_indices, strict=True))
        }
        pairs = []
        for s, flow in enumerate(flows):
            key = (s, tuple(int(x) for x in flow))
            assert key in lookup, f"flow {key[1]} is not feasible at stock {self.states[s]}"
            pairs.append(lookup[key])
        return np.array(pairs, dtype=np.int64)

    def policy_chain(
        self, flows: NDArray[np.int64]
    ) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
        """(r_sigma, P_sigma) of the policy moving flows[s] at state s, shapes (S,), (S, S)."""
        pairs = self.pair_indices(flows)
        return self.rewards[pairs], self.transitions[pairs]

    def pair_values(self, v: NDArray[np.float64], discount: float) -> NDArray[np.float64]:
        """Q(s, f) = r(s, f) + discount * sum_s' P(s' | s, f) v(s') for every pair, shape (P,)."""
        q: NDArray[np.float64] = self.rewards + discount * (self.transitions @ v)
        return q

    def best_by_state(self, pair_values: NDArray[np.float64]) -> NDArray[np.float64]:
        """max over feasible flows of a per-pair quantity, shape (S,)."""
        best = np.full(self.n_states, -np.inf)
        np.maximum.at(best, self.s_indices, pair_values)
        return best


def all_flows(
    spec: NetworkSpec,
) -> tuple[NDArray[np.int64], NDArray[np.int64], NDArray[np.int64], NDArray[np.float64]]:
    """Every integer flow vector within the lane limits and the units-per-night limit.

    Returns (flows (A, L), units sent out of each location (A, N), units received (A, N),
    cost of each flow (A,) in currency units).
    """
    index = {location.id: i for i, location in enumerate(spec.locations)}
    flows = np.array(
        list(itertools.product(*(range(lane.max_units + 1) for lane in spec.lanes))),
        dtype=np.int64,
    ).reshape(-1, len(spec.lanes))
    if spec.max_units_per_night is not None:
        flows = flows[flows.sum(axis=1) <= spec.max_units_per_night]
    incidence_out = np.zeros((len(spec.lanes), len(spec.locations)), dtype=np.int64)
    incidence_in = np.zeros_like(incidence_out)
    for lane_number, lane in enumerate(spec.lanes):
        incidence_out[lane_number, index[lane.from_]] = 1
        incidence_in[lane_number, index[lane.to]] = 1
    costs: NDArray[np.float64] = flows @ np.array([lane.unit_cost for lane in spec.lanes])
    return flows, flows @ incidence_out, flows @ incidence_in, costs


def build_reference(spec: NetworkSpec) -> ReferenceMDP:
    """Enumerate states, all flows, feasibility, rewards and transitions of `spec`."""
    capacities = np.array([location.capacity for location in spec.locations], dtype=np.int64)
    n_locations = capacities.size
    states = np.array(
        list(itertools.product(*(range(int(c) + 1) for c in capacities))), dtype=np.int64
    ).reshape(-1, n_locations)

    flows, sent, received, costs = all_flows(spec)
    post = states[:, None, :] - sent[None, :, :] + received[None, :, :]
    feasible = np.all((sent[None, :, :] <= states[:, None, :]) & (post <= capacities), axis=2)
    s_indices, a_indices = np.nonzero(feasible)  # row-major, so sorted by state then flow
    post_stock = post[s_indices, a_indices]
    post_flat = np.ravel_multi_index(tuple(post_stock.T), tuple(int(c) + 1 for c in capacities))

    per_location = [location_transition_by_enumeration(loc) for loc in spec.locations]
    # Kronecker product of the location laws: row y, column s', both flat in row-major order.
    joint: NDArray[np.floating[Any]] = per_location[0]
    for law in per_location[1:]:
        joint = np.kron(joint, law)
    location_rewards = [location_rewards_by_summation(loc) for loc in spec.locations]
    rewards = sum(
        (location_rewards[i][post_stock[:, i]] for i in range(n_locations)),
        start=np.zeros(s_indices.size),
    )
    return ReferenceMDP(
        states=states,
        flows=flows,
        s_indices=s_indices.astype(np.int64),
        a_indices=a_indices.astype(np.int64),
        rewards=rewards - costs[a_indices],
        transitions=joint[post_flat],
        discount=spec.discount,
    )


def stationary_gain(
    reward: NDArray[np.float64], transition: NDArray[np.float64]
) -> tuple[float, NDArray[np.float64]]:
    """Long-run reward per day of a unichain chain and its stationary distribution, from
    quantecon.MarkovChain (GTH elimination). Raises AssertionError unless there is exactly one
    recurrent class."""
    distributions = qe.MarkovChain(transition).stationary_distributions
    assert distributions.shape[0] == 1, f"{distributions.shape[0]} recurrent classes"
    pi: NDArray[np.float64] = distributions[0]
    return float(pi @ reward), pi


def make_network(
    name: str,
    locations: list[dict[str, Any]],
    lanes: list[tuple[int, int, float, int]],
    *,
    discount: float,
    max_units_per_night: int | None = None,
) -> NetworkSpec:
    """A NetworkSpec from location dicts (as in the JSON input) and lanes given as
    (from index, to index, unit cost, max units)."""
    ids = [loc["id"] for loc in locations]
    return NetworkSpec.model_validate(
        {
            "name": name,
            "discount": discount,
            "max_units_per_night": max_units_per_night,
            "locations": locations,
            "lanes": [
                {"from": ids[a], "to": ids[b], "unit_cost": cost, "max_units": limit}
                for a, b, cost, limit in lanes
            ],
        }
    )
