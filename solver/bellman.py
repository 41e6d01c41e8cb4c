"""The Bellman operator of a transfer model, applied through its factored structure.

With symbols as in solver.model, values are kept per phase: v has shape (P, S), v[d] the value
of a closing count in phase d. The value of post-move stock y on the evening of phase d is

    U_d(y) = R_d(y) + beta * E_d[v_{d+1}(s') | y],
    E_d[w(s') | y] = (w x_1 K_1^d x_2 K_2^d ... x_N K_N^d)(y)

(phase indices mod P), where x_i applies K_i^d along axis i (for two locations:
K_1^d @ w @ K_2^d.T), and the value of flow f at closing stock s in phase d is
Q_d(s, f) = U_d(s + in(f) - out(f)) - cost(f), for the flows allowed on night d. This is the
Bellman equation of the periodic MDP, V_d(s) = max_f Q_d(s, f) (Riis 1965, "Discounted Markov
programming in a periodic process", from memory); P = 1 is the stationary case. No
states-by-states matrix is ever formed: one expectation costs sum_i (C_i + 1) * S multiply-adds.

For the average criterion beta = 1 and v is the bias h.
"""

from __future__ import annotations

import math
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
    shape = tensor.shape
    out = tensor
    last = len(matrices) - 1
    for axis, matrix in enumerate(matrices):
        n = shape[axis]
        # Each step is one matrix product on a C-contiguous view, with no transposed copies: the
        # last axis as (rest, n) @ M.T, any other as a stack of M @ (n, trailing) products.
        if axis == last:
            out = out.reshape(-1, n) @ matrix.T
        else:
            out = np.matmul(matrix, out.reshape(math.prod(shape[:axis]), n, -1))
    result: NDArray[np.float64] = out.reshape(shape)
    return result


def expected_next(
    model: TransferModel, v: NDArray[np.float64], phase: int = 0
) -> NDArray[np.float64]:
    """E_phase[v(s') | y] for every post-move stock y: the next closing stock's law is that of
    `phase`, and `v` must be the values of the phase after it.

    v: shape (S,) or model.shape. Returns shape model.shape.
    """
    return apply_along_axes(v.reshape(model.shape), model.kernels[phase])


def post_move_values(
    model: TransferModel, v: NDArray[np.float64], discount: float
) -> NDArray[np.float64]:
    """U_d(y) = R_d(y) + discount * E_d[v_{d+1}(s') | y] for every phase d.

    v: P x S values (any shape of that size, phase-major). Returns shape
    (P, *model.shape), currency units.
    """
    phases = model.n_phases
    values = v.reshape(phases, model.n_states)
    u = np.empty_like(model.reward)
    for d in range(phases):
        u[d] = model.reward[d] + discount * expected_next(model, values[(d + 1) % phases], d)
    return u


@dataclass(frozen=True)
class ActionTable:
    """Precomputed per-flow geometry used by every improvement step.

    boxes: per phase and flow (boxes[d][k]), the slices of the states where flow k is feasible
        in phase d and of their post-move stocks (phases with the same floors share one tuple).
    shift: shape (A,), change of the flat stock index caused by each flow.
    costs: shape (A,), currency units.
    phase_flows: per phase, the indices of the flows allowed on that night, ascending.
    candidates: per phase, the allowed flows the improvement step scans: those not dominated
        (see `undominated`), ascending.
    """

    boxes: tuple[tuple[tuple[Box, Box], ...], ...]
    shift: NDArray[np.int64]
    costs: NDArray[np.float64]
    phase_flows: tuple[NDArray[np.int64], ...]
    candidates: tuple[NDArray[np.int64], ...]

    @classmethod
    def of(cls, model: TransferModel) -> ActionTable:
        shared: dict[bytes, tuple[tuple[Box, Box], ...]] = {}
        boxes = []
        for d in range(model.n_phases):
            key = model.floors[d].tobytes()
            if key not in shared:
                shared[key] = tuple(model.boxes(d))
            boxes.append(shared[key])
        return cls(
            tuple(boxes),
            model.flat_shift(),
            model.flow_costs,
            model.phase_flows,
            undominated(model),
        )

    def post_move_index(self, actions: NDArray[np.int64]) -> NDArray[np.int64]:
        """Flat stock index of the post-move stock of every state under `actions`.

        actions: shape (S,) or (P, S), flow indices. Returns the same shape.
        """
        return np.arange(actions.shape[-1], dtype=np.int64) + self.shift[actions]


