"""Large networks by price decomposition: a Lagrangian relaxation of the transfer MDP, prices that
minimise its bound, a nightly plan from the per-store values, and a certified gap.

The transfer network (solver.model) is a weakly coupled MDP: given tonight's moves the stores
evolve independently, and only the moves couple them (Hawkins, MIT PhD thesis, 2003; Adelman &
Mersereau, "Relaxations of weakly coupled stochastic dynamic programs", Operations Research
56(3), 2008; Kunnumkal & Topaloglu, "A duality-based relaxation and decomposition approach for
inventory distribution systems", Naval Research Logistics 55, 2008; Brown & Zhang, "On the
strength of relaxations of weakly coupled stochastic dynamic programs", Operations Research
71(6), 2023; all from memory).

Relaxation. Split each lane flow f_l (l = i -> j) into the sender's send_l and the receiver's
take_l, both in 0..u_{d,l} (night d's lane limit). Price send_l = take_l with lambda_{d,l} (any
sign) and the units-per-night limit sum_l send_l <= U_d with mu_d >= 0 (U_d = the network limit,
at most the sum of the lane limits; mu = 0 without a limit). Store i's priced MDP has states
s_i in 0..C_i and phases d; tonight it sends a <= s_i units and takes b, y = s_i - a + b in
0..C_i, for the one-day reward

    psi_{i,d}(s, y) + r_{i,d}(y),   psi = max_{a - b = s - y} g_{i,d}(a) - h_{i,d}(b),
    g(a) = max { sum_{l out of i} (lambda_{d,l} - c_l - mu_d) send_l : sum send = a }
           (greedy over the out-lanes by that margin: concave piecewise linear),
    h(b) = min { sum_{l into i} lambda_{d,l} take_l : sum take = b }  (greedy: convex),

and next stock from K_{i,d}[y, .] (solver.build), with a and b at most U_d (no feasible
network flow sends or takes more at one store).

Rules (solver.spec). Store i's own rules on night d narrow its (a, b) range: a <= O_{i,d} and
b <= I_{i,d} (its handling limits), and a > 0 only if y >= k_{i,d} (its floor); lane limits
are first cut to min(u_l, O_{sender}, I_{receiver}). A lane's dispatch cost F_l is charged to
the sender, once when send_l > 0, so g becomes a knapsack with fixed charges,

    g(a) = max { sum_l [(lambda_l - c_l - mu) send_l - F_l [send_l > 0]] : sum send = a },

exact by dynamic programming over the store's out-lanes (one max-plus step per lane over the
amounts 0..a_max; solver.priced._best_split); g is no longer concave, which nothing here needs,
since psi is maximised over every a. h keeps its greedy form (no charge on takes).

The bound stays valid with the rules: for a flow f of the real network that is feasible on
night d, send = take = f satisfies every store's narrowed range (the same floors, the same
handling limits, which the real flow obeys at every store), and the priced one-day rewards
summed over the stores are R(y) - c.f - sum_l F_l [f_l > 0] - mu sum f: the true reward with
dispatch costs, less mu sum f as before. So the proof below applies word for word.

Theorem (the bound). For any prices, with V_{i,d} the optimal discounted value of store i's
priced MDP from phase d, V*_d(s) <= sum_i V_{i,d}(s_i) + M_d, M_d = sum_{k >= 0} beta^k
mu_{d+k} U_{d+k} = (sum_{k < P} beta^k mu_{d+k} U_{d+k}) / (1 - beta^P) (phases mod P).
Proof. Let pi be any policy of the network and f_t its moves. Setting send = take = f_t is
feasible for every store's relaxed action, and the priced one-day reward summed over the stores
is R(y_t) - c.f_t + sum_l lambda_l (send_l - take_l) - mu (sum_l f_{l,t}) = R(y_t) - c.f_t -
mu sum f_t, so adding mu U_d back gives at least the true reward R(y_t) - c.f_t (the network
limit holds). Hence V^pi_d(s) <= E sum_t beta^t [sum_i rho_i(t)] + M_d where rho_i is store i's
priced reward under the joint (history-dependent) strategy induced by pi. Store i's marginal
process is an MDP in its own state: its stock moves by K_i from its own post-move stock, so the
joint strategy induces a (randomised, history-dependent) strategy of store i alone, whose value
is at most V_{i,d}(s_i). Summing over i proves the claim; minimising over pi's proves it for V*.
The average criterion follows the same way per day: g* <= sum_i g_i + (1/P) sum_d mu_d U_d, g_i
the optimal gain of store i's priced MDP (averaged over the P phases). Each store is solved
exactly (Howard's policy iteration on dense (P (C_i + 1))-state systems), and the bound uses
V_i + max(T V_i - V_i)^+ / (1 - beta) and g_i <= max(T h_i - h_i) (Puterman 1994, Markov
Decision Processes, sections 6.3 and 8.5), so solver round-off cannot break it.

Prices. The bound is convex and piecewise linear in (lambda, mu). We minimise its average over
a product distribution of closing stocks: for each store its do-nothing law at each phase
(stationary for P = 1; for P > 1 stationary for the week's product kernel at phase 0 and then
pushed forward one day per phase), each phase's bound counted 1 / P. A subgradient in
lambda_{d,l} is the discounted occupation-weighted expected send_l of the sender minus take_l of
the receiver under their optimal priced policies in phase d (one dense linear solve per store);
in mu_d it is U_d / (P (1 - beta)) minus the expected sends (average criterion: stationary laws
and U_d / P). The objective is a sum of one term per store (its part of the bound, a function of
the prices of its own lanes and of mu only) plus the linear mu term, and the minimisation keeps
one cutting plane per store and trial point (a disaggregated, or multi-cut, model: Birge &
Louveaux, "A multicut algorithm for two-stage stochastic linear programs", European Journal of
Operational Research 34(3), 1988; from memory): theta_i >= F_i(x_k) + g_ik.(x - x_k) for each
store i and trial x_k, minimising sum_i theta_i + (mu term). Each trial point thus adds N
planes, each with only the store's own lanes, and the model is as tight as the aggregated one
or tighter (the aggregated cut is the sum of the store cuts). Measured on the 24-store benchmark
network (benchmarks/networks.py): the aggregated model was still lowering the bound at the
reference stock by about 1% after 1,500 iterations, the disaggregated one converged in about
350. The steps are a box-step method (Marsten, Hogan & Blankenship, "The boxstep method for
large-scale optimization", Operations Research 23(3), 1975; from memory) with
scipy.optimize.linprog (HiGHS, sparse rows): minimise the model within a box around the best
point, move only on sufficient decrease, double the box on good steps and halve it when a trial
point is worse; planes idle longest are dropped beyond _MAX_CUTS_PER_STORE per store. It stops
when the model predicts a relative decrease within the box below `tolerance` (converged), or at
the iteration or time budget. The best bound found is kept, so the reported bounds never
increase.

Plan and certificate. Tonight's moves maximise sum_i W_{i,d}(y_i) - c.f - F.[f > 0] within the
night's rules (solver.transfer_plan, on the concave envelopes of W; exact for concave W without
dispatch costs, stores below their floors or binding limits on units received, a documented
heuristic otherwise). The same plan is served, simulated (dispatch costs paid) and evaluated.
Trade limit of the plan. A store's post-move value W_{i,d} assumes it can buy and sell at the
lane prices on every later night, as much as its lanes allow; the real network cannot always
supply that, so the plan may also use, for every store, the post-move values of the same priced
subproblem with each later night's sends and takes limited to k units (k in
PricedOptions.trade_limits, by default 2, 4 and 8; still one small MDP per store, and still a
separable concave-envelope plan, so everything below holds unchanged). The solve simulates each
candidate for _SELECTION_DAYS days from the reference stock (_SELECTION_REPLICATIONS
replications, common random numbers across the candidates, seed + 1 so that the certificate's
random numbers are not the ones it chose on) and keeps the best; the bound never uses these
values. Measured on the benchmark networks (benchmarks/networks.py, 365 days after 50 of
warm-up, 30 replications, common random numbers): 12 stores x 60, k = 3 earned +1.35 a day
[+1.07, +1.64] over the unlimited values and k = 5 +0.71, k = 2 -0.05, k = 1 -8.68; 24 stores x
40, k = 2, 3, 4 earned -2.80, -0.67 and -0.07: no single limit suits every network, hence the
choice by simulation. This is our own heuristic (the limit stands for the liquidity the
relaxation assumes), not a published method. With no limits to try (quick solves) the plan
uses the store values and nothing is simulated.

The certificate simulates that plan from a reference stock (per store, the median of its
phase-0 stock in the long run under its own priced policy). Each replication adds up, day by
day, the expected one-day profit of the plan's post-move stock, r(y_t) - c.f_t - F.[f_t > 0]
(a conditional expectation of the day's profit given y_t, since the day's demand is independent
of the past), less a martingale built from the store values V(s) = sum_i V_{i,d}(s_i):

    X = sum_t w_t [r(y_t) - c.f_t - F.[f_t > 0] - b (V(s_{t+1}) - E[V(s_{t+1}) | y_t])],

with E[V(s_{t+1}) | y_t] = sum_i K_{i,d}[y_{i,t}] . V_{i,d+1} exact, so every increment of the
martingale has mean zero whatever V is, and E X is the plan's T-day value (w_t = beta^t and
b = beta; average criterion: w_t = 1 / days after the warm-up, b = 1, V the biases). The
estimator is unbiased for any V; a V close to the plan's own value makes X nearly constant
(approximating martingales: Henderson & Glynn, "Approximating martingales for variance
reduction in Markov process simulation", Mathematics of Operations Research 27(2), 2002; from
memory). Measured on the 24-store benchmark network, 32 replications of 400 days: standard
error 120 with moving nothing as a control variate (the previous estimator), 23 with this one.
Discounted: each replication sums T days; V^pi = E[sum_{t < T}] + beta^T E[V^pi(s_T)], and
V^pi lies between r_min / (1 - beta) and r_max / (1 - beta) (r the expected one-day profit of
any stock and move), so the interval is the Student t interval of X widened by
beta^T r_min / (1 - beta) below and beta^T r_max / (1 - beta) above; T makes that widening at
most a quarter of the target half-width. Average: each replication's mean profit per day over
`days` days after `warmup` days (statistical only: the warm-up bias is not bounded).
certified_gap = (upper bound at the reference stock - low end of the interval) / |upper bound|,
where the upper bound is the smaller of the bound from the averaged prices and the bound from
prices minimised at the reference stock itself (both valid).
"""

