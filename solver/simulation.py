"""Monte Carlo simulation of transfer policies under the model's daily dynamics, with common
random numbers across policies.

One period t (symbols as in solver.model) runs from closing stock s_t to the next closing stock:

    tonight    f_t = flows[sigma_t(s_t)],   y_t = s_t - out(f_t) + in(f_t)
    next day   D_ti ~ demand_i and R_ti ~ replenishment_i, independent across i and t
               sales_ti = min(D_ti, y_ti),  lost_ti = D_ti - sales_ti
               s_{t+1,i} = min(y_ti - sales_ti + R_ti, C_i)
    profit     pi_t = sum_i [m_i sales_ti - h_i y_ti - p_i lost_ti] - cost(f_t)

so E[pi_t | s_t] = R(y_t) - cost(f_t), the one-day reward of solver.build;
E sum_{t >= 0} beta^t pi_t from s_0 = s is the discounted value v_sigma(s) that solver.evaluation
solves for (the first night's move and the next day count as t = 0), and the long-run mean of
pi_t is the gain g_sigma of the average criterion.

A policy sigma is given in one of two forms:
  * a table: indices into model.flows over flat closing-stock states, shape (S,) for a stationary
    policy or (P, S) for a periodic one, day t using row (start_phase + t) % P
    (simulate_policies; checked whole before the run);
  * a plan: a function from a batch of closing stocks, shape (B, N), and the phase of the count
    to the flows of tonight, shape (B, L) (simulate_plans). Plans need no model, so they serve
    networks far too large to tabulate (solver.heuristics, the priced method); their flows are
    checked every night against the lane and network limits, the stock on hand and capacity.

Common random numbers: one uniform u per (day, replication, kind, location), kind 0 demand and
1 replenishment, mapped by the inverse transform X = min{k : F(k) > u} of the location's law F.
Every policy in one run sees the same counts on the same day, so a paired difference between two
policies is not blurred by their meeting different days, and its interval is far tighter than
with independent draws (Law, Simulation Modeling and Analysis, 5th ed., 2015: inverse transform
section 8.2.1, common random numbers section 11.2; from memory).

Intervals are across independent replications: Student t, mean +- t_{n-1, (1 + level) / 2}
s / sqrt(n). A fill rate is the ratio estimator (total units sold) / (total units demanded) with
the delta-method standard error sqrt(sum_j (Y_j - r X_j)^2 / (n (n - 1))) / mean(X)
(Cochran, Sampling Techniques, 3rd ed., 1977, ch. 6; from memory), clipped to [0, 1].
"""

from __future__ import annotations

import math
from collections.abc import Callable, Iterator, Mapping, Sequence
from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy import stats

from solver.build import n_phases
from solver.distributions import count_law
from solver.model import TransferModel, flow_costs
from solver.spec import Distribution, LocationSpec, NetworkSpec

__all__ = [
    "CONFIDENCE",
    "TAIL_PROBABILITY",
    "CountTable",
    "DailyLaws",
    "Interval",
    "Plan",
    "PolicyOutcome",
    "SimulationReport",
    "balance_cover_policy",
    "count_table",
    "daily_laws",
    "do_nothing_policy",
    "draw_counts",
    "mean_demands",
    "simulate_discounted_return",
    "simulate_plans",
    "simulate_policies",
]

Plan = Callable[[NDArray[np.int64], int], NDArray[np.int64]]
"""A policy as a function: closing stocks, shape (B, N), and the phase of their count (0..P-1,
P = 7 for a weekly network, else 1) -> the flows sent that night, shape (B, L), units per lane in
the network's lane order."""

# Level of every interval unless the caller asks for another.
CONFIDENCE = 0.95
# A count table stops at the first count K with P(X > K) <= this; a uniform beyond it gives K + 1.
TAIL_PROBABILITY = 1e-15
# Longest count table built (entries); far beyond any stockroom the solver accepts.
_MAX_TABLE = 1 << 22
# Uniforms drawn at once: bounds the memory of a long run without changing its draws.
_BLOCK_UNIFORMS = 1 << 20


# -- laws and draws ---------------------------------------------------------------------------


@dataclass(frozen=True, eq=False)
class CountTable:
    """Inverse cumulative distribution of a daily count, for sampling by inverse transform.

    cdf: shape (K + 1,), cdf[k] = P(X <= k) for k = 0..K, K the first count with
        P(X > K) <= TAIL_PROBABILITY (an explicit pmf ends at its last entry or earlier).
    mean: E X of the whole law, units per day.
    """

    cdf: NDArray[np.float64]
    mean: float

    def quantile(self, u: NDArray[np.float64]) -> NDArray[np.int64]:
        """min{k : P(X <= k) > u} for uniforms u in [0, 1), same shape as `u`, in units.

        A u beyond the table (probability at most TAIL_PROBABILITY) gives K + 1, the first count
        of the tail: draws that rare cannot move any interval this module reports.
        """
        counts: NDArray[np.int64] = np.searchsorted(self.cdf, u, side="right").astype(np.int64)
        return counts