# Flows with the same change of stock are compared pairwise; a larger group is scanned in full.
_MAX_GROUP = 2048


def undominated(model: TransferModel) -> tuple[NDArray[np.int64], ...]:
    """Per phase d, the flows allowed on night d that no earlier allowed flow dominates,
    ascending.

    Flow g dominates a later flow f (g < f in the table's preference order) when both change
    the stock alike (in - out equal), g sends no more out of any location (out_g <= out_f, hence
    in_g <= in_f) and g costs no more. Then wherever f is feasible in phase d so is g: its box
    is at least as large, since with equal in - out the upper ends C_i - in_i + out_i agree and
    the lower ends max(out_i, k_i^d + out_i - in_i) (or 0 when nothing is sent) are no higher
    (solver.model). Both reach the same post-move stock, g at no higher cost, so in the scan of
    `greedy` f never displaces g or whatever displaced g: leaving f out changes neither the
    chosen flows nor their values. (Relays that cost more than the direct lane are the common
    case: they move the same stock through a third store.)
    """
    # Flows that change the stock alike shift the flat stock index alike; the converse may fail
    # (a flat index is a mixed-radix number and a change may have digits of either sign), so
    # groups of equal shift are split by the change itself below.
    shift = model.flat_shift()
    order = np.argsort(shift, kind="stable")
    bounds = np.flatnonzero(np.diff(shift[order])) + 1
    dominated = np.zeros((model.n_phases, model.n_flows), dtype=np.bool_)
    if bounds.size == model.n_flows - 1:  # every change of stock is made by one flow only
        return model.phase_flows
    delta = model.flow_in - model.flow_out
    for members in np.split(order, bounds):
        if members.size < 2 or members.size > _MAX_GROUP:
            continue
        members = np.sort(members)
        out, cost, change = model.flow_out[members], model.flow_costs[members], delta[members]
        # beats[g, f]: member g dominates member f (members are ascending).
        beats = np.all(out[:, None, :] <= out[None, :, :], axis=2) & (cost[:, None] <= cost)
        beats &= np.all(change[:, None, :] == change[None, :, :], axis=2)
        beats &= members[:, None] < members[None, :]
        for d in range(model.n_phases):
            allowed = model.allowed[d, members]
            dominated[d, members] |= np.any(beats & allowed[:, None], axis=0)
    return tuple(
        np.flatnonzero(row & ~dominated[d]).astype(np.int64) for d, row in enumerate(model.allowed)
    )


def greedy(
    table: ActionTable,
    u: NDArray[np.float64],
    tolerance: float,
) -> tuple[NDArray[np.int64], NDArray[np.float64]]:
    """Best allowed flow in every phase and state given post-move values `u` (shape
    (P, *model.shape)).

    Flows are scanned in preference order and a later flow replaces the incumbent only when it
    is better by more than `tolerance`, so among flows within `tolerance` of the best the
    preferred one (fewer units, then lower cost) wins. Returns (action index, Q of that action),
    both of shape (P, S).
    """
    phases = u.shape[0]
    best = np.full(u.shape, -np.inf)
    action = np.zeros(u.shape, dtype=np.int64)
    for d in range(phases):
        u_d, best_d, action_d = u[d], best[d], action[d]
        boxes = table.boxes[d]
        for k in table.candidates[d]:
            states, posts = boxes[k]
            q = u_d[posts] - table.costs[k]
            incumbent = best_d[states]
            better = q > incumbent + tolerance
            incumbent[better] = q[better]
            action_d[states][better] = k
    return action.reshape(phases, -1), best.reshape(phases, -1)
