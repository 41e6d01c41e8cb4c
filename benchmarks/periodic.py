"""Benchmark of weekly (periodic) networks beside their stationary approximation, on one core.

Usage: .venv/bin/python benchmarks/periodic.py [--quick] [--out PATH]

Network (a scenario of our own): the two pressure-washer stores of benchmarks/solve.py, Quayside
and Elmfield, 100 units each, with daily demand that depends on the weekday: each store's mean
(and, for Quayside's negative binomial, variance) is multiplied by a factor per day, Quayside
busiest on Friday and Saturday, Elmfield a little busier early in the week. The factors average
1, so the stationary approximation, each store's demand replaced by its weekly average, is
exactly benchmarks/solve.py's "2 stores c=100" network. Lanes and everything else are the same.

Per criterion (discounted at 0.9, 0.99 and 0.999, and average) it solves both networks with
Howard's policy iteration and reports the solve seconds (timed as in benchmarks/solve.py), their
ratio against the target (weekly under 7 times stationary: a week has 7 times the states and
state-move pairs), iterations, one-day expectations ("products"), residuals and the tracemalloc
peak. A table goes to stdout and everything to JSON (default benchmarks/results/periodic.json).
"""

import os

# One core: must be set before numpy (and its BLAS) is first imported.
os.environ["OPENBLAS_NUM_THREADS"] = "1"
os.environ["OMP_NUM_THREADS"] = "1"
os.environ["MKL_NUM_THREADS"] = "1"

import argparse
import gc
import sys
import time
from collections.abc import Sequence
from pathlib import Path
from typing import Any

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "benchmarks"))

import solve  # noqa: E402  (networks, timing and machine facts, shared with benchmarks/solve.py)

from solver import Criterion, NetworkSpec, build_transfer_model, solve_policy_iteration  # noqa: E402
from solver.spec import WEEKDAYS  # noqa: E402

DEFAULT_OUT = ROOT / "benchmarks" / "results" / "periodic.json"
CAPACITY = 100
QUICK_CAPACITY = 50
TARGET_RATIO = 7.0
# Demand factor per weekday, Monday first; each averages 1.
DEMAND_FACTORS = {
    "quayside": (0.8, 0.85, 0.9, 1.0, 1.15, 1.4, 0.9),
    "elmfield": (1.1, 1.1, 1.0, 1.0, 0.9, 0.8, 1.1),
}
CASES: tuple[tuple[Criterion, float], ...] = (
    ("discounted", 0.9),
    ("discounted", 0.99),
    ("discounted", 0.999),
    ("average", solve.UNUSED_DISCOUNT),
)


def weekly_network(capacity: int, discount: float) -> NetworkSpec:
    """benchmarks/solve.py's two stores with demand scaled by DEMAND_FACTORS on each weekday."""
    document = solve.two_store_network(capacity, discount).model_dump(by_alias=True)
    document["name"] += ", weekday demand"
    for location in document["locations"]:
        law = location["demand"]
        factors = DEMAND_FACTORS[location["id"]]
        days = {}
        for day, factor in zip(WEEKDAYS, factors, strict=True):
            scaled = {**law, "mean": law["mean"] * factor}
            if "variance" in law:
                scaled["variance"] = law["variance"] * factor
            days[day] = scaled
        location["demand"] = {"weekly": days}
    return NetworkSpec.model_validate(document)


def measure(spec: NetworkSpec, criterion: Criterion) -> dict[str, Any]:
    model = build_transfer_model(spec)

    def run() -> Any:
        return solve_policy_iteration(model, criterion=criterion, max_iter=solve.MAX_ITER)

    gc.collect()
    start = time.perf_counter()
    result = run()
    timing = solve.time_solve(run, time.perf_counter() - start)
    return {
        "network": spec.name,
        "phases": model.n_phases,
        "states": model.n_phases * model.n_states,
        "pairs": model.n_pairs,
        "seconds": timing.seconds,
        "statistic": timing.statistic,
        "runs": timing.runs,
        "phase_seconds": dict(result.seconds),
        "peak_mb": solve.traced_peak_mb(run),
        "iterations": result.iterations,
        "products": result.evaluation_sweeps,
        "residual": result.residual,
        "error_bound": result.error_bound,
        "converged": result.converged,
        "method": result.method,
        "gain": result.gain,
    }


_COLUMNS = (
    ("case", 16),
    ("states", 13),
    ("pairs", 17),
    ("stationary s", 12),
    ("weekly s", 9),
    ("ratio", 6),
    ("target", 10),
    ("iter", 5),
    ("products", 9),
    ("residual", 8),
    ("peak MB", 9),
)


def _line(cells: Sequence[str]) -> str:
    return "  ".join(
        cell.ljust(width) if i == 0 else cell.rjust(width)
        for i, (cell, (_, width)) in enumerate(zip(cells, _COLUMNS, strict=True))
    )


def _cells(row: dict[str, Any]) -> list[str]:
    stationary, weekly = row["stationary"], row["weekly"]
    return [
        row["name"],
        f"{stationary['states']:,}/{weekly['states']:,}",
        f"{stationary['pairs']:,}/{weekly['pairs']:,}",
        f"{stationary['seconds']:.4f}",
        f"{weekly['seconds']:.4f}",
        f"{row['ratio']:.2f}",
        f"<{TARGET_RATIO:g}x {'pass' if row['target_met'] else 'FAIL'}",
        f"{stationary['iterations']}/{weekly['iterations']}",
        f"{stationary['products']}/{weekly['products']}",
        f"{weekly['residual']:.1e}",
        f"{stationary['peak_mb']:.1f}/{weekly['peak_mb']:.1f}",
    ]


def main(argv: Sequence[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description="Benchmark weekly networks against stationary.")
    parser.add_argument("--quick", action="store_true", help=f"capacity {QUICK_CAPACITY} only")
    parser.add_argument("--out", type=Path, default=DEFAULT_OUT, help="JSON results file")
    args = parser.parse_args(argv)
    capacity = QUICK_CAPACITY if args.quick else CAPACITY

    facts = solve.machine_facts()
    print(
        f"stockrelay periodic benchmark: two stores, capacity {capacity}; numpy {facts['numpy']}, "
        f"scipy {facts['scipy']}; BLAS single-threaded"
    )
    print(_line([name for name, _ in _COLUMNS]))
    print(_line(["-" * width for _, width in _COLUMNS]))
    rows = []
    for criterion, discount in CASES:
        stationary = measure(solve.two_store_network(capacity, discount), criterion)
        weekly = measure(weekly_network(capacity, discount), criterion)
        ratio = weekly["seconds"] / stationary["seconds"]
        name = f"{criterion}" if criterion == "average" else f"discount {discount:g}"
        row = {
            "name": name,
            "criterion": criterion,
            "discount": discount if criterion == "discounted" else None,
            "capacity": capacity,
            "stationary": stationary,
            "weekly": weekly,
            "ratio": ratio,
            "target_ratio": TARGET_RATIO,
            "target_met": ratio < TARGET_RATIO,
        }
        rows.append(row)
        print(_line(_cells(row)), flush=True)
    print(
        "states, pairs, iter, products, peak MB: stationary/weekly; products: one-day "
        "expectations (result.evaluation_sweeps); seconds: solve_policy_iteration only, timed "
        "as in benchmarks/solve.py."
    )

    report = {
        "benchmark": "periodic",
        "quick": args.quick,
        "demand_factors": DEMAND_FACTORS,
        "machine": facts,
        "revision": solve.solver_revision(),
        "cases": rows,
    }
    solve.write_report(args.out, report)
    return 0


if __name__ == "__main__":
    sys.exit(main())