def count_table(dist: Distribution) -> CountTable:
    """The inverse-transform table of a Poisson, negative binomial or explicit count law."""
    n_points = 64
    law = count_law(dist, n_points)
    while law.sf[-1] > TAIL_PROBABILITY:
        if n_points >= _MAX_TABLE:
            raise ValueError(
                f"the law {dist!r} needs more than {_MAX_TABLE:,} counts to reach a tail of "
                f"{TAIL_PROBABILITY:g}"
            )
        n_points *= 2
        law = count_law(dist, n_points)
    top = int(np.argmax(law.sf <= TAIL_PROBABILITY))
    # 1 - sf is accurate to about 1e-16 in absolute terms, the resolution of the uniforms; the
    # running maximum guards the search against a rounding step downwards.
    cdf = np.maximum.accumulate(1.0 - law.sf[: top + 1])
    return CountTable(cdf, law.mean)


@dataclass(frozen=True)
class DailyLaws:
    """Count tables of every location, per phase of the period: demand[p][i] is location i's
    demand on the day that follows a closing count in phase p (for a weekly network, phase p is
    the weekday of that count, so the day is weekday (p + 1) % 7); one phase when nothing
    depends on the weekday."""

    demand: tuple[tuple[CountTable, ...], ...]
    replenishment: tuple[tuple[CountTable, ...], ...]

    @property
    def n_locations(self) -> int:
        return len(self.demand[0])

    @property
    def n_phases(self) -> int:
        return len(self.demand)


def daily_laws(spec: NetworkSpec) -> DailyLaws:
    """The demand and replenishment tables of every location of `spec`, per phase."""
    days = [(p + 1) % 7 for p in range(n_phases(spec))]
    return DailyLaws(
        demand=tuple(
            tuple(count_table(location.demand_on(d)) for location in spec.locations) for d in days
        ),
        replenishment=tuple(
            tuple(count_table(location.replenishment_on(d)) for location in spec.locations)
            for d in days
        ),
    )


def draw_counts(
    laws: DailyLaws,
    rng: np.random.Generator,
    days: int,
    replications: int,
    first_phase: int = 0,
) -> tuple[NDArray[np.int64], NDArray[np.int64]]:
    """Demand and replenishment counts, both shape (days, replications, N), units per day; day
    t follows a closing count in phase (first_phase + t) % P.

    Uniforms are drawn in C order over (day, replication, kind, location), kind 0 demand and 1
    replenishment, so drawing d1 days and then d2 more (from phase first_phase + d1) gives the
    same counts as drawing d1 + d2 days at once.
    """
    n = laws.n_locations
    uniforms = rng.random((days, replications, 2, n))
    demand = np.empty((days, replications, n), dtype=np.int64)
    replenishment = np.empty_like(demand)
    phases = (first_phase + np.arange(days)) % laws.n_phases
    for p in range(laws.n_phases):
        on = phases == p
        for i in range(n):
            demand[on, :, i] = laws.demand[p][i].quantile(uniforms[on, :, 0, i])
            replenishment[on, :, i] = laws.replenishment[p][i].quantile(uniforms[on, :, 1, i])
    return demand, replenishment


def mean_demands(spec: NetworkSpec) -> NDArray[np.float64]:
    """Mean daily demand of every location over the week, shape (N,), units per day."""
    return np.array(
        [
            np.mean([count_law(loc.demand_on(d), 1).mean for d in range(7)])
            for loc in spec.locations
        ],
        dtype=np.float64,
    )


# -- baseline policies ------------------------------------------------------------------------


def do_nothing_policy(model: TransferModel) -> NDArray[np.int64]:
    """The policy that never moves anything: flow 0 in every state, shape (S,)."""
    return np.zeros(model.n_states, dtype=np.int64)


