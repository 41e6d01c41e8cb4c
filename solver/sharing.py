"""Tonight's moves of many items that share the lanes' transport capacity.

Each item m of an assortment has its own optimal policy over the same locations and lanes (an
item kept off a lane has no candidate that uses it: solver.assortment). Uncoupled, item m would
send its best flow; a lane's truck, shared by all items, may not carry them all. With symbols
as in solver.model, item m at its closing stock has candidate flows k in K_m (those feasible
tonight), each with a value

    q_k = U_m(y_k) - cost_m(f_k)      (currency; the item's post-move value less move costs)

and uses w_m f_kl of lane l's capacity (w_m the item's volume per unit, 1 when capacity is
counted in units). The coupled problem of the night is the assignment

    OPT = max sum_m q_{k_m}   over one k_m in K_m per item,
          subject to  sum_m w_m f_{k_m, l} <= cap_l  for every lane l with a shared capacity.

Pricing the capacity (Lagrangian relaxation; e.g. Fisher, "The Lagrangian relaxation method
for solving integer programming problems", Management Science 27(1), 1981, from memory) gives
for every price vector pi >= 0 the bound

    D(pi) = sum_m max_{k in K_m} (q_k - pi . w_m f_k) + pi . cap  >=  OPT,

convex and piecewise linear in pi, with subgradient cap - (load of the maximisers). D is
minimised by Kelley's cutting-plane method (Kelley 1960, J. SIAM 8(4)) on the box
0 <= pi_l <= pi_max_l, where pi_max_l = max over candidates using lane l of
(q_k - q_{nothing}) / (w_m f_kl): beyond it no item gains by using lane l, so D only grows.
Kelley's method stops in finitely many steps on a polyhedral function; the LP of the cuts
(scipy.optimize.linprog, HiGHS) gives a lower estimate of min D, so the loop stops when the
best D found is within `tolerance` of it.

The allocation: every item takes its best candidate at the best prices; while a lane is over
capacity, the item switch that frees over-capacity load at the least loss of value per unit of
load freed is made (never overloading another lane); then, while some switch raises the value
and fits, the best such switch is made; last, a few rounds of forced switches: the candidates
that would gain most are each tried in turn, making room for them by the same repair, and the
first that raises the total is kept (up to 20,000 candidates in all). Moving nothing always
fits, so the allocation is feasible, and

    allocated value  <=  OPT  <=  bound = min D,

so `bound - value` bounds how far the allocation is from the best one, and
`unconstrained_value - value` is what the shared capacity costs tonight.
"""

from __future__ import annotations

import heapq
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy.optimize import linprog

__all__ = ["ItemChoices", "SharedAllocation", "allocate_shared_capacity"]

_RELATIVE_TOLERANCE = 1e-9
# Forced switches tried after the greedy repair: rounds, and the best-gaining candidates per round.
_FORCED_ROUNDS = 8
_FORCED_TRIES = 16
# ... and only up to this many candidates in all (each try costs a pass over all of them); the
# reported gap covers what larger assortments might miss.
_FORCED_MAX_CANDIDATES = 20_000


@dataclass(frozen=True, eq=False)
class ItemChoices:
    """Every item's candidate flows tonight and their values.

    item: shape (K,), the item of each candidate, non-decreasing, every item 0..M-1 present.
    flows: shape (K, L), units per lane; one candidate of every item moves nothing.
    value: shape (K,), q_k in currency units.
    Within an item, earlier candidates are preferred when values tie.
    """

    item: NDArray[np.int64]
    flows: NDArray[np.int64]
    value: NDArray[np.float64]

    def __post_init__(self) -> None:
        k = self.item.shape[0]
        if self.flows.ndim != 2 or self.flows.shape[0] != k or self.value.shape != (k,):
            raise ValueError(
                f"item, flows and value must have K rows; got {self.item.shape}, "
                f"{self.flows.shape} and {self.value.shape}"
            )
        steps = np.diff(self.item)
        if k == 0 or self.item[0] != 0 or np.any((steps != 0) & (steps != 1)):
            raise ValueError("candidates must be grouped by item, items numbered 0..M-1")
        if np.any(self.flows < 0):
            raise ValueError("flows must be non-negative")
        idle = np.zeros(self.n_items, dtype=bool)
        idle[self.item[~self.flows.any(axis=1)]] = True
        if not idle.all():
            raise ValueError(
                f"item {int(np.argmin(idle))} has no candidate that moves nothing; every item "
                "must be able to stay put"
            )

    @property
    def n_items(self) -> int:
        return int(self.item[-1]) + 1

    @property
    def starts(self) -> NDArray[np.int64]:
        """Index of each item's first candidate, shape (M,)."""
        starts: NDArray[np.int64] = np.flatnonzero(np.r_[True, np.diff(self.item) != 0])
        return starts


