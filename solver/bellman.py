"""The Bellman operator of a transfer model, applied through its factored structure.

With symbols as in solver.model, the value of post-move stock y is

    U(y) = R(y) + beta * E[v(s') | y],   E[v(s') | y] = (v x_1 K_1 x_2 K_2 ... x_N K_N)(y)

where x_i applies K_i along axis i (for two locations: K_1 @ v @ K_2.T), and the value of flow f
at closing stock s is Q(s, f) = U(s + in(f) - out(f)) - cost(f). No states-by-states matrix is
ever formed: one expectation costs sum_i (C_i + 1) * n_states multiply-adds.

For the average criterion beta = 1 and v is the bias h.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from solver.model import TransferModel

__all__ = ["ActionTable", "apply_along_axes", "expected_next", "greedy", "post_move_values"]

Box = tuple[slice, ...]


def apply_along_axes(
    tensor: NDArray[np.float64], matrices: Sequence[NDArray[np.float64]]
) -> NDArray[np.float64]:
    """Multiply `tensor` by matrices[i] along axis i: out[y] = sum_s prod_i M_i[y_i, s_i] t[s]."""
    if len(matrices) == 2:
        product: NDArray[np.float64] = matrices[0] @ tensor @ matrices[1].T
        return product
    out = tensor
    for axis, matrix in enumerate(matrices):
        out = np.moveaxis(np.tensordot(matrix, out, axes=([1], [axis])), 0, axis)
    return np.ascontiguousarray(out)


def expected_next(model: TransferModel, v: NDArray[np.float64]) -> NDArray[np.float64]:
    """E[v(s') | y] for every post-move stock y.

    v: shape (n_states,) or model.shape. Returns shape model.shape.
    """
    return apply_along_axes(v.reshape(model.shape), model.kernels)


def post_move_values(
    model: TransferModel, v: NDArray[np.float64], discount: float
) -> NDArray[np.float64]:
    """U(y) = R(y) + discount * E[v(s') | y], shape model.shape, currency units."""
    return model.reward + discount * expected_next(model, v)


@dataclass(frozen=True)
class ActionTable:
    """Precomputed per-flow geometry used by every improvement step."""

    boxes: tuple[tuple[Box, Box], ...]
    shift: NDArray[np.int64]
    costs: NDArray[np.float64]

    @classmethod
    def of(cls, model: TransferModel) -> ActionTable:
        return cls(tuple(model.boxes()), model.flat_shift(), model.flow_costs)

    def post_move_index(self, actions: NDArray[np.int64]) -> NDArray[np.int64]:
        """Flat index of the post-move stock of every state under `actions`, shape (S,)."""
        return np.arange(actions.size, dtype=np.int64) + self.shift[actions]


def greedy(
    table: ActionTable,
    u: NDArray[np.float64],
    tolerance: float,
) -> tuple[NDArray[np.int64], NDArray[np.float64]]:
    """Best flow in every state given post-move values `u` (shape model.shape).

    Flows are scanned in preference order and a later flow replaces the incumbent only when it
    is better by more than `tolerance`, so among flows within `tolerance` of the best the
    preferred one (fewer units, then lower cost) wins. Returns (action index, Q of that action),
    both of shape (n_states,).
    """
    best = np.full(u.shape, -np.inf)
    action = np.zeros(u.shape, dtype=np.int64)
    for k, (states, posts) in enumerate(table.boxes):
        q = u[posts] - table.costs[k]
        incumbent = best[states]
        better = q > incumbent + tolerance
        incumbent[better] = q[better]
        action[states][better] = k
    return action.reshape(-1), best.reshape(-1)
