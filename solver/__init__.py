"""stockrelay's solver: optimal overnight transfer policies for retail networks, computed exactly
as Markov decision processes, or for large networks by price decomposition with a certified gap
(solver.priced). Pure numpy/scipy; no I/O."""

from __future__ import annotations

import dataclasses
import time
from typing import Literal

from solver.build import SizeLimits, build_transfer_model
from solver.errors import (
    InvalidModelError,
    InvalidStockError,
    ModelTooLargeError,
    NotUnichainError,
    SolverError,
)
from solver.model import TransferModel
from solver.policy_iteration import solve_modified_policy_iteration, solve_policy_iteration
from solver.priced import (
    PricedLimits,
    check_priced_size,
    evaluate_plan_average,
    evaluate_plan_exactly,
    solve_priced,
)
from solver.priced_result import Certificate, PricedOptions, PricedPolicy, PricedProgress
from solver.result import (
    CRITERIA,
    Alternative,
    Criterion,
    PolicyResult,
    Progress,
    ProgressCallback,
    Recommendation,
)
from solver.spec import NetworkSpec

__all__ = [
    "CRITERIA",
    "Alternative",
    "Certificate",
    "Criterion",
    "InvalidModelError",
    "InvalidStockError",
    "ModelTooLargeError",
    "NetworkSpec",
    "NotUnichainError",
    "PolicyResult",
    "PricedLimits",
    "PricedOptions",
    "PricedPolicy",
    "PricedProgress",
    "Progress",
    "ProgressCallback",
    "Recommendation",
    "SizeLimits",
    "SolverError",
    "TransferModel",
    "build_transfer_model",
    "check_priced_size",
    "evaluate_plan_average",
    "evaluate_plan_exactly",
    "solve_modified_policy_iteration",
    "solve_network",
    "solve_policy_iteration",
    "solve_priced",
]

Method = Literal["howard", "modified", "value-iteration"]


def solve_network(
    spec: NetworkSpec,
    *,
    criterion: Criterion = "discounted",
    method: Method = "howard",
    limits: SizeLimits | None = None,
    progress: ProgressCallback | None = None,
) -> PolicyResult:
    """Build the model of `spec` and solve it; the build time is added to `seconds`.
    `progress` is called after each iteration (see Progress)."""
    if method != "howard" and criterion != "discounted":
        raise ValueError(f"method {method!r} solves the discounted criterion only")
    start = time.perf_counter()
    model = build_transfer_model(spec, limits)
    built = time.perf_counter() - start
    if method == "howard":
        result = solve_policy_iteration(model, criterion=criterion, progress=progress)
    else:
        sweeps = 0 if method == "value-iteration" else 20
        result = solve_modified_policy_iteration(model, sweeps=sweeps, progress=progress)
    seconds = {**result.seconds, "build": built, "total": result.seconds["total"] + built}
    return dataclasses.replace(result, seconds=seconds)