@dataclass(frozen=True, eq=False)
class SharedAllocation:
    """The night's allocation of shared lane capacity over items.

    chosen: shape (M,), index into the candidates of each item's flow; flows: shape (M, L).
    value: sum of the chosen candidates' values; unconstrained_value: the same with every item
        taking its best candidate (no shared capacity); bound: min D found, >= the best
        allocation's value. Currency units.
    prices: shape (L,), price per unit of capacity on each lane (0 where not shared).
    load: shape (L,), capacity used on each lane (in the capacity's units).
    """

    chosen: NDArray[np.int64]
    flows: NDArray[np.int64]
    value: float
    unconstrained_value: float
    bound: float
    prices: NDArray[np.float64]
    load: NDArray[np.float64]
    iterations: int
    converged: bool

    @property
    def sharing_cost(self) -> float:
        """What the shared capacity costs tonight: unconstrained_value - value (>= 0)."""
        return self.unconstrained_value - self.value

    @property
    def gap(self) -> float:
        """bound - value: the allocation is at most this far from the best one."""
        return self.bound - self.value


def allocate_shared_capacity(
    choices: ItemChoices,
    volume: ArrayLike,
    capacity: ArrayLike,
    *,
    tolerance: float = 1e-4,
    max_iterations: int = 200,
) -> SharedAllocation:
    """Allocate the lanes' shared capacity over items (module docs).

    volume: shape (M,), capacity used per unit of each item (> 0).
    capacity: shape (L,), capacity of each lane tonight (>= 0; inf where not shared).
    tolerance: stop pricing when the bound is within tolerance x max(1, |bound|) of the cuts'
        lower estimate.
    """
    w = np.asarray(volume, dtype=np.float64)
    cap = np.asarray(capacity, dtype=np.float64)
    m, n_lanes = choices.n_items, choices.flows.shape[1]
    if w.shape != (m,) or not np.all(w > 0):
        raise ValueError(f"volume must hold {m} positive numbers, one per item")
    if cap.shape != (n_lanes,) or np.any(np.isnan(cap)) or np.any(cap < 0):
        raise ValueError(f"capacity must hold {n_lanes} numbers >= 0 (inf: not shared)")

    # Column-major: the pricing loop reads one lane's column at a time.
    use = np.asfortranarray(choices.flows * w[choices.item][:, None])
    starts = choices.starts
    free = _best(choices.value, starts)
    unconstrained = float(choices.value[free].sum())
    shared = np.flatnonzero(np.isfinite(cap) & (use[free].sum(axis=0) > cap))

    prices = np.zeros(n_lanes)
    bound, iterations, converged = unconstrained, 0, True
    if shared.size:
        prices, bound, iterations, converged = _price(
            choices, use, cap, shared, starts, tolerance, max_iterations
        )
    adjusted = choices.value - _charge(use, prices)
    chosen = _repair(choices, use, cap, _best(adjusted, starts))
    value = float(choices.value[chosen].sum())
    return SharedAllocation(
        chosen=chosen,
        flows=choices.flows[chosen],
        value=value,
        unconstrained_value=unconstrained,
        bound=max(bound, value) if shared.size else unconstrained,
        prices=prices,
        load=use[chosen].sum(axis=0),
        iterations=iterations,
        converged=converged,
    )


def _charge(use: NDArray[np.float64], prices: NDArray[np.float64]) -> NDArray[np.float64]:
    """use @ prices, shape (K,), one lane at a time: with a handful of lanes this beats a BLAS
    matrix-vector product, whose threads cost more than the work."""
    total = np.zeros(use.shape[0])
    for lane in np.flatnonzero(prices):
        total += use[:, lane] * prices[lane]
    return total


