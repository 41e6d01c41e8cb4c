"""Priced policies on the command line and in exports: the RESULT.json document of
`stockrelay solve --mode priced`, its summary, progress lines, and the per-state tables of a
priced policy (plan, upper bound) for networks small enough to list every stock.

A priced policy (solver.PricedPolicy) has no table over stock states: it plans each night from
lane prices and per-store values. Where the stock states are few enough (at most
FULL_TABLE_MAX_STATES here, the export limit for the API) the tables are computed from it: the
plan at every stock, the plan's exact value (solver.evaluate_plan_exactly, only within the exact
size limits) and the upper bound at every stock.
"""

from __future__ import annotations

import sys
import time
from collections.abc import Callable
from typing import Any, TextIO

import numpy as np
from numpy.typing import NDArray

from solver import ModelTooLargeError, NetworkSpec, PolicyResult
from solver.priced import evaluate_plan_exactly
from solver.priced_result import PricedPolicy, PricedProgress
from solver.spec import WEEKDAYS

__all__ = [
    "FULL_TABLE_MAX_STATES",
    "all_stocks",
    "plan_table",
    "priced_result_document",
    "priced_summary",
    "progress_printer",
    "summary_heading",
    "upper_bound_table",
]

# The RESULT.json of a priced solve lists every stock state up to this many.
FULL_TABLE_MAX_STATES = 200_000
# Stocks planned per call of plan_batch.
_BATCH = 4096


def all_stocks(policy: PricedPolicy, start: int = 0, stop: int | None = None) -> NDArray[np.int64]:
    """The closing stocks of flat states start..stop - 1 (row-major, location 0 slowest), shape
    (B, N)."""
    stop = policy.n_states if stop is None else stop
    index = np.arange(start, stop)
    return np.stack(np.unravel_index(index, policy.shape), axis=1).astype(np.int64)


def plan_table(policy: PricedPolicy) -> NDArray[np.int64]:
    """Units per lane planned at every stock state of every phase, shape (P, S, L)."""
    lanes = len(policy.lanes)
    table = np.zeros((policy.phases, policy.n_states, lanes), dtype=np.int64)
    for phase in range(policy.phases):
        for start in range(0, policy.n_states, _BATCH):
            stop = min(start + _BATCH, policy.n_states)
            table[phase, start:stop] = policy.plan_batch(
                all_stocks(policy, start, stop), phase=phase
            )
    return table


def upper_bound_table(policy: PricedPolicy) -> NDArray[np.float64]:
    """The upper bound on the optimal value at every stock state of every phase, shape (P, S)."""
    table = np.zeros((policy.phases, policy.n_states))
    stocks = all_stocks(policy).tolist()
    for phase in range(policy.phases):
        table[phase] = [policy.upper_bound(stock, phase=phase) for stock in stocks]
    return table


def _certificate(spec: NetworkSpec, policy: PricedPolicy) -> dict[str, Any]:
    certificate = policy.certificate
    return {
        "reference_stock": dict(
            zip(spec.location_ids, (int(u) for u in certificate.reference_stock), strict=True)
        ),
        "upper_bound": certificate.upper_bound,
        "policy_value": certificate.policy_value,
        "policy_value_interval": list(certificate.policy_value_interval),
        "certified_gap": certificate.certified_gap,
        "replications": certificate.replications,
    }


