"""An independent brute-force reference for transfer networks, built straight from a NetworkSpec.

Nothing here uses solver.build, solver.distributions or solver.model: the laws come from
scipy.stats, every integer flow vector within the lane limits is enumerated (no pruning), and
feasibility and transitions are worked out from the model rules stated in the docstrings of
solver/build.py and solver/model.py:

    y_i  = s_i - out_i(f) + in_i(f)            post-move stock, feasible iff 0 <= out_i <= s_i and
                                               y_i <= C_i for every i, and total units <= the
                                               network's units-per-night limit
                                               rules (solver/spec.py's field descriptions):
                                               out_i > 0 only if y_i >= keep_at_least_i;
                                               out_i <= max_units_out_i, in_i <= max_units_in_i
    s'_i = min(y_i - min(D_i, y_i) + R_i, C_i) independent across locations
    r    = sum_i [m_i E min(D_i, y_i) - h_i y_i - p_i E (D_i - y_i)^+]
           - sum_l (c_l f_l + F_l [f_l > 0])     F_l the lane's dispatch cost

The result is a state-action pair MDP in the form quantecon's DiscreteDP takes
(R, Q, beta, s_indices, a_indices), with actions numbered by their row in the full flow table.

Weekly specifications (any `{"weekly": {...}}` field) become a stationary MDP on the explicit
states (weekday d, closing stock s), numbered d * S + s, following the convention stated in
README.md ("The model"): from closing stock s on weekday d the moves obey night d's lane limits,
the next day is weekday d + 1 (mod 7), whose demand and replenishment apply, and the next
closing stock belongs to weekday d + 1. Days are read straight from the specification's
`weekly` fields (mon .. sun), not through the solver's accessors.
"""

from __future__ import annotations

import itertools
import math
from dataclasses import dataclass
from typing import Any

import numpy as np
import quantecon as qe
from numpy.testing import assert_allclose
from numpy.typing import NDArray
from scipy import stats

from solver.spec import (
    Distribution,
    LocationSpec,
    NegativeBinomialDemand,
    NetworkSpec,
    PmfDemand,
    PoissonDemand,
    WeeklyDistribution,
)

__all__ = [
    "BIAS_ATOL",
    "BLACKWELL_GAIN_ATOL",
    "GAIN_ATOL",
    "NEAR_ONE",
    "Q_ATOL",
    "VALUE_ATOL",
    "VALUE_RTOL",
    "WEEK",
    "Case",
    "ReferenceMDP",
    "all_flows",
    "assert_policy_is_optimal",
    "assert_values_match",
    "build_reference",
    "count_atoms",
    "day_value",
    "location_rewards_by_summation",
    "location_rules",
    "location_transition_by_enumeration",
    "make_network",
    "rounding_slack",
    "scipy_law",
    "solve_reference",
    "stationary_gain",
    "weekdays_of",
]

# Agreement with the reference, in currency units.
# Discounted values: |ours - quantecon| <= 1e-8 + 1e-10 |quantecon|.
VALUE_ATOL = 1e-8
VALUE_RTOL = 1e-10
# A chosen flow is optimal when its Q value is within this of the best Q value in its state.
Q_ATOL = 1e-8
# Long-run profit per day.
GAIN_ATOL = 1e-8
BLACKWELL_GAIN_ATOL = 1e-7
BIAS_ATOL = 1e-7
# Close enough to 1 that a discounted-optimal policy is Blackwell optimal on the test networks.
NEAR_ONE = 0.99999

# Probability mass beyond the summed support; far below every tolerance the tests use.
_TAIL_MASS = 1e-16
# The keys of a weekly field, Monday first.
WEEK = ("mon", "tue", "wed", "thu", "fri", "sat", "sun")


def day_value(value: Any, day: int) -> Any:
    """A specification field's value on weekday `day` (0 = Monday): the day's entry of a weekly
    field, the value itself otherwise."""
    weekly = getattr(value, "weekly", None)
    return value if weekly is None else getattr(weekly, WEEK[day])


def weekdays_of(spec: NetworkSpec) -> int:
    """7 when some field of `spec` is weekly, else 1."""
    fields: list[Any] = [
        f
        for loc in spec.locations
        for f in (
            loc.demand,
            loc.replenishment,
            loc.keep_at_least,
            loc.max_units_out,
            loc.max_units_in,
        )
    ]
    fields += [lane.max_units for lane in spec.lanes]
    return 7 if any(hasattr(f, "weekly") for f in fields) else 1


