"""The `stockrelay` command line. Thin: it reads files, calls solver/, and writes results."""

from __future__ import annotations

import argparse
import json
import logging
import math
import sys
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import numpy as np
from pydantic import ValidationError

from service import operations
from service.analysis import AnalysisInputError, run_simulation
from service.errors import UsageError
from service.files import load_network, write_json_atomically
from service.logs import logging_from_environment
from service.schemas import SimulationRequest
from solver import NetworkSpec, PolicyResult, SolverError, solve_network
from solver.spec import WEEKDAYS

__all__ = ["main"]

log = logging.getLogger(__name__)

EXIT_BAD_INPUT = 2
_GRID_MAX_SIDE = 21


def main(argv: Sequence[str] | None = None) -> int:
    parser = _parser()
    args = parser.parse_args(argv)
    logging_from_environment()
    try:
        code: int = args.handler(args)
    except UsageError as exc:
        sys.stderr.write(f"stockrelay: error: {exc}\n")
        return EXIT_BAD_INPUT
    return code


def _parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="stockrelay",
        description="Optimal overnight stock transfers between retail locations.",
    )
    commands = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")

    solve = commands.add_parser(
        "solve",
        help="solve a network specification and print a summary",
        description="Solve NETWORK.json exactly and print a summary; --out writes the policy.",
    )
    solve.add_argument("network", type=Path, metavar="NETWORK.json")
    solve.add_argument("--criterion", choices=["discounted", "average"], default="discounted")
    solve.add_argument(
        "--method",
        choices=["howard", "modified", "value-iteration"],
        default="howard",
        help="algorithm (default: Howard's policy iteration)",
    )
    solve.add_argument("--out", type=Path, metavar="RESULT.json", help="write the full policy")
    solve.set_defaults(handler=_solve)

    simulate = commands.add_parser(
        "simulate",
        help="simulate the optimal policy beside simple rules and compare them",
        description="Solve NETWORK.json, then simulate its optimal policy, moving nothing, and "
        "balancing days of cover on the same random days, and print each one's profit per day, "
        "fill rate, stock-out days and moves with 95%% intervals.",
    )
    simulate.add_argument("network", type=Path, metavar="NETWORK.json")
    simulate.add_argument("--criterion", choices=["discounted", "average"], default="average")
    simulate.add_argument(
        "--days", type=int, default=365, help="days measured per replication (1..3650)"
    )
    simulate.add_argument(
        "--replications", type=int, default=200, help="independent runs (1..2000)"
    )
    simulate.add_argument(
        "--warmup", type=int, default=30, help="days simulated before measuring (0..365)"
    )
    simulate.add_argument("--seed", type=int, help="seed of the random days (default: random)")
    simulate.add_argument("--json", action="store_true", help="print the report as JSON")
    simulate.set_defaults(handler=_simulate)

    migrate = commands.add_parser(
        "migrate", help="upgrade the database (STOCKRELAY_DATABASE_URL) to the current schema"
    )
    migrate.set_defaults(handler=operations.migrate)

    serve = commands.add_parser("serve", help="run the HTTP API (uvicorn) until Ctrl-C")
    serve.add_argument("--host", default="127.0.0.1")
    serve.add_argument("--port", type=_positive, default=8000)
    serve.add_argument(
        "--workers", type=_positive, default=1, help="API processes (default 1; try one per core)"
    )
    serve.set_defaults(handler=operations.serve)

    run = commands.add_parser(
        "run",
        help="run the HTTP API and solve workers together until Ctrl-C",
        description="Start `stockrelay serve` and solve workers as child processes, print an "
        "example request once the API answers, and stop them all on Ctrl-C or SIGTERM.",
    )
    run.add_argument("--host", default="127.0.0.1")
    run.add_argument("--port", type=_positive, default=8000)
    run.add_argument("--workers", type=_positive, default=1, help="solve workers (default 1)")
    run.set_defaults(handler=operations.run)

    openapi = commands.add_parser("openapi", help="write the API's OpenAPI document")
    openapi.add_argument("--out", type=Path, metavar="openapi.json", help="default: stdout")
    openapi.set_defaults(handler=operations.write_openapi)

    worker = commands.add_parser("worker", help="run a solve worker until SIGTERM or Ctrl-C")
    worker.add_argument(
        "--until-idle", action="store_true", help="exit once no job is left to claim"
    )
    worker.set_defaults(handler=operations.worker)

    networks = commands.add_parser("networks", help="import, export and list networks")
    network_commands = networks.add_subparsers(dest="action", required=True, metavar="ACTION")
    import_ = network_commands.add_parser(
        "import",
        help="store NETWORK.json as a new network, or as the next version of the tenant's "
        "network of the same name, and queue its solves",
    )
    import_.add_argument("network", type=Path, metavar="NETWORK.json")
    import_.add_argument("--tenant", default=operations.DEFAULT_TENANT)
    import_.add_argument(
        "--criteria",
        default="discounted",
        type=_criteria,
        help="comma-separated: discounted, average (default: discounted)",
    )
    import_.add_argument(
        "--skip-unchanged",
        action="store_true",
        help="add no version when the specification equals the current one",
    )
    import_.set_defaults(handler=operations.import_network)
    export = network_commands.add_parser(
        "export", help="write the current specification of a network"
    )
    export.add_argument("id", type=int)
    export.add_argument("--version", type=int, help="an earlier version number")
    export.add_argument("--out", type=Path, metavar="NETWORK.json")
    export.set_defaults(handler=operations.export_network)
    list_networks = network_commands.add_parser("list", help="list networks and their versions")
    list_networks.set_defaults(handler=operations.list_networks)

    keys = commands.add_parser("keys", help="create, list and revoke API keys")
    key_commands = keys.add_subparsers(dest="action", required=True, metavar="ACTION")
    create_key = key_commands.add_parser(
        "create", help="create a key and print it (once: only its hash is stored)"
    )
    create_key.add_argument("--tenant", required=True)
    create_key.add_argument("--scope", choices=["read", "write", "admin"], required=True)
    create_key.add_argument("--label", help="a note saying whose key this is")
    create_key.set_defaults(handler=operations.create_key)
    list_keys = key_commands.add_parser("list", help="list keys (never the keys themselves)")
    list_keys.set_defaults(handler=operations.list_keys)
    revoke = key_commands.add_parser("revoke", help="revoke a key by its prefix")
    revoke.add_argument("prefix")
    revoke.set_defaults(handler=operations.revoke_key)

    jobs = commands.add_parser("jobs", help="list solve jobs or retry a failed one")
    job_commands = jobs.add_subparsers(dest="action", required=True, metavar="ACTION")
    list_jobs = job_commands.add_parser("list", help="newest jobs first")
    list_jobs.add_argument("--state", choices=["queued", "running", "done", "failed"])
    list_jobs.add_argument("--limit", type=_positive, default=50)
    list_jobs.set_defaults(handler=operations.list_jobs)
    retry = job_commands.add_parser("retry", help="queue a failed job again")
    retry.add_argument("id", type=int)
    retry.set_defaults(handler=operations.retry_job)
    return parser


