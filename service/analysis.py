"""Simulations and what-if comparisons of a network: the computations behind the simulation and
what-if endpoints, the worker's jobs of those kinds and `stockrelay simulate`. No database and
no HTTP here: specifications and requests in, JSON-able reports out.

A simulation runs the optimal policy of one criterion beside two rules a planner might use
without it (never move; move toward equal days of cover when the move pays for itself the next
day) on the same simulated days (solver.simulation, common random numbers), and reports each
one's profit, fill rate, stock-out days and moves with intervals, and its paired difference to
the optimal policy. When the network has floors or handling limits, the optimal policy of the
same network without them (dispatch costs kept) runs on the same days too, so that the report
shows what the rules cost in profit per day and which fill rates they protect. Every policy is
then simulated in the model without the rules: it holds every flow of the model with them
(rules only remove flows and narrow where they are feasible), and the days are the same.

A what-if comparison applies overrides to a specification, solves both networks for one
criterion and reports how the optimal value changes and at how many stocks the recommended
moves differ.

A priced network (service.modes) has no table over stock states: its simulation runs the priced
policy's nightly plan (solver.simulation.simulate_plans, the same common random numbers) beside
moving nothing and balancing days of cover one unit at a time (solver.heuristics), and
its what-if comparison solves both networks by prices and compares their upper bounds and
certified policy values (the moves state by state only where the stock states are few).
"""

from __future__ import annotations

import math
import secrets
from collections.abc import Callable, Mapping, Sequence
from typing import Any

import numpy as np
from numpy.typing import NDArray
from pydantic import BaseModel, ValidationError

from service.analysis_requests import MAX_SEED, Overrides, SimulationRequest
from service.errors import AnalysisInputError
from service.json_pointer import json_pointer
from service.modes import resolve_method
from service.priced import FULL_TABLE_MAX_STATES, plan_table
from service.settings import SIMULATION_MAX_REPLICATION_DAYS
from solver import (
    Criterion,
    InvalidModelError,
    ModelTooLargeError,
    NetworkSpec,
    PolicyResult,
    ProgressCallback,
    SizeLimits,
    TransferModel,
    build_transfer_model,
    solve_network,
    solve_policy_iteration,
)
from solver.build import check_size
from solver.heuristics import balance_cover_plan, do_nothing_plan
from solver.priced import check_priced_size, solve_priced
from solver.priced_result import PricedOptions, PricedPolicy, PricedProgress
from solver.result import stock_problems
from solver.simulation import (
    CONFIDENCE,
    Interval,
    Plan,
    PolicyOutcome,
    SimulationReport,
    balance_cover_policy,
    do_nothing_policy,
    mean_demands,
    simulate_plans,
    simulate_policies,
)

__all__ = [
    "apply_overrides",
    "check_simulation",
    "new_seed",
    "run_simulation",
    "run_what_if",
]

REFERENCE = "optimal"
PRICED_REFERENCE = "priced"
# The priced policy without the rules is only simulated here: its own certificate is not
# reported, so a short one will do. It still chooses its trade limit as the served policy did,
# so that the rules' effect compares plans made the same way.
_QUICK_CERTIFICATE = PricedOptions(replications=2)
# Location fields an override may set to null (no limit).
_LIFTABLE = frozenset({"max_units_out", "max_units_in"})
# The optimal policy of the network with its floors and handling limits removed.
WITHOUT_RULES = "optimal_without_rules"


def _non_finite(document: Any, path: str = "") -> str | None:
    """The path of the first number in `document` that is not finite (JSON has none)."""
    if isinstance(document, float) and not math.isfinite(document):
        return path or "/"
    if isinstance(document, dict):
        items: Any = document.items()
    elif isinstance(document, list):
        items = enumerate(document)
    else:
        return None
    for key, value in items:
        found = _non_finite(value, f"{path}/{key}")
        if found is not None:
            return found
    return None


def _require_finite(report: dict[str, Any], pointer: str) -> dict[str, Any]:
    """`report`, unless amounts so large that sums overflow made one of its numbers infinite or
    undefined: then AnalysisInputError at `pointer`, the request's part to blame."""
    where = _non_finite(report)
    if where is not None:
        raise AnalysisInputError(
            [
                (
                    pointer,
                    f"the amounts are too large to compute with: {where} of the result is not a "
                    "finite number",
                )
            ]
        )
    return report