def balance_cover_policy(
    model: TransferModel, demand_means: Sequence[float] | NDArray[np.float64]
) -> NDArray[np.int64]:
    """A planner's rule of thumb: move stock toward equal days of cover. Shape (P, S), one row
    per phase of the model (P = 1 unless something depends on the weekday).

    demand_means: mean daily demand mu_i of every location, shape (N,), units per day, all > 0
        (e.g. mean_demands(spec)).

    Days of cover at location i is y_i / mu_i; the network-wide cover c = sum_i s_i / sum_i mu_i
    is the same before and after any move. The rule, at closing stock s in phase p:

      * a flow qualifies if it is allowed that night, feasible at s, and pays for itself
        tomorrow: R_p(y) - cost(f) > R_p(s), R_p the model's expected one-day profit after a
        count in phase p (solver.build);
      * among qualifying flows (all within the lane limits and the nightly limit), choose the
        one minimising the imbalance J(y) = sum_i (y_i / mu_i - c)^2 (days squared);
      * move only if that lowers J below J(s); flows with equal J (within 1e-9 of its scale)
        go to the earlier row of the flow table: fewer units, then cheaper.

    A heuristic of our own, not an optimisation: it looks one day ahead for the payback and at
    cover, not at value, for the target.
    """
    mu = np.asarray(demand_means, dtype=np.float64)
    if mu.shape != (model.n_locations,):
        raise ValueError(
            f"expected {model.n_locations} mean demands, one per location, got shape {mu.shape}"
        )
    idle = [location for location, m in zip(model.location_ids, mu, strict=True) if not m > 0]
    if idle:
        raise ValueError(
            "days of cover needs a positive mean demand at every location, not at "
            + ", ".join(repr(location) for location in idle)
        )
    stock = np.indices(model.shape, dtype=np.float64)
    network_cover = stock.sum(axis=0) / mu.sum()
    per_location = (-1,) + (1,) * model.n_locations
    imbalance = ((stock / mu.reshape(per_location) - network_cover) ** 2).sum(axis=0)
    tolerance = 1e-9 * max(1.0, float(imbalance.max()))
    payback_tolerance = 1e-9 * max(1.0, float(np.abs(model.reward).max()))

    table = np.zeros((model.n_phases, model.n_states), dtype=np.int64)
    for p in range(model.n_phases):
        boxes = model.boxes(p)
        reward = model.reward[p]
        best = imbalance.copy()
        action = np.zeros(model.shape, dtype=np.int64)
        for k in model.phase_flows[p]:
            if k == 0:
                continue
            states, posts = boxes[k]
            candidate = imbalance[posts]
            pays = reward[posts] - model.flow_costs[k] > reward[states] + payback_tolerance
            incumbent = best[states]  # a view: updating it updates `best`
            better = pays & (candidate < incumbent - tolerance)
            incumbent[better] = candidate[better]
            action[states][better] = k
        table[p] = action.reshape(-1)
    return table


# -- results ----------------------------------------------------------------------------------


@dataclass(frozen=True)
class Interval:
    """An estimate and its confidence interval, in the units of the quantity.

    With one replication no spread can be estimated: low = -inf and high = inf (or the bounds
    of a fraction).
    """

    mean: float
    low: float
    high: float

    @property
    def half_width(self) -> float:
        return (self.high - self.low) / 2.0

    def __contains__(self, value: float) -> bool:
        return self.low <= value <= self.high


@dataclass(frozen=True)
class PolicyOutcome:
    """What one policy did over the measured days of every replication.

    profit_per_day: currency per day, move costs deducted.
    fill_rate: units sold / units demanded (1 when nothing was demanded).
    fill_rate_by_location: the same per location id.
    stockout_days: fraction of location-days with unmet demand.
    stockout_days_by_location: fraction of days with unmet demand, per location id.
    units_moved_per_night: units moved over all lanes per night.
    move_cost_per_day: currency per day spent on moves.
    difference_to_reference: profit per day of this policy minus that of the report's reference
        policy, paired by replication (common random numbers); None without a reference.
    """

    name: str
    profit_per_day: Interval
    fill_rate: Interval
    fill_rate_by_location: dict[str, Interval]
    stockout_days: Interval
    stockout_days_by_location: dict[str, Interval]
    units_moved_per_night: Interval
    move_cost_per_day: Interval
    difference_to_reference: Interval | None


@dataclass(frozen=True)
class SimulationReport:
    """Outcomes of several policies on the same simulated days.

    days: measured days per replication, after warmup_days that are simulated but not counted.
    start_stock: closing stock of every replication before the first night, per location.
    confidence: level of every interval.
    outcomes: one per policy, in the order given.
    """

    location_ids: tuple[str, ...]
    days: int
    replications: int
    warmup_days: int
    start_stock: tuple[int, ...]
    confidence: float
    reference: str | None
    outcomes: tuple[PolicyOutcome, ...]

    def outcome(self, name: str) -> PolicyOutcome:
        """The outcome of the policy called `name`; KeyError if there is none."""
        for outcome in self.outcomes:
            if outcome.name == name:
                return outcome
        raise KeyError(name)


