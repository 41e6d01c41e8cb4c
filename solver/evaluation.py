"""Policy evaluation without forming P_sigma.

A policy sigma chooses a flow for every phase d and closing stock s (symbols as in
solver.model). With post-move index y_sigma(d, s) and one-day reward
r_sigma(d, s) = R_d(y_sigma(d, s)) - cost(sigma(d, s)), its chain lives on the stacked states
(d, s), phase-major (index d * S + s), and its transition operator is

    (P_sigma v)(d, s) = (P_d v_{d+1})(s) = E_d[v(d + 1 mod P, s') | y_sigma(d, s)],

applied through the per-location kernels of phase d (solver.bellman.expected_next): one
"product" is one such one-day expectation.

One cycle. The P equations V_d = r_d + beta P_d V_{d+1} (indices mod P) are cyclic. Substituting
them into each other around the cycle leaves one system for phase 0 alone,

    V_0 = r~ + beta^P M V_0,    M = P_0 P_1 ... P_{P-1},
    r~ = r_0 + beta P_0 r_1 + beta^2 P_0 P_1 r_2 + ... + beta^{P-1} P_0 ... P_{P-2} r_{P-1},

the chain observed once a cycle (M is stochastic: P days of moves and sales), after which
V_{P-1}, ..., V_1 follow by one backward pass, V_d = r_d + beta P_d V_{d+1}. Errors do not grow on
the way back (each step multiplies them by beta <= 1). This is the usual reduction of a periodic
process to its embedded chain; it avoids iterating on the stacked chain, which is periodic (it
only moves from phase d to phase d + 1, so its eigenvalues include the P-th roots of unity and
it never mixes from step to step), whereas M mixes over P days. With P = 1: r~ = r_0, M = P_0.

Discounted criterion, v_sigma solving (I - beta^P M) v_0 = r~:
  * successive approximation v <- r~ + beta^P M v, stopped by MacQueen's bounds on the span of
    the last change (Puterman 1994, Markov Decision Processes, sections 6.3 and 6.6.3);
  * a Krylov method (BiCGSTAB, falling back to GMRES; scipy.sparse.linalg) on the matrix-free
    LinearOperator I - beta^P M; ||v - v_sigma||_inf <= ||residual||_2 / (1 - beta^P).

Average criterion (unichain), gain g and bias h solving h_d + g = r_d + P_d h_{d+1} with
h_0(0) = 0 (Puterman 1994, section 8.6). Around the cycle (beta = 1): h_0 + P g = r~ + M h_0,
since every product of stochastic matrices keeps constants. The bordered system in the unknowns
(P g, h_0(1), ...) is nonsingular exactly when M has a single recurrent class, which holds
exactly when the stacked chain has one (every phase-0 state reaches the stacked chain's
recurrent class, and that class meets phase 0 in one recurrent class of M, possibly periodic);
it is solved by the same Krylov method, and h_{P-1}, ..., h_1 follow from h_d = r_d - g +
P_d h_{d+1}. g is the profit per day averaged over the cycle.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Literal

import numpy as np
from numpy.typing import NDArray
from scipy.sparse.linalg import LinearOperator, bicgstab, gmres

from solver.bellman import expected_next
from solver.model import TransferModel

__all__ = [
    "EvaluationMethod",
    "PolicyChain",
    "choose_evaluation",
    "evaluate_average",
    "evaluate_discounted",
]

EvaluationMethod = Literal["auto", "successive", "krylov"]

_SUCCESSIVE_UP_TO = 0.95
_GMRES_RESTART = 60
# GMRES is restarted from where it stopped at most this many times before giving up.
_GMRES_ROUNDS = 3


@dataclass
class PolicyChain:
    """The Markov chain of one policy on the stacked states (phase, stock).

    post_move: shape (P, S), flat post-move stock index per phase and closing stock.
    reward: shape (P * S,), r_sigma phase-major, currency per day.
    Counts one-day expectations in `products`.
    """

    model: TransferModel
    post_move: NDArray[np.int64]
    reward: NDArray[np.float64]
    products: int = field(default=0)

    @property
    def phases(self) -> int:
        return int(self.post_move.shape[0])

    def step(self, phase: int, v: NDArray[np.float64]) -> NDArray[np.float64]:
        """(P_phase v)(s) for the values v of the next phase, both of shape (S,)."""
        self.products += 1
        following: NDArray[np.float64] = expected_next(self.model, v, phase).reshape(-1)[
            self.post_move[phase]
        ]
        return following

    def apply(self, v: NDArray[np.float64]) -> NDArray[np.float64]:
        """(P_sigma v)(d, s), shape (P * S,), for v of shape (P * S,)."""
        values = v.reshape(self.phases, -1)
        return np.concatenate(
            [self.step(d, values[(d + 1) % self.phases]) for d in range(self.phases)]
        )


class _Cycle:
    """The chain of a policy observed once a cycle, at phase 0 (see the module docstring):
    `apply` is M, `reward` is r~ for the per-day discount `beta` (1 for the average criterion),
    both on vectors of shape (S,)."""

    def __init__(self, chain: PolicyChain, beta: float) -> None:
        self.chain = chain
        self.beta = beta
        self.rewards = chain.reward.reshape(chain.phases, -1)
        total = self.rewards[-1]
        for d in range(chain.phases - 2, -1, -1):
            total = self.rewards[d] + beta * chain.step(d, total)
        self.reward = total

    def apply(self, v: NDArray[np.float64]) -> NDArray[np.float64]:
        for d in range(self.chain.phases - 1, -1, -1):
            v = self.chain.step(d, v)
        return v

    def unroll(self, v0: NDArray[np.float64], gain: float = 0.0) -> NDArray[np.float64]:
        """All phases' values from phase 0's: v_d = r_d - gain + beta P_d v_{d+1}, backwards
        from d = P - 1. Returns shape (P * S,)."""
        values = np.empty_like(self.rewards)
        values[0] = v0
        following = v0
        for d in range(self.chain.phases - 1, 0, -1):
            following = self.rewards[d] - gain + self.beta * self.chain.step(d, following)
            values[d] = following
        return values.reshape(-1)


def choose_evaluation(discount: float) -> Literal["successive", "krylov"]:
    """Successive approximation with MacQueen's bounds converges at the chain's mixing rate times
    beta; it wins for small discounts, where a sweep costs less than a Krylov step."""
    return "successive" if discount <= _SUCCESSIVE_UP_TO else "krylov"


def evaluate_discounted(
    chain: PolicyChain,
    discount: float,
    *,
    v0: NDArray[np.float64],
    tolerance: float,
    method: Literal["successive", "krylov"],
    max_sweeps: int = 1_000_000,
) -> NDArray[np.float64]:
    """Expected discounted profit of following the policy forever, shape (P * S,).

    v0: starting values, shape (P * S,) (only phase 0's are used).
    tolerance: target bound on ||v - v_sigma||_inf, currency units.
    """
    cycle = _Cycle(chain, discount)
    start = v0[: v0.size // chain.phases]
    cycle_discount = discount**chain.phases
    if method == "successive":
        v = _successive(cycle, cycle_discount, start, tolerance, max_sweeps)
    else:
        v = _krylov_discounted(cycle, cycle_discount, start, tolerance)
    return cycle.unroll(v)


def _successive(
    cycle: _Cycle,
    discount: float,
    v: NDArray[np.float64],
    tolerance: float,
    max_sweeps: int,
) -> NDArray[np.float64]:
    # `discount` is the cycle's, beta^P. MacQueen's bounds: with d = v_next - v, v_sigma lies
    # between v_next + c min(d) and v_next + c max(d), c = discount / (1 - discount). Stopping on
    # the span of d rather than its sup norm
    # removes the slow constant component, and the midpoint of the bounds is returned
    # (Puterman 1994, section 6.6.3).
    c = discount / (1.0 - discount)
    for _ in range(max_sweeps):
        v_next = cycle.reward + discount * cycle.apply(v)
        step = v_next - v
        low, high = float(step.min()), float(step.max())
        v = v_next
        if c * (high - low) / 2 <= tolerance:
            return v + c * (high + low) / 2
    return v


def _krylov_discounted(
    cycle: _Cycle,
    discount: float,
    v0: NDArray[np.float64],
    tolerance: float,
) -> NDArray[np.float64]:
    # `discount` is the cycle's, beta^P. Write v = b / (1 - discount) + u with u(0) = 0. Since
    # M 1 = 1, (I - discount M) v = b 1 + (I - discount M) u: the nearly singular constant
    # direction (eigenvalue 1 - discount) becomes an ordinary unknown, so the Krylov solver
    # converges at a rate set by the chain's mixing rather than by the discount.
    b, u = _bordered_solve(
        cycle, discount, (1.0 - discount) * v0[0], v0 - v0[0], tolerance * (1.0 - discount)
    )
    solution: NDArray[np.float64] = u + b / (1.0 - discount)
    return solution


def evaluate_average(
    chain: PolicyChain,
    *,
    gain0: float,
    bias0: NDArray[np.float64],
    tolerance: float,
) -> tuple[float, NDArray[np.float64]]:
    """Gain (currency per day, averaged over the phases) and bias (shape (P * S,), bias[0] = 0)
    of a unichain policy, to an absolute residual `tolerance` of h + g - r_sigma - P_sigma h
    (2-norm; the residual is that of phase 0, the other phases' equations hold by
    construction)."""
    cycle = _Cycle(chain, 1.0)
    phases = chain.phases
    cycle_gain, h0 = _bordered_solve(
        cycle, 1.0, phases * gain0, bias0[: bias0.size // phases], tolerance
    )
    gain = cycle_gain / phases
    return gain, cycle.unroll(h0, gain)


def _bordered_solve(
    cycle: _Cycle,
    beta: float,
    scalar0: float,
    vector0: NDArray[np.float64],
    atol: float,
) -> tuple[float, NDArray[np.float64]]:
    """Solve c 1 + (I - beta M) w = r~ for (c, w) with w(0) = 0, from (scalar0, vector0): the
    scalar c takes the place of the unknown w(0). With beta = 1 this is the average criterion's
    cycle gain and bias; it is nonsingular when M is unichain."""
    n = cycle.reward.size

    def unpack(x: NDArray[np.float64]) -> tuple[float, NDArray[np.float64]]:
        w = x.reshape(-1).copy()
        c = float(w[0])
        w[0] = 0.0
        return c, w

    def matvec(x: NDArray[np.float64]) -> NDArray[np.float64]:
        c, w = unpack(x)
        return c + w - beta * cycle.apply(w)

    x0 = vector0.copy()
    x0[0] = scalar0
    operator = LinearOperator((n, n), matvec=matvec, dtype=np.float64)
    return unpack(_solve(operator, cycle.reward, x0, atol))


def _solve(
    operator: LinearOperator,
    rhs: NDArray[np.float64],
    x0: NDArray[np.float64],
    atol: float,
) -> NDArray[np.float64]:
    """Solve to an absolute residual `atol` (2-norm). BiCGSTAB first: it needs a handful of
    vectors and no Python-level orthogonalisation, and on these operators (eigenvalues within
    beta of 1) it is about twice as fast as GMRES. Should it break down or stall, GMRES continues
    from its iterate. A solve that still stalls is reported through the caller's residual; the
    best iterate is returned."""
    n = rhs.size
    solution, info = bicgstab(operator, rhs, x0=x0, rtol=0.0, atol=atol, maxiter=max(1000, n))
    x = np.asarray(solution, dtype=np.float64)
    if info == 0 and np.all(np.isfinite(x)):
        return x
    x = x if np.all(np.isfinite(x)) else x0
    for _ in range(_GMRES_ROUNDS):
        solution, info = gmres(
            operator,
            rhs,
            x0=x,
            rtol=0.0,
            atol=atol,
            restart=min(_GMRES_RESTART, n),
            maxiter=max(100, n // _GMRES_RESTART + 1),
        )
        x = np.asarray(solution, dtype=np.float64)
        if info == 0:
            break
    return x