from __future__ import annotations

import functools
import math
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass, replace

import numpy as np
from numpy.typing import NDArray
from scipy import sparse, stats
from scipy.optimize import linprog

from solver.build import SizeLimits, location_kernel, location_reward, n_phases
from solver.errors import ModelTooLargeError
from solver.evaluation import PolicyChain, choose_evaluation, evaluate_average, evaluate_discounted
from solver.model import TransferModel, flow_costs, lane_incidence
from solver.priced_result import Certificate, PricedOptions, PricedPolicy, PricedProgress
from solver.result import Criterion, lane_pairs
from solver.simulation import daily_laws, draw_counts
from solver.spec import LocationSpec, NetworkSpec
from solver.transfer_plan import PlanNetwork

__all__ = [
    "PricedLimits",
    "check_priced_size",
    "evaluate_plan_average",
    "evaluate_plan_exactly",
    "solve_priced",
]

# Policy improvement switches only for a gain beyond this fraction of the store's value scale.
_TIE_RTOL = 1e-10
# Certificate: first batch of replications, and the longest discounted horizon (days).
_FIRST_REPLICATIONS = 32
_MAX_HORIZON = 20_000
# The simulation that chooses the plan's trade limit: replications and days.
_SELECTION_REPLICATIONS = 8
_SELECTION_DAYS = 250
# Cutting planes kept per store in the model at most (the longest idle are dropped first).
_MAX_CUTS_PER_STORE = 100
# Entries of one block of (send, stock, post-move stock) arrays in a store's move table.
_BLOCK_ENTRIES = 1 << 20
# Rows planned at once by evaluate_plan_exactly.
_PLAN_CHUNK = 50_000


@dataclass(frozen=True)
class PricedLimits:
    """Largest networks the priced method accepts: the per-store subproblem grows with the cube
    of the capacity, the price vector with lanes x phases."""

    max_capacity: int = 300
    max_weekly_capacity: int = 150
    max_lanes: int = 3_000


def check_priced_size(spec: NetworkSpec, limits: PricedLimits | None = None) -> None:
    """Raise ModelTooLargeError when `spec` exceeds the priced method's own limits."""
    limits = limits or PricedLimits()
    # A weekly store's subproblem has 7 (C + 1) states, solved densely.
    most = limits.max_weekly_capacity if spec.is_periodic else limits.max_capacity
    big = [loc for loc in spec.locations if loc.capacity > most]
    states = 1
    for loc in spec.locations:
        states *= loc.capacity + 1
    if big:
        names = ", ".join(f"{loc.id!r} ({loc.capacity})" for loc in big)
        raise ModelTooLargeError(
            f"the priced mode solves stores of capacity up to {most:,}"
            f"{' in a network with weekly fields' if spec.is_periodic else ''}; "
            f"{names} exceed it",
            states=states * n_phases(spec),
            pairs=None,
        )
    if len(spec.lanes) > limits.max_lanes:
        raise ModelTooLargeError(
            f"the priced mode prices up to {limits.max_lanes:,} lanes; the network has "
            f"{len(spec.lanes):,}",
            states=states * n_phases(spec),
            pairs=None,
        )


# -- the network as per-store arrays ----------------------------------------------------------


@dataclass(frozen=True, eq=False)
class _Network(PlanNetwork):
    """The plan's network (capacities and lanes) with per-store kernels and rewards. Phase d
    holds day d + 1's laws and night d's lane limits (solver.model)."""

    spec: NetworkSpec
    phases: int
    kernels: tuple[NDArray[np.float64], ...]  # per store (P, C + 1, C + 1)
    rewards: tuple[NDArray[np.float64], ...]  # per store (P, C + 1)
    lane_limits: NDArray[np.int64]  # (P, L), at most both ends' capacities, handling limits, U
    network_limit: NDArray[np.int64]  # (P,), -1 without a limit
    discount: float
    dispatch_costs: NDArray[np.float64]  # (L,)
    floors: NDArray[np.int64]  # (P, N), keep_at_least on night d
    most_out: NDArray[np.int64]  # (P, N), handling limits (the capacity where there is none)
    most_in: NDArray[np.int64]

    @property
    def units(self) -> NDArray[np.float64]:
        """U_d: units over all lanes on night d, at most the sum of the lane limits (0 without
        a network limit: mu is then fixed at 0)."""
        total = self.lane_limits.sum(axis=1)
        limit = np.where(self.network_limit < 0, 0, np.minimum(self.network_limit, total))
        return limit.astype(np.float64)


