"""Policy evaluation without forming P_sigma.

A policy sigma chooses a flow for every phase d and closing stock s (symbols as in
solver.model). With post-move index y_sigma(d, s) and one-day reward
r_sigma(d, s) = R_d(y_sigma(d, s)) - cost(sigma(d, s)), its chain lives on the stacked states
(d, s), phase-major (index d * S + s), and its transition operator is

    (P_sigma v)(d, s) = E_d[v(d + 1 mod P, s') | y_sigma(d, s)],

applied through the per-location kernels of phase d (solver.bellman.expected_next). P_sigma is an
ordinary stochastic matrix on P x S states, so everything below holds for the stacked system as
written: the discounted equations V_d = r_d + beta P_d V_{d+1} of the seven phases are solved as
one cyclic system. With P > 1 the stacked chain is periodic (phase d only leads to phase d + 1):
its eigenvalues include the P-th roots of unity, so successive approximation contracts at rate
beta at best and, undiscounted, not at all; the Krylov solves below are unaffected.

Discounted criterion, value v_sigma solving (I - beta P_sigma) v = r_sigma:
  * successive approximation v <- r_sigma + beta P_sigma v, stopped when the contraction bound
    beta / (1 - beta) * ||v_new - v||_inf guarantees the requested accuracy
    (Puterman 1994, Markov Decision Processes, section 6.3);
  * a Krylov method (BiCGSTAB, falling back to GMRES; scipy.sparse.linalg) on the matrix-free
    LinearOperator I - beta P_sigma; ||v - v_sigma||_inf <= ||residual||_2 / (1 - beta).

Average criterion (unichain), gain g and bias h solving h + g 1 = r_sigma + P_sigma h with
h(0) = 0 (Puterman 1994, section 8.6): the bordered system in the unknowns (g, h(1), ...),
nonsingular exactly when P_sigma has a single recurrent class, solved by the same Krylov method.
For the stacked chain, g is the profit per day averaged over the week and h(0) = 0 normalises
the bias of phase 0 at the all-empty stock; the system stays nonsingular when the chain is
periodic, since its other unit-modulus eigenvalues differ from 1.
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
    Counts applications of P_sigma in `products`.
    """

    model: TransferModel
    post_move: NDArray[np.int64]
    reward: NDArray[np.float64]
    products: int = field(default=0)

    def apply(self, v: NDArray[np.float64]) -> NDArray[np.float64]:
        """(P_sigma v)(d, s), shape (P * S,), for v of shape (P * S,)."""
        self.products += 1
        phases = self.post_move.shape[0]
        values = v.reshape(phases, -1)
        out = np.empty_like(values)
        for d in range(phases):
            expected = expected_next(self.model, values[(d + 1) % phases], d)
            out[d] = expected.reshape(-1)[self.post_move[d]]
        return out.reshape(-1)


def choose_evaluation(discount: float, phases: int = 1) -> Literal["successive", "krylov"]:
    """Successive approximation with MacQueen's bounds converges at the chain's mixing rate times
    beta; it wins for small discounts, where a sweep costs less than a Krylov step. A periodic
    chain does not mix from step to step (its span contracts at rate beta only), so with
    several phases the Krylov solver is used at every discount."""
    return "successive" if discount <= _SUCCESSIVE_UP_TO and phases == 1 else "krylov"


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

    tolerance: target bound on ||v - v_sigma||_inf, currency units.
    """
    if method == "successive":
        return _successive(chain, discount, v0, tolerance, max_sweeps)
    return _krylov_discounted(chain, discount, v0, tolerance)


def _successive(
    chain: PolicyChain,
    discount: float,
    v: NDArray[np.float64],
    tolerance: float,
    max_sweeps: int,
) -> NDArray[np.float64]:
    # MacQueen's bounds: with d = v_next - v, v_sigma lies between v_next + c min(d) and
    # v_next + c max(d), c = beta / (1 - beta). Stopping on the span of d rather than its sup norm
    # removes the slow constant component, and the midpoint of the bounds is returned
    # (Puterman 1994, section 6.6.3).
    c = discount / (1.0 - discount)
    for _ in range(max_sweeps):
        v_next = chain.reward + discount * chain.apply(v)
        step = v_next - v
        low, high = float(step.min()), float(step.max())
        v = v_next
        if c * (high - low) / 2 <= tolerance:
            return v + c * (high + low) / 2
    return v


def _krylov_discounted(
    chain: PolicyChain,
    discount: float,
    v0: NDArray[np.float64],
    tolerance: float,
) -> NDArray[np.float64]:
    # Write v = b / (1 - beta) + u with u(0) = 0. Since P_sigma 1 = 1,
    # (I - beta P_sigma) v = b 1 + (I - beta P_sigma) u: the nearly singular constant direction
    # (eigenvalue 1 - beta) becomes an ordinary unknown, so the Krylov solver converges at a rate
    # set by the chain's mixing rather than by the discount.
    b, u = _bordered_solve(
        chain, discount, (1.0 - discount) * v0[0], v0 - v0[0], tolerance * (1.0 - discount)
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
    (2-norm)."""
    return _bordered_solve(chain, 1.0, gain0, bias0, tolerance)


def _bordered_solve(
    chain: PolicyChain,
    beta: float,
    scalar0: float,
    vector0: NDArray[np.float64],
    atol: float,
) -> tuple[float, NDArray[np.float64]]:
    """Solve c 1 + (I - beta P_sigma) w = r_sigma for (c, w) with w(0) = 0, from (scalar0,
    vector0): the scalar c takes the place of the unknown w(0). With beta = 1 this is the
    average criterion's gain and bias; it is nonsingular when P_sigma is unichain."""
    n = chain.reward.size

    def unpack(x: NDArray[np.float64]) -> tuple[float, NDArray[np.float64]]:
        w = x.reshape(-1).copy()
        c = float(w[0])
        w[0] = 0.0
        return c, w

    def matvec(x: NDArray[np.float64]) -> NDArray[np.float64]:
        c, w = unpack(x)
        return c + w - beta * chain.apply(w)

    x0 = vector0.copy()
    x0[0] = scalar0
    operator = LinearOperator((n, n), matvec=matvec, dtype=np.float64)
    return unpack(_solve(operator, chain.reward, x0, atol))


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
