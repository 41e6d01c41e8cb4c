"""Exact unichain test for the Markov chain of a policy, matrix-free.

A finite chain has a single closed (recurrent) class iff some state z can be reached from every
state: every state reaches some closed class, and a closed class can only reach itself. The test
finds a recurrent z and checks that every state reaches it. Reachability uses only the supports
of the kernels (which next stocks have positive probability), so it is exact, not numerical:
the successors of a set X are {s' : B_i[y_i, s'_i] for all i, for some y in y_sigma(X)}, a
boolean version of the expectation in solver.bellman.
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np
from numpy.typing import NDArray

from solver.bellman import apply_along_axes
from solver.model import TransferModel

__all__ = ["common_successor", "unichain_witness"]

_MIXING_STEPS = 64


def common_successor(model: TransferModel) -> tuple[int, ...] | None:
    """A stock that every post-move stock reaches in one day with positive probability, or None.

    When it exists, every policy's chain reaches it from every state, so every policy is
    unichain (and aperiodic): one check per model instead of one per policy. It exists whenever
    each location has a next stock with positive probability from every post-move stock, e.g.
    under Poisson or negative binomial demand, which can empty any stockroom.
    """
    stock = []
    for kernel in model.kernels:
        columns = np.flatnonzero(np.all(kernel > 0, axis=0))
        if columns.size == 0:
            return None
        stock.append(int(columns[0]))
    return tuple(stock)


def unichain_witness(model: TransferModel, post_move: NDArray[np.int64]) -> tuple[int, int] | None:
    """None when the policy with post-move index `post_move` (shape (S,)) is unichain;
    otherwise (z, w): a recurrent state z and a state w from which z cannot be reached."""
    reach = _Reachability(model, post_move)
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
    def __init__(self, model: TransferModel, post_move: NDArray[np.int64]) -> None:
        self.shape = model.shape
        self.post_move = post_move
        self.kernels_t = [kernel.T for kernel in model.kernels]
        support = [(kernel > 0).astype(np.float64) for kernel in model.kernels]
        self.support = support
        self.support_t = [b.T for b in support]

    def _scatter(self, weights: NDArray[np.float64]) -> NDArray[np.float64]:
        """Total weight of the states arriving at each post-move stock, shape model.shape."""
        total: NDArray[np.float64] = np.bincount(
            self.post_move, weights=weights, minlength=weights.size
        ).astype(np.float64)
        return total.reshape(self.shape)

    def successors(self, states: NDArray[np.bool_]) -> NDArray[np.bool_]:
        posts = self._scatter(states.astype(np.float64))
        reached: NDArray[np.bool_] = apply_along_axes(posts, self.support_t).reshape(-1) > 0
        return reached

    def predecessors(self, states: NDArray[np.bool_]) -> NDArray[np.bool_]:
        leads = apply_along_axes(states.astype(np.float64).reshape(self.shape), self.support)
        found: NDArray[np.bool_] = leads.reshape(-1)[self.post_move] > 0
        return found

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
            mu = apply_along_axes(self._scatter(mu), self.kernels_t).reshape(-1)
        return mu