# -- simulations ------------------------------------------------------------------------------


def new_seed() -> int:
    """A random seed for a simulation that was given none (it is reported, so it can be
    repeated)."""
    return secrets.randbelow(MAX_SEED + 1)


def check_simulation(
    spec: NetworkSpec,
    params: SimulationRequest,
    *,
    limits: SizeLimits | None = None,
    max_replication_days: int = SIMULATION_MAX_REPLICATION_DAYS,
    method: str = "exact",
) -> None:
    """Refuse, before any work, a simulation that does not fit `spec` or is too long:
    AnalysisInputError (start stock, length) or ModelTooLargeError (the network, for the size
    limits of `method`)."""
    errors: list[tuple[str, str]] = []
    if params.start_stock is not None:
        errors += _start_stock_problems(spec, params.start_stock)
    replication_days = (params.days + params.warmup_days) * params.replications
    if replication_days > max_replication_days:
        errors.append(
            (
                "/replications",
                f"(days + warmup_days) x replications = {replication_days:,} simulated days, "
                f"over the limit of {max_replication_days:,}",
            )
        )
    if errors:
        raise AnalysisInputError(errors)
    if method == "priced":
        check_priced_size(spec)
    else:
        check_size(spec, limits)


def _start_stock_problems(spec: NetworkSpec, stock: Mapping[str, int]) -> list[tuple[str, str]]:
    return [
        (json_pointer("start_stock", location), what)
        for location, what in stock_problems(
            spec.location_ids, [location.capacity for location in spec.locations], stock
        )
    ]


def run_simulation(
    spec: NetworkSpec,
    params: SimulationRequest,
    optimal: PolicyResult | PricedPolicy | None = None,
    *,
    limits: SizeLimits | None = None,
    max_replication_days: int = SIMULATION_MAX_REPLICATION_DAYS,
    progress: ProgressCallback | None = None,
    method: str = "exact",
    priced_progress: Callable[[PricedProgress], None] | None = None,
) -> dict[str, Any]:
    """Simulate the optimal policy of `params.criterion`, moving nothing, and balancing days of
    cover, on the same days; the report as JSON-able data (see SimulationReportOut). With
    `method` priced (or a priced `optimal`), the priced policy's plan and moving nothing.

    optimal: the stored policy of `spec` for the criterion; solved here when None (or
        when it does not fit the model, e.g. stored by a solver with another flow table).
    progress: told about each iteration of that solve (exact); priced_progress: about each
        stage of a priced one.
    Raises AnalysisInputError, ModelTooLargeError, NotUnichainError (average criterion).
    """
    if method == "priced" or isinstance(optimal, PricedPolicy):
        priced = optimal if isinstance(optimal, PricedPolicy) else None
        return _run_priced_simulation(spec, params, priced, max_replication_days, priced_progress)
    check_simulation(spec, params, limits=limits, max_replication_days=max_replication_days)
    model = build_transfer_model(spec, limits)
    policy = None if optimal is None else _policy_on(model, optimal, params.criterion)
    source = "stored"
    if policy is None:
        policy = solve_policy_iteration(model, criterion=params.criterion, progress=progress).action
        source = "solved"
    policies: dict[str, NDArray[np.int64]] = {
        REFERENCE: policy,
        "do_nothing": do_nothing_policy(model),
    }
    notes = []
    try:
        policies["balance_cover"] = balance_cover_policy(model, mean_demands(spec))
    except ValueError as exc:  # a location without demand has no days of cover
        notes.append(f"balance_cover left out: {exc}")
    simulated_spec, simulated_model = spec, model
    compare_rules = params.compare_without_rules and spec.has_rules
    if compare_rules:
        simulated_spec = spec.without_rules()
        try:
            simulated_model = build_transfer_model(simulated_spec, limits)
        except ModelTooLargeError as exc:  # the rules kept the network within the limits
            notes.append(
                f"{WITHOUT_RULES} left out: without its rules the network is too large: {exc}"
            )
            simulated_spec, simulated_model, compare_rules = spec, model, False
    if compare_rules:
        rows = _rows_in(model, simulated_model)
        policies = {name: rows[table] for name, table in policies.items()}
        policies[WITHOUT_RULES] = solve_policy_iteration(
            simulated_model, criterion=params.criterion
        ).action
    seed, start = _seed_and_start(spec, params)
    report = simulate_policies(
        simulated_spec,
        simulated_model,
        policies,
        days=params.days,
        replications=params.replications,
        rng=np.random.default_rng(seed),
        start_stock=start,
        warmup_days=params.warmup_days,
        reference=REFERENCE,
        confidence=CONFIDENCE,
    )
    rules = _rules_effect(report) if compare_rules else None
    return _report_document(params, report, seed, source, notes, REFERENCE, rules)