def _best(score: NDArray[np.float64], starts: NDArray[np.int64]) -> NDArray[np.int64]:
    """Per item, the index of its first candidate with the highest score, shape (M,)."""
    top = np.maximum.reduceat(score, starts)
    counts = np.diff(np.r_[starts, score.size])
    scale = _RELATIVE_TOLERANCE * np.maximum(1.0, np.abs(top))
    at_top = score >= np.repeat(top - scale, counts)
    positions = np.where(at_top, np.arange(score.size), score.size)
    best: NDArray[np.int64] = np.minimum.reduceat(positions, starts)
    return best


def _price(
    choices: ItemChoices,
    use: NDArray[np.float64],
    cap: NDArray[np.float64],
    shared: NDArray[np.int64],
    starts: NDArray[np.int64],
    tolerance: float,
    max_iterations: int,
) -> tuple[NDArray[np.float64], float, int, bool]:
    """Kelley's cutting planes for min D over the prices of the `shared` lanes."""
    n_lanes = use.shape[1]
    nothing = np.repeat(choices.value[_idle(choices, starts)], np.diff(np.r_[starts, use.shape[0]]))
    gain = choices.value - nothing
    top = np.zeros(shared.size)
    for j, lane in enumerate(shared):
        on = use[:, lane] > 0
        if on.any():
            top[j] = max(0.0, float(np.max(gain[on] / use[on, lane])))

    def dual(pi: NDArray[np.float64]) -> tuple[float, NDArray[np.float64]]:
        prices = np.zeros(n_lanes)
        prices[shared] = pi
        charge = _charge(use, prices)
        best = _best(choices.value - charge, starts)
        load = use[best][:, shared].sum(axis=0)
        value = float((choices.value[best] - charge[best]).sum() + pi @ cap[shared])
        return value, cap[shared] - load

    pi = np.zeros(shared.size)
    cuts_a: list[NDArray[np.float64]] = []
    cuts_b: list[float] = []
    best_value, best_pi = np.inf, pi
    for iteration in range(1, max_iterations + 1):
        value, slope = dual(pi)
        if value < best_value:
            best_value, best_pi = value, pi
        # t >= value + slope . (p - pi)  <=>  slope . p - t <= slope . pi - value
        cuts_a.append(np.r_[slope, -1.0])
        cuts_b.append(float(slope @ pi - value))
        objective = np.r_[np.zeros(shared.size), 1.0]
        bounds = [(0.0, float(hi)) for hi in top] + [(None, None)]
        lp = linprog(objective, A_ub=np.array(cuts_a), b_ub=np.array(cuts_b), bounds=bounds)
        if lp.status != 0:
            break
        lower = float(lp.x[-1])
        if best_value - lower <= tolerance * max(1.0, abs(best_value)):
            full = np.zeros(n_lanes)
            full[shared] = best_pi
            return full, best_value, iteration, True
        pi = np.asarray(lp.x[:-1], dtype=np.float64)
    full = np.zeros(n_lanes)
    full[shared] = best_pi
    return full, best_value, max_iterations, False


def _idle(choices: ItemChoices, starts: NDArray[np.int64]) -> NDArray[np.int64]:
    """Index of each item's first candidate that moves nothing, shape (M,)."""
    stays = np.all(choices.flows == 0, axis=1)
    return _best(np.where(stays, 1.0, 0.0), starts)


def _repair(
    choices: ItemChoices,
    use: NDArray[np.float64],
    cap: NDArray[np.float64],
    chosen: NDArray[np.int64],
) -> NDArray[np.int64]:
    """Make `chosen` fit the capacities, improve it by switches that fit, then by forced
    switches (module docs)."""
    chosen = _improve(choices, use, cap, _fit(choices, use, cap, chosen, locked=-1))
    value = float(choices.value[chosen].sum())
    rounds = _FORCED_ROUNDS if choices.item.size <= _FORCED_MAX_CANDIDATES else 0
    for _ in range(rounds):
        gain = choices.value - choices.value[chosen[choices.item]]
        tries = np.argsort(-gain, kind="stable")[:_FORCED_TRIES]
        for k in tries[gain[tries] > _RELATIVE_TOLERANCE * max(1.0, abs(value))]:
            trial = chosen.copy()
            trial[choices.item[k]] = k
            trial = _improve(choices, use, cap, _fit(choices, use, cap, trial, locked=k))
            trial_value = float(choices.value[trial].sum())
            if trial_value > value + _RELATIVE_TOLERANCE * max(1.0, abs(value)):
                chosen, value = trial, trial_value
                break
        else:
            break
    return chosen