def _network(spec: NetworkSpec) -> _Network:
    phases = n_phases(spec)
    days = [(d + 1) % phases for d in range(phases)] if phases > 1 else [0]
    kernels, rewards = [], []
    for loc in spec.locations:
        if phases > 1:
            kernels.append(np.stack([location_kernel(loc, weekday=day) for day in days]))
            rewards.append(np.stack([location_reward(loc, weekday=day) for day in days]))
        else:
            kernels.append(location_kernel(loc)[None])
            rewards.append(location_reward(loc)[None])
    index = {loc.id: i for i, loc in enumerate(spec.locations)}
    capacities = np.array([loc.capacity for loc in spec.locations], dtype=np.int64)
    lane_from = np.array([index[lane.from_] for lane in spec.lanes], dtype=np.int64)
    lane_to = np.array([index[lane.to] for lane in spec.lanes], dtype=np.int64)
    limits = np.array(
        [[lane.max_units_on(d) for lane in spec.lanes] for d in range(phases)], dtype=np.int64
    )
    limits = np.minimum(limits, np.minimum(capacities[lane_from], capacities[lane_to])[None, :])

    def nightly(value: Callable[[LocationSpec, int], int | None]) -> NDArray[np.int64]:
        return np.array(
            [
                [
                    loc.capacity if (units := value(loc, d)) is None else min(units, loc.capacity)
                    for loc in spec.locations
                ]
                for d in range(phases)
            ],
            dtype=np.int64,
        )

    most_out = nightly(lambda loc, d: loc.max_units_out_on(d))
    most_in = nightly(lambda loc, d: loc.max_units_in_on(d))
    # No feasible flow puts more on a lane than its sender may send or its receiver take.
    limits = np.minimum(limits, np.minimum(most_out[:, lane_from], most_in[:, lane_to]))
    per_night = spec.max_units_per_night
    if per_night is not None:
        limits = np.minimum(limits, per_night)
    network_limit = np.full(phases, -1 if per_night is None else per_night, dtype=np.int64)
    return _Network(
        spec=spec,
        phases=phases,
        capacities=capacities,
        kernels=tuple(kernels),
        rewards=tuple(rewards),
        lane_from=lane_from,
        lane_to=lane_to,
        lane_costs=np.array([lane.unit_cost for lane in spec.lanes], dtype=np.float64),
        lane_limits=limits,
        network_limit=network_limit,
        discount=spec.discount,
        dispatch_costs=np.array([lane.dispatch_cost for lane in spec.lanes], dtype=np.float64),
        floors=nightly(lambda loc, d: loc.keep_at_least_on(d)),
        most_out=most_out,
        most_in=most_in,
    )


def _stationary(matrix: NDArray[np.float64]) -> NDArray[np.float64]:
    """A stationary law of a stochastic matrix (least squares; the average of the laws of the
    recurrent classes when there are several is not needed here: any law will do)."""
    n = matrix.shape[0]
    system = np.vstack([matrix.T - np.eye(n), np.ones((1, n))])
    rhs = np.zeros(n + 1)
    rhs[-1] = 1.0
    law = np.linalg.lstsq(system, rhs, rcond=None)[0]
    law = np.clip(law, 0.0, None)
    result: NDArray[np.float64] = law / law.sum()
    return result


def _do_nothing_laws(net: _Network) -> list[NDArray[np.float64]]:
    """Per store, its do-nothing closing-stock law at each phase, shape (P, C + 1)."""
    laws = []
    for kernels in net.kernels:
        cycle = kernels[0]
        for d in range(1, net.phases):
            cycle = cycle @ kernels[d]
        law = np.empty((net.phases, kernels.shape[1]))
        law[0] = _stationary(cycle)
        for d in range(1, net.phases):
            law[d] = law[d - 1] @ kernels[d - 1]
        laws.append(law)
    return laws


# -- one store's priced MDP -------------------------------------------------------------------


@dataclass(frozen=True, eq=False)
class _StoreSolution:
    """values: (P, C + 1), rigorous upper values (discounted) or bias (average); post_move: W,
    (P, C + 1); gain: the gain bound (average) else 0; policy: post-move stock per (d, s);
    sends, takes: (P, L) expected units per lane under the occupation measure; objective: this
    store's part of the pricing objective."""

    values: NDArray[np.float64]
    post_move: NDArray[np.float64]
    gain: float
    policy: NDArray[np.int64]
    sends: NDArray[np.float64]
    takes: NDArray[np.float64]
    objective: float


def _greedy_units(amount: NDArray[np.int64], caps: NDArray[np.int64]) -> NDArray[np.int64]:
    """Units on each lane (in the given order, each up to caps[k]) when `amount` units are
    spread greedily, shape (len(amount), len(caps))."""
    before = np.concatenate([[0], np.cumsum(caps)[:-1]])
    units: NDArray[np.int64] = np.clip(amount[:, None] - before[None, :], 0, caps[None, :])
    return units


def _best_split(
    margin: NDArray[np.float64],
    caps: NDArray[np.int64],
    dispatch: NDArray[np.float64],
    top: int,
) -> tuple[NDArray[np.float64], NDArray[np.int64]]:
    """g(a) = max sum_k (margin_k x_k - dispatch_k [x_k > 0]) over 0 <= x_k <= caps_k with
    sum x = a, for a = 0..top, shape (top + 1,), and the maximising x per a, shape (top + 1,
    K). Without dispatch costs the greedy split by margin (a concave g); with them a knapsack
    with fixed charges, exact by dynamic programming over the lanes (one (cap + 1, top + 1)
    array per lane)."""
    k = margin.size
    if not np.any(dispatch > 0):
        order = np.argsort(-margin, kind="stable")
        g = np.concatenate([[0.0], np.cumsum(np.repeat(margin[order], caps[order]))[:top]])
        split = np.zeros((top + 1, k), dtype=np.int64)
        split[:, order] = _greedy_units(np.arange(top + 1), caps[order])
        return g, split
    amounts = np.arange(top + 1)
    g = np.full(top + 1, -np.inf)
    g[0] = 0.0
    choices = np.zeros((k, top + 1), dtype=np.int64)
    for lane in range(k):
        x = np.arange(int(min(caps[lane], top)) + 1)[:, None]  # (X, 1)
        before = amounts[None, :] - x
        value = np.where(
            before >= 0,
            g[np.clip(before, 0, top)] + margin[lane] * x - dispatch[lane] * (x > 0),
            -np.inf,
        )
        choices[lane] = value.argmax(axis=0)
        g = value.max(axis=0)
    split = np.zeros((top + 1, k), dtype=np.int64)
    rest = amounts.copy()
    for lane in range(k - 1, -1, -1):
        split[:, lane] = choices[lane, rest]
        rest = rest - split[:, lane]
    return g, split


