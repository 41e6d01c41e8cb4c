"""The `stockrelay` command line. Thin: it reads files, calls solver/, and writes results."""

from __future__ import annotations

import argparse
import json
import logging
import math
import os
import sys
import time
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import numpy as np
from pydantic import ValidationError

from service import operations, priced
from service.analysis import run_simulation
from service.analysis_requests import SimulationRequest
from service.errors import AnalysisInputError, UsageError
from service.files import load_network, write_json_atomically
from service.logs import logging_from_environment
from service.modes import resolve_method
from service.vocabulary import JobKind, JobState, SolveMode
from solver import (
    CRITERIA,
    InvalidStockError,
    NetworkSpec,
    PolicyResult,
    PricedPolicy,
    Progress,
    Recommendation,
    SizeLimits,
    SolverError,
    solve_network,
)
from solver.priced import solve_priced
from solver.spec import WEEKDAYS

__all__ = ["main"]

log = logging.getLogger(__name__)

EXIT_BAD_INPUT = 2
EXIT_INTERRUPTED = 130  # 128 + SIGINT, as shells report a command stopped by Ctrl-C
# Solver progress goes to stderr once a solve has taken this long, at most this often.
PROGRESS_AFTER_SECONDS = 2.0
PROGRESS_EVERY_SECONDS = 0.5
_GRID_MAX_SIDE = 21
_REPRESENTATIVE_MAX = 6  # locations shown full in turn in the summary of a larger network
TENANT_NAME_MAX = 100  # the width of tenants.name
LABEL_MAX = 200  # the width of api_keys.label
ROW_ID_MAX = 2**31 - 1  # INTEGER columns