def scipy_law(dist: Distribution | WeeklyDistribution) -> Any:
    """The frozen scipy.stats distribution of a Poisson or negative binomial count (TypeError for
    a weekly field: take one day's law first)."""
    if isinstance(dist, PoissonDemand):
        return stats.poisson(dist.mean)
    if isinstance(dist, NegativeBinomialDemand):
        # Mean mu, variance v: scipy nbinom(n = mu^2 / (v - mu), p = mu / v).
        mu, var = dist.mean, dist.variance
        return stats.nbinom(mu * mu / (var - mu), mu / var)
    raise TypeError(f"no scipy law for {dist!r}")


def count_atoms(
    dist: Distribution | WeeklyDistribution, capacity: int
) -> tuple[NDArray[np.int64], NDArray[np.float64]]:
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

    states: shape (D * S, N), closing stocks in row-major order (location 0 slowest), repeated
        for each of the D weekdays of a weekly network (D = 1 otherwise).
    flows: shape (A, L), every integer flow vector within the lane and units-per-night limits
        (handling limits and floors are applied per pair, not here).
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
        """Index of the pair (s, flows[s]) for every state s; flows: shape (D * S, L).

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
        """(r_sigma, P_sigma) of the policy moving flows[s] at state s, shapes (D * S,),
        (D * S, D * S)."""
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


def lane_limits(spec: NetworkSpec) -> NDArray[np.int64]:
    """Most units on each lane on each night, shape (D, L)."""
    return np.array(
        [[day_value(lane.max_units, d) for lane in spec.lanes] for d in range(weekdays_of(spec))],
        dtype=np.int64,
    )


def all_flows(
    spec: NetworkSpec,
) -> tuple[NDArray[np.int64], NDArray[np.int64], NDArray[np.int64], NDArray[np.float64]]:
    """Every integer flow vector within the lane limits of some night and the units-per-night
    limit.

    Returns (flows (A, L), units sent out of each location (A, N), units received (A, N),
    cost of each flow (A,) in currency units).
    """
    index = {location.id: i for i, location in enumerate(spec.locations)}
    top = lane_limits(spec).max(axis=0)
    flows = np.array(
        list(itertools.product(*(range(int(limit) + 1) for limit in top))),
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
    # A dispatch cost is paid once per lane used, whatever the units.
    costs += (flows > 0) @ np.array([lane.dispatch_cost for lane in spec.lanes])
    return flows, flows @ incidence_out, flows @ incidence_in, costs


def location_rules(spec: NetworkSpec, day: int) -> tuple[NDArray[np.int64], ...]:
    """Floors, most units sent and most units received on night `day`, shapes (N,) each; a
    missing handling limit is a bound no flow reaches."""
    unlimited = 10**9

    def limit(value: Any) -> int:
        return unlimited if value is None else int(day_value(value, day))

    return (
        np.array([day_value(loc.keep_at_least, day) for loc in spec.locations], dtype=np.int64),
        np.array([limit(loc.max_units_out) for loc in spec.locations], dtype=np.int64),
        np.array([limit(loc.max_units_in) for loc in spec.locations], dtype=np.int64),
    )


def build_reference(spec: NetworkSpec) -> ReferenceMDP:
    """Enumerate states, all flows, feasibility, rewards and transitions of `spec` (of every
    weekday, for a weekly network)."""
    capacities = np.array([location.capacity for location in spec.locations], dtype=np.int64)
    n_locations = capacities.size
    stocks = np.array(
        list(itertools.product(*(range(int(c) + 1) for c in capacities))), dtype=np.int64
    ).reshape(-1, n_locations)
    n_stocks, days = stocks.shape[0], weekdays_of(spec)

    flows, sent, received, costs = all_flows(spec)
    limits = lane_limits(spec)
    post = stocks[:, None, :] - sent[None, :, :] + received[None, :, :]
    within = (sent[None, :, :] <= stocks[:, None, :]) & (post <= capacities)
    laws: dict[str, NDArray[np.float64]] = {}
    parts: list[tuple[NDArray[np.int64], NDArray[np.int64], Any, NDArray[np.float64]]] = []
    for d in range(days):
        # Tonight is night d; tomorrow is weekday d + 1, and so is the next closing count.
        tomorrow = (d + 1) % days
        floors, most_out, most_in = location_rules(spec, d)
        fits = np.all(within & ((sent[None, :, :] == 0) | (post >= floors)), axis=2)
        allowed = (
            np.all(flows <= limits[d], axis=1)
            & np.all(sent <= most_out, axis=1)
            & np.all(received <= most_in, axis=1)
        )
        s_indices, a_indices = np.nonzero(fits & allowed)  # sorted by state then flow
        post_stock = post[s_indices, a_indices]
        post_flat = np.ravel_multi_index(tuple(post_stock.T), tuple(int(c) + 1 for c in capacities))
        locations = [_on_day(loc, tomorrow) for loc in spec.locations]
        per_location = [_cached_transition(loc, laws) for loc in locations]
        # Kronecker product of the location laws: row y, column s', both flat in row-major order.
        joint: NDArray[np.floating[Any]] = per_location[0]
        for law in per_location[1:]:
            joint = np.kron(joint, law)
        transitions = np.zeros((s_indices.size, days * n_stocks))
        transitions[:, tomorrow * n_stocks : (tomorrow + 1) * n_stocks] = joint[post_flat]
        location_rewards = [location_rewards_by_summation(loc) for loc in locations]
        rewards = sum(
            (location_rewards[i][post_stock[:, i]] for i in range(n_locations)),
            start=np.zeros(s_indices.size),
        )
        parts.append((d * n_stocks + s_indices, a_indices, rewards - costs[a_indices], transitions))
    return ReferenceMDP(
        states=np.tile(stocks, (days, 1)),
        flows=flows,
        s_indices=np.concatenate([p[0] for p in parts]).astype(np.int64),
        a_indices=np.concatenate([p[1] for p in parts]).astype(np.int64),
        rewards=np.concatenate([p[2] for p in parts]),
        transitions=np.concatenate([p[3] for p in parts]),
        discount=spec.discount,
    )


def _on_day(location: LocationSpec, day: int) -> LocationSpec:
    """The location with the demand and replenishment laws of weekday `day`."""
    return location.model_copy(
        update={
            "demand": day_value(location.demand, day),
            "replenishment": day_value(location.replenishment, day),
        }
    )


def _cached_transition(
    location: LocationSpec, cache: dict[str, NDArray[np.float64]]
) -> NDArray[np.float64]:
    key = location.model_dump_json()
    if key not in cache:
        cache[key] = location_transition_by_enumeration(location)
    return cache[key]


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


@dataclass(frozen=True)
class Case:
    """A network and quantecon's optimal discounted solution of its reference MDP."""

    spec: NetworkSpec
    reference: ReferenceMDP
    # quantecon's optimal values and policy (a flow row per state), shapes (D * S,).
    reference_values: NDArray[np.float64]
    reference_sigma: NDArray[np.int64]


