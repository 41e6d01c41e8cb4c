"""Unichain test of a policy's chain, against quantecon.MarkovChain's recurrent classes."""

from __future__ import annotations

from typing import Any

import numpy as np
import pytest
import quantecon as qe
from hypothesis import given, settings
from hypothesis import strategies as st

from solver import build_transfer_model
from solver.bellman import ActionTable
from solver.chains import common_successor, unichain_witness
from tests.solver.networks import two_stores
from tests.solver.reference import build_reference


def test_poisson_network_has_a_common_successor() -> None:
    # Poisson demand can empty any stockroom and Poisson deliveries may be zero: all-empty stock
    # is reachable in one day from everywhere.
    assert common_successor(build_transfer_model(two_stores())) == (0, 0)


@st.composite
def bounded_laws(draw: st.DrawFn) -> dict[str, Any]:
    weights = draw(st.lists(st.sampled_from([0.0, 0.0, 1.0, 2.0]), min_size=1, max_size=3))
    if sum(weights) == 0:
        weights[-1] = 1.0
    total = sum(weights)
    return {"dist": "pmf", "p": [w / total for w in weights]}


@settings(max_examples=60, deadline=None)
@given(
    st.tuples(bounded_laws(), bounded_laws()),
    st.tuples(bounded_laws(), bounded_laws()),
    st.integers(0, 10_000),
)
def test_witness_agrees_with_quantecon_recurrent_classes(
    demand: tuple[dict[str, Any], dict[str, Any]],
    replenishment: tuple[dict[str, Any], dict[str, Any]],
    seed: int,
) -> None:
    spec = two_stores(capacities=(3, 2), demand=demand, replenishment=replenishment)
    model = build_transfer_model(spec)
    # A random feasible policy: a random flow among those feasible in each state.
    rng = np.random.default_rng(seed)
    table = ActionTable.of(model)
    action = np.zeros(model.n_states, dtype=np.int64)
    for k, (states, _) in enumerate(table.boxes[0]):
        mask = np.zeros(model.shape, dtype=bool)
        mask[states] = True
        pick = mask.reshape(-1) & (rng.random(model.n_states) < 0.4)
        action[pick] = k
    post = table.post_move_index(action)

    # Reference: quantecon.MarkovChain on the explicit transition matrix of the same policy,
    # built independently by brute force in tests/solver/reference.py.
    reference = build_reference(spec)
    _, transition = reference.policy_chain(model.flows[action])
    classes = qe.MarkovChain(transition).num_recurrent_classes

    witness = unichain_witness(model, post)
    assert (witness is None) == (classes == 1)
    if witness is not None:
        z, w = witness
        recurrent = qe.MarkovChain(transition).recurrent_classes
        assert any(z in members for members in recurrent)
        assert not any(z in members and w in members for members in recurrent)
    if common_successor(model) is not None:
        assert classes == 1


@pytest.mark.parametrize("capacities", [(2, 2), (4, 3)])
def test_conserved_total_stock_is_multichain(capacities: tuple[int, int]) -> None:
    one = {"dist": "pmf", "p": [0.0, 1.0]}
    model = build_transfer_model(
        two_stores(capacities=capacities, demand=(one, one), replenishment=(one, one))
    )
    assert common_successor(model) is None
    assert unichain_witness(model, np.arange(model.n_states)) is not None
