"""Solving modes: which method solves a network.

A network asks for a mode: `exact` (Howard's policy iteration on every stock state), `priced`
(the Lagrangian relaxation of solver.solve_priced: per-store subproblems under lane prices, a
certified upper bound, and a nightly plan from the per-store values), or `auto`, the default:
exact while the network is within the exact size limits, priced beyond them. A version records
the method its network's mode resolved to (service.db.tables).
"""

from __future__ import annotations

from service.vocabulary import SolveMethodName
from solver import ModelTooLargeError, NetworkSpec, SizeLimits
from solver.build import check_size
from solver.priced import check_priced_size

__all__ = ["resolve_method"]


def resolve_method(spec: NetworkSpec, mode: str, limits: SizeLimits) -> SolveMethodName:
    """The method that solves `spec` in `mode`.

    Raises ModelTooLargeError when the network is too large for that mode: in exact mode beyond
    the exact limits (the message names the priced mode), in priced or auto mode beyond the
    priced limits.
    """
    if mode == "priced":
        check_priced_size(spec)
        return "priced"
    try:
        check_size(spec, limits)
    except ModelTooLargeError as exc:
        if mode == "exact":
            hint = (
                '; send "mode": "priced" (or "auto") to solve it by lane prices, with a '
                "certified optimality gap"
            )
            raise ModelTooLargeError(
                str(exc) + ("" if "priced" in str(exc) else hint),
                states=exc.states,
                pairs=exc.pairs,
            ) from exc
        check_priced_size(spec)
        return "priced"
    return "exact"