def main(argv: Sequence[str] | None = None) -> int:
    parser = _parser()
    args = parser.parse_args(argv)
    logging_from_environment()
    try:
        code: int = args.handler(args)
    except UsageError as exc:
        sys.stderr.write(f"stockrelay: error: {exc}\n")
        return EXIT_BAD_INPUT
    except KeyboardInterrupt:
        sys.stderr.write("stockrelay: interrupted\n")
        return EXIT_INTERRUPTED
    except BrokenPipeError:
        # The reader went away (`stockrelay jobs list | head`): stop quietly, and keep Python
        # from complaining when it flushes stdout at exit.
        os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
        return 1
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
    solve.add_argument("network", type=Path, metavar="NETWORK.json", help=_NETWORK_HELP)
    solve.add_argument(
        "--criterion",
        choices=CRITERIA,
        default="discounted",
        help="discounted profit, or long-run profit per day (default: discounted)",
    )
    solve.add_argument(
        "--method",
        choices=["howard", "modified", "value-iteration"],
        default="howard",
        help="algorithm (default: Howard's policy iteration)",
    )
    solve.add_argument("--out", type=Path, metavar="RESULT.json", help="write the full policy")
    solve.add_argument(
        "--stock",
        type=_stock,
        metavar="LOCATION=UNITS,...",
        help="also print tonight's moves from this closing stock, e.g. riverside=13,hilltop=1",
    )
    solve.add_argument(
        "--mode",
        choices=[mode.value for mode in SolveMode],
        default="auto",
        help="exact: every stock state; priced: lane prices and per-store values, with a "
        "certified gap; auto (default): exact within the size limits, priced beyond",
    )
    solve.set_defaults(handler=_solve)

    simulate = commands.add_parser(
        "simulate",
        help="simulate the optimal policy beside simple rules and compare them",
        description="Solve NETWORK.json, then simulate its optimal policy, moving nothing, and "
        "balancing days of cover on the same random days, and print each one's profit per day, "
        "fill rate, stock-out days and moves with 95% intervals.",
    )
    simulate.add_argument("network", type=Path, metavar="NETWORK.json", help=_NETWORK_HELP)
    simulate.add_argument(
        "--criterion",
        choices=CRITERIA,
        default="average",
        help="the criterion the optimal policy is solved for (default: average)",
    )
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
    simulate.add_argument(
        "--mode",
        choices=[mode.value for mode in SolveMode],
        default="auto",
        help="how the policy simulated is solved, as for `stockrelay solve` (default: auto)",
    )
    simulate.add_argument("--json", action="store_true", help="print the report as JSON")
    simulate.set_defaults(handler=_simulate)

    migrate = commands.add_parser(
        "migrate",
        help="create the database or upgrade it to the current schema",
        description="Create the database named by STOCKRELAY_DATABASE_URL (default "
        "./var/stockrelay.db) or upgrade it to the schema this stockrelay needs. The only "
        "command that creates a database; run it before the others and after each upgrade.",
    )
    migrate.set_defaults(handler=operations.migrate)

    serve = commands.add_parser(
        "serve",
        help="run the HTTP API (uvicorn) until Ctrl-C",
        description="Serve the HTTP API on HOST:PORT until Ctrl-C or SIGTERM. Solves are done "
        "by `stockrelay worker` processes (or use `stockrelay run` for both).",
    )
    serve.add_argument("--host", default="127.0.0.1", help=_HOST_HELP)
    serve.add_argument("--port", type=_positive, default=8000, help="TCP port (default 8000)")
    serve.add_argument(
        "--processes",
        type=_positive,
        default=1,
        help="API processes sharing the port (default 1; try one per core)",
    )
    _renamed(serve, "--workers", "--processes")
    serve.set_defaults(handler=operations.serve)

    run = commands.add_parser(
        "run",
        help="run the HTTP API and solve workers together until Ctrl-C",
        description="Start `stockrelay serve` and solve workers as child processes, print an "
        "example request once the API answers, and stop them all on Ctrl-C or SIGTERM.",
    )
    run.add_argument("--host", default="127.0.0.1", help=_HOST_HELP)
    run.add_argument("--port", type=_positive, default=8000, help="the API's port (default 8000)")
    run.add_argument(
        "--solve-workers",
        type=_positive,
        default=1,
        help="solve worker processes beside the API (default 1)",
    )
    _renamed(run, "--workers", "--solve-workers")
    run.set_defaults(handler=operations.run)

    openapi = commands.add_parser(
        "openapi",
        help="write the API's OpenAPI document",
        description="Write the HTTP API's OpenAPI 3.1 document as JSON (the committed copy is "
        "openapi/openapi.json).",
    )
    openapi.add_argument(
        "--out", type=Path, metavar="openapi.json", help="the file to write (default: stdout)"
    )
    openapi.set_defaults(handler=operations.write_openapi)

    worker = commands.add_parser(
        "worker",
        help="run a solve worker until SIGTERM or Ctrl-C",
        description="Claim queued jobs (solves, simulations, what-if comparisons) one at a "
        "time and store their results, until SIGTERM or Ctrl-C. Run as many as there are cores "
        "(PostgreSQL) or one (SQLite).",
    )
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
        description="Store NETWORK.json as a new network, or as the next version of the "
        "tenant's network of the same name, and queue a solve per criterion that has neither "
        "a policy nor a live job.",
    )
    import_.add_argument("network", type=Path, metavar="NETWORK.json", help=_NETWORK_HELP)
    import_.add_argument(
        "--tenant",
        type=_tenant,
        default=operations.DEFAULT_TENANT,
        help=f"the tenant that owns it (default: {operations.DEFAULT_TENANT})",
    )
    import_.add_argument(
        "--criteria",
        default="discounted",
        type=_criteria,
        help="comma-separated: discounted, average (default: discounted)",
    )
    import_.add_argument(
        "--mode",
        choices=[mode.value for mode in SolveMode],
        help="solving mode (default: the network's, auto for a new one)",
    )
    import_.add_argument(
        "--skip-unchanged",
        action="store_true",
        help="add no version when the specification equals the current one",
    )
    import_.set_defaults(handler=operations.import_network)
    export = network_commands.add_parser(
        "export",
        help="write the current specification of a network",
        description="Write the current (or an earlier) specification of a network as JSON.",
    )
    export.add_argument(
        "id", type=_row_id, help="the network's id (see `stockrelay networks list`)"
    )
    export.add_argument("--version", type=_row_id, help="an earlier version number")
    export.add_argument(
        "--out", type=Path, metavar="NETWORK.json", help="the file to write (default: stdout)"
    )
    export.set_defaults(handler=operations.export_network)
    list_networks = network_commands.add_parser(
        "list",
        help="list networks and their versions",
        description="List every network: id, name, latest version number, archived or not.",
    )
    list_networks.set_defaults(handler=operations.list_networks)

    keys = commands.add_parser("keys", help="create, list and revoke API keys")
    key_commands = keys.add_subparsers(dest="action", required=True, metavar="ACTION")
    create_key = key_commands.add_parser(
        "create",
        help="create a key and print it (once: only its hash is stored)",
        description="Create an API key for a tenant and print it. It is shown once: only its "
        "hash is stored. Scopes: read (GET and recommendations) < write < admin.",
    )
    create_key.add_argument(
        "--tenant", type=_tenant, required=True, help="the tenant whose data the key reaches"
    )
    create_key.add_argument(
        "--scope",
        choices=["read", "write", "admin"],
        required=True,
        help="what the key may do: read < write < admin",
    )
    create_key.add_argument(
        "--label", type=_label, help=f"a note saying whose key this is (up to {LABEL_MAX})"
    )
    create_key.set_defaults(handler=operations.create_key)
    list_keys = key_commands.add_parser(
        "list",
        help="list keys (never the keys themselves)",
        description="List API keys: prefix, tenant, scope, when created and revoked, label. "
        "The keys themselves are never stored.",
    )
    list_keys.set_defaults(handler=operations.list_keys)
    revoke = key_commands.add_parser(
        "revoke",
        help="revoke a key by its prefix",
        description="Revoke an API key; processes stop accepting it within "
        "STOCKRELAY_KEY_CACHE_SECONDS.",
    )
    revoke.add_argument("prefix", help="the key's prefix, as `stockrelay keys list` shows it")
    revoke.set_defaults(handler=operations.revoke_key)

    jobs = commands.add_parser("jobs", help="list solve jobs or retry a failed one")
    job_commands = jobs.add_subparsers(dest="action", required=True, metavar="ACTION")
    list_jobs = job_commands.add_parser(
        "list",
        help="list jobs, newest first",
        description="List jobs newest first: id, state, kind, criterion, network, version "
        "number, attempts, seconds, error.",
    )
    list_jobs.add_argument(
        "--state", choices=[state.value for state in JobState], help="only jobs in this state"
    )
    list_jobs.add_argument(
        "--kind",
        choices=[kind.value for kind in JobKind],
        help="only solves, simulations or what-if comparisons (default: every kind)",
    )
    list_jobs.add_argument("--limit", type=_positive, default=50, help="at most this many (50)")
    list_jobs.set_defaults(handler=operations.list_jobs)
    retry = job_commands.add_parser(
        "retry",
        help="queue a failed job again with fresh attempts",
        description="Queue a "
        "failed job again with fresh attempts (after fixing what made it fail).",
    )
    retry.add_argument("id", type=_row_id, help="the job's id (see `stockrelay jobs list`)")
    retry.set_defaults(handler=operations.retry_job)
    return parser