# -- simulation -------------------------------------------------------------------------------


def simulate_policies(
    spec: NetworkSpec,
    model: TransferModel,
    policies: Mapping[str, ArrayLike],
    *,
    days: int,
    replications: int,
    rng: np.random.Generator,
    start_stock: Sequence[int] | None = None,
    warmup_days: int = 0,
    reference: str | None = None,
    start_phase: int = 0,
    confidence: float = CONFIDENCE,
) -> SimulationReport:
    """Simulate every policy on the same draws and compare them.

    spec, model: the network and the model built from it (build_transfer_model(spec)).
    policies: name -> flow indices into model.flows, shape (S,) or (P, S) (see module docs).
    days: measured days per replication (>= 1); warmup_days more are simulated first and not
        counted. Day t, counted from the first simulated day, uses row (start_phase + t) % P.
    replications: independent replications (>= 1); intervals are across them.
    start_stock: closing stock before the first night, one count per location, the same for
        every replication; None starts every location at capacity // 2.
    reference: name of one of `policies`; every outcome then carries its paired difference in
        profit per day to it.
    Raises ValueError for a policy of the wrong shape, an index outside the flow table or a
    flow infeasible at some state, and for sizes or a start stock out of range.
    """
    _check_model(spec, model)
    plans = {
        name: _table_plan(model, _policy_table(model, name, policy))
        for name, policy in policies.items()
    }
    settings = _Run(
        days, replications, rng, start_stock, warmup_days, reference, start_phase, confidence
    )
    return _compare(spec, plans, settings, checked=False)


def simulate_plans(
    spec: NetworkSpec,
    plans: Mapping[str, Plan],
    *,
    days: int,
    replications: int,
    rng: np.random.Generator,
    start_stock: Sequence[int] | None = None,
    warmup_days: int = 0,
    reference: str | None = None,
    start_phase: int = 0,
    confidence: float = CONFIDENCE,
) -> SimulationReport:
    """simulate_policies for policies given as plans (see module docs): no model is built, so
    any network the specification allows can be simulated. Each night's flows are checked;
    ValueError names the plan, the stock and the limit broken."""
    periods = n_phases(spec)

    def on_phase(plan: Plan) -> Plan:
        # The simulation counts days; a plan is asked with the phase of the count.
        return lambda stock, day: plan(stock, day % periods)

    settings = _Run(
        days, replications, rng, start_stock, warmup_days, reference, start_phase, confidence
    )
    return _compare(
        spec, {name: on_phase(plan) for name, plan in plans.items()}, settings, checked=True
    )


@dataclass(frozen=True, eq=False)
class _Run:
    """The settings of one comparison, as simulate_policies and simulate_plans take them."""

    days: int
    replications: int
    rng: np.random.Generator
    start_stock: Sequence[int] | None
    warmup_days: int
    reference: str | None
    start_phase: int
    confidence: float


def _compare(
    spec: NetworkSpec, plans: Mapping[str, Plan], run: _Run, *, checked: bool
) -> SimulationReport:
    days, replications, warmup_days = run.days, run.replications, run.warmup_days
    reference, start_phase, confidence = run.reference, run.start_phase, run.confidence
    if not plans:
        raise ValueError("no policies to simulate")
    if reference is not None and reference not in plans:
        raise ValueError(
            f"reference {reference!r} is not one of the policies "
            f"({', '.join(repr(name) for name in plans)})"
        )
    _check_sizes(days, replications, warmup_days, start_phase, confidence)
    names = list(plans)
    network = _Network.of(spec)
    start = _start_stock(network, run.start_stock)

    k, r, n = len(names), replications, network.n_locations
    profit = np.zeros((k, r))
    units = np.zeros((k, r))
    move_cost = np.zeros((k, r))
    sold = np.zeros((k, r, n))
    short = np.zeros((k, r, n))
    demanded = np.zeros((r, n))
    runs = [(name, plans[name]) for name in names] if checked else None
    days_run = _simulate(
        spec,
        network,
        [plans[name] for name in names],
        start,
        warmup_days + days,
        r,
        run.rng,
        start_phase,
        checked=runs,
    )
    for t, day in enumerate(days_run):
        if t < warmup_days:
            continue
        profit += day.profit
        units += day.units
        move_cost += day.move_cost
        sold += day.sold
        short += day.short
        demanded += day.demand

    per_day = profit / days
    outcomes = []
    for j, name in enumerate(names):
        difference = None
        if reference is not None:
            paired = per_day[j] - per_day[names.index(reference)]
            difference = _t_interval(paired, confidence)
        outcomes.append(
            PolicyOutcome(
                name=name,
                profit_per_day=_t_interval(per_day[j], confidence),
                fill_rate=_ratio_interval(sold[j].sum(axis=1), demanded.sum(axis=1), confidence),
                fill_rate_by_location={
                    location: _ratio_interval(sold[j, :, i], demanded[:, i], confidence)
                    for i, location in enumerate(network.location_ids)
                },
                stockout_days=_t_interval(short[j].sum(axis=1) / (days * n), confidence),
                stockout_days_by_location={
                    location: _t_interval(short[j, :, i] / days, confidence)
                    for i, location in enumerate(network.location_ids)
                },
                units_moved_per_night=_t_interval(units[j] / days, confidence),
                move_cost_per_day=_t_interval(move_cost[j] / days, confidence),
                difference_to_reference=difference,
            )
        )
    return SimulationReport(
        location_ids=network.location_ids,
        days=days,
        replications=replications,
        warmup_days=warmup_days,
        start_stock=tuple(int(u) for u in start),
        confidence=confidence,
        reference=reference,
        outcomes=tuple(outcomes),
    )