def _slack(cap: NDArray[np.float64]) -> NDArray[np.float64]:
    slack: NDArray[np.float64] = _RELATIVE_TOLERANCE * np.maximum(
        1.0, np.where(np.isfinite(cap), cap, 0.0)
    )
    return slack


# Keys of the switches among the given candidates that are worth queueing, and those
# candidates: (keys, rows).
_Score = Callable[[NDArray[np.int64]], tuple[NDArray[np.float64], NDArray[np.int64]]]


class _Queue:
    """Switches in increasing key order, ties to the lowest candidate index: a sorted array
    made by numpy at the start plus a heap of later pushes. Each entry carries the version of
    its item's choice when it was queued (0 for the sorted array), so that entries made stale
    by a switch of their item are skipped; switches that did not fit when they came up are
    held apart until the loads change in their favour (see requeue_held).

    keys, rows: the first switches; fitting: whether each fits now (the others start held)."""

    def __init__(
        self,
        keys: NDArray[np.float64],
        rows: NDArray[np.int64],
        fitting: NDArray[np.bool_],
    ) -> None:
        order = np.lexsort((rows[fitting], keys[fitting]))
        self._keys: list[float] = keys[fitting][order].tolist()
        self._rows: list[int] = rows[fitting][order].tolist()
        self._at = 0
        self._heap: list[tuple[float, int, int]] = []
        self.held: list[int] = rows[~fitting].tolist()

    def push(self, keys: NDArray[np.float64], rows: NDArray[np.int64], version: int) -> None:
        """Queue the switches to `rows` with these keys, their item's choice at `version`."""
        for key, row in zip(keys.tolist(), rows.tolist(), strict=True):
            heapq.heappush(self._heap, (key, row, version))

    def pop(self) -> tuple[float, int, int] | None:
        if self._at < len(self._keys):
            first = (self._keys[self._at], self._rows[self._at], 0)
            if not self._heap or first < self._heap[0]:
                self._at += 1
                return first
        return heapq.heappop(self._heap) if self._heap else None

    def requeue_held(
        self,
        score: _Score,
        fits: Callable[[NDArray[np.int64]], NDArray[np.bool_]],
        version: NDArray[np.int64],
        item: NDArray[np.int64],
    ) -> None:
        """Queue the held switches (each once) that `score` keeps and that fit now, at their
        items' current `version`; hold the others that `score` keeps."""
        keys, rows = score(np.unique(np.array(self.held, dtype=np.int64)))
        now = fits(rows)
        for key, row in zip(keys[now].tolist(), rows[now].tolist(), strict=True):
            heapq.heappush(self._heap, (key, row, int(version[item[row]])))
        self.held = rows[~now].tolist()