def _plan_of(policy: PricedPolicy) -> Plan:
    def plan(stocks: NDArray[np.int64], phase: int) -> NDArray[np.int64]:
        return np.asarray(policy.plan_batch(stocks, phase=phase), dtype=np.int64)

    return plan


def _run_priced_simulation(
    spec: NetworkSpec,
    params: SimulationRequest,
    stored: PricedPolicy | None,
    max_replication_days: int,
    progress: Callable[[PricedProgress], None] | None = None,
) -> dict[str, Any]:
    check_simulation(spec, params, max_replication_days=max_replication_days, method="priced")
    source = "stored"
    policy = stored
    if (
        policy is None
        or policy.criterion != params.criterion
        or policy.location_ids != tuple(spec.location_ids)
    ):
        policy = solve_priced(spec, criterion=params.criterion, progress=progress)
        source = "solved"
    seed, start = _seed_and_start(spec, params)
    plans: dict[str, Plan] = {
        PRICED_REFERENCE: _plan_of(policy),
        "do_nothing": do_nothing_plan(spec),
    }
    notes = [
        "the network is solved by prices: its priced policy is simulated in place of the "
        "optimal one"
    ]
    try:
        plans["balance_cover"] = balance_cover_plan(spec)
        notes.append(
            "balance_cover moves one unit at a time (the form of the rule for networks "
            "without a flow table)"
        )
    except ValueError as exc:
        notes.append(f"balance_cover left out: {exc}")
    # As for exact networks: every plan runs in the network without the rules (which allows
    # every move of the network with them), beside the priced policy solved without them.
    compare_rules = params.compare_without_rules and spec.has_rules
    simulated_spec = spec.without_rules() if compare_rules else spec
    if compare_rules:
        plans[WITHOUT_RULES] = _plan_of(
            solve_priced(simulated_spec, criterion=params.criterion, options=_QUICK_CERTIFICATE)
        )
    report = simulate_plans(
        simulated_spec,
        plans,
        days=params.days,
        replications=params.replications,
        rng=np.random.default_rng(seed),
        start_stock=start,
        warmup_days=params.warmup_days,
        reference=PRICED_REFERENCE,
        confidence=CONFIDENCE,
    )
    rules = _rules_effect(report, PRICED_REFERENCE) if compare_rules else None
    return _report_document(params, report, seed, source, notes, PRICED_REFERENCE, rules)


def _seed_and_start(spec: NetworkSpec, params: SimulationRequest) -> tuple[int, list[int] | None]:
    """The run's seed (a new one unless given) and its start stock in network order."""
    seed = new_seed() if params.seed is None else params.seed
    if params.start_stock is None:
        return seed, None
    return seed, [params.start_stock[location] for location in spec.location_ids]


def _report_document(
    params: SimulationRequest,
    report: SimulationReport,
    seed: int,
    source: str,
    notes: list[str],
    reference: str,
    rules: dict[str, Any] | None = None,
) -> dict[str, Any]:
    """A simulation's report as stored with its job and answered over HTTP."""
    document = {
        "criterion": params.criterion,
        "days": report.days,
        "replications": report.replications,
        "warmup_days": report.warmup_days,
        "seed": seed,
        "confidence": report.confidence,
        "start_stock": dict(zip(report.location_ids, report.start_stock, strict=True)),
        "optimal_source": source,
        "policies": [_outcome(outcome, reference) for outcome in report.outcomes],
        "rules": rules,
        "notes": notes,
    }
    return _require_finite(document, "")