_NETWORK_HELP = "a network specification (JSON), e.g. service/data/demo_network.json"
_HOST_HELP = "address to listen on (default 127.0.0.1; 0.0.0.0 for every interface)"


class _RenamedOption(argparse.Action):
    """An option's earlier name: still accepted, with a note naming the new one."""

    def __init__(self, option_strings: list[str], dest: str, new_name: str, **kwargs: Any):
        super().__init__(option_strings, dest, **kwargs)
        self.new_name = new_name

    def __call__(
        self,
        parser: argparse.ArgumentParser,
        namespace: argparse.Namespace,
        values: Any,
        option_string: str | None = None,
    ) -> None:
        sys.stderr.write(f"stockrelay: note: {option_string} is now {self.new_name}\n")
        setattr(namespace, self.dest, values)


def _renamed(parser: argparse.ArgumentParser, old: str, new: str) -> None:
    """Keep accepting `old` for the option now called `new` (hidden from --help)."""
    parser.add_argument(
        old,
        action=_RenamedOption,
        new_name=new,
        dest=new.lstrip("-").replace("-", "_"),
        type=_positive,
        help=argparse.SUPPRESS,
    )


def _positive(text: str) -> int:
    try:
        value = int(text)
    except ValueError:
        value = 0
    if value < 1:
        raise argparse.ArgumentTypeError(f"expected a whole number >= 1, got {text!r}")
    return value


