"""Howard's policy iteration for both criteria, and modified policy iteration.

States are the stacked pairs (phase d, closing stock s) of solver.evaluation; a stationary
network has the one phase 0. A weekly network is a periodic MDP: its Bellman equation

    V_d(s) = max_f [ -cost(f) + R_d(y) + beta * E_d[V_{d+1}(s') | y] ],  y = s + in(f) - out(f),

over the flows f feasible at s and allowed on night d (indices mod 7; phase d's R and E belong
to business day d + 1, see solver.model) is that of a stationary MDP on the stacked states, so
policy iteration on it yields a periodic policy that is optimal among all policies (Riis 1965,
"Discounted Markov programming in a periodic process", Operations Research; from memory). Below,
v, r_sigma and P_sigma are the stacked vectors and operator.

Discounted criterion (Puterman 1994, Markov Decision Processes, sections 6.4 and 6.5):
    1. evaluate:  v_n = v_{sigma_n}, solving (I - beta P_sigma) v = r_sigma (solver.evaluation)
    2. improve:   sigma_{n+1}(d, s) in argmax_f Q_d(s, f),
       Q_d(s, f) = U_{n,d}(s + in(f) - out(f)) - cost(f) (solver.bellman),
       keeping sigma_n(d, s) unless another flow is better by more than a tie tolerance,
    until sigma_{n+1} = sigma_n. Modified policy iteration replaces step 1 by m sweeps
    v <- r_sigma + beta P_sigma v from the last v (m = 0 is value iteration) and stops when
    ||T v - v||_inf < eps (1 - beta) / (2 beta) (Puterman 1994, section 6.5).

Average criterion, unichain (Puterman 1994, section 8.6): step 1 solves h + g = r_sigma + P_sigma h
with h(0) = 0, step 2 maximises U_d(y) = R_d(y) + E_d[h_{d+1}(s') | y] less the move cost. For a
weekly network, h_d(s) + g = r_d(s) + E_d[h_{d+1}] and g is the profit per day averaged over the
week; the unichain check covers the stacked chain.

Starting from the policy that never moves anything, every policy is checked before it is used.
When the loop stops, ties are settled once more from the final values so that among flows within
the tie tolerance of the best the one with fewest units, then lowest cost, is recommended.

Residuals and bounds reported (Puterman 1994, sections 6.3 and 8.5): for a beta-contraction T,
||v* - v||_inf <= ||T v - v||_inf / (1 - beta); under the average criterion
min_s (T h - h)(s) <= g* <= max_s (T h - h)(s).
"""

from __future__ import annotations

import time

import numpy as np
from numpy.typing import NDArray

from solver.bellman import ActionTable, greedy, post_move_values
from solver.chains import every_policy_unichain, unichain_witness
from solver.errors import NotUnichainError
from solver.evaluation import (
    EvaluationMethod,
    PolicyChain,
    choose_evaluation,
    evaluate_average,
    evaluate_discounted,
)
from solver.model import TransferModel
from solver.result import Criterion, PolicyResult, Progress, ProgressCallback, lane_pairs
from solver.spec import WEEKDAYS

__all__ = ["solve_modified_policy_iteration", "solve_policy_iteration"]

# Flows whose values differ by less than this, relative to the value scale, count as tied.
TIE_RTOL = 1e-9
# Policy evaluation accuracy relative to the value scale; well inside the tie tolerance.
EVALUATION_RTOL = 1e-11
# Accuracy of the first evaluation, and how much tighter than the last improvement later ones are.
_FIRST_EVALUATION_RTOL = 1e-4
_TIGHTENING = 1e-2


class _Clock:
    def __init__(self) -> None:
        self.seconds: dict[str, float] = {"evaluate": 0.0, "improve": 0.0}
        self.start = time.perf_counter()

    def add(self, phase: str, since: float) -> float:
        now = time.perf_counter()
        self.seconds[phase] += now - since
        return now

    def elapsed(self) -> float:
        return time.perf_counter() - self.start

    def done(self) -> dict[str, float]:
        return {**self.seconds, "total": self.elapsed()}


def _report(
    progress: ProgressCallback | None, iteration: int, gap: NDArray[np.float64], clock: _Clock
) -> None:
    """Tell `progress` about one iteration; `gap` is what each state gains by its best move
    over its current one, so its maximum is the residual ||T v - v||_inf."""
    if progress is not None:
        progress(Progress(iteration, max(0.0, float(gap.max())), clock.elapsed()))


