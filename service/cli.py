"""The `stockrelay` command line. Thin: it reads files, calls solver/, and writes results."""

from __future__ import annotations

import argparse
import json
import logging
import math
import os
import sys
import tempfile
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import numpy as np
from pydantic import ValidationError

from solver import NetworkSpec, PolicyResult, SolverError, solve_network

__all__ = ["main"]

log = logging.getLogger(__name__)

EXIT_BAD_INPUT = 2
_GRID_MAX_SIDE = 21


class UsageError(Exception):
    """Bad input from the user: reported as one line, exit code 2."""


def main(argv: Sequence[str] | None = None) -> int:
    parser = _parser()
    args = parser.parse_args(argv)
    logging.basicConfig(level=logging.WARNING, format="%(levelname)s %(name)s: %(message)s")
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
    return parser


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


def load_network(path: Path) -> NetworkSpec:
    """Read and validate a network specification; UsageError with one line when it is bad."""
    try:
        text = path.read_text(encoding="utf-8")
    except OSError as exc:
        raise UsageError(f"cannot read {path}: {exc.strerror or exc}") from exc
    try:
        document = json.loads(text)
    except json.JSONDecodeError as exc:
        raise UsageError(f"{path}: not valid JSON: {exc.msg} at line {exc.lineno}") from exc
    try:
        return NetworkSpec.model_validate(document)
    except ValidationError as exc:
        raise UsageError(f"{path}: {describe_validation_error(exc)}") from exc


def describe_validation_error(exc: ValidationError) -> str:
    """All problems of a specification on one line: `where: what; where: what`."""
    parts = []
    for error in exc.errors(include_url=False):
        where = ".".join(str(part) for part in error["loc"]) or "network"
        parts.append(f"{where}: {error['msg']}")
    return "; ".join(parts)


def result_document(spec: NetworkSpec, result: PolicyResult) -> dict[str, Any]:
    """The documented RESULT.json contract."""
    return {
        "network": spec.name,
        "criterion": result.criterion,
        "states": result.n_states,
        "lanes": [{"from": lane.from_, "to": lane.to} for lane in spec.lanes],
        "value": result.values.tolist(),
        "policy": result.policy_flows().tolist(),
        "gain": result.gain,
        "iterations": result.iterations,
        "residual": result.residual,
        "seconds": result.seconds["total"],
    }


def write_json_atomically(path: Path, document: dict[str, Any]) -> None:
    """Write all of `document` or nothing: a temporary file beside `path`, then a rename."""
    try:
        descriptor, name = tempfile.mkstemp(dir=path.parent, prefix=f".{path.name}.")
    except OSError as exc:
        raise UsageError(f"cannot write {path}: {exc.strerror or exc}") from exc
    temporary = Path(name)
    try:
        with os.fdopen(descriptor, "w", encoding="utf-8") as handle:
            json.dump(document, handle, allow_nan=False, separators=(",", ":"))
            handle.write("\n")
        os.replace(temporary, path)
    except BaseException:
        temporary.unlink(missing_ok=True)
        raise


def summary(spec: NetworkSpec, result: PolicyResult) -> str:
    """A few lines for a person: sizes, convergence, and for two locations the policy grid."""
    lines = [
        f"network     {spec.name}",
        f"criterion   {result.criterion}"
        + (f" (discount {result.discount:g})" if result.discount is not None else ""),
        f"states      {result.n_states:,}   transfer options {result.n_flows:,}",
        f"iterations  {result.iterations} ({result.method}, "
        f"{result.evaluation_sweeps:,} matrix-vector products)",
        f"residual    {result.residual:.3g}   bound on error {result.error_bound:.3g}"
        + ("" if result.converged else "   NOT CONVERGED"),
        f"seconds     {result.seconds['total']:.3f}",
    ]
    if result.gain is not None:
        lines.append(f"profit/day  {result.gain:.4f}")
    if len(result.capacities) == 2:
        lines.extend(_policy_grid(spec, result))
    return "\n".join(lines) + "\n"


def _policy_grid(spec: NetworkSpec, result: PolicyResult) -> list[str]:
    """Net units moved from the first location to the second, by closing stock."""
    first, second = spec.location_ids
    sign = np.array([1 if a == 0 else -1 for a, _ in result.lanes], dtype=np.int64)
    net = (result.policy_flows() @ sign).reshape(result.shape)
    rows_step = max(1, math.ceil(result.shape[0] / _GRID_MAX_SIDE))
    cols_step = max(1, math.ceil(result.shape[1] / _GRID_MAX_SIDE))
    rows = range(0, result.shape[0], rows_step)
    cols = range(0, result.shape[1], cols_step)
    width = max(3, len(str(int(np.abs(net).max()))) + 2)
    lines = [
        "",
        f"net units moved {first} -> {second} (rows: {first} stock, columns: {second} stock"
        + (f", every {rows_step}th/{cols_step}th level" if rows_step > 1 or cols_step > 1 else "")
        + ")",
        " " * 5 + "".join(f"{c:>{width}}" for c in cols),
    ]
    lines.extend(f"{r:>4} " + "".join(f"{int(net[r, c]):>{width}}" for c in cols) for r in rows)
    return lines


if __name__ == "__main__":
    raise SystemExit(main())