def _rows_in(model: TransferModel, larger: TransferModel) -> NDArray[np.int64]:
    """Row in `larger`'s flow table of every flow of `model`'s, shape (A,); `larger` must hold
    them all (as the model without rules holds those of the model with them)."""
    rows = {tuple(flow): k for k, flow in enumerate(larger.flows.tolist())}
    return np.array([rows[tuple(flow)] for flow in model.flows.tolist()], dtype=np.int64)


def _rules_effect(report: SimulationReport, reference: str = REFERENCE) -> dict[str, Any]:
    """What the floors and handling limits cost (profit per day) and protect (fill rate and
    stock-out days per location): the optimal (or priced) policies without and with them."""
    ruled, free = report.outcome(reference), report.outcome(WITHOUT_RULES)
    assert free.difference_to_reference is not None  # the report's reference is the optimal
    return {
        "profit_per_day_cost": _interval(free.difference_to_reference),
        "by_location": {
            location: {
                "fill_rate_with_rules": _interval(ruled.fill_rate_by_location[location]),
                "fill_rate_without_rules": _interval(free.fill_rate_by_location[location]),
                "stockout_days_with_rules": _interval(ruled.stockout_days_by_location[location]),
                "stockout_days_without_rules": _interval(free.stockout_days_by_location[location]),
            }
            for location in report.location_ids
        },
    }


def _policy_on(
    model: TransferModel, optimal: PolicyResult, criterion: str
) -> NDArray[np.int64] | None:
    """The stored policy as indices into the model's flow table; None when it was solved for
    another network or with a flow table the model lacks."""
    if optimal.criterion != criterion:
        raise ValueError(f"a {optimal.criterion} policy cannot stand for the {criterion} one")
    lanes = tuple(zip(model.lane_from.tolist(), model.lane_to.tolist(), strict=True))
    if (
        optimal.location_ids != model.location_ids
        or optimal.capacities != tuple(int(c) for c in model.capacities)
        or tuple(optimal.lanes) != lanes
    ):
        return None
    rows = {tuple(flow): k for k, flow in enumerate(model.flows.tolist())}
    mapped = [rows.get(tuple(flow)) for flow in optimal.flows.tolist()]
    if any(k is None for k in mapped):
        return None
    table = np.array(mapped, dtype=np.int64)
    result: NDArray[np.int64] = table[optimal.action]
    return result


def _interval(interval: Interval) -> dict[str, float | None]:
    """An interval as JSON: an unbounded end (one replication) is null."""
    return {
        "mean": interval.mean,
        "low": interval.low if math.isfinite(interval.low) else None,
        "high": interval.high if math.isfinite(interval.high) else None,
    }


def _outcome(outcome: PolicyOutcome, reference: str = REFERENCE) -> dict[str, Any]:
    difference = outcome.difference_to_reference
    return {
        "name": outcome.name,
        "profit_per_day": _interval(outcome.profit_per_day),
        "fill_rate": _interval(outcome.fill_rate),
        "fill_rate_by_location": {
            location: _interval(value) for location, value in outcome.fill_rate_by_location.items()
        },
        "stockout_days": _interval(outcome.stockout_days),
        "stockout_days_by_location": {
            location: _interval(value)
            for location, value in outcome.stockout_days_by_location.items()
        },
        "units_moved_per_night": _interval(outcome.units_moved_per_night),
        "move_cost_per_day": _interval(outcome.move_cost_per_day),
        "difference_to_optimal": (
            None if difference is None or outcome.name == reference else _interval(difference)
        ),
    }


# -- what-if comparisons ----------------------------------------------------------------------