def _positive(text: str) -> int:
    try:
        value = int(text)
    except ValueError:
        value = 0
    if value < 1:
        raise argparse.ArgumentTypeError(f"expected a whole number >= 1, got {text!r}")
    return value


def _criteria(text: str) -> list[str]:
    criteria = [part.strip() for part in text.split(",") if part.strip()]
    unknown = [c for c in criteria if c not in ("discounted", "average")]
    if unknown or not criteria:
        raise argparse.ArgumentTypeError(
            f"criteria must be discounted and/or average, got {text!r}"
        )
    return criteria


def _solve(args: argparse.Namespace) -> int:
    spec = load_network(args.network)
    try:
        result = solve_network(spec, criterion=args.criterion, method=args.method)
    except (SolverError, ValueError) as exc:
        raise UsageError(f"{args.network}: {exc}") from exc
    if args.out is not None:
        write_json_atomically(args.out, result_document(spec, result))
    sys.stdout.write(summary(spec, result))
    return 0 if result.converged else 1


_OPTIONS = {"warmup_days": "--warmup"}


def _simulate(args: argparse.Namespace) -> int:
    spec = load_network(args.network)
    try:
        params = SimulationRequest(
            criterion=args.criterion,
            days=args.days,
            replications=args.replications,
            warmup_days=args.warmup,
            seed=args.seed,
        )
    except ValidationError as exc:
        raise UsageError(
            "; ".join(
                f"{_OPTIONS.get(str(e['loc'][0]), '--' + str(e['loc'][0]))}: {e['msg']}"
                for e in exc.errors(include_url=False)
            )
        ) from exc
    try:
        report = run_simulation(spec, params)
    except AnalysisInputError as exc:
        raise UsageError("; ".join(detail for _, detail in exc.errors)) from exc
    except (SolverError, ValueError) as exc:
        raise UsageError(f"{args.network}: {exc}") from exc
    if args.json:
        sys.stdout.write(json.dumps(report, indent=2) + "\n")
    else:
        sys.stdout.write(simulation_table(spec, report))
    return 0


def _count(n: int, noun: str) -> str:
    return f"{n} {noun}" + ("" if n == 1 else "s")


def _with_interval(interval: dict[str, Any]) -> str:
    """ "mean (low to high)", two decimals."""
    if interval["low"] is None or interval["high"] is None:
        return f"{interval['mean']:.2f} (no interval)"
    return f"{interval['mean']:.2f} ({interval['low']:.2f} to {interval['high']:.2f})"