def simulate_discounted_return(
    spec: NetworkSpec,
    model: TransferModel,
    policy: ArrayLike,
    start_stock: Sequence[int],
    *,
    discount: float,
    days: int,
    replications: int,
    rng: np.random.Generator,
    start_phase: int = 0,
    confidence: float = CONFIDENCE,
) -> Interval:
    """Mean of sum_{t < days} discount^t pi_t from closing stock `start_stock`, currency units.

    t = 0 is the first night's move and the day after it, as in the solver's discounted values,
    so for a stationary policy the estimate approaches v_sigma(start_stock) as days grow; the
    truncation error is at most discount^days max|r(s, f)| / (1 - discount), r the expected
    one-day profit.
    policy: shape (S,) or (P, S), indices into model.flows. Interval across replications.
    """
    _check_model(spec, model)
    if not 0.0 < discount <= 1.0:
        raise ValueError(f"discount must lie in (0, 1], got {discount}")
    _check_sizes(days, replications, 0, start_phase, confidence)
    plan = _table_plan(model, _policy_table(model, "policy", policy))
    network = _Network.of(spec)
    start = _start_stock(network, start_stock)
    total = np.zeros(replications)
    weight = 1.0
    for day in _simulate(spec, network, [plan], start, days, replications, rng, start_phase):
        total += weight * day.profit[0]
        weight *= discount
    return _t_interval(total, confidence)


@dataclass(frozen=True)
class _Day:
    """One simulated day of K policies in R replications (counts in units, money in currency).

    profit, units, move_cost: shape (K, R). sold, short: shape (K, R, N), short being 1 where
    demand went unmet. demand: shape (R, N), the same for every policy.
    """

    profit: NDArray[np.float64]
    units: NDArray[np.int64]
    move_cost: NDArray[np.float64]
    sold: NDArray[np.int64]
    short: NDArray[np.int64]
    demand: NDArray[np.int64]