def apply_overrides(spec: NetworkSpec, overrides: Overrides) -> NetworkSpec:
    """`spec` with `overrides` applied, validated as a whole new specification.

    Raises AnalysisInputError naming every unknown location or lane, every demand that cannot
    be rescaled and every problem of the resulting specification, each with its pointer into
    the what-if request (e.g. "/overrides/locations/hilltop/capacity").
    """
    document = spec.model_dump(mode="json", by_alias=True)
    errors: list[tuple[str, str]] = []
    # Where each part of the new specification came from, to point spec errors at overrides.
    origin: dict[tuple[str | int, ...], str] = {}

    index = {location["id"]: i for i, location in enumerate(document["locations"])}
    for location_id, change in overrides.locations.items():
        pointer = json_pointer("overrides", "locations", location_id)
        i = index.get(location_id)
        if i is None:
            known = ", ".join(repr(known_id) for known_id in index)
            errors.append((pointer, f"unknown location {location_id!r} (the network has {known})"))
            continue
        entry = document["locations"][i]
        for field in (
            "capacity",
            "unit_margin",
            "holding_cost",
            "stockout_penalty",
            "keep_at_least",
            "max_units_out",
            "max_units_in",
        ):
            value = getattr(change, field)
            # A handling limit given as null lifts it; any other null keeps the value.
            if value is not None or field in change.model_fields_set & _LIFTABLE:
                entry[field] = (
                    value.model_dump(mode="json") if isinstance(value, BaseModel) else value
                )
                origin[("locations", i, field)] = f"{pointer}/{field}"
        if change.demand_mean is not None:
            origin[("locations", i, "demand")] = f"{pointer}/demand_mean"
            try:
                entry["demand"] = _rescaled_demand(entry["demand"], change.demand_mean)
            except ValueError as exc:
                errors.append((f"{pointer}/demand_mean", str(exc)))

    lanes: list[dict[str, Any]] = document["lanes"]
    lane_index = {(lane["from"], lane["to"]): j for j, lane in enumerate(lanes)}
    lane_origin: list[str | None] = [None] * len(lanes)
    for k, lane_change in enumerate(overrides.lanes):
        pointer = f"/overrides/lanes/{k}"
        j = lane_index.get((lane_change.from_, lane_change.to))
        if j is None:
            errors.append((pointer, f"no lane {lane_change.from_!r} -> {lane_change.to!r}"))
            continue
        if lane_origin[j] is not None:
            errors.append((pointer, f"lane changed twice (also at {lane_origin[j]})"))
        lane_origin[j] = pointer
        if lane_change.unit_cost is not None:
            lanes[j]["unit_cost"] = lane_change.unit_cost
        if lane_change.dispatch_cost is not None:
            lanes[j]["dispatch_cost"] = lane_change.dispatch_cost
        if lane_change.max_units is not None:
            lanes[j]["max_units"] = lane_change.max_units
    removed: set[int] = set()
    for k, ref in enumerate(overrides.remove_lanes):
        pointer = f"/overrides/remove_lanes/{k}"
        j = lane_index.get((ref.from_, ref.to))
        if j is None:
            errors.append((pointer, f"no lane {ref.from_!r} -> {ref.to!r}"))
        elif lane_origin[j] is not None:
            errors.append((pointer, f"lane both changed (at {lane_origin[j]}) and removed"))
        else:
            removed.add(j)
    kept = [(lane, lane_origin[j]) for j, lane in enumerate(lanes) if j not in removed]
    kept += [
        (lane.model_dump(mode="json", by_alias=True), f"/overrides/new_lanes/{k}")
        for k, lane in enumerate(overrides.new_lanes)
    ]
    document["lanes"] = [lane for lane, _ in kept]
    lane_origins = [where for _, where in kept]
    if "max_units_per_night" in overrides.model_fields_set:
        document["max_units_per_night"] = overrides.max_units_per_night
        origin[("max_units_per_night",)] = "/overrides/max_units_per_night"
    if overrides.remove_rules:
        for entry in document["locations"]:
            for field in _LIFTABLE | {"keep_at_least"}:
                entry.pop(field, None)
    if errors:
        raise AnalysisInputError(errors)

    try:
        return NetworkSpec.model_validate(document)
    except ValidationError as exc:
        problems = []
        for error in exc.errors(include_url=False):
            loc = tuple(error["loc"])
            pointer = _override_pointer(loc, origin, lane_origins, bool(removed))
            where = ".".join(str(part) for part in loc)
            detail = error["msg"] if pointer != "/overrides" else f"{where}: {error['msg']}"
            problems.append((pointer, f"the changed network is invalid: {detail}"))
        raise AnalysisInputError(problems) from exc