class _Store:
    """Store i's lanes and laws, and its priced subproblem."""

    def __init__(self, net: _Network, i: int, law: NDArray[np.float64]) -> None:
        self.i = i
        self.capacity = int(net.capacities[i])
        self.kernels = net.kernels[i]
        self.rewards = net.rewards[i]
        self.out_lanes = np.flatnonzero(net.lane_from == i)
        self.in_lanes = np.flatnonzero(net.lane_to == i)
        self.costs = net.lane_costs
        self.limits = net.lane_limits
        # Most units one store can send or take in a night: its capacity, its lanes' limits and
        # the network limit (valid for every feasible network flow, so the bound stays valid).
        self.most = np.where(net.network_limit < 0, self.capacity, net.network_limit)
        self.most = np.minimum(self.most, self.capacity)
        self.most_out = np.minimum(self.most, net.most_out[:, i])
        self.most_in = np.minimum(self.most, net.most_in[:, i])
        self.floors = net.floors[:, i]
        self.dispatch = net.dispatch_costs
        self.phases = net.phases
        # Initial law of the occupation measure over (d, s), phase-major, summing to 1.
        self.start = law.reshape(-1) / net.phases
        self.policy: NDArray[np.int64] = np.tile(np.arange(self.capacity + 1), (self.phases, 1))
        self.scale = max(1.0, float(np.abs(self.rewards).max()))

    def _moves(
        self, prices: NDArray[np.float64], network_price: NDArray[np.float64]
    ) -> tuple[
        NDArray[np.float64], NDArray[np.int64], list[tuple[NDArray[np.int64], NDArray[np.int64]]]
    ]:
        """psi (P, C + 1, C + 1) over (s, y), -inf where y cannot be reached; the best send a
        per (d, s, y); per phase the units on each out-lane for every total send a (shape
        (top a + 1, out-lanes), the best split) and the in-lane order of the greedy split."""
        c = self.capacity
        size = c + 1
        psi = np.full((self.phases, size, size), -np.inf)
        best_a = np.zeros((self.phases, size, size), dtype=np.int64)
        orders = []
        s = np.arange(size)[:, None]
        y = np.arange(size)[None, :]
        for d in range(self.phases):
            margin = prices[d, self.out_lanes] - self.costs[self.out_lanes] - network_price[d]
            take_order = self.in_lanes[np.argsort(prices[d, self.in_lanes], kind="stable")]
            send_caps = self.limits[d, self.out_lanes]
            take_caps = self.limits[d, take_order]
            top_a = int(min(self.most_out[d], send_caps.sum()))
            top_b = int(min(self.most_in[d], take_caps.sum()))
            g, split = _best_split(margin, send_caps, self.dispatch[self.out_lanes], top_a)
            orders.append((split, take_order))
            h = np.concatenate(
                [[0.0], np.cumsum(np.repeat(prices[d, take_order], take_caps))[:top_b]]
            )
            psi_d, best_d = psi[d], best_a[d]
            floor = int(self.floors[d])
            # Sends a in blocks of (a, s, y) arrays of about _BLOCK_ENTRIES entries; the first
            # best a is kept on ties, as a loop over a with a strict comparison would.
            block = max(1, _BLOCK_ENTRIES // (size * size))
            for first in range(0, top_a + 1, block):
                a = np.arange(first, min(first + block, top_a + 1))[:, None, None]
                b = y - s + a
                # A store that sends ends the night at its floor or above.
                valid = (a <= s) & (b >= 0) & (b <= top_b) & ((a == 0) | (y >= floor))
                value = np.where(valid, g[a] - h[np.clip(b, 0, top_b)], -np.inf)
                where = value.argmax(axis=0)
                top = np.take_along_axis(value, where[None], axis=0)[0]
                better = top > psi_d
                psi_d[better] = top[better]
                best_d[better] = first + where[better]
        return psi, best_a, orders

    def _matrix(self, policy: NDArray[np.int64]) -> NDArray[np.float64]:
        """Stacked transition matrix of a policy over (d, s), phase-major."""
        size = self.capacity + 1
        n = self.phases * size
        matrix = np.zeros((n, n))
        for d in range(self.phases):
            nxt = (d + 1) % self.phases
            matrix[d * size : (d + 1) * size, nxt * size : (nxt + 1) * size] = self.kernels[d][
                policy[d]
            ]
        return matrix

    def solve(
        self,
        prices: NDArray[np.float64],
        network_price: NDArray[np.float64],
        criterion: Criterion,
        beta: float,
        n_lanes: int,
    ) -> _StoreSolution:
        psi, best_a, orders = self._moves(prices, network_price)
        size = self.capacity + 1
        phases = self.phases
        rows = np.arange(size)
        policy = self.policy.copy()
        tie = _TIE_RTOL * self.scale / (1.0 - beta if criterion == "discounted" else 1e-3)
        discount = beta if criterion == "discounted" else 1.0
        gain = 0.0
        for _ in range(200):
            reward = np.stack(
                [psi[d, rows, policy[d]] + self.rewards[d, policy[d]] for d in range(phases)]
            )
            matrix = self._matrix(policy)
            n = phases * size
            if criterion == "discounted":
                v = np.linalg.solve(np.eye(n) - discount * matrix, reward.reshape(-1))
            else:
                system = np.eye(n) - matrix
                system[:, 0] = 1.0
                try:
                    solution = np.linalg.solve(system, reward.reshape(-1))
                except np.linalg.LinAlgError:
                    solution = np.linalg.lstsq(system, reward.reshape(-1), rcond=None)[0]
                gain = float(solution[0])
                v = solution.copy()
                v[0] = 0.0
            values = v.reshape(phases, size)
            post = np.stack(
                [
                    self.rewards[d] + discount * self.kernels[d] @ values[(d + 1) % phases]
                    for d in range(phases)
                ]
            )
            q = psi + post[:, None, :]
            best = q.argmax(axis=2)
            best_q = np.take_along_axis(q, best[:, :, None], axis=2)[:, :, 0]
            current = np.take_along_axis(q, policy[:, :, None], axis=2)[:, :, 0]
            change = best_q > current + tie
            if not change.any():
                break
            policy = np.where(change, best, policy)
        self.policy = policy
        # Rigorous bounds from the Bellman residual (module docstring).
        slack = best_q - (values + (gain if criterion == "average" else 0.0))
        if criterion == "discounted":
            values = values + max(0.0, float(slack.max())) / (1.0 - beta)
            post = np.stack(
                [
                    self.rewards[d] + beta * self.kernels[d] @ values[(d + 1) % phases]
                    for d in range(phases)
                ]
            )
            gain_bound = 0.0
        else:
            gain_bound = gain + float(slack.max())
        # Occupation measure: discounted from the phase-averaged do-nothing law, or stationary.
        matrix = self._matrix(policy)
        n = phases * size
        if criterion == "discounted":
            start = self.start
            occupation = np.linalg.solve((np.eye(n) - beta * matrix).T, start)
            objective = float(start @ values.reshape(-1))
        else:
            occupation = _stationary(matrix)
            objective = gain_bound
        occupation = occupation.reshape(phases, size)
        sends = np.zeros((phases, n_lanes))
        takes = np.zeros((phases, n_lanes))
        for d in range(phases):
            a = best_a[d, rows, policy[d]]
            b = a - rows + policy[d]
            split, take_order = orders[d]
            if self.out_lanes.size:
                sends[d, self.out_lanes] = occupation[d] @ split[a]
            if take_order.size:
                takes[d, take_order] = occupation[d] @ _greedy_units(b, self.limits[d, take_order])
        return _StoreSolution(values, post, gain_bound, policy, sends, takes, objective)


# -- prices -----------------------------------------------------------------------------------


@dataclass
class _Point:
    """The objective at x, its subgradient, the store solutions, and each store's own part:
    parts[i] = (value, indices, subgradient) of store i's term (the entries of x it depends
    on: its lanes' prices and mu). The linear mu term is not in the parts."""

    x: NDArray[np.float64]
    value: float
    gradient: NDArray[np.float64]
    solutions: list[_StoreSolution]
    parts: list[tuple[float, NDArray[np.int64], NDArray[np.float64]]]


class _Oracle:
    """The pricing objective and a subgradient at a price vector x = (lambda.flat, mu)."""

    def __init__(
        self,
        net: _Network,
        criterion: Criterion,
        laws: list[NDArray[np.float64]],
        at: NDArray[np.int64] | None = None,
    ) -> None:
        """laws: per store (P, C + 1), the stock distribution the bound is averaged over (each
        phase weighted 1 / P); at: instead, one closing stock in phase 0 (discounted only)."""
        self.net = net
        self.criterion = criterion
        self.stores = [_Store(net, i, laws[i]) for i in range(net.n_stores)]
        self.has_limit = bool(np.any(net.network_limit >= 0))
        self.size = net.phases * net.n_lanes + (net.phases if self.has_limit else 0)
        # Entries of x that each store's term depends on: its lanes' prices in every phase and
        # the network prices (for the disaggregated cutting-plane model of _price).
        self.indices = []
        for store in self.stores:
            lanes = np.union1d(store.out_lanes, store.in_lanes)
            index = (np.arange(net.phases)[:, None] * net.n_lanes + lanes[None, :]).reshape(-1)
            if self.has_limit:
                index = np.concatenate([index, net.phases * net.n_lanes + np.arange(net.phases)])
            self.indices.append(index.astype(np.int64))
        beta = net.discount
        phases = net.phases
        # Weight of mu_d in the objective (module docstring).
        if criterion == "average":
            self.mu_weight = net.units / phases
        elif at is None:
            self.mu_weight = net.units / (phases * (1.0 - beta))
        else:
            # M_0 = sum_k beta^k mu_{k mod P} U_{k mod P}.
            self.mu_weight = net.units * beta ** np.arange(phases) / (1.0 - beta**phases)
            for store, units in zip(self.stores, at, strict=True):
                store.start = np.zeros(phases * (store.capacity + 1))
                store.start[int(units)] = 1.0

    def split(self, x: NDArray[np.float64]) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
        p, n_lanes = self.net.phases, self.net.n_lanes
        prices = x[: p * n_lanes].reshape(p, n_lanes)
        mu = x[p * n_lanes :] if self.has_limit else np.zeros(p)
        return prices, mu

    def __call__(self, x: NDArray[np.float64]) -> _Point:
        prices, mu = self.split(x)
        net = self.net
        solutions = [
            store.solve(prices, mu, self.criterion, net.discount, net.n_lanes)
            for store in self.stores
        ]
        value = sum(s.objective for s in solutions) + float(mu @ self.mu_weight)
        sends = sum(s.sends for s in solutions)
        takes = sum(s.takes for s in solutions)
        gradient = [np.asarray(sends - takes).reshape(-1)]
        if self.has_limit:
            gradient.append(self.mu_weight - np.asarray(sends).sum(axis=1))
        parts = []
        for index, solution in zip(self.indices, solutions, strict=True):
            own = np.asarray(solution.sends - solution.takes).reshape(-1)
            if self.has_limit:
                own = np.concatenate([own, -solution.sends.sum(axis=1)])
            parts.append((solution.objective, index, own[index]))
        return _Point(x.copy(), value, np.concatenate(gradient), solutions, parts)


def _price_box(net: _Network) -> float:
    """Prices are searched within +-this: twice the most a unit can earn or save in a day, plus
    the dearest lane (one unit and its dispatch cost). The bound is valid at any prices; the
    box only limits the search."""
    spec = net.spec
    unit = max(loc.unit_margin + loc.stockout_penalty + loc.holding_cost for loc in spec.locations)
    lane = float((net.lane_costs + net.dispatch_costs).max(initial=0.0))
    return 2.0 * unit + lane + 1.0


def _initial_prices(
    net: _Network, laws: list[NDArray[np.float64]], oracle: _Oracle
) -> NDArray[np.float64]:
    """Each lane priced at the mean of its ends' expected marginal post-move values under moving
    nothing."""
    beta = net.discount if oracle.criterion == "discounted" else 0.0
    marginal = np.zeros((net.phases, net.n_stores))
    for i, (kernels, rewards) in enumerate(zip(net.kernels, net.rewards, strict=True)):
        size = kernels.shape[1]
        v = np.zeros((net.phases, size))
        for _ in range(200 if beta else 1):
            for d in range(net.phases - 1, -1, -1):
                v[d] = rewards[d] + beta * kernels[d] @ v[(d + 1) % net.phases]
        for d in range(net.phases):
            w = rewards[d] + beta * kernels[d] @ v[(d + 1) % net.phases]
            marginal[d, i] = float(laws[i][d][:-1] @ np.diff(w)) if size > 1 else 0.0
    prices = 0.5 * (marginal[:, net.lane_from] + marginal[:, net.lane_to])
    x = np.zeros(oracle.size)
    x[: prices.size] = prices.reshape(-1)
    return x


@dataclass
class _PricingResult:
    point: _Point
    iterations: int
    converged: bool
    history: list[float]


def _price(
    oracle: _Oracle,
    x0: NDArray[np.float64],
    box: float,
    options: PricedOptions,
    report: Callable[[int, float], None],
    started: float,
) -> _PricingResult:
    """Box-step cutting planes on the disaggregated model (module docstring)."""
    n = oracle.size
    n_stores = len(oracle.stores)
    lower = np.full(n, -box)
    upper = np.full(n, box)
    linear = np.zeros(n)
    if oracle.has_limit:
        mu_at = oracle.net.phases * oracle.net.n_lanes
        lower[mu_at:] = 0.0
        linear[mu_at:] = oracle.mu_weight
    objective = np.concatenate([linear, np.ones(n_stores)])
    x0 = np.clip(x0, lower, upper)
    center = oracle(x0)
    # One cut per store and trial point: theta_i >= F_i(x_k) + g_ik . (x - x_k).
    # Each cut's columns and entries (theta_i's -1 included) and its right-hand side.
    cut_columns: list[NDArray[np.int64]] = []
    cut_entries: list[NDArray[np.float64]] = []
    cut_offset: list[float] = []
    idle: list[int] = []

    def add_cuts(point: _Point) -> None:
        for i, (value, index, coef) in enumerate(point.parts):
            cut_columns.append(np.append(index, n + i))
            cut_entries.append(np.append(coef, -1.0))
            cut_offset.append(float(coef @ point.x[index]) - value)
            idle.append(0)

    add_cuts(center)
    most_cuts = _MAX_CUTS_PER_STORE * n_stores
    radius = box / 8.0
    history = [center.value]
    converged = False
    iterations = 1
    report(iterations, center.value)
    while iterations < options.max_iterations:
        if options.time_limit is not None and time.perf_counter() - started > options.time_limit:
            break
        sizes = np.array([columns.size for columns in cut_columns])
        a_ub = sparse.csr_array(
            (
                np.concatenate(cut_entries),
                np.concatenate(cut_columns),
                np.concatenate([[0], np.cumsum(sizes)]),
            ),
            shape=(len(cut_columns), n + n_stores),
        )
        bounds = np.empty((n + n_stores, 2))
        bounds[:n, 0] = np.maximum(lower, center.x - radius)
        bounds[:n, 1] = np.minimum(upper, center.x + radius)
        bounds[n:, 0] = -np.inf
        bounds[n:, 1] = np.inf
        lp = linprog(objective, A_ub=a_ub, b_ub=np.array(cut_offset), bounds=bounds, method="highs")
        if lp.status != 0:
            break
        trial_x = np.asarray(lp.x[:n], dtype=np.float64)
        predicted = center.value - float(lp.fun)
        marginals = np.asarray(lp.ineqlin.marginals)
        idle = [0 if abs(m) > 0 else k + 1 for k, m in zip(idle, marginals, strict=True)]
        if predicted <= options.tolerance * max(1.0, abs(center.value)):
            converged = True
            break
        trial = oracle(trial_x)
        iterations += 1
        add_cuts(trial)
        if len(idle) > most_cuts:
            # Drop the cuts idle longest (never the ones just added).
            keep = np.sort(
                np.argsort(np.array(idle[:-n_stores]), kind="stable")[: most_cuts - n_stores]
            )
            keep = np.concatenate([keep, np.arange(len(idle) - n_stores, len(idle))])
            cut_columns = [cut_columns[k] for k in keep]
            cut_entries = [cut_entries[k] for k in keep]
            cut_offset = [cut_offset[k] for k in keep]
            idle = [idle[k] for k in keep]
        decrease = center.value - trial.value
        if decrease >= 0.1 * predicted:
            at_edge = np.any(np.abs(trial_x - center.x) >= radius * (1 - 1e-9))
            if decrease >= 0.5 * predicted and at_edge:
                radius = min(2.0 * radius, 2.0 * box)
            center = trial
        elif decrease < 0:
            radius = max(radius / 2.0, 1e-6 * box)
        history.append(center.value)
        report(iterations, center.value)
    return _PricingResult(center, iterations, converged, history)


def _reference_stock(oracle: _Oracle, solutions: list[_StoreSolution]) -> NDArray[np.int64]:
    """The certificate's reference stock: per store, the median of its phase-0 stock in the long
    run under its own priced policy (where the network sits when the plan runs)."""
    stock = []
    for store, solution in zip(oracle.stores, solutions, strict=True):
        law = _stationary(store._matrix(solution.policy)).reshape(store.phases, -1)[0]
        stock.append(int(np.searchsorted(np.cumsum(law / law.sum()), 0.5)))
    return np.minimum(np.array(stock, dtype=np.int64), oracle.net.capacities)


# -- the plan's trade limit -------------------------------------------------------------------


def _limited_post_move(
    net: _Network,
    laws: list[NDArray[np.float64]],
    policy: PricedPolicy,
    criterion: Criterion,
    limit: int,
) -> tuple[NDArray[np.float64], ...]:
    """Per store, the post-move values of its priced subproblem (the policy's prices) with its
    sends and takes limited to `limit` units on every night, shape (P, C_i + 1) each."""
    out = []
    for i in range(net.n_stores):
        store = _Store(net, i, laws[i])
        store.most_out = np.minimum(store.most_out, limit)
        store.most_in = np.minimum(store.most_in, limit)
        solution = store.solve(
            policy.prices, policy.network_price, criterion, net.discount, net.n_lanes
        )
        out.append(solution.post_move)
    return tuple(out)


def _choose_trade_limit(
    net: _Network,
    policy: PricedPolicy,
    criterion: Criterion,
    reference: NDArray[np.int64],
    laws: list[NDArray[np.float64]],
    options: PricedOptions,
    report: Callable[[int, int, int | None], None],
) -> PricedPolicy:
    """The policy planning on the store values, or on the values with later trades limited to
    one of options.trade_limits units a night, whichever earns most in a short simulation from
    the reference stock (module docstring). Its random numbers are not the certificate's.
    `report(candidate, candidates, limit)` is called as each candidate is prepared (candidate
    1 plans on the store values, limit None); they are then simulated together."""
    # A limit no store reaches changes nothing.
    limits: list[int | None] = [None] + [
        limit
        for limit in options.trade_limits
        if not all(
            np.all(net.most_out[:, i] <= limit) and np.all(net.most_in[:, i] <= limit)
            for i in range(net.n_stores)
        )
    ]
    if len(limits) == 1:
        return policy
    if criterion == "discounted":
        days = _SELECTION_DAYS
        weights = np.power(net.discount, np.arange(days, dtype=np.float64))
        step = net.discount
    else:
        warmup = _SELECTION_DAYS // 4
        days = _SELECTION_DAYS
        weights = np.concatenate([np.zeros(warmup), np.full(days - warmup, 1.0 / (days - warmup))])
        step = 1.0
    candidates = []
    for number, limit in enumerate(limits, start=1):
        report(number, len(limits), limit)
        candidate = policy
        if limit is not None:
            values = _limited_post_move(net, laws, policy, criterion, limit)
            candidate = replace(policy, plan_post_move_values=values, trade_limit=limit)
        candidates.append(candidate)
    # All candidates in one simulation: each on the same random numbers as if alone.
    samples = _simulate(
        net,
        candidates,
        reference,
        _SELECTION_REPLICATIONS,
        days,
        np.random.default_rng(options.seed + 1),
        weights,
        step,
    )
    best, best_mean = policy, -math.inf
    for candidate, sample in zip(candidates, samples, strict=True):
        mean = float(sample.mean())
        # The first best is kept on ties, as argmax over the candidates in order.
        if mean > best_mean:
            best, best_mean = candidate, mean
    return best


# -- certificate ------------------------------------------------------------------------------


def _reward_range(net: _Network) -> tuple[float, float]:
    """Least and most expected one-day profit of any stock and allowed move (currency)."""
    low = sum(float(r.min()) for r in net.rewards)
    high = sum(float(r.max()) for r in net.rewards)
    costs = []
    for d in range(net.phases):
        most = float(net.lane_costs @ net.lane_limits[d])
        if net.network_limit[d] >= 0:
            most = min(most, float(net.lane_costs.max(initial=0.0)) * float(net.network_limit[d]))
        costs.append(most + float(net.dispatch_costs @ (net.lane_limits[d] > 0)))
    return low - max(costs), high


def _simulate(
    net: _Network,
    policies: Sequence[PricedPolicy],
    stock: NDArray[np.int64],
    replications: int,
    days: int,
    rng: np.random.Generator,
    weights: NDArray[np.float64],
    step: float,
    tick: Callable[[], None] = lambda: None,
) -> NDArray[np.float64]:
    """Per policy and replication, sum_t weights[t] (r(y_t) - cost_t - step (V(s_{t+1}) -
    E[V(s_{t+1}) | y_t])), shape (G, replications) for G policies: the expected one-day profits
    of the plan's post-move stocks less the martingale of the store values V (module
    docstring). The policies share the random numbers and are planned in one batch (policies
    after the first: the same network, other plan values), each as if simulated alone. `tick`
    is called after every block of days (for progress reports)."""
    laws = daily_laws(net.spec)
    caps = net.capacities
    n = caps.size
    width = int(caps.max()) + 1
    phases = net.phases
    stores = np.arange(n)
    groups = len(policies)
    # Per policy and phase, (N, max C + 1) tables: r_{i,d}(y), V_{i,d+1}(s) and
    # E[V_{i,d+1}(s') | y].
    reward = np.zeros((groups, phases, n, width))
    value = np.zeros((groups, phases, n, width))
    expected = np.zeros((groups, phases, n, width))
    for g, policy in enumerate(policies):
        for i, (kernels, rewards, values) in enumerate(
            zip(net.kernels, net.rewards, policy.store_values, strict=True)
        ):
            size = int(caps[i]) + 1
            for d in range(phases):
                following = values[(d + 1) % phases]
                reward[g, d, i, :size] = rewards[d]
                value[g, d, i, :size] = following
                expected[g, d, i, :size] = kernels[d] @ following
    current = np.broadcast_to(stock, (groups, replications, n)).copy()
    total = np.zeros((groups, replications))
    block = 256
    done = 0
    while done < days:
        count = min(block, days - done)
        demand, supply = draw_counts(laws, rng, count, replications, first_phase=done)
        for k in range(count):
            t = done + k
            d = t % phases
            if groups == 1:
                flows = policies[0].plan_batch(current[0], phase=d)[None]
            else:
                flows = policies[0].plan_alongside(policies[1:], current, phase=d)
            for g in range(groups):
                post = current[g] + net.stock_change(flows[g])
                current[g] = np.minimum(post - np.minimum(post, demand[k]) + supply[k], caps)
                cost = flow_costs(flows[g], net.lane_costs, net.dispatch_costs)
                profit = reward[g, d][stores, post].sum(axis=1) - cost
                surprise = (value[g, d][stores, current[g]] - expected[g, d][stores, post]).sum(
                    axis=1
                )
                total[g] += weights[t] * (profit - step * surprise)
        done += count
        tick()
    return total


def _certify(
    net: _Network,
    policy: PricedPolicy,
    criterion: Criterion,
    reference: NDArray[np.int64],
    options: PricedOptions,
    report: Callable[[int, float, float | None], None],
    upper: float,
) -> Certificate:
    """The certificate at `reference`, with `upper` the bound there (module docstring)."""
    rng = np.random.default_rng(options.seed)
    beta = net.discount
    target = options.target_half_width * max(abs(upper), 1e-9)
    if criterion == "discounted":
        low_r, high_r = _reward_range(net)
        spread = max(high_r - low_r, 1e-12) / (1.0 - beta)
        wanted = 0.25 * target / spread
        days = int(min(_MAX_HORIZON, max(1, math.ceil(math.log(wanted) / math.log(beta)))))
        weights = np.power(beta, np.arange(days, dtype=np.float64))
        tail = (beta**days * low_r / (1.0 - beta), beta**days * high_r / (1.0 - beta))
        warmup = 0
        step = beta
    else:
        days = options.average_days
        warmup = options.average_warmup
        weights = np.concatenate([np.zeros(warmup), np.full(days, 1.0 / days)])
        tail = (0.0, 0.0)
        step = 1.0
    samples = np.zeros(0)
    batch = options.replications or _FIRST_REPLICATIONS
    low: float | None = None
    while True:
        done = samples.size
        part = _simulate(
            net,
            [policy],
            reference,
            batch,
            warmup + days,
            rng,
            weights,
            step,
            functools.partial(report, done, upper, low),
        )[0]
        samples = np.concatenate([samples, part])
        n = samples.size
        half = (
            float(stats.t.ppf(0.5 + options.confidence / 2, n - 1))
            * float(samples.std(ddof=1))
            / math.sqrt(n)
        )
        mean = float(samples.mean())
        low = mean - half + tail[0]
        report(n, upper, low)
        if options.replications is not None or half <= target or n >= options.max_replications:
            break
        batch = min(n, options.max_replications - n)
    low = mean - half + tail[0]
    high = mean + half + tail[1]
    gap = (upper - low) / max(abs(upper), 1e-12)
    return Certificate(
        reference_stock=tuple(int(u) for u in reference),
        upper_bound=upper,
        policy_value=mean,
        policy_value_interval=(low, high),
        certified_gap=gap,
        replications=int(n),
    )


# -- the solve --------------------------------------------------------------------------------


def solve_priced(
    spec: NetworkSpec,
    *,
    criterion: Criterion = "discounted",
    options: PricedOptions | None = None,
    progress: Callable[[PricedProgress], None] | None = None,
) -> PricedPolicy:
    """Prices, per-store values, the nightly plan and its certificate for `spec`.

    Raises ModelTooLargeError beyond PricedLimits (check_priced_size)."""
    options = options or PricedOptions()
    check_priced_size(spec)
    started = time.perf_counter()
    seconds: dict[str, float] = {}
    net = _network(spec)
    laws = _do_nothing_laws(net)
    oracle = _Oracle(net, criterion, laws)
    seconds["build"] = time.perf_counter() - started

    def pricing_report(iteration: int, bound: float) -> None:
        if progress is not None:
            progress(
                PricedProgress("pricing", iteration, bound, None, time.perf_counter() - started)
            )

    t = time.perf_counter()
    box = _price_box(net)
    result = _price(
        oracle, _initial_prices(net, laws, oracle), box, options, pricing_report, started
    )
    seconds["pricing"] = time.perf_counter() - t
    point = result.point
    prices, mu = oracle.split(point.x)
    solutions = point.solutions
    beta = net.discount
    phases = net.phases
    units = net.units
    if criterion == "discounted":
        constants = np.array(
            [
                sum(beta**k * mu[(d + k) % phases] * units[(d + k) % phases] for k in range(phases))
                for d in range(phases)
            ]
        ) / (1.0 - beta**phases)
        gain = None
    else:
        gain = sum(s.gain for s in solutions) + float(mu @ units) / phases
        constants = np.full(phases, gain)
    reference = _reference_stock(oracle, solutions)
    refined = None
    if criterion == "discounted":
        # The bound at the reference stock itself, from prices minimised there (still valid).
        t = time.perf_counter()
        at_reference = _Oracle(net, criterion, laws, at=reference)
        for store, solved in zip(at_reference.stores, solutions, strict=True):
            store.policy = solved.policy.copy()
        refinement = _price(
            at_reference,
            point.x,
            box,
            replace(options, max_iterations=max(1, options.max_iterations // 2)),
            lambda i, b: pricing_report(result.iterations + i, b),
            started,
        )
        refined = refinement.point.value
        seconds["reference_pricing"] = time.perf_counter() - t
    placeholder = Certificate(tuple(int(u) for u in reference), 0.0, 0.0, (0.0, 0.0), 0.0, 0)
    policy = PricedPolicy(
        criterion=criterion,
        method="priced",
        location_ids=tuple(spec.location_ids),
        capacities=tuple(int(c) for c in net.capacities),
        lanes=lane_pairs(net.lane_from, net.lane_to),
        lane_costs=net.lane_costs,
        lane_limits=net.lane_limits,
        network_limit=net.network_limit,
        dispatch_costs=net.dispatch_costs,
        floors=net.floors,
        most_out=net.most_out,
        most_in=net.most_in,
        discount=beta if criterion == "discounted" else None,
        phases=phases,
        prices=prices.copy(),
        network_price=mu.copy(),
        store_values=tuple(s.values for s in solutions),
        store_post_move_values=tuple(s.post_move for s in solutions),
        constants=constants,
        gain=gain,
        certificate=placeholder,
        iterations=result.iterations,
        converged=result.converged,
        seconds={},
    )
    # The bound at the reference stock: what the planning and certifying stages report, and
    # the certificate's upper end.
    upper = policy.upper_bound(tuple(int(u) for u in reference), phase=0)
    if refined is not None:
        upper = min(upper, refined)

    def planning_report(candidate: int, candidates: int, limit: int | None) -> None:
        if progress is not None:
            progress(
                PricedProgress(
                    "planning",
                    candidate,
                    upper,
                    None,
                    time.perf_counter() - started,
                    candidates=candidates,
                    trade_limit=limit,
                )
            )

    if options.trade_limits:
        t = time.perf_counter()
        policy = _choose_trade_limit(
            net, policy, criterion, reference, laws, options, planning_report
        )
        seconds["trade_limit"] = time.perf_counter() - t

    def certify_report(replications: int, bound: float, low: float | None) -> None:
        if progress is not None:
            progress(
                PricedProgress(
                    "certifying", replications, bound, low, time.perf_counter() - started
                )
            )

    t = time.perf_counter()
    certificate = _certify(net, policy, criterion, reference, options, certify_report, upper)
    seconds["certify"] = time.perf_counter() - t
    seconds["total"] = time.perf_counter() - started
    return replace(policy, certificate=certificate, seconds=seconds)


def pricing_history(
    spec: NetworkSpec, *, criterion: Criterion = "discounted", options: PricedOptions | None = None
) -> list[float]:
    """The pricing objective after each iteration (the best so far): for tests and
    benchmarks."""
    options = options or PricedOptions()
    net = _network(spec)
    laws = _do_nothing_laws(net)
    oracle = _Oracle(net, criterion, laws)
    result = _price(
        oracle,
        _initial_prices(net, laws, oracle),
        _price_box(net),
        options,
        lambda _i, _b: None,
        time.perf_counter(),
    )
    return result.history


# -- exact evaluation of the plan -------------------------------------------------------------


def _evaluation_model(spec: NetworkSpec, limits: SizeLimits | None) -> TransferModel:
    """The network's kernels and rewards as a TransferModel whose flow table holds only 'move
    nothing' (the plan supplies the moves)."""
    limits = limits or SizeLimits()
    net = _network(spec)
    states = 1
    for c in net.capacities:
        states *= int(c) + 1
    if states * net.phases > limits.max_states:
        raise ModelTooLargeError(
            f"exact evaluation covers up to {limits.max_states:,} states; the network has "
            f"{states * net.phases:,}",
            states=states * net.phases,
            pairs=None,
        )
    shape = tuple(int(c) + 1 for c in net.capacities)
    reward = np.zeros((net.phases, *shape))
    for i, rewards in enumerate(net.rewards):
        axis = [1] * len(shape)
        axis[i] = -1
        for d in range(net.phases):
            reward[d] += rewards[d].reshape(axis)
    return TransferModel(
        location_ids=tuple(spec.location_ids),
        capacities=net.capacities,
        lane_from=net.lane_from,
        lane_to=net.lane_to,
        lane_costs=net.lane_costs,
        dispatch_costs=np.zeros(net.n_lanes),
        floors=np.zeros((net.phases, net.capacities.size), dtype=np.int64),
        flows=np.zeros((1, net.n_lanes), dtype=np.int64),
        kernels=tuple(tuple(k[d] for k in net.kernels) for d in range(net.phases)),
        reward=reward,
        allowed=np.ones((net.phases, 1), dtype=np.bool_),
        discount=spec.discount,
    )


def _plan_chain(model: TransferModel, policy: PricedPolicy) -> PolicyChain:
    states = np.indices(model.shape).reshape(model.n_locations, -1).T.astype(np.int64)
    incidence = lane_incidence(model.lane_from, model.lane_to, model.n_locations)
    post = np.empty((model.n_phases, model.n_states), dtype=np.int64)
    reward = np.empty((model.n_phases, model.n_states))
    for d in range(model.n_phases):
        for start in range(0, model.n_states, _PLAN_CHUNK):
            chunk = states[start : start + _PLAN_CHUNK]
            flows = policy.plan_batch(chunk, phase=d)
            index = (chunk + flows @ incidence) @ model.strides
            post[d, start : start + chunk.shape[0]] = index
            reward[d, start : start + chunk.shape[0]] = (
                model.reward[d].reshape(-1)[index]
                - flows @ model.lane_costs
                - (flows > 0) @ policy.dispatch_costs
            )
    return PolicyChain(model, post, reward.reshape(-1))


def evaluate_plan_exactly(
    spec: NetworkSpec,
    policy: PricedPolicy,
    criterion: Criterion,
    *,
    limits: SizeLimits | None = None,
) -> NDArray[np.float64]:
    """The exact value of the priced policy at every phase and closing stock, shape (P, S):
    discounted values, or for the average criterion the bias (evaluate_plan_average gives the
    gain too). Uses the exact evaluator (solver.evaluation) with the plan made at every state by
    plan_batch. Raises ModelTooLargeError beyond the exact size limits."""
    if criterion == "average":
        return evaluate_plan_average(spec, policy, limits=limits)[1]
    model = _evaluation_model(spec, limits)
    chain = _plan_chain(model, policy)
    beta = model.discount
    scale = max(1.0, float(np.abs(chain.reward).max())) / (1.0 - beta)
    values = evaluate_discounted(
        chain,
        beta,
        v0=np.zeros(model.n_phases * model.n_states),
        tolerance=1e-11 * scale,
        method=choose_evaluation(beta),
    )
    result: NDArray[np.float64] = values.reshape(model.n_phases, model.n_states)
    return result


def evaluate_plan_average(
    spec: NetworkSpec, policy: PricedPolicy, *, limits: SizeLimits | None = None
) -> tuple[float, NDArray[np.float64]]:
    """(gain, bias of shape (P, S)) of the priced policy under the average criterion, exactly
    (the policy's chain is assumed unichain, as under any Poisson or negative binomial law)."""
    model = _evaluation_model(spec, limits)
    chain = _plan_chain(model, policy)
    scale = max(1.0, float(np.abs(chain.reward).max()))
    gain, bias = evaluate_average(
        chain,
        gain0=0.0,
        bias0=np.zeros(model.n_phases * model.n_states),
        tolerance=1e-10 * scale * math.sqrt(chain.reward.size),
    )
    return gain, bias.reshape(model.n_phases, model.n_states)
