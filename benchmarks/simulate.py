"""Benchmark of policy simulation: speed, and the demo network's optimal policy against baselines.

Usage: .venv/bin/python benchmarks/simulate.py [--days N] [--replications N] [--warmup N]
                                               [--seed N] [--out PATH]

Networks:
  * the demo network (service/data/demo_network.json): Riverside and Hilltop sharing drill kits;
  * three ski-hire shops sharing snowboards (a scenario of our own), 16 to 20 boards each, lanes
    both ways between every pair of at most 3 boards a night and 4 in all.

Speed: simulate_policies with three policies (average-optimal, balance_cover_policy, moving
nothing) on the same draws, in (days x replications) per second, median of --repeats runs, at
--replications and at ten times as many.

Comparison: the demo network over --days measured days (after --warmup days) and
--replications replications, profit per day, fill rate, stock-out days, units moved per night and
the paired difference to the optimal policy, all with 95% intervals.

A table goes to stdout and everything to JSON (default benchmarks/results/simulate.json). BLAS
runs single-threaded, as in benchmarks/solve.py.
"""

import os

# One core: must be set before numpy (and its BLAS) is first imported.
os.environ["OPENBLAS_NUM_THREADS"] = "1"
os.environ["OMP_NUM_THREADS"] = "1"
os.environ["MKL_NUM_THREADS"] = "1"

import argparse
import json
import platform
import statistics
import sys
import time
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import numpy as np
import scipy

from solver import NetworkSpec, PolicyResult, TransferModel, build_transfer_model
from solver.policy_iteration import solve_policy_iteration
from solver.simulation import (
    Interval,
    PolicyOutcome,
    SimulationReport,
    balance_cover_policy,
    do_nothing_policy,
    mean_demands,
    simulate_policies,
)

ROOT = Path(__file__).resolve().parent.parent
DEMO = ROOT / "service" / "data" / "demo_network.json"
DEFAULT_OUT = Path(__file__).resolve().parent / "results" / "simulate.json"
NAMES = ("optimal", "balance cover", "do nothing")


def snowboard_shops() -> NetworkSpec:
    """Three ski-hire shops sharing snowboards; the village shop sells out, the lift shop is
    over-supplied."""
    lanes = {
        ("village", "lift"): 3.0,
        ("lift", "village"): 2.5,
        ("village", "pass"): 4.5,
        ("pass", "village"): 4.0,
        ("lift", "pass"): 3.5,
        ("pass", "lift"): 3.5,
    }
    return NetworkSpec.model_validate(
        {
            "name": "Snowboards: Village, Lift and Pass hire shops",
            "discount": 0.995,
            "max_units_per_night": 4,
            "locations": [
                {
                    "id": "village",
                    "capacity": 20,
                    "unit_margin": 32.0,
                    "holding_cost": 0.4,
                    "stockout_penalty": 5.0,
                    "demand": {"dist": "negative_binomial", "mean": 5.2, "variance": 8.8},
                    "replenishment": {"dist": "poisson", "mean": 3.9},
                },
                {
                    "id": "lift",
                    "capacity": 16,
                    "unit_margin": 29.0,
                    "holding_cost": 0.3,
                    "stockout_penalty": 4.0,
                    "demand": {"dist": "poisson", "mean": 2.4},
                    "replenishment": {"dist": "poisson", "mean": 3.3},
                },
                {
                    "id": "pass",
                    "capacity": 16,
                    "unit_margin": 35.0,
                    "holding_cost": 0.5,
                    "stockout_penalty": 6.0,
                    "demand": {"dist": "poisson", "mean": 3.1},
                    "replenishment": {"dist": "pmf", "p": [0.1, 0.2, 0.3, 0.25, 0.15]},
                },
            ],
            "lanes": [
                {"from": a, "to": b, "unit_cost": cost, "max_units": 3}
                for (a, b), cost in lanes.items()
            ],
        }
    )


def prepare(spec: NetworkSpec) -> tuple[TransferModel, PolicyResult, dict[str, Any]]:
    model = build_transfer_model(spec)
    result = solve_policy_iteration(model, criterion="average")
    policies = {
        NAMES[0]: result.action,
        NAMES[1]: balance_cover_policy(model, mean_demands(spec)),
        NAMES[2]: do_nothing_policy(model),
    }
    return model, result, policies


def time_simulation(
    spec: NetworkSpec,
    model: TransferModel,
    policies: dict[str, Any],
    days: int,
    replications: int,
    repeats: int,
) -> dict[str, Any]:
    """Median seconds of simulate_policies over `repeats` runs (after one warm-up run)."""

    def run(seed: int) -> float:
        start = time.perf_counter()
        simulate_policies(
            spec,
            model,
            policies,
            days=days,
            replications=replications,
            rng=np.random.default_rng(seed),
        )
        return time.perf_counter() - start

    run(0)
    seconds = statistics.median(run(seed) for seed in range(1, repeats + 1))
    return {
        "network": spec.name,
        "states": model.n_states,
        "flows": model.n_flows,
        "policies": len(policies),
        "days": days,
        "replications": replications,
        "seconds": seconds,
        "day_replications_per_second": days * replications / seconds,
    }


def _interval(interval: Interval) -> dict[str, float]:
    return {"mean": interval.mean, "low": interval.low, "high": interval.high}