def _rescaled_demand(demand: dict[str, Any], mean: float) -> dict[str, Any]:
    """A demand law of the same family with mean `mean` (units per day)."""
    if demand["dist"] == "poisson":
        return {"dist": "poisson", "mean": mean}
    if demand["dist"] == "negative_binomial":
        if mean <= 0:
            raise ValueError(
                "negative binomial demand needs a mean above 0 (its variance-to-mean ratio is "
                "kept); a mean of 0 needs a new version with Poisson demand"
            )
        ratio = demand["variance"] / demand["mean"]
        return {"dist": "negative_binomial", "mean": mean, "variance": mean * ratio}
    raise ValueError(
        "demand is an explicit distribution (pmf), which a mean alone cannot rescale; send a "
        "new version of the network with the distribution you expect"
    )


def _override_pointer(
    loc: tuple[str | int, ...],
    origin: Mapping[tuple[str | int, ...], str],
    lane_origins: Sequence[str | None],
    removed_any: bool,
) -> str:
    """The pointer into the what-if request of a problem at `loc` of the changed spec."""
    if len(loc) >= 2 and loc[0] == "lanes" and isinstance(loc[1], int):
        where = lane_origins[loc[1]] if loc[1] < len(lane_origins) else None
        if where is None:
            return "/overrides"
        field = loc[2] if len(loc) > 2 else None
        if where.startswith("/overrides/new_lanes/") and field is not None:
            return f"{where}/{field}"
        if field in ("unit_cost", "dispatch_cost", "max_units"):
            return f"{where}/{field}"
        return where
    if loc == ("lanes",) and removed_any:
        return "/overrides/remove_lanes"
    for size in range(len(loc), 0, -1):
        if loc[:size] in origin:
            return origin[loc[:size]]
    return "/overrides"