def simulation_table(spec: NetworkSpec, report: dict[str, Any]) -> str:
    """The simulation report for a person: one row per policy."""
    source = {"stored": "the stored policy", "solved": "solved for this run"}
    start = ", ".join(f"{location} {units}" for location, units in report["start_stock"].items())
    width = max(15, *(len(policy["name"]) + 2 for policy in report["policies"]))
    lines = [
        f"network      {spec.name}",
        f"criterion    {report['criterion']} (optimal policy {source[report['optimal_source']]})",
        f"simulated    {_count(report['replications'], 'replication')} of "
        f"{_count(report['days'], 'day')} after {_count(report['warmup_days'], 'warm-up day')}, "
        f"seed {report['seed']}",
        f"start stock  {start}",
        "",
        f"{'policy':<{width}}{'profit/day (95% interval)':<30}{'fill rate':>10}"
        f"{'stock-out days':>16}{'units/night':>13}  {'vs optimal (95% interval)'}",
    ]
    for policy in report["policies"]:
        difference = policy["difference_to_optimal"]
        lines.append(
            f"{policy['name']:<{width}}{_with_interval(policy['profit_per_day']):<30}"
            f"{policy['fill_rate']['mean']:>10.1%}{policy['stockout_days']['mean']:>16.1%}"
            f"{policy['units_moved_per_night']['mean']:>13.2f}  "
            + ("-" if difference is None else _with_interval(difference))
        )
    rules = report.get("rules")
    if rules is not None:
        lines += [
            "",
            "floors and handling limits give up "
            f"{_with_interval(rules['profit_per_day_cost'])} a day (optimal_without_rules "
            "minus optimal); per location, with / without them:",
        ]
        for location, effect in rules["by_location"].items():
            lines.append(
                f"  {location:<{width}}fill rate {effect['fill_rate_with_rules']['mean']:.1%} / "
                f"{effect['fill_rate_without_rules']['mean']:.1%}, stock-out days "
                f"{effect['stockout_days_with_rules']['mean']:.1%} / "
                f"{effect['stockout_days_without_rules']['mean']:.1%}"
            )
    lines += [f"note: {note}" for note in report["notes"]]
    return "\n".join(lines) + "\n"


def result_document(spec: NetworkSpec, result: PolicyResult) -> dict[str, Any]:
    """The documented RESULT.json contract. A weekly network's document also has `weekdays`
    (mon .. sun), and its `value` and `policy` hold one list per weekday of the closing count."""
    periodic = result.phases > 1
    document: dict[str, Any] = {
        "network": spec.name,
        "criterion": result.criterion,
        "states": result.n_states,
        "lanes": [{"from": lane.from_, "to": lane.to} for lane in spec.lanes],
        "value": (result.values if periodic else result.values[0]).tolist(),
        "policy": (result.policy_flows() if periodic else result.policy_flows()[0]).tolist(),
        "gain": result.gain,
        "iterations": result.iterations,
        "residual": result.residual,
        "seconds": result.seconds["total"],
    }
    if periodic:
        document["weekdays"] = list(WEEKDAYS[: result.phases])
    return document


def summary(spec: NetworkSpec, result: PolicyResult) -> str:
    """A few lines for a person: sizes, convergence, and for two locations the policy grid."""
    lines = [
        f"network     {spec.name}",
        f"criterion   {result.criterion}"
        + (f" (discount {result.discount:g})" if result.discount is not None else ""),
        f"states      {result.n_states:,}"
        + (f" x {result.phases} weekdays" if result.phases > 1 else "")
        + f"   transfer options {result.n_flows:,}",
        f"iterations  {result.iterations} ({result.method}, "
        f"{result.evaluation_sweeps:,} matrix-vector products)",
        f"residual    {result.residual:.3g}   bound on error {result.error_bound:.3g}"
        + ("" if result.converged else "   NOT CONVERGED"),
        f"seconds     {result.seconds['total']:.3f}",
    ]
    if result.gain is not None:
        lines.append(f"profit/day  {result.gain:.4f}")
    if len(result.capacities) == 2:
        for phase in range(result.phases):
            lines.extend(_policy_grid(spec, result, phase))
    return "\n".join(lines) + "\n"


def _policy_grid(spec: NetworkSpec, result: PolicyResult, phase: int) -> list[str]:
    """Net units moved from the first location to the second, by closing stock."""
    first, second = spec.location_ids
    sign = np.array([1 if a == 0 else -1 for a, _ in result.lanes], dtype=np.int64)
    net = (result.policy_flows()[phase] @ sign).reshape(result.shape)
    rows_step = max(1, math.ceil(result.shape[0] / _GRID_MAX_SIDE))
    cols_step = max(1, math.ceil(result.shape[1] / _GRID_MAX_SIDE))
    rows = range(0, result.shape[0], rows_step)
    cols = range(0, result.shape[1], cols_step)
    width = max(3, len(str(int(np.abs(net).max()))) + 2)
    lines = [
        "",
        ("" if result.phases == 1 else f"{WEEKDAYS[phase]} night: ")
        + f"net units moved {first} -> {second} (rows: {first} stock, columns: {second} stock"
        + (f", every {rows_step}th/{cols_step}th level" if rows_step > 1 or cols_step > 1 else "")
        + ")",
        " " * 5 + "".join(f"{c:>{width}}" for c in cols),
    ]
    lines.extend(f"{r:>4} " + "".join(f"{int(net[r, c]):>{width}}" for c in cols) for r in rows)
    return lines


if __name__ == "__main__":
    raise SystemExit(main())
