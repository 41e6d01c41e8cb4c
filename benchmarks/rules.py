"""What a floor costs and what it protects, on the demo network.

Usage: .venv/bin/python benchmarks/rules.py [--days N] [--replications N] [--seed N] [--out PATH]

Scenario (our own): the demo network (service/data/demo_network.json, Riverside and Hilltop
sharing drill kits) with both lanes cut to LANE_COST a kit, so that the optimal policy feeds
Hilltop, whose margin is higher, from Riverside. Riverside then keeps a floor of k kits
(keep_at_least = k, k in FLOORS): it sends nothing that would leave it with fewer.

For each k, service.analysis.run_simulation (the simulation endpoint's computation) runs the
average-optimal policy with the floor and the one without it on the same simulated days (common
random numbers), and reports the profit per day the floor gives up (paired, 95% interval) and
each store's fill rate and stock-out days with and without it. The exact difference of the two
optimal gains (solver.solve_network, average criterion) is printed beside the simulated one.

A table goes to stdout and everything to JSON (default benchmarks/results/rules.json).
"""

import os

# One core: must be set before numpy (and its BLAS) is first imported.
os.environ["OPENBLAS_NUM_THREADS"] = "1"
os.environ["OMP_NUM_THREADS"] = "1"
os.environ["MKL_NUM_THREADS"] = "1"

import argparse
import sys
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import solve  # benchmarks/solve.py: the shared JSON writer

from service.analysis import run_simulation
from service.analysis_requests import SimulationRequest
from solver import NetworkSpec, solve_network

ROOT = Path(__file__).resolve().parent.parent
DEMO = ROOT / "service" / "data" / "demo_network.json"
DEFAULT_OUT = Path(__file__).resolve().parent / "results" / "rules.json"
LANE_COST = 1.0
FLOORS = (1, 2, 3, 4, 6)
STORE = "riverside"


def scenario(floor: int) -> NetworkSpec:
    """The demo network with cheap lanes and a floor of `floor` kits at Riverside."""
    document = NetworkSpec.model_validate_json(DEMO.read_text(encoding="utf-8")).model_dump(
        mode="json", by_alias=True
    )
    for lane in document["lanes"]:
        lane["unit_cost"] = LANE_COST
    for location in document["locations"]:
        if location["id"] == STORE:
            location["keep_at_least"] = floor
    return NetworkSpec.model_validate(document)


def measure(floor: int, days: int, replications: int, seed: int) -> dict[str, Any]:
    spec = scenario(floor)
    with_floor = solve_network(spec, criterion="average").gain
    without = solve_network(spec.without_rules(), criterion="average").gain
    assert with_floor is not None and without is not None
    request = SimulationRequest(
        criterion="average", days=days, replications=replications, seed=seed
    )
    report = run_simulation(spec, request)
    return {
        "floor": floor,
        "exact_gain_with_floor": with_floor,
        "exact_gain_without_floor": without,
        "exact_cost_per_day": without - with_floor,
        "rules": report["rules"],
        "moves_per_night": {
            policy["name"]: policy["units_moved_per_night"]["mean"] for policy in report["policies"]
        },
    }


def _pm(interval: dict[str, Any], digits: int, scale: float = 1.0) -> str:
    half = (interval["high"] - interval["low"]) / 2
    return f"{interval['mean'] * scale:.{digits}f} ± {half * scale:.{digits}f}"


def print_table(rows: Sequence[dict[str, Any]]) -> None:
    print(
        "| floor at Riverside | profit per day given up (simulated) | exact | Riverside fill "
        "rate with / without | Hilltop fill rate with / without | Riverside stock-out days "
        "with / without |"
    )
    print("|---:|---:|---:|---:|---:|---:|")
    for row in rows:
        rules = row["rules"]
        here, there = rules["by_location"][STORE], rules["by_location"]["hilltop"]
        print(
            f"| {row['floor']} | {_pm(rules['profit_per_day_cost'], 2)} | "
            f"{row['exact_cost_per_day']:.2f} | "
            f"{_pm(here['fill_rate_with_rules'], 1, 100)}% / "
            f"{_pm(here['fill_rate_without_rules'], 1, 100)}% | "
            f"{_pm(there['fill_rate_with_rules'], 1, 100)}% / "
            f"{_pm(there['fill_rate_without_rules'], 1, 100)}% | "
            f"{_pm(here['stockout_days_with_rules'], 1, 100)}% / "
            f"{_pm(here['stockout_days_without_rules'], 1, 100)}% |"
        )


def main(argv: Sequence[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description="What a floor costs and protects (demo).")
    parser.add_argument("--days", type=int, default=365, help="measured days per replication")
    parser.add_argument("--replications", type=int, default=200)
    parser.add_argument("--seed", type=int, default=20_261_202)
    parser.add_argument("--out", type=Path, default=DEFAULT_OUT, help="JSON results file")
    args = parser.parse_args(argv)

    rows = [measure(floor, args.days, args.replications, args.seed) for floor in FLOORS]
    print_table(rows)
    solve.write_report(
        args.out,
        {
            "benchmark": "rules",
            "scenario": f"demo network, both lanes at {LANE_COST:g} a kit, floor at {STORE}",
            "settings": {
                "criterion": "average",
                "days": args.days,
                "warmup_days": SimulationRequest().warmup_days,
                "replications": args.replications,
                "seed": args.seed,
            },
            "rows": rows,
        },
    )
    return 0


if __name__ == "__main__":
    sys.exit(main())