@dataclass(frozen=True, eq=False)
class _Network:
    """What a simulated day needs of a specification, as arrays.

    incidence: shape (L, N), +1 at a lane's receiver and -1 at its sender, so that the post-move
    stock is s + f @ incidence. unit_costs, dispatch_costs: shape (L,), currency per unit and per
    night a lane is used. night_limits: shape (P, L), most units per lane on the night of each
    phase; network_limit: most units over all lanes in a night (None: no limit). floors,
    most_out, most_in: shape (P, N), per location and night, the floor (keep_at_least) and the
    handling limits (a large number where there is none).
    """

    location_ids: tuple[str, ...]
    capacities: NDArray[np.int64]
    margin: NDArray[np.float64]
    holding: NDArray[np.float64]
    penalty: NDArray[np.float64]
    senders: NDArray[np.int64]
    incidence: NDArray[np.int64]
    unit_costs: NDArray[np.float64]
    dispatch_costs: NDArray[np.float64]
    night_limits: NDArray[np.int64]
    network_limit: int | None
    floors: NDArray[np.int64]
    most_out: NDArray[np.int64]
    most_in: NDArray[np.int64]

    @classmethod
    def of(cls, spec: NetworkSpec) -> _Network:
        index = {location_id: i for i, location_id in enumerate(spec.location_ids)}
        n, n_lanes = len(index), len(spec.lanes)
        senders = np.zeros((n_lanes, n), dtype=np.int64)
        receivers = np.zeros((n_lanes, n), dtype=np.int64)
        for lane, spec_lane in enumerate(spec.lanes):
            senders[lane, index[spec_lane.from_]] = 1
            receivers[lane, index[spec_lane.to]] = 1
        phases = n_phases(spec)
        unlimited = sum(loc.capacity for loc in spec.locations)

        def per_night(value: Callable[[LocationSpec, int], int | None]) -> NDArray[np.int64]:
            return np.array(
                [
                    [unlimited if (v := value(loc, day)) is None else v for loc in spec.locations]
                    for day in range(phases)
                ],
                dtype=np.int64,
            )

        return cls(
            location_ids=tuple(spec.location_ids),
            capacities=np.array([loc.capacity for loc in spec.locations], dtype=np.int64),
            margin=np.array([loc.unit_margin for loc in spec.locations]),
            holding=np.array([loc.holding_cost for loc in spec.locations]),
            penalty=np.array([loc.stockout_penalty for loc in spec.locations]),
            senders=senders,
            incidence=receivers - senders,
            unit_costs=np.array([lane.unit_cost for lane in spec.lanes], dtype=np.float64),
            dispatch_costs=np.array([lane.dispatch_cost for lane in spec.lanes], dtype=np.float64),
            night_limits=np.array(
                [[lane.max_units_on(day) for lane in spec.lanes] for day in range(phases)],
                dtype=np.int64,
            ),
            network_limit=spec.max_units_per_night,
            floors=per_night(lambda loc, day: loc.keep_at_least_on(day)),
            most_out=per_night(lambda loc, day: loc.max_units_out_on(day)),
            most_in=per_night(lambda loc, day: loc.max_units_in_on(day)),
        )

    @property
    def n_locations(self) -> int:
        return len(self.location_ids)


def _table_plan(model: TransferModel, table: NDArray[np.int64]) -> Plan:
    """A checked policy table (shape (P, S)) as a function of the stock and the day counted from
    the first simulated one: row (start_phase + t) % P, as the module docs say."""

    def plan(stock: NDArray[np.int64], phase: int) -> NDArray[np.int64]:
        flows: NDArray[np.int64] = model.flows[table[phase % table.shape[0], stock @ model.strides]]
        return flows

    return plan