def _tenant(text: str) -> str:
    name = text.strip()
    if not 1 <= len(name) <= TENANT_NAME_MAX or not name.isprintable():
        raise argparse.ArgumentTypeError(
            f"a tenant is named by 1 to {TENANT_NAME_MAX} printable characters, got {text!r}"
        )
    return name


def _stock(text: str) -> dict[str, int]:
    """`riverside=13,hilltop=1` -> {"riverside": 13, "hilltop": 1}."""
    stock: dict[str, int] = {}
    for part in text.split(","):
        location, _, units = part.partition("=")
        try:
            stock[location.strip()] = int(units)
        except ValueError:
            raise argparse.ArgumentTypeError(
                f"expected LOCATION=UNITS,... such as riverside=13,hilltop=1, got {text!r}"
            ) from None
    return stock


def _stock_of(spec: NetworkSpec, stock: dict[str, int] | None) -> tuple[int, ...] | None:
    """--stock in the network's location order; UsageError naming what is missing or unknown."""
    if stock is None:
        return None
    unknown = sorted(set(stock) - set(spec.location_ids))
    missing = [location for location in spec.location_ids if location not in stock]
    outside = [
        f"{location.id} {stock[location.id]} is outside 0..{location.capacity}"
        for location in spec.locations
        if location.id in stock and not 0 <= stock[location.id] <= location.capacity
    ]
    problems = (
        [f"no location {name!r} in the network" for name in unknown]
        + [f"no units given for {name!r}" for name in missing]
        + outside
    )
    if problems:
        raise UsageError("--stock: " + "; ".join(problems))
    return tuple(stock[location] for location in spec.location_ids)


def _row_id(text: str) -> int:
    """An id or number as the database stores it (a 32-bit integer on PostgreSQL)."""
    try:
        value = int(text)
    except ValueError:
        value = 0
    if not 1 <= value <= ROW_ID_MAX:
        raise argparse.ArgumentTypeError(f"expected a whole number 1..{ROW_ID_MAX}, got {text!r}")
    return value


def _label(text: str) -> str:
    if len(text) > LABEL_MAX:
        raise argparse.ArgumentTypeError(f"a label has at most {LABEL_MAX} characters")
    return text


def _criteria(text: str) -> list[str]:
    criteria = [part.strip() for part in text.split(",") if part.strip()]
    unknown = [c for c in criteria if c not in CRITERIA]
    if unknown or not criteria:
        raise argparse.ArgumentTypeError(
            f"criteria must be {' and/or '.join(CRITERIA)}, got {text!r}"
        )
    return criteria


class ProgressLines:
    """Solver progress on stderr, one line per iteration (at most every PROGRESS_EVERY_SECONDS),
    once the work has taken PROGRESS_AFTER_SECONDS: quick commands stay quiet."""

    def __init__(self) -> None:
        self.start = time.monotonic()
        self.last = -math.inf

    def __call__(self, progress: Progress) -> None:
        now = time.monotonic()
        elapsed = now - self.start
        if elapsed < PROGRESS_AFTER_SECONDS or now - self.last < PROGRESS_EVERY_SECONDS:
            return
        self.last = now
        sys.stderr.write(
            f"stockrelay: iteration {progress.iteration}, residual {progress.residual:.3g}, "
            f"{elapsed:.1f} s elapsed\n"
        )
        sys.stderr.flush()


def _solve(args: argparse.Namespace) -> int:
    spec = load_network(args.network)
    stock = _stock_of(spec, args.stock)
    operations.load_settings().limit_blas_threads()
    try:
        if resolve_method(spec, args.mode, SizeLimits()) == "priced":
            return _solve_priced(args, spec, stock)
        result = solve_network(
            spec, criterion=args.criterion, method=args.method, progress=ProgressLines()
        )
    except (SolverError, ValueError) as exc:
        raise UsageError(f"{args.network}: {exc}") from exc
    if args.out is not None:
        write_json_atomically(args.out, result_document(spec, result))
    sys.stdout.write(summary(spec, result, stock=stock))
    return 0 if result.converged else 1


