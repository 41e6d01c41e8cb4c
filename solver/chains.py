"""Exact unichain test for the Markov chain of a policy, matrix-free.

A finite chain has a single closed (recurrent) class iff some state z can be reached from every
state: every state reaches some closed class, and a closed class can only reach itself. The test
finds a recurrent z and checks that every state reaches it. Reachability uses only the supports
of the kernels (which next stocks have positive probability), so it is exact, not numerical:
the successors of a set X of phase-d states are the phase-(d + 1) states
{s' : B_i^d[y_i, s'_i] for all i, for some y in y_sigma(d, X)}, a boolean version of the
expectation in solver.bellman. States are the stacked (phase, stock) pairs of solver.evaluation,
so a weekly chain is tested as a whole: its periodicity does not matter here.
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np
from numpy.typing import NDArray

from solver.bellman import apply_along_axes
from solver.model import TransferModel

__all__ = ["common_successor", "every_policy_unichain", "unichain_witness"]

_MIXING_STEPS = 64


def common_successor(model: TransferModel, phase: int = 0) -> tuple[int, ...] | None:
    """A stock that every post-move stock of `phase` reaches in one day with positive
    probability, or None.

    It exists whenever each location has a next stock with positive probability from every
    post-move stock, e.g. under Poisson or negative binomial demand, which can empty any
    stockroom.
    """
    stock = []
    for kernel in model.kernels[phase]:
        columns = np.flatnonzero(np.all(kernel > 0, axis=0))
        if columns.size == 0:
            return None
        stock.append(int(columns[0]))
    return tuple(stock)


def every_policy_unichain(model: TransferModel) -> bool:
    """True when every phase has a common successor z_d. Then from any state the chain of any
    policy reaches phase 0 and, one day later, (1 mod P, z_0): that state is reachable from
    everywhere, so every policy is unichain. One check per model instead of one per policy."""
    return all(common_successor(model, d) is not None for d in range(model.n_phases))


def unichain_witness(model: TransferModel, post_move: NDArray[np.int64]) -> tuple[int, int] | None:
    """None when the policy with post-move index `post_move` (shape (P, S), or (S,) with one
    phase) is unichain; otherwise (z, w), stacked indices d * S + s: a recurrent state z and a
    state w from which z cannot be reached."""
    reach = _Reachability(model, post_move.reshape(model.n_phases, model.n_states))
    weight = reach.long_run_weight()
    z = int(np.argmax(weight))
    while True:
        to_z = reach.closure(_single(z, weight.size), reach.predecessors)
        if to_z.all():
            return None
        from_z = reach.closure(_single(z, weight.size), reach.successors)
        if not np.any(from_z & ~to_z):
            return z, int(np.argmin(to_z))
        # z is transient: move to a state it reaches that cannot return; the forward set of
        # the new candidate is strictly smaller, so this ends.
        candidates = np.where(from_z & ~to_z, weight, -1.0)
        z = int(np.argmax(candidates))


def _single(index: int, size: int) -> NDArray[np.bool_]:
    out = np.zeros(size, dtype=np.bool_)
    out[index] = True
    return out


class _Reachability:
    """Steps of a policy's chain on sets and weights of stacked states, shape (P * S,)."""

    def __init__(self, model: TransferModel, post_move: NDArray[np.int64]) -> None:
        self.shape = model.shape
        self.phases = model.n_phases
        self.post_move = post_move
        self.kernels_t = [[kernel.T for kernel in kernels] for kernels in model.kernels]
        self.support = [
            [(kernel > 0).astype(np.float64) for kernel in kernels] for kernels in model.kernels
        ]
        self.support_t = [[b.T for b in support] for support in self.support]

    def _forward(
        self, weights: NDArray[np.float64], matrices: list[list[NDArray[np.float64]]]
    ) -> NDArray[np.float64]:
        """Weight of each state one day later, pushed through `matrices` (transposed kernels or
        supports of each phase)."""
        current = weights.reshape(self.phases, -1)
        out = np.empty_like(current)
        n = current.shape[1]
        for d in range(self.phases):
            # Total weight of the phase-d states arriving at each post-move stock.
            posts = np.bincount(self.post_move[d], weights=current[d], minlength=n)
            pushed = apply_along_axes(posts.astype(np.float64).reshape(self.shape), matrices[d])
            out[(d + 1) % self.phases] = pushed.reshape(-1)
        return out.reshape(-1)

    def successors(self, states: NDArray[np.bool_]) -> NDArray[np.bool_]:
        reached: NDArray[np.bool_] = self._forward(states.astype(np.float64), self.support_t) > 0
        return reached

    def predecessors(self, states: NDArray[np.bool_]) -> NDArray[np.bool_]:
        targets = states.astype(np.float64).reshape(self.phases, -1)
        found = np.empty(targets.shape, dtype=np.bool_)
        for d in range(self.phases):
            following = targets[(d + 1) % self.phases].reshape(self.shape)
            leads = apply_along_axes(following, self.support[d])
            found[d] = leads.reshape(-1)[self.post_move[d]] > 0
        return found.reshape(-1)

    def closure(
        self,
        states: NDArray[np.bool_],
        step: Callable[[NDArray[np.bool_]], NDArray[np.bool_]],
    ) -> NDArray[np.bool_]:
        while True:
            grown = states | step(states)
            if np.array_equal(grown, states):
                return states
            states = grown

    def long_run_weight(self) -> NDArray[np.float64]:
        """State distribution after some steps from uniform: mass gathers on recurrent states."""
        n = self.post_move.size
        mu: NDArray[np.float64] = np.full(n, 1.0 / n)
        for _ in range(_MIXING_STEPS):
            mu = self._forward(mu, self.kernels_t)
        return mu