def _simulate(
    spec: NetworkSpec,
    network: _Network,
    plans: Sequence[Plan],
    start: NDArray[np.int64],
    total_days: int,
    replications: int,
    rng: np.random.Generator,
    start_phase: int,
    *,
    checked: Sequence[tuple[str, Plan]] | None = None,
) -> Iterator[_Day]:
    """Step every policy through `total_days` days, vectorised over replications (and over
    policies after each has chosen its flows); yields each day's outcome. With `checked`
    (name, plan) pairs, every night's flows are checked (see _check_flows)."""
    laws = daily_laws(spec)
    n = network.n_locations
    stock = np.broadcast_to(start, (len(plans), replications, n)).copy()
    block = max(1, _BLOCK_UNIFORMS // (replications * 2 * n))
    done = 0
    while done < total_days:
        count = min(block, total_days - done)
        demand_block, replenishment_block = draw_counts(
            laws, rng, count, replications, first_phase=start_phase + done
        )
        for b in range(count):
            phase = start_phase + done + b
            flows = np.stack([plan(stock[k], phase) for k, plan in enumerate(plans)])
            if checked is not None:
                for k, (name, _) in enumerate(checked):
                    _check_flows(network, name, stock[k], flows[k], phase)
            post = stock + flows @ network.incidence
            demand = demand_block[b]
            sold = np.minimum(post, demand)
            lost = demand - sold
            stock = np.minimum(post - sold + replenishment_block[b], network.capacities)
            cost = flow_costs(flows, network.unit_costs, network.dispatch_costs)
            # Sums along the location axis treat every (policy, replication) row alike, so two
            # copies of one policy earn bit-identical profits.
            profit = (sold * network.margin - post * network.holding - lost * network.penalty).sum(
                axis=-1
            ) - cost
            yield _Day(
                profit=profit,
                units=flows.sum(axis=-1),
                move_cost=cost,
                sold=sold,
                short=(lost > 0).astype(np.int64),
                demand=demand,
            )
        done += count


def _check_flows(
    network: _Network,
    name: str,
    stock: NDArray[np.int64],
    flows: NDArray[np.int64],
    phase: int,
) -> None:
    """ValueError unless every row of `flows` (shape (R, L)) is feasible at the matching row of
    `stock` (shape (R, N)) on the night of `phase`."""
    if flows.shape != (stock.shape[0], network.incidence.shape[0]):
        raise ValueError(
            f"plan {name!r} returned flows of shape {flows.shape}; expected "
            f"{(stock.shape[0], network.incidence.shape[0])}, one row per stock and a column "
            "per lane"
        )
    night = phase % network.night_limits.shape[0]
    post = stock + flows @ network.incidence
    sent = flows @ network.senders
    received = sent + post - stock
    below_floor = (sent > 0) & (post < network.floors[night])
    broken = [
        ("a negative number of units on a lane", np.any(flows < 0, axis=1)),
        (
            "more units on a lane than its limit that night",
            np.any(flows > network.night_limits[night], axis=1),
        ),
        ("more than is on hand", np.any(sent > stock, axis=1)),
        ("a location beyond its capacity", np.any(post > network.capacities, axis=1)),
        ("a sending location below its floor (keep_at_least)", np.any(below_floor, axis=1)),
        (
            "more units out of a location than it can send",
            np.any(sent > network.most_out[night], axis=1),
        ),
        (
            "more units into a location than it can take",
            np.any(received > network.most_in[night], axis=1),
        ),
    ]
    if network.network_limit is not None:
        broken.append(
            ("more units than the nightly limit", flows.sum(axis=1) > network.network_limit)
        )
    for what, rows in broken:
        if rows.any():
            row = int(np.argmax(rows))
            moves = ", ".join(str(int(u)) for u in flows[row])
            raise ValueError(
                f"plan {name!r} sends flows ({moves}) at closing stock "
                f"({_describe_stock(network.location_ids, stock[row])}): {what}"
            )


# -- validation -------------------------------------------------------------------------------


def _check_model(spec: NetworkSpec, model: TransferModel) -> None:
    ids = tuple(spec.location_ids)
    capacities = tuple(location.capacity for location in spec.locations)
    lanes = tuple((lane.from_, lane.to, lane.unit_cost, lane.dispatch_cost) for lane in spec.lanes)
    model_lanes = tuple(
        (model.location_ids[a], model.location_ids[b], float(c), float(f))
        for a, b, c, f in zip(
            model.lane_from, model.lane_to, model.lane_costs, model.dispatch_costs, strict=True
        )
    )
    if (
        ids != model.location_ids
        or capacities != tuple(int(c) for c in model.capacities)
        or lanes != model_lanes
    ):
        raise ValueError(
            "the model was not built from this specification (locations, capacities or lanes "
            "differ); build it with build_transfer_model(spec)"
        )


def _check_sizes(
    days: int, replications: int, warmup_days: int, start_phase: int, confidence: float
) -> None:
    if days < 1:
        raise ValueError(f"days must be at least 1, got {days}")
    if replications < 1:
        raise ValueError(f"replications must be at least 1, got {replications}")
    if warmup_days < 0:
        raise ValueError(f"warmup_days must be at least 0, got {warmup_days}")
    if start_phase < 0:
        raise ValueError(f"start_phase must be at least 0, got {start_phase}")
    if not 0.0 < confidence < 1.0:
        raise ValueError(f"confidence must lie in (0, 1), got {confidence}")


def _describe_stock(location_ids: Sequence[str], stock: NDArray[np.int64]) -> str:
    return ", ".join(
        f"{location}={int(u)}" for location, u in zip(location_ids, stock, strict=True)
    )


def _describe_flow(model: TransferModel, k: int) -> str:
    moves = [
        f"{units} {model.location_ids[a]}->{model.location_ids[b]}"
        for units, a, b in zip(model.flows[k], model.lane_from, model.lane_to, strict=True)
        if units
    ]
    return f"flow {k} ({', '.join(moves) or 'no move'})"


def _policy_table(model: TransferModel, name: str, policy: ArrayLike) -> NDArray[np.int64]:
    """`policy` as shape (P, S) after checking its shape, indices and feasibility."""
    table = np.asarray(policy)
    s = model.n_states
    if table.ndim == 1:
        table = table[None, :]
    if table.ndim != 2 or table.shape[0] < 1 or table.shape[1] != s:
        raise ValueError(
            f"policy {name!r} has shape {np.shape(policy)}; expected ({s},) or (P, {s}), one "
            "flow index per closing-stock state (per day of the period)"
        )
    if not np.issubdtype(table.dtype, np.integer):
        raise ValueError(
            f"policy {name!r} must hold integer indices into the flow table, got {table.dtype}"
        )
    table = table.astype(np.int64)
    if model.n_phases > 1 and table.shape[0] not in (1, model.n_phases):
        raise ValueError(
            f"policy {name!r} has {table.shape[0]} rows; a network whose limits or laws depend "
            f"on the weekday needs 1 or {model.n_phases}, one per weekday"
        )
    states = np.indices(model.shape).reshape(model.n_locations, -1).T
    # A row is used on the nights of its phase, or on every night when there is one row.
    allowed: NDArray[np.bool_] = (
        model.allowed if table.shape[0] == model.n_phases else np.all(model.allowed, axis=0)[None]
    )
    for row, actions in enumerate(table):
        where = "" if table.shape[0] == 1 else f" (row {row})"
        closed = ~allowed[row % allowed.shape[0]][np.clip(actions, 0, model.n_flows - 1)]
        if closed.any() and not ((actions < 0) | (actions >= model.n_flows)).any():
            state = int(np.argmax(closed))
            raise ValueError(
                f"policy {name!r}{where} chooses {_describe_flow(model, int(actions[state]))} "
                f"at closing stock ({_describe_stock(model.location_ids, states[state])}) on a "
                "night whose lane or handling limits do not allow it"
            )
        outside = (actions < 0) | (actions >= model.n_flows)
        if outside.any():
            state = int(np.argmax(outside))
            raise ValueError(
                f"policy {name!r}{where} chooses flow {int(actions[state])} at closing stock "
                f"({_describe_stock(model.location_ids, states[state])}), outside the flow table "
                f"0..{model.n_flows - 1}"
            )
        out, inn = model.flow_out[actions], model.flow_in[actions]
        after = states - out + inn
        # A row used on every night must keep the highest floor of any night.
        floors = (
            model.floors[row % model.n_phases]
            if table.shape[0] == model.n_phases
            else model.floors.max(axis=0)
        )
        infeasible = np.any(
            (out > states) | (after > model.capacities) | ((out > 0) & (after < floors)), axis=1
        )
        if infeasible.any():
            state = int(np.argmax(infeasible))
            raise ValueError(
                f"policy {name!r}{where} chooses {_describe_flow(model, int(actions[state]))} "
                f"at closing stock ({_describe_stock(model.location_ids, states[state])}), where "
                "it is not feasible: it sends more than is on hand, fills a location beyond "
                "capacity or leaves a sending location below its floor (keep_at_least)"
            )
    return table


def _start_stock(network: _Network, start_stock: Sequence[int] | None) -> NDArray[np.int64]:
    if start_stock is None:
        return network.capacities // 2
    stock = np.asarray(start_stock)
    ids = network.location_ids
    if stock.shape != (len(ids),) or not np.issubdtype(stock.dtype, np.integer):
        raise ValueError(
            f"start stock must be {len(ids)} whole numbers of units, one per location "
            f"({', '.join(ids)}), got {list(start_stock)}"
        )
    for location, units, capacity in zip(ids, stock, network.capacities, strict=True):
        if not 0 <= units <= capacity:
            raise ValueError(f"start stock at {location!r} is {int(units)}, outside 0..{capacity}")
    return stock.astype(np.int64)


# -- intervals --------------------------------------------------------------------------------


def _t_quantile(n: int, confidence: float) -> float:
    """Two-sided Student t multiplier for n replications; inf when n < 2."""
    if n < 2:
        return math.inf
    return float(stats.t.ppf(0.5 + confidence / 2.0, n - 1))


def _t_interval(values: NDArray[np.float64], confidence: float) -> Interval:
    """Mean of per-replication values, shape (n,), with its Student t interval."""
    mean = float(values.mean())
    if values.size < 2:
        return Interval(mean, -math.inf, math.inf)
    half = _t_quantile(values.size, confidence) * float(values.std(ddof=1)) / math.sqrt(values.size)
    return Interval(mean, mean - half, mean + half)


def _ratio_interval(
    numerator: NDArray[np.float64], denominator: NDArray[np.float64], confidence: float
) -> Interval:
    """sum(numerator) / sum(denominator) over replications, shapes (n,), with the delta-method
    interval of the ratio estimator clipped to [0, 1]; 1 with no width when the denominator
    is 0 throughout."""
    total = float(denominator.sum())
    if total == 0.0:
        return Interval(1.0, 1.0, 1.0)
    ratio = float(numerator.sum()) / total
    n = numerator.size
    if n < 2:
        return Interval(ratio, 0.0, 1.0)
    residual = numerator - ratio * denominator
    error = math.sqrt(float(residual @ residual) / (n * (n - 1))) / (total / n)
    half = _t_quantile(n, confidence) * error
    return Interval(ratio, max(0.0, ratio - half), min(1.0, ratio + half))