def solve_reference(spec: NetworkSpec) -> Case:
    """Build the reference MDP of `spec` and solve it with quantecon's policy iteration."""
    reference = build_reference(spec)
    solution = reference.discrete_dp().solve(method="policy_iteration")
    # quantecon stops policy iteration when the policy repeats or at max_iter; it must repeat.
    assert solution.num_iter < solution.max_iter
    return Case(
        spec,
        reference,
        np.asarray(solution.v, dtype=np.float64),
        np.asarray(solution.sigma, dtype=np.int64),
    )


def rounding_slack(case: Case) -> float:
    """Allowance for the reference's own rounding when checking an error bound: its values come
    from dense solves of (I - beta P) v = r, accurate to a few ulps times 1 / (1 - beta)."""
    return 1e-12 * float(np.max(np.abs(case.reference_values)))


def assert_values_match(values: NDArray[np.float64], case: Case) -> None:
    """values: the solver's, any shape holding D * S values in the reference's state order."""
    # Reference: quantecon.markov.DiscreteDP policy iteration (QuantEcon, PyPI).
    assert_allclose(values.reshape(-1), case.reference_values, rtol=VALUE_RTOL, atol=VALUE_ATOL)


def assert_policy_is_optimal(flows: NDArray[np.int64], case: Case) -> None:
    """Every chosen flow (flows: units per lane, shape (D * S, L) or (D, S, L)) is feasible and
    attains the reference's best Q value in its state."""
    reference = case.reference
    q = reference.pair_values(case.reference_values, case.spec.discount)
    best = reference.best_by_state(q)
    chosen = reference.pair_indices(flows.reshape(-1, flows.shape[-1]))
    # Reference: Q values from quantecon.markov.DiscreteDP's optimal v (QuantEcon, PyPI).
    assert_allclose(q[chosen], best, rtol=0, atol=Q_ATOL)