def solve_policy_iteration(
    model: TransferModel,
    *,
    criterion: Criterion = "discounted",
    evaluation: EvaluationMethod = "auto",
    max_iter: int = 200,
    initial_action: NDArray[np.int64] | None = None,
    progress: ProgressCallback | None = None,
) -> PolicyResult:
    """Optimal transfer policy by Howard's policy iteration.

    initial_action: shape (P, S) (or (S,) with one phase), indices into model.flows of flows
        allowed on each night; default moves nothing.
    progress: called after each policy evaluated and improved (see Progress).
    `iterations` counts the policies evaluated, the last one being the optimal policy.
    Hitting `max_iter` is reported through `converged`, not raised.
    Raises NotUnichainError (average criterion) when a policy has several recurrent classes.
    """
    if max_iter < 1:
        raise ValueError(f"max_iter must be at least 1, got {max_iter}")
    clock = _Clock()
    table = ActionTable.of(model)
    reward_scale = max(1.0, float(np.max(np.abs(model.reward))) + float(table.costs.max()))
    action = _initial(model, initial_action)
    gain = 0.0

    if criterion == "average":
        beta, scale, method = 1.0, reward_scale, "krylov"
        all_unichain = every_policy_unichain(model)

        def evaluate(
            chain: PolicyChain, v0: NDArray[np.float64], tolerance: float, iteration: int
        ) -> NDArray[np.float64]:
            nonlocal gain
            if not all_unichain:
                _require_unichain(model, chain.post_move, iteration)
            gain, bias = evaluate_average(chain, gain0=gain, bias0=v0, tolerance=tolerance)
            return bias

    else:
        beta, scale = model.discount, reward_scale / (1.0 - model.discount)
        method = choose_evaluation(beta) if evaluation == "auto" else evaluation

        def evaluate(
            chain: PolicyChain, v0: NDArray[np.float64], tolerance: float, iteration: int
        ) -> NDArray[np.float64]:
            return evaluate_discounted(chain, beta, v0=v0, tolerance=tolerance, method=method)

    final = EVALUATION_RTOL * scale
    # Early policies are far from optimal and need no precise values: evaluate them loosely,
    # tightening with the size of the last improvement (inexact policy iteration, in the spirit of
    # modified policy iteration). Only an evaluation at `final` accuracy may end the loop.
    tolerance = max(final, _FIRST_EVALUATION_RTOL * scale)
    # Stacked values, phase-major: shape (P * S,).
    values = np.zeros(model.n_phases * model.n_states)
    products, converged, iterations = 0, False, 0
    while iterations < max_iter:
        t = time.perf_counter()
        chain = _chain(model, table, action)
        values = evaluate(chain, values, tolerance, iterations + 1)
        products += chain.products
        t = clock.add("evaluate", t)
        u = post_move_values(model, values, beta)
        tie = TIE_RTOL * max(scale, float(np.max(np.abs(u))))
        candidate, best = greedy(table, u, tie)
        gap = best - (_at_post_move(u, chain.post_move) - table.costs[action])
        new_action = np.where(gap > tie, candidate, action)
        clock.add("improve", t)
        if np.array_equal(new_action, action):
            if tolerance <= final:
                iterations += 1
                converged = True
                _report(progress, iterations, gap, clock)
                break
            tolerance = final
            continue
        iterations += 1
        _report(progress, iterations, gap, clock)
        action = new_action
        tolerance = max(final, min(tolerance, _TIGHTENING * float(gap.max())))

    # Settle ties from the final values toward fewer units, then lower cost: the last greedy
    # step's choice from those values (the loop ends right after it, with `u` and `tie` unchanged).
    t = time.perf_counter()
    canonical = candidate
    if not np.array_equal(canonical, action):
        action = canonical
        chain = _chain(model, table, action)
        values = evaluate(chain, values, final, iterations)
        products += chain.products
        u = post_move_values(model, values, beta)
        best = greedy(table, u, tie)[1]
    clock.add("improve", t)

    slack = best - values.reshape(best.shape)
    if criterion == "average":
        residual = float(slack.max() - slack.min())
        error_bound = max(float(slack.max()) - gain, 0.0)
    else:
        residual = float(np.max(np.abs(slack)))
        error_bound = residual / (1.0 - beta)
    return _result(
        model,
        criterion=criterion,
        method=f"howard/{method}",
        action=action,
        values=values,
        post_move=u,
        gain=gain if criterion == "average" else None,
        iterations=iterations,
        products=products,
        residual=residual,
        error_bound=error_bound,
        converged=converged,
        seconds=clock.done(),
    )