def _fit(
    choices: ItemChoices,
    use: NDArray[np.float64],
    cap: NDArray[np.float64],
    chosen: NDArray[np.int64],
    *,
    locked: int,
) -> NDArray[np.int64]:
    """While a lane is over capacity, make the switch that frees over-capacity load at the
    least loss per unit freed, never overloading another lane nor moving the item of
    candidate `locked` (-1: none).

    A switch's rate (loss per unit of over-capacity load freed) depends only on its item's
    current choice and on which lanes are over, and lanes only leave that set (a switch never
    overloads a lane). So the rates are computed for every candidate once per set of
    overloaded lanes (at most L + 1 times) and queued; after a switch only the switched item's
    candidates get new rates. Whether a switch fits depends on the loads: it is checked when
    the switch comes up, and one that does not fit is held until some other lane's load falls.
    The switches made are those of taking, each time, the least rate over every candidate that
    fits (ties to the lowest candidate index)."""
    chosen = chosen.copy()
    item, value, slack = choices.item, choices.value, _slack(cap)
    limit = cap + slack
    load = use[chosen].sum(axis=0)
    movable = np.ones(item.size, dtype=bool)
    if locked >= 0:
        movable[item == item[locked]] = False
    starts = choices.starts
    ends = np.r_[starts[1:], item.size]
    version = np.zeros(starts.size, dtype=np.int64)
    over = load > limit
    budget = use.shape[0] * max(1, use.shape[1])

    def rates(rows: NDArray[np.int64]) -> tuple[NDArray[np.float64], NDArray[np.int64]]:
        """Rates of the useful switches among `rows` at the current choices."""
        delta = use[chosen[item[rows]]] - use[rows]
        freed = np.where(over, delta, 0.0).sum(axis=1)
        useful = (freed > 0) & movable[rows]
        loss = value[chosen[item[rows]]] - value[rows]
        return loss[useful] / freed[useful], rows[useful]

    def fits(rows: NDArray[np.int64]) -> NDArray[np.bool_]:
        delta = use[chosen[item[rows]]] - use[rows]
        fitting: NDArray[np.bool_] = np.all((load - delta <= limit) | over, axis=1)
        return fitting

    while over.any() and budget > 0:
        version[:] = 0
        keys, rows = rates(np.arange(item.size))
        queue = _Queue(keys, rows, fits(rows))
        regrouped = False
        while budget > 0:
            entry = queue.pop()
            if entry is None:
                break
            _, k, seen = entry
            m = int(item[k])
            if seen != version[m]:
                continue
            step = use[chosen[m]] - use[k]
            if not np.all((load - step <= limit) | over):
                queue.held.append(k)
                continue
            load -= step
            chosen[m] = k
            version[m] += 1
            budget -= 1
            now_over = load > limit
            if not np.array_equal(now_over, over):
                over, regrouped = now_over, True
                break
            queue.push(*rates(np.arange(starts[m], ends[m])), int(version[m]))
            if queue.held and np.any((step > 0) & ~over):
                queue.requeue_held(rates, fits, version, item)
        if not regrouped:
            break
    if np.any(load > limit):
        # Only a locked item is left on an overloaded lane: its forced candidate cannot fit.
        chosen[item[locked]] = _idle(choices, starts)[item[locked]]
    return chosen


def _improve(
    choices: ItemChoices,
    use: NDArray[np.float64],
    cap: NDArray[np.float64],
    chosen: NDArray[np.int64],
) -> NDArray[np.int64]:
    """While some switch raises the value and fits, make the best such switch.

    A switch's gain depends only on its item's current choice: the gains are queued and,
    after a switch, only the switched item's are renewed. Whether a switch fits is checked
    when it comes up; one that does not is held until some lane's load falls. The switches
    made are those of taking, each time, the best gain over every switch that fits (ties to
    the lowest candidate index)."""
    chosen = chosen.copy()
    item, value, slack = choices.item, choices.value, _slack(cap)
    limit = cap + slack
    load = use[chosen].sum(axis=0)
    starts = choices.starts
    ends = np.r_[starts[1:], item.size]
    version = np.zeros(starts.size, dtype=np.int64)

    def losses(rows: NDArray[np.int64]) -> tuple[NDArray[np.float64], NDArray[np.int64]]:
        """Minus the gains of the switches among `rows` that raise the value."""
        gain = value[rows] - value[chosen[item[rows]]]
        up = gain > 0
        return -gain[up], rows[up]

    def fits(rows: NDArray[np.int64]) -> NDArray[np.bool_]:
        delta = use[rows] - use[chosen[item[rows]]]
        fitting: NDArray[np.bool_] = np.all(load + delta <= limit, axis=1)
        return fitting

    keys, rows = losses(np.arange(item.size))
    queue = _Queue(keys, rows, fits(rows))
    for _ in range(use.shape[0]):
        best: tuple[int, int, NDArray[np.float64], float] | None = None
        while (entry := queue.pop()) is not None:
            loss, k, seen = entry
            m = int(item[k])
            if seen != version[m]:
                continue
            step = use[k] - use[chosen[m]]
            if not np.all(load + step <= limit):
                queue.held.append(k)
                continue
            best = (k, m, step, -loss)
            break
        if best is None:
            break
        k, m, step, up = best
        if not up > _RELATIVE_TOLERANCE * max(1.0, abs(float(value[k]))):
            break
        load += step
        chosen[m] = k
        version[m] += 1
        queue.push(*losses(np.arange(starts[m], ends[m])), int(version[m]))
        if queue.held and np.any(step < 0):
            queue.requeue_held(losses, fits, version, item)
    return chosen