def run_what_if(
    spec: NetworkSpec,
    overrides: Overrides,
    *,
    criterion: Criterion = "discounted",
    limits: SizeLimits | None = None,
    mode: str = "exact",
) -> dict[str, Any]:
    """Solve `spec` and `spec` with `overrides` for `criterion`, each by the method `mode`
    resolves to for it (service.modes); the comparison as JSON-able data (see
    WhatIfResultOut). A priced network's summary has its upper bound at the reference stock
    and no mean value.

    Values compared: discounted, the mean value over all stocks and the value at a reference
    stock (half of every base capacity, rounded down, and at most the changed capacity);
    average, the profit per day. Raises AnalysisInputError, ModelTooLargeError and
    NotUnichainError.
    """
    changed_spec = apply_overrides(spec, overrides)
    limits = limits or SizeLimits()
    base = _solve(spec, criterion, limits, "", "the network", resolve_method(spec, mode, limits))
    changed = _solve(
        changed_spec,
        criterion,
        limits,
        "/overrides",
        "the changed network",
        resolve_method(changed_spec, mode, limits),
    )
    reference = tuple(c // 2 for c in base.capacities)
    changed_reference = tuple(
        min(units, capacity) for units, capacity in zip(reference, changed.capacities, strict=True)
    )
    base_summary = _summary(base, reference)
    changed_summary = _summary(changed, changed_reference)
    change = {
        key: None
        if base_summary[key] is None or changed_summary[key] is None
        else changed_summary[key] - base_summary[key]
        for key in (
            "profit_per_day",
            "mean_value",
            "value_at_reference",
            "upper_bound_at_reference",
        )
    }
    document = {
        "criterion": criterion,
        "base": base_summary,
        "changed": changed_summary,
        "change": change,
        "moves": _move_changes(base, changed),
        "changed_spec": changed_spec.model_dump(mode="json", by_alias=True),
    }
    return _require_finite(document, "/overrides")


def _solve(
    spec: NetworkSpec,
    criterion: Criterion,
    limits: SizeLimits | None,
    pointer: str,
    what: str,
    method: str = "exact",
) -> PolicyResult | PricedPolicy:
    """solve_network (or solve_priced), with a model the solver refuses (amounts so large that
    the expected profit overflows) reported as the request's fault, at `pointer`."""
    try:
        if method == "priced":
            return solve_priced(spec, criterion=criterion)
        return solve_network(spec, criterion=criterion, limits=limits)
    except InvalidModelError as exc:
        raise AnalysisInputError([(pointer, f"{what} cannot be solved: {exc}")]) from exc


def _summary(result: PolicyResult | PricedPolicy, reference: tuple[int, ...]) -> dict[str, Any]:
    discounted = result.criterion == "discounted"
    if isinstance(result, PricedPolicy):
        certificate = result.certificate
        return {
            "states": result.n_states,
            "method": "priced",
            "profit_per_day": result.gain,
            "mean_value": None,
            "reference_stock": dict(zip(result.location_ids, reference, strict=True)),
            "value_at_reference": None,
            "upper_bound_at_reference": result.upper_bound(reference),
            "certified_gap": certificate.certified_gap,
            "residual": None,
            "error_bound": None,
        }
    return {
        "states": result.n_states,
        "method": "exact",
        "profit_per_day": result.gain,
        # Under the average criterion values are relative (0 at the empty stock): not compared.
        "mean_value": float(result.values.mean()) if discounted else None,
        "reference_stock": dict(zip(result.location_ids, reference, strict=True)),
        # For a weekly network: the value of a Monday closing count.
        "value_at_reference": (
            float(result.values[0, result.state_index(reference)]) if discounted else None
        ),
        "upper_bound_at_reference": None,
        "certified_gap": None,
        "residual": result.residual,
        "error_bound": result.error_bound,
    }


def _moves_by_lane(
    result: PolicyResult | PricedPolicy, lanes: Sequence[tuple[str, str]]
) -> NDArray[np.int64]:
    """Units moved along each of `lanes` (by their ends) in every state of every phase, shape
    (P, S, len(lanes)); 0 on a lane the network lacks."""
    ids = result.location_ids
    own = {(ids[a], ids[b]): k for k, (a, b) in enumerate(result.lanes)}
    flows = plan_table(result) if isinstance(result, PricedPolicy) else result.policy_flows()
    moves = np.zeros((result.phases, result.n_states, len(lanes)), dtype=np.int64)
    for column, lane in enumerate(lanes):
        if lane in own:
            moves[..., column] = flows[..., own[lane]]
    return moves


def _move_changes(
    base: PolicyResult | PricedPolicy, changed: PolicyResult | PricedPolicy
) -> dict[str, Any]:
    """At how many stocks the two policies recommend different moves; lanes are matched by
    their ends, so a lane added or removed compares with moving nothing along it."""
    sizes = {"base_states": base.n_states, "changed_states": changed.n_states}
    if base.location_ids != changed.location_ids or base.capacities != changed.capacities:
        return {
            "comparable": False,
            "states_changed": None,
            **sizes,
            "detail": f"the capacities differ, so the stocks do not correspond: "
            f"{base.n_states:,} stock states before, {changed.n_states:,} after",
        }
    priced = isinstance(base, PricedPolicy) or isinstance(changed, PricedPolicy)
    if priced and base.n_states * base.phases > FULL_TABLE_MAX_STATES:
        return {
            "comparable": False,
            "states_changed": None,
            **sizes,
            "detail": f"a priced network's moves are compared stock by stock only up to "
            f"{FULL_TABLE_MAX_STATES:,} stock states; this one has {base.n_states:,}",
        }
    ids = base.location_ids
    lanes = list(dict.fromkeys((ids[a], ids[b]) for a, b in (*base.lanes, *changed.lanes)))
    differs = np.any(_moves_by_lane(base, lanes) != _moves_by_lane(changed, lanes), axis=-1)
    count = int(differs.sum())
    # A weekly network counts (weekday, stock) pairs: 7 per stock.
    pairs = base.phases * base.n_states
    unit = "stocks" if base.phases == 1 else "weekday-stock pairs"
    return {
        "comparable": True,
        "states_changed": count,
        **sizes,
        "detail": f"the recommended moves differ at {count:,} of {pairs:,} {unit}",
    }