def solve_modified_policy_iteration(
    model: TransferModel,
    *,
    sweeps: int = 20,
    epsilon: float | None = None,
    max_iter: int = 1_000_000,
    progress: ProgressCallback | None = None,
) -> PolicyResult:
    """Optimal discounted policy by modified policy iteration with `sweeps` partial-evaluation
    sweeps per improvement (sweeps = 0 is value iteration).

    progress: called after each improvement step (see Progress).

    epsilon: the returned policy is epsilon-optimal (currency units); default a small fraction
    of the value scale.
    """
    clock = _Clock()
    beta = model.discount
    table = ActionTable.of(model)
    scale = max(1.0, float(np.max(np.abs(model.reward))) + float(table.costs.max())) / (1 - beta)
    epsilon = EVALUATION_RTOL * 100 * scale if epsilon is None else epsilon
    threshold = epsilon * (1 - beta) / (2 * beta)
    v = np.zeros(model.n_phases * model.n_states)
    action = np.zeros((model.n_phases, model.n_states), dtype=np.int64)
    products, converged, iterations, residual = 0, False, 0, np.inf
    while iterations < max_iter:
        iterations += 1
        t = time.perf_counter()
        u = post_move_values(model, v, beta)
        products += 1
        action, best = greedy(table, u, TIE_RTOL * scale)
        residual = float(np.max(np.abs(best.reshape(-1) - v)))
        t = clock.add("improve", t)
        if progress is not None:
            progress(Progress(iterations, residual, clock.elapsed()))
        v = best.reshape(-1)
        if residual < threshold:
            converged = True
            break
        chain = _chain(model, table, action)
        for _ in range(sweeps):
            v = chain.reward + beta * chain.apply(v)
        products += chain.products
        clock.add("evaluate", t)

    return _result(
        model,
        criterion="discounted",
        method="value-iteration" if sweeps == 0 else f"modified/{sweeps}",
        action=action,
        values=v,
        post_move=post_move_values(model, v, beta),
        gain=None,
        iterations=iterations,
        products=products,
        residual=residual,
        # v = T v_prev with ||T v_prev - v_prev|| = residual: ||v* - v|| <= beta res / (1 - beta).
        error_bound=beta * residual / (1 - beta),
        converged=converged,
        seconds=clock.done(),
    )


def _initial(model: TransferModel, initial_action: NDArray[np.int64] | None) -> NDArray[np.int64]:
    shape = (model.n_phases, model.n_states)
    if initial_action is None:
        return np.zeros(shape, dtype=np.int64)
    action = np.asarray(initial_action, dtype=np.int64)
    if action.shape == (model.n_states,) and model.n_phases == 1:
        action = action[None, :]
    if action.shape != shape or action.min() < 0 or action.max() >= model.n_flows:
        raise ValueError(f"initial_action must have shape {shape}: indices into the flow table")
    if not np.all(np.take_along_axis(model.allowed, action, axis=1)):
        raise ValueError("initial_action uses a flow on a night that does not allow it")
    return action.copy()


def _at_post_move(u: NDArray[np.float64], post_move: NDArray[np.int64]) -> NDArray[np.float64]:
    """U_d at the post-move stock of every phase and state: u shape (P, *stock shape),
    post_move shape (P, S); returns shape (P, S)."""
    values: NDArray[np.float64] = np.take_along_axis(u.reshape(u.shape[0], -1), post_move, axis=1)
    return values


def _chain(model: TransferModel, table: ActionTable, action: NDArray[np.int64]) -> PolicyChain:
    post = table.post_move_index(action)
    reward = _at_post_move(model.reward, post) - table.costs[action]
    return PolicyChain(model, post, reward.reshape(-1))


def _require_unichain(model: TransferModel, post_move: NDArray[np.int64], iteration: int) -> None:
    witness = unichain_witness(model, post_move)
    if witness is None:
        return
    z, w = witness

    def describe(index: int) -> str:
        phase, state = divmod(index, model.n_states)
        stock = np.unravel_index(state, model.shape)
        text = ", ".join(
            f"{loc}={int(u)}" for loc, u in zip(model.location_ids, stock, strict=True)
        )
        return f"({text})" if model.n_phases == 1 else f"({text}) on {WEEKDAYS[phase]}"

    raise NotUnichainError(
        f"the average criterion needs every stock level to lead to one common pattern, but under "
        f"the policy of iteration {iteration} closing stock {describe(w)} can never reach "
        f"{describe(z)}, which recurs: long-run profit per day would depend on the starting "
        "stock. Use the discounted criterion, or demand and replenishment laws that can empty "
        "or refill each location"
    )


def _result(
    model: TransferModel,
    *,
    criterion: Criterion,
    method: str,
    action: NDArray[np.int64],
    values: NDArray[np.float64],
    post_move: NDArray[np.float64],
    gain: float | None,
    iterations: int,
    products: int,
    residual: float,
    error_bound: float,
    converged: bool,
    seconds: dict[str, float],
) -> PolicyResult:
    shape = (model.n_phases, model.n_states)
    return PolicyResult(
        criterion=criterion,
        method=method,
        location_ids=model.location_ids,
        capacities=tuple(int(c) for c in model.capacities),
        lanes=lane_pairs(model.lane_from, model.lane_to),
        lane_costs=model.lane_costs,
        dispatch_costs=model.dispatch_costs,
        flows=model.flows,
        phases=model.n_phases,
        allowed=model.allowed,
        floors=model.floors,
        action=action.reshape(shape),
        values=values.reshape(shape),
        post_move_values=post_move.reshape(shape),
        discount=model.discount if criterion == "discounted" else None,
        gain=gain,
        iterations=iterations,
        evaluation_sweeps=products,
        residual=residual,
        error_bound=error_bound,
        converged=converged,
        seconds=seconds,
    )