def _outcome_row(outcome: PolicyOutcome) -> dict[str, Any]:
    difference = outcome.difference_to_reference
    return {
        "policy": outcome.name,
        "profit_per_day": _interval(outcome.profit_per_day),
        "fill_rate": _interval(outcome.fill_rate),
        "fill_rate_by_location": {
            k: _interval(v) for k, v in outcome.fill_rate_by_location.items()
        },
        "stockout_days": _interval(outcome.stockout_days),
        "stockout_days_by_location": {
            k: _interval(v) for k, v in outcome.stockout_days_by_location.items()
        },
        "units_moved_per_night": _interval(outcome.units_moved_per_night),
        "move_cost_per_day": _interval(outcome.move_cost_per_day),
        "difference_to_optimal": None if difference is None else _interval(difference),
    }


def _pm(interval: Interval, digits: int, scale: float = 1.0) -> str:
    return f"{interval.mean * scale:.{digits}f} ± {interval.half_width * scale:.{digits}f}"


def print_speed(rows: Sequence[dict[str, Any]]) -> None:
    print("simulation speed (3 policies on common draws, median of runs)")
    header = f"{'network':<48} {'states':>6} {'flows':>5} {'days':>5} {'reps':>5} "
    print(header + f"{'seconds':>8} {'day-reps/s':>11}")
    for row in rows:
        print(
            f"{row['network']:<48} {row['states']:>6} {row['flows']:>5} {row['days']:>5} "
            f"{row['replications']:>5} {row['seconds']:>8.3f} "
            f"{row['day_replications_per_second']:>11,.0f}"
        )


def print_comparison(report: SimulationReport, gain: float) -> None:
    print()
    print(
        f"demo network, {report.days} days after {report.warmup_days} warm-up days, "
        f"{report.replications} replications, start stock {report.start_stock}; "
        f"mean ± half-width of {report.confidence:.0%} intervals"
    )
    print(f"solver's optimal gain (average criterion): {gain:.3f} per day")
    print(
        f"{'policy':<14} {'profit/day':>16} {'fill rate %':>13} {'stock-out days %':>17} "
        f"{'units/night':>13} {'move cost/day':>14} {'vs optimal/day':>16}"
    )
    for outcome in report.outcomes:
        difference = outcome.difference_to_reference
        print(
            f"{outcome.name:<14} {_pm(outcome.profit_per_day, 2):>16} "
            f"{_pm(outcome.fill_rate, 2, 100):>13} {_pm(outcome.stockout_days, 2, 100):>17} "
            f"{_pm(outcome.units_moved_per_night, 3):>13} "
            f"{_pm(outcome.move_cost_per_day, 2):>14} "
            f"{'' if difference is None else _pm(difference, 2):>16}"
        )


def main(argv: Sequence[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description="Benchmark policy simulation.")
    parser.add_argument("--days", type=int, default=365, help="measured days per replication")
    parser.add_argument("--replications", type=int, default=200)
    parser.add_argument("--warmup", type=int, default=30, help="days simulated before measuring")
    parser.add_argument("--repeats", type=int, default=5, help="timed runs per speed case")
    parser.add_argument("--seed", type=int, default=20_261_202)
    parser.add_argument("--out", type=Path, default=DEFAULT_OUT, help="JSON results file")
    args = parser.parse_args(argv)

    demo = NetworkSpec.model_validate_json(DEMO.read_text(encoding="utf-8"))
    networks = [demo, snowboard_shops()]
    prepared = [prepare(spec) for spec in networks]

    speed = []
    for spec, (model, _, policies) in zip(networks, prepared, strict=True):
        for replications in (args.replications, 10 * args.replications):
            speed.append(
                time_simulation(spec, model, policies, args.days, replications, args.repeats)
            )
    print_speed(speed)
    print("load average (1, 5, 15 min): {:.2f}, {:.2f}, {:.2f}".format(*os.getloadavg()))

    model, result, policies = prepared[0]
    assert result.gain is not None
    report = simulate_policies(
        demo,
        model,
        policies,
        days=args.days,
        replications=args.replications,
        rng=np.random.default_rng(args.seed),
        warmup_days=args.warmup,
        reference=NAMES[0],
    )
    print_comparison(report, result.gain)

    results = {
        "benchmark": "simulate",
        "machine": {
            "python": platform.python_version(),
            "platform": platform.platform(),
            "numpy": np.__version__,
            "scipy": scipy.__version__,
            "cpu_count": os.cpu_count(),
            # The machine may be shared: load averages (1, 5, 15 min) when the run ended.
            "load_average": list(os.getloadavg()),
        },
        "settings": {
            "days": args.days,
            "replications": args.replications,
            "warmup_days": args.warmup,
            "repeats": args.repeats,
            "seed": args.seed,
        },
        "speed": speed,
        "demo_comparison": {
            "network": demo.name,
            "criterion": "average",
            "solver_gain": result.gain,
            "start_stock": list(report.start_stock),
            "confidence": report.confidence,
            "outcomes": [_outcome_row(outcome) for outcome in report.outcomes],
        },
    }
    args.out.parent.mkdir(parents=True, exist_ok=True)
    args.out.write_text(json.dumps(results, indent=2) + "\n")
    print(f"wrote {args.out}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