def priced_result_document(spec: NetworkSpec, policy: PricedPolicy) -> dict[str, Any]:
    """RESULT.json of a priced solve: the keys of the exact contract (network, criterion,
    states, lanes, value, policy, gain, iterations, residual, seconds), plus `method`,
    `certificate`, `prices` (per phase and lane) and `upper_bound`.

    With at most FULL_TABLE_MAX_STATES stock states, `policy` is the plan at every state,
    `upper_bound` the bound at every state, and `value` the plan's exact value (within the
    exact size limits; else null); with more, all three are null. `residual` is always null (no
    Bellman residual: the certificate says how good the policy is). A weekly network's lists
    have one entry per weekday (`weekdays`). Under the average criterion `gain` and every
    `upper_bound` are the bound on the optimal profit per day, and `value` the plan's bias."""
    periodic = policy.phases > 1
    small = policy.n_states <= FULL_TABLE_MAX_STATES
    plans: Any = None
    bounds: Any = None
    values: Any = None
    if small:
        table = plan_table(policy)
        upper = upper_bound_table(policy)
        plans = (table if periodic else table[0]).tolist()
        bounds = (upper if periodic else upper[0]).tolist()
        try:
            exact = np.asarray(evaluate_plan_exactly(spec, policy, policy.criterion))
            values = (exact if periodic else exact[0]).tolist()
        except ModelTooLargeError:
            values = None
    prices = np.asarray(policy.prices)
    document: dict[str, Any] = {
        "network": spec.name,
        "criterion": policy.criterion,
        "states": policy.n_states,
        "lanes": [{"from": lane.from_, "to": lane.to} for lane in spec.lanes],
        "value": values,
        "policy": plans,
        "gain": policy.gain,
        "iterations": policy.iterations,
        "residual": None,
        "seconds": policy.seconds["total"],
        "method": "priced",
        "converged": policy.converged,
        "certificate": _certificate(spec, policy),
        "prices": (prices if periodic else prices[0]).tolist(),
        "upper_bound": bounds,
    }
    if periodic:
        document["weekdays"] = list(WEEKDAYS[: policy.phases])
    return document


def summary_heading(spec: NetworkSpec, policy: PolicyResult | PricedPolicy, size: str) -> list[str]:
    """The first lines of a solve's summary, exact or priced: the network, the criterion and the
    states, followed on that line by `size` (what else measures the problem)."""
    discount = f" (discount {policy.discount:g})" if policy.discount is not None else ""
    weekdays = f" x {policy.phases} weekdays" if policy.phases > 1 else ""
    return [
        f"network     {spec.name}",
        f"criterion   {policy.criterion}{discount}",
        f"states      {policy.n_states:,}{weekdays}   {size}",
    ]


def priced_summary(spec: NetworkSpec, policy: PricedPolicy) -> str:
    """A few lines for a person: sizes, the certificate, time."""
    certificate = policy.certificate
    low, high = certificate.policy_value_interval
    reference = ", ".join(
        f"{location} {int(units)}"
        for location, units in zip(spec.location_ids, certificate.reference_stock, strict=True)
    )
    lines = [
        *summary_heading(spec, policy, f"lanes {len(policy.lanes)}"),
        f"method      priced, {policy.iterations} pricing iterations"
        + ("" if policy.converged else "   NOT CONVERGED"),
        f"reference   {reference}",
        f"bound       {certificate.upper_bound:,.4f}   policy value "
        f"{certificate.policy_value:,.4f} ({low:,.4f} to {high:,.4f}, "
        f"{certificate.replications} replications)",
        f"gap         {certificate.certified_gap:.3%} certified",
        f"seconds     {policy.seconds['total']:.3f}",
    ]
    if policy.gain is not None:
        lines.append(f"profit/day  at most {policy.gain:.4f} (the bound)")
    return "\n".join(lines) + "\n"


def progress_printer(
    stream: TextIO | None = None, every: float = 1.0
) -> Callable[[PricedProgress], None]:
    """A progress callback for solve_priced that writes one line to `stream` (default stderr)
    at most every `every` seconds."""
    last = -every

    def report(progress: PricedProgress) -> None:
        nonlocal last
        now = time.monotonic()
        if now - last < every:
            return
        last = now
        step = f"iteration {progress.iteration}"
        if progress.candidates is not None:
            limit = progress.trade_limit
            plan = "plain store values" if limit is None else f"trade limit {limit}"
            step = f"candidate {progress.iteration} of {progress.candidates} ({plan})"
        line = f"{progress.stage}: {step}, upper bound {progress.upper_bound:,.4f}"
        if progress.lower_bound is not None:
            line += f", lower bound {progress.lower_bound:,.4f}"
        (stream or sys.stderr).write(line + f" ({progress.elapsed:.1f} s)\n")

    return report