def _solve_priced(
    args: argparse.Namespace, spec: NetworkSpec, stock: tuple[int, ...] | None
) -> int:
    try:
        policy = solve_priced(spec, criterion=args.criterion, progress=priced.progress_printer())
        document = None if args.out is None else priced.priced_result_document(spec, policy)
    except (SolverError, ValueError) as exc:
        raise UsageError(f"{args.network}: {exc}") from exc
    if document is not None:
        write_json_atomically(args.out, document)
    lines = _representative_moves(spec, policy)
    if stock is not None:
        lines.extend(_moves_from(spec, policy, stock))
    lines += ["", CAUTION]
    sys.stdout.write(priced.priced_summary(spec, policy) + "\n".join(lines) + "\n")
    return 0 if policy.converged else 1


_OPTIONS = {"warmup_days": "--warmup"}


def _simulate(args: argparse.Namespace) -> int:
    spec = load_network(args.network)
    operations.load_settings().limit_blas_threads()
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
        method = resolve_method(spec, args.mode, SizeLimits())
        report = run_simulation(
            spec,
            params,
            progress=ProgressLines(),
            method=method,
            priced_progress=priced.progress_printer(),
        )
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
    lines += ["", CAUTION]
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


CAUTION = (
    "caution: moves and figures follow the model and its parameters; a person reviews them "
    "before acting"
)


def summary(
    spec: NetworkSpec, result: PolicyResult, *, stock: tuple[int, ...] | None = None
) -> str:
    """A few lines for a person: sizes, convergence, for two locations the policy grid, for more
    the moves from a few representative closing stocks, and the moves from `stock` if given."""
    lines = [
        *priced.summary_heading(spec, result, f"transfer options {result.n_flows:,}"),
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
    else:
        lines.extend(_representative_moves(spec, result))
    if stock is not None:
        lines.extend(_moves_from(spec, result, stock))
    lines += ["", CAUTION]
    return "\n".join(lines) + "\n"


def _moves(spec: NetworkSpec, recommendation: Recommendation) -> str:
    moved = [
        f"{lane.from_} -> {lane.to} {units}"
        for lane, units in zip(spec.lanes, recommendation.flows, strict=True)
        if units
    ]
    if not moved:
        return "move nothing"
    return f"{', '.join(moved)}  (gain {recommendation.gain_from_transfers:.2f})"


def _describe_stock(spec: NetworkSpec, stock: Sequence[int]) -> str:
    return ", ".join(f"{loc} {units}" for loc, units in zip(spec.location_ids, stock, strict=True))


def _representative_moves(spec: NetworkSpec, result: PolicyResult | PricedPolicy) -> list[str]:
    """Tonight's moves when every location is half full, and when each one in turn is full
    while the others are empty (the first night of the week for a weekly network)."""
    capacities = result.capacities
    stocks = [tuple(c // 2 for c in capacities)] + [
        tuple(c if i == full else 0 for i, c in enumerate(capacities))
        for full in range(min(len(capacities), _REPRESENTATIVE_MAX))
    ]
    night = f" ({WEEKDAYS[0]} night)" if result.phases > 1 else ""
    lines = ["", f"tonight's moves{night} from a few closing stocks (--stock for any other):"]
    for stock in stocks:
        lines.append(f"  {_describe_stock(spec, stock)}: {_moves(spec, result.recommend(stock))}")
    return lines


def _moves_from(
    spec: NetworkSpec, result: PolicyResult | PricedPolicy, stock: tuple[int, ...]
) -> list[str]:
    """Tonight's moves from `stock`, for each night of the week of a weekly network."""
    try:
        result.state_index(stock)
    except InvalidStockError as exc:
        raise UsageError(f"--stock: {exc}") from exc
    lines = ["", f"from closing stock {_describe_stock(spec, stock)}:"]
    for phase in range(result.phases):
        night = f"{WEEKDAYS[phase]} night: " if result.phases > 1 else ""
        lines.append(f"  {night}{_moves(spec, result.recommend(stock, phase=phase))}")
    return lines


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
        + (f", every {rows_step} / {cols_step} levels" if rows_step > 1 or cols_step > 1 else "")
        + ")",
        " " * 5 + "".join(f"{c:>{width}}" for c in cols),
    ]
    lines.extend(f"{r:>4} " + "".join(f"{int(net[r, c]):>{width}}" for c in cols) for r in rows)
    return lines


if __name__ == "__main__":
    raise SystemExit(main())
