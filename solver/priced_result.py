"""Results of the price-decomposed solve (solver.priced): the priced policy, its certificate,
options and progress reports.

The policy is the nightly plan of solver.transfer_plan applied to per-store post-move values
(concave envelopes of them, see `plan_values`): the W_{i,d} of the priced subproblems, or, when
the solve chose a trade limit k (solver.priced), the post-move values of the same subproblems
with every later night's sends and takes limited to k units (`plan_post_move_values`); `plan`,
`plan_batch` and `recommend` all go through `plan_batch`, which is also what the certificate's
simulation and `evaluate_plan_exactly` use, so the policy served is the policy measured.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from functools import cached_property
from typing import Any

import numpy as np
from numpy.typing import NDArray

from solver.errors import InvalidStockError
from solver.model import flow_costs
from solver.result import (
    Alternative,
    Recommendation,
    SolvedNetwork,
    check_stock,
    phase_of_weekday,
)
from solver.transfer_plan import PlanNetwork, PlanRules, concave_envelope, plan_flows

__all__ = ["Certificate", "PricedOptions", "PricedPolicy", "PricedProgress"]

# A plan's cycle must gain more than this fraction of the value scale to be taken.
PLAN_RTOL = 1e-9


@dataclass(frozen=True)
class PricedOptions:
    """Settings of solve_priced.

    max_iterations: pricing iterations (one subproblem solve per store each) at most.
    tolerance: pricing stops when the cutting-plane model predicts less than this relative
        decrease of the bound (fraction of the bound).
    replications: simulated replications for the certificate; None chooses them adaptively,
        doubling from 32 until the interval's half-width is at most target_half_width of the
        bound or max_replications is reached.
    max_replications: cap of the adaptive choice.
    seed: seed of the certificate's random numbers (numpy default_rng).
    time_limit: seconds for pricing (checked between iterations), None for no limit.
    target_half_width: relative half-width aimed at by the adaptive replications; the
        discounted horizon is chosen so that the truncation term is at most a quarter of it.
    confidence: level of the policy value's interval.
    average_days, average_warmup: average criterion, days measured per replication after the
        warm-up days.
    trade_limits: the plan's trade limits tried (units a store may send and take on each later
        night, solver.priced), each simulated against the plain store values and the best
        kept; empty to plan on the plain store values without that simulation (for solves
        whose plan is only a quick comparison).
    """

    max_iterations: int = 1_000
    tolerance: float = 1e-6
    replications: int | None = None
    max_replications: int = 1024
    seed: int = 0
    time_limit: float | None = None
    target_half_width: float = 0.0025
    confidence: float = 0.95
    average_days: int = 3_000
    average_warmup: int = 300
    trade_limits: tuple[int, ...] = (2, 4, 8)

    def __post_init__(self) -> None:
        if self.max_iterations < 1:
            raise ValueError(f"max_iterations must be at least 1, got {self.max_iterations}")
        if not self.tolerance > 0:
            raise ValueError(f"tolerance must be positive, got {self.tolerance}")
        if self.replications is not None and self.replications < 2:
            raise ValueError(f"replications must be at least 2, got {self.replications}")
        if self.max_replications < 2:
            raise ValueError(f"max_replications must be at least 2, got {self.max_replications}")
        if self.time_limit is not None and not self.time_limit > 0:
            raise ValueError(f"time_limit must be positive, got {self.time_limit}")
        if self.average_days < 1 or self.average_warmup < 0:
            raise ValueError("average_days must be at least 1 and average_warmup at least 0")
        if not 0.0 < self.confidence < 1.0:
            raise ValueError(f"confidence must lie in (0, 1), got {self.confidence}")
        if any(limit < 1 for limit in self.trade_limits):
            raise ValueError(f"trade_limits must be at least 1 each, got {self.trade_limits}")
        if len(set(self.trade_limits)) != len(self.trade_limits):
            raise ValueError(f"trade_limits must differ from each other, got {self.trade_limits}")


@dataclass(frozen=True)
class PricedProgress:
    """One progress report, by stage in the order they run:

    "pricing": after each pricing iteration; iteration counts them, continuing through the
        pricing at the reference stock.
    "planning": as the plan's trade limit is chosen (solver.priced), as each candidate is
        prepared (all are then simulated together); iteration = that candidate's number (1 is
        the plain store values), candidates = how many there are, trade_limit = its limit
        (None for the plain store values). Absent when there is nothing to choose
        (PricedOptions.trade_limits empty, or no limit below what the stores can trade).
    "certifying": every 256 simulated days and after each batch of replications; iteration =
        replications finished.

    upper_bound: the best bound so far (pricing: the pricing objective, see solver.priced;
    planning and certifying: the bound at the reference stock); lower_bound: low end of the
    policy value's interval once a batch of the certificate has finished, else None. elapsed:
    seconds since the solve started. candidates and trade_limit are None outside planning."""

    stage: str
    iteration: int
    upper_bound: float
    lower_bound: float | None
    elapsed: float
    candidates: int | None = None
    trade_limit: int | None = None


@dataclass(frozen=True)
class Certificate:
    """How far the priced policy can be from optimal, at one reference closing stock (phase 0).

    reference_stock: per store, the median of its phase-0 stock in the long run under its own
        priced policy (solver.priced).
    upper_bound: the Lagrangian bound at reference_stock (discounted: on the optimal value,
        the smaller of upper_bound(reference_stock) and the bound from prices minimised at
        that stock; average: on the optimal profit per day).
    policy_value: the policy's estimated value there (discounted profit, or profit per day).
    policy_value_interval: confidence interval of the policy's value (discounted: simulation
        interval widened by the truncation bound, see solver.priced).
    certified_gap: (upper_bound - policy_value_interval[0]) / |upper_bound|, a fraction.
    replications: simulated replications behind the interval.
    """

    reference_stock: tuple[int, ...]
    upper_bound: float
    policy_value: float
    policy_value_interval: tuple[float, float]
    certified_gap: float
    replications: int


@dataclass(frozen=True, eq=False)
class PricedPolicy(SolvedNetwork):
    """A price-decomposed transfer policy.

    lanes: (from, to) location indices; lane_costs (L,); lane_limits (P, L), units per lane on
        the night of each phase; network_limit (P,), units over all lanes (-1: no limit).
    prices: (P, L), the lane prices lambda (currency per unit); network_price: (P,), mu >= 0.
    store_values: N arrays (P, C_i + 1): discounted, each store's value in its priced
        subproblem (raised by its Bellman residual / (1 - beta), so that every bound is
        rigorous); average, its bias.
    store_post_move_values: N arrays (P, C_i + 1), W_{i,d}(y) = r_{i,d}(y) + beta
        E[V_{i,d+1}(s') | y] (beta = 1 and the bias for the average criterion).
    constants: (P,), the price term of the bound from each phase: discounted,
        M_d = sum_k beta^k mu_{d+k} U (see solver.priced); average, the gain bound's
        sum_i g_i + mean_d mu_d U in every entry.
    gain: the bound on the optimal profit per day (average criterion), else None.
    plan_post_move_values: N arrays (P, C_i + 1), the values the plan maximises: None for
        store_post_move_values, else those of the priced subproblems with every later night's
        sends and takes limited to `trade_limit` units (solver.priced); the bound and
        `plan_value` keep store_post_move_values.
    trade_limit: that limit (None: the plan uses store_post_move_values).
    dispatch_costs: (L,), currency per night a lane is used; floors, most_out, most_in:
        (P, N), each store's keep_at_least and handling limits on the night of each phase (the
        capacity where there is no limit). The plan keeps them and pays the dispatch costs
        (solver.transfer_plan).
    """

    lane_limits: NDArray[np.int64]
    network_limit: NDArray[np.int64]
    dispatch_costs: NDArray[np.float64]
    floors: NDArray[np.int64]
    most_out: NDArray[np.int64]
    most_in: NDArray[np.int64]
    discount: float | None
    phases: int
    prices: NDArray[np.float64]
    network_price: NDArray[np.float64]
    store_values: tuple[NDArray[np.float64], ...]
    store_post_move_values: tuple[NDArray[np.float64], ...]
    constants: NDArray[np.float64]
    gain: float | None
    certificate: Certificate
    iterations: int
    converged: bool
    seconds: Mapping[str, float] = field(default_factory=dict)
    plan_post_move_values: tuple[NDArray[np.float64], ...] | None = None
    trade_limit: int | None = None

    # -- sizes and stocks --------------------------------------------------------------------

    @property
    def n_states(self) -> int:
        """Stock states of one phase, as a Python int (may exceed int64)."""
        total = 1
        for size in self.shape:
            total *= size
        return total

    @property
    def n_lanes(self) -> int:
        return len(self.lanes)

    def phase_of(self, weekday: int) -> int:
        """The phase of a closing count on this weekday (0 = Monday), as PolicyResult."""
        return phase_of_weekday(weekday, self.phases)

    def _check_stock(self, stock: Sequence[int] | NDArray[np.int64]) -> NDArray[np.int64]:
        return check_stock(self.location_ids, self.capacities, [int(u) for u in stock])

    def state_index(self, stock: Sequence[int]) -> int:
        """Flat row-major index of a closing stock (a Python int); InvalidStockError when it does
        not fit the network."""
        s = self._check_stock(stock)
        index = 0
        for units, size in zip(s, self.shape, strict=True):
            index = index * size + int(units)
        return index

    def _check_phase(self, phase: int) -> None:
        if not 0 <= phase < self.phases:
            raise ValueError(f"phase must lie in 0..{self.phases - 1}, got {phase}")

    # -- values ------------------------------------------------------------------------------

    def upper_bound(self, stock: Sequence[int], *, phase: int = 0) -> float:
        """Discounted: the Lagrangian bound on the optimal value from closing `stock` in `phase`,
        sum_i V_{i,d}(s_i) + M_d. Average: the bound on the optimal profit per day (the same at
        every stock)."""
        self._check_phase(phase)
        s = self._check_stock(stock)
        if self.criterion == "average":
            return float(self.constants[phase])
        total = float(self.constants[phase])
        for values, units in zip(self.store_values, s, strict=True):
            total += float(values[phase, units])
        return total

    @cached_property
    def plan_values(self) -> NDArray[np.float64]:
        """(P, N, max C + 1): concave envelopes of the W_{i,d} used by the plan (equal to W
        where W is concave)."""
        width = max(self.capacities) + 1
        out = np.zeros((self.phases, len(self.capacities), width))
        planned = self.plan_post_move_values
        for i, w in enumerate(self.store_post_move_values if planned is None else planned):
            for d in range(self.phases):
                out[d, i, : w.shape[1]] = concave_envelope(w[d])
        return out

    @cached_property
    def _network(self) -> PlanNetwork:
        return PlanNetwork(
            np.array(self.capacities, dtype=np.int64), *self.lane_ends, self.lane_costs
        )

    @cached_property
    def _rules(self) -> tuple[PlanRules | None, ...]:
        """Each night's rules for the plan, None on a night without any."""
        caps = np.array(self.capacities, dtype=np.int64)
        # Without a handling limit on units received the plan needs a bound it never reaches.
        unlimited = int(caps.sum()) + 1
        rules: list[PlanRules | None] = []
        for d in range(self.phases):
            most_in = np.where(self.most_in[d] >= caps, unlimited, self.most_in[d])
            ruled = (
                np.any(self.floors[d] > 0)
                or np.any(self.most_out[d] < caps)
                or np.any(most_in < unlimited)
                or np.any(self.dispatch_costs > 0)
            )
            rules.append(
                PlanRules(self.floors[d], self.most_out[d], most_in, self.dispatch_costs)
                if ruled
                else None
            )
        return tuple(rules)

    @cached_property
    def _plan_tolerance(self) -> float:
        return PLAN_RTOL * max(1.0, float(np.max(np.abs(self.plan_values))))

    # -- plans -------------------------------------------------------------------------------

    def plan_batch(
        self,
        stocks: NDArray[np.int64],
        *,
        phase: int = 0,
        lane_limits: NDArray[np.int64] | None = None,
    ) -> NDArray[np.int64]:
        """Tonight's units per lane for every closing stock, shape (B, L); stocks: (B, N).

        lane_limits: optional (B, L) limits tighter than the night's (used for alternatives).
        """
        self._check_phase(phase)
        s = np.asarray(stocks, dtype=np.int64)
        caps = np.array(self.capacities, dtype=np.int64)
        if s.ndim != 2 or s.shape[1] != caps.size:
            raise InvalidStockError(
                f"expected stocks of shape (B, {caps.size}), got {tuple(np.shape(stocks))}"
            )
        if s.size and (np.any(s < 0) or np.any(s > caps)):
            row = int(np.argmax(np.any((s < 0) | (s > caps), axis=1)))
            self._check_stock(tuple(int(u) for u in s[row]))
        limits: NDArray[np.int64] = self.lane_limits[phase]
        if lane_limits is not None:
            limits = np.minimum(limits[None, :], lane_limits)
        network = int(self.network_limit[phase])
        return plan_flows(
            self._network,
            s,
            self.plan_values[phase],
            limits,
            None if network < 0 else network,
            self._plan_tolerance,
            self._rules[phase],
        )

    def plan_alongside(
        self,
        others: Sequence[PricedPolicy],
        stocks: NDArray[np.int64],
        *,
        phase: int = 0,
    ) -> NDArray[np.int64]:
        """Tonight's units per lane of this policy and of `others` (the same network and rules,
        other plan values, as the trade limit's candidates) in one batch, shape (G, B, L) for
        stocks (G, B, N) already checked: row b of policy g (this one first) plans stocks[g, b],
        each exactly as its plan_batch would."""
        policies = [self, *others]
        groups, batch, n = stocks.shape
        if groups != len(policies):
            raise ValueError(f"expected stocks for {len(policies)} policies, got {groups}")
        network = int(self.network_limit[phase])
        flows = plan_flows(
            self._network,
            stocks.reshape(groups * batch, n),
            np.stack([policy.plan_values[phase] for policy in policies]),
            self.lane_limits[phase],
            None if network < 0 else network,
            np.array([policy._plan_tolerance for policy in policies]),
            self._rules[phase],
            tables=np.repeat(np.arange(groups), batch),
        )
        return flows.reshape(groups, batch, -1)

    def plan(self, stock: Sequence[int], *, phase: int = 0) -> NDArray[np.int64]:
        """Tonight's units per lane from closing `stock`, shape (L,)."""
        s = self._check_stock(stock)
        flows: NDArray[np.int64] = self.plan_batch(s[None, :], phase=phase)[0]
        return flows

    def _posts(self, stock: NDArray[np.int64], flows: NDArray[np.int64]) -> NDArray[np.int64]:
        posts: NDArray[np.int64] = stock[None, :] + self._network.stock_change(flows)
        return posts

    def plan_value(
        self, stock: Sequence[int] | NDArray[np.int64], flows: NDArray[np.int64], *, phase: int = 0
    ) -> NDArray[np.float64]:
        """The relaxation's value of moving `flows` (shape (K, L)) tonight from `stock` and acting
        optimally afterwards, shape (K,): discounted, sum_i W_{i,d}(y_i) - cost + beta M_{d+1},
        an upper bound on that value in the true network (solver.priced); average, on the bias
        scale, sum_i W_{i,d}(y_i) - cost - gain bound."""
        s = self._check_stock(stock)
        return self.move_values(np.broadcast_to(s, (flows.shape[0], s.size)), flows, phase=phase)

    def move_values(
        self, stocks: NDArray[np.int64], flows: NDArray[np.int64], *, phase: int = 0
    ) -> NDArray[np.float64]:
        """plan_value for a batch: row k moves flows[k] (shape (K, L)) from stocks[k] (shape
        (K, N), already checked), shape (K,)."""
        posts = stocks + self._posts(np.zeros(len(self.capacities), dtype=np.int64), flows)
        total = -(flows @ self.lane_costs) - (flows > 0) @ self.dispatch_costs
        for i, w in enumerate(self.store_post_move_values):
            total = total + w[phase, posts[:, i]]
        if self.criterion == "average":
            result: NDArray[np.float64] = total - float(self.constants[phase])
            return result
        beta = float(self.discount or 0.0)
        result = total + beta * float(self.constants[(phase + 1) % self.phases])
        return result

    def recommend(
        self, stock: Sequence[int], *, phase: int = 0, n_alternatives: int = 3
    ) -> Recommendation:
        """Tonight's moves from closing `stock` in `phase`, in the shape of the exact solver's
        recommendation, with values on the relaxation's scale (`plan_value`):
        expected_value for the plan, value_without_transfers for moving nothing.
        Alternatives: the plan re-made with one of the used lanes closed tonight, best first
        (none when nothing moves)."""
        self._check_phase(phase)
        s = self._check_stock(stock)
        flows = self.plan_batch(s[None, :], phase=phase)[0]
        used = np.flatnonzero(flows)
        candidates = np.zeros((1 + used.size, self.n_lanes), dtype=np.int64)
        candidates[0] = flows
        if used.size:
            limits = np.broadcast_to(self.lane_limits[phase], (used.size, self.n_lanes)).copy()
            limits[np.arange(used.size), used] = 0
            candidates[1:] = self.plan_batch(
                np.broadcast_to(s, (used.size, s.size)).copy(), phase=phase, lane_limits=limits
            )
        nothing = np.zeros((1, self.n_lanes), dtype=np.int64)
        values = self.plan_value(s, np.vstack([candidates, nothing]), phase=phase)
        seen = {tuple(int(x) for x in flows)}
        alternatives: list[Alternative] = []
        order = 1 + np.argsort(-values[1:-1], kind="stable")
        for k in order:
            key = tuple(int(x) for x in candidates[k])
            if key in seen:
                continue
            seen.add(key)
            alternatives.append(Alternative(key, float(values[k])))
        expected, without = float(values[0]), float(values[-1])
        return Recommendation(
            stock=tuple(int(u) for u in s),
            flows=tuple(int(x) for x in flows),
            post_move_stock=tuple(int(u) for u in self._posts(s, flows[None, :])[0]),
            transfer_cost=float(flow_costs(flows, self.lane_costs, self.dispatch_costs)),
            expected_value=expected,
            value_without_transfers=without,
            gain_from_transfers=expected - without,
            alternatives=tuple(alternatives[:n_alternatives]),
        )

    # -- storage -----------------------------------------------------------------------------

    def to_arrays(self) -> tuple[dict[str, NDArray[Any]], dict[str, Any]]:
        """Arrays and JSON-able metadata from which from_arrays rebuilds this policy exactly."""
        arrays: dict[str, NDArray[Any]] = {
            "lanes": np.array(self.lanes, dtype=np.int64).reshape(-1, 2),
            "lane_costs": np.asarray(self.lane_costs, dtype=np.float64),
            "lane_limits": np.asarray(self.lane_limits, dtype=np.int64),
            "network_limit": np.asarray(self.network_limit, dtype=np.int64),
            "dispatch_costs": np.asarray(self.dispatch_costs, dtype=np.float64),
            "floors": np.asarray(self.floors, dtype=np.int64),
            "most_out": np.asarray(self.most_out, dtype=np.int64),
            "most_in": np.asarray(self.most_in, dtype=np.int64),
            "prices": np.asarray(self.prices, dtype=np.float64),
            "network_price": np.asarray(self.network_price, dtype=np.float64),
            "constants": np.asarray(self.constants, dtype=np.float64),
            "store_values": np.concatenate([v.reshape(-1) for v in self.store_values]),
            "store_post_move_values": np.concatenate(
                [v.reshape(-1) for v in self.store_post_move_values]
            ),
            "reference_stock": np.array(self.certificate.reference_stock, dtype=np.int64),
            "certificate_values": np.array(
                [
                    self.certificate.upper_bound,
                    self.certificate.policy_value,
                    *self.certificate.policy_value_interval,
                    self.certificate.certified_gap,
                ],
                dtype=np.float64,
            ),
        }
        if self.plan_post_move_values is not None:
            arrays["plan_post_move_values"] = np.concatenate(
                [v.reshape(-1) for v in self.plan_post_move_values]
            )
        meta: dict[str, Any] = {
            "format": "priced-policy/1",
            "criterion": self.criterion,
            "method": self.method,
            "location_ids": list(self.location_ids),
            "capacities": list(self.capacities),
            "discount": self.discount,
            "phases": self.phases,
            "gain": self.gain,
            "replications": self.certificate.replications,
            "iterations": self.iterations,
            "converged": self.converged,
            "seconds": dict(self.seconds),
            "trade_limit": self.trade_limit,
        }
        return arrays, meta

    @classmethod
    def from_arrays(
        cls, arrays: Mapping[str, NDArray[Any]], meta: Mapping[str, Any]
    ) -> PricedPolicy:
        """Rebuild a policy from to_arrays' output (bit-exact)."""
        if meta.get("format") != "priced-policy/1":
            raise ValueError(f"unknown priced policy format {meta.get('format')!r}")
        capacities = tuple(int(c) for c in meta["capacities"])
        phases = int(meta["phases"])

        def split(flat: NDArray[Any]) -> tuple[NDArray[np.float64], ...]:
            parts, start = [], 0
            for c in capacities:
                size = phases * (c + 1)
                parts.append(
                    np.array(flat[start : start + size], dtype=np.float64).reshape(phases, c + 1)
                )
                start += size
            if start != flat.size:
                raise ValueError("store value arrays do not match the capacities")
            return tuple(parts)

        values = np.asarray(arrays["certificate_values"], dtype=np.float64)
        certificate = Certificate(
            reference_stock=tuple(int(u) for u in arrays["reference_stock"]),
            upper_bound=float(values[0]),
            policy_value=float(values[1]),
            policy_value_interval=(float(values[2]), float(values[3])),
            certified_gap=float(values[4]),
            replications=int(meta["replications"]),
        )
        lanes = np.asarray(arrays["lanes"], dtype=np.int64).reshape(-1, 2)
        gain = meta["gain"]
        # Policies stored before the rules existed were solved without them: no dispatch
        # costs, no floors, handling limits at the capacities.
        caps = np.broadcast_to(np.array(capacities, dtype=np.int64), (phases, len(capacities)))

        def rule(name: str, default: NDArray[Any], dtype: type) -> NDArray[Any]:
            return np.array(arrays.get(name, default), dtype=dtype)

        discount = meta["discount"]
        return cls(
            criterion=meta["criterion"],
            method=str(meta["method"]),
            location_ids=tuple(str(x) for x in meta["location_ids"]),
            capacities=capacities,
            lanes=tuple((int(a), int(b)) for a, b in lanes),
            lane_costs=np.array(arrays["lane_costs"], dtype=np.float64),
            lane_limits=np.array(arrays["lane_limits"], dtype=np.int64),
            network_limit=np.array(arrays["network_limit"], dtype=np.int64),
            dispatch_costs=rule("dispatch_costs", np.zeros(lanes.shape[0]), np.float64),
            floors=rule("floors", np.zeros_like(caps), np.int64),
            most_out=rule("most_out", caps, np.int64),
            most_in=rule("most_in", caps, np.int64),
            discount=None if discount is None else float(discount),
            phases=phases,
            prices=np.array(arrays["prices"], dtype=np.float64),
            network_price=np.array(arrays["network_price"], dtype=np.float64),
            store_values=split(np.asarray(arrays["store_values"])),
            store_post_move_values=split(np.asarray(arrays["store_post_move_values"])),
            constants=np.array(arrays["constants"], dtype=np.float64),
            gain=None if gain is None else float(gain),
            certificate=certificate,
            iterations=int(meta["iterations"]),
            converged=bool(meta["converged"]),
            seconds={str(k): float(v) for k, v in meta["seconds"].items()},
            # Policies stored before trade limits existed plan on the store values.
            plan_post_move_values=(
                split(np.asarray(arrays["plan_post_move_values"]))
                if "plan_post_move_values" in arrays
                else None
            ),
            trade_limit=None if meta.get("trade_limit") is None else int(meta["trade_limit"]),
        )
