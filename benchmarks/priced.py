"""Benchmark of the price-decomposed solver (solver.priced) on large networks, and its bound
slack and policy loss against exact dynamic programming on small ones.

Usage: .venv/bin/python benchmarks/priced.py [--quick] [--out PATH]

Large networks (benchmarks/networks.py, scenarios of our own): 12 garden centres of capacity 60
with lanes between every pair (132 lanes), 24 of capacity 40 with lanes between every pair (552
lanes), 50 of capacity 30 with lanes to the 6 nearest branches both ways (368 lanes); lane
limits of 3 to 5 units, at most 2 units per branch a night in all, Poisson and negative binomial
demand, discount 0.99. Each is solved with its certificate (default PricedOptions, seed 0); the
table gives pricing iterations, seconds (pricing, the reference-stock pricing, the choice of the
plan's trade limit, certificate, total), the trade limit chosen ('-': none), the certified gap
and our targets (12 stores: <= 60 s and gap <= 1.5%; 24 stores:
<= 180 s and gap <= 1.0%; 50 stores: <= 600 s, gap reported).

Baselines on the large networks: the priced policy, moving nothing, balancing days of cover and
the pairwise index heuristic (solver.heuristics) simulated on common random numbers (365
measured days after 50 of warm-up, 30 replications, seed 0): profit per day and the paired
difference to the priced policy with its 95% interval.

Small networks: the same generator at 2 to 5 stores (discount 0.97), solved exactly (Howard's
policy iteration) and by prices; bound slack = (bound - optimal value) / mean |optimal value|
(median and largest over all stock states), policy loss = (optimal value - the plan's exact
value) / mean |optimal value| (median and largest).

Recommendations through the API: the 12-store network posted in auto mode to the app on a
scratch SQLite database (in process, FastAPI's TestClient), solved by the worker, then 300
recommendations at random closing stocks; p50 and p95 latency (milliseconds).

A table goes to stdout and everything to JSON (default benchmarks/results/priced.json) through
the shared writer of benchmarks/solve.py. BLAS runs single-threaded, as in benchmarks/solve.py.
Everything runs in one process: each store's subproblem takes milliseconds, and about half of
the pricing time goes to the cutting-plane linear programs (HiGHS), which one process solves;
the simulations (the trade limit's choice and the certificate) are loops vectorised over
replications, so spreading stores over processes was not tried.
"""

import os

# One core: must be set before numpy (and its BLAS) is first imported.
os.environ["OPENBLAS_NUM_THREADS"] = "1"
os.environ["OMP_NUM_THREADS"] = "1"
os.environ["MKL_NUM_THREADS"] = "1"

import argparse
import json
import sys
import tempfile
import time
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))

import solve  # machine facts, revision and the shared JSON writer
from fastapi.testclient import TestClient
from networks import large_network

from service.auth import create_key
from service.db.keys import get_or_create_tenant
from service.db.migrate import upgrade
from service.db.session import make_engine, make_session_factory
from service.main import create_app
from service.settings import Settings
from service.worker import Worker
from solver import NetworkSpec, PricedPolicy, solve_network
from solver.heuristics import balance_cover_plan, do_nothing_plan, pairwise_index_plan
from solver.priced import evaluate_plan_exactly, solve_priced
from solver.simulation import Plan, simulate_plans

DEFAULT_OUT = Path(__file__).resolve().parent / "results" / "priced.json"

# (stores, capacity, neighbours (None: every pair), target seconds, target gap)
LARGE = [
    (12, 60, None, 60.0, 0.015),
    (24, 40, None, 180.0, 0.010),
    (50, 30, 6, 600.0, None),
]
# (stores, capacity, neighbours, seed)
SMALL = [
    (2, 60, None, 1),
    (2, 120, None, 2),
    (3, 20, None, 3),
    (4, 12, 1, 4),
    (5, 7, 1, 5),
]


def run_large(
    stores: int, capacity: int, neighbours: int | None, target_s: float, target_gap: float | None
) -> tuple[dict[str, Any], NetworkSpec, PricedPolicy]:
    spec = large_network(stores, capacity, 0, neighbours=neighbours)
    started = time.perf_counter()
    policy = solve_priced(spec)
    seconds = time.perf_counter() - started
    cert = policy.certificate
    met = seconds <= target_s and (target_gap is None or cert.certified_gap <= target_gap)
    return (
        {
            "name": f"{stores} stores x {capacity}",
            "stores": stores,
            "capacity": capacity,
            "lanes": len(spec.lanes),
            "stock_states": f"{float(policy.n_states):.2e}",
            "iterations": policy.iterations,
            "converged": policy.converged,
            "trade_limit": policy.trade_limit,
            "seconds": seconds,
            "seconds_by_stage": dict(policy.seconds),
            "upper_bound": cert.upper_bound,
            "policy_value": cert.policy_value,
            "policy_value_interval": list(cert.policy_value_interval),
            "certified_gap": cert.certified_gap,
            "replications": cert.replications,
            "reference_stock": list(cert.reference_stock),
            "target_seconds": target_s,
            "target_gap": target_gap,
            "target_met": met,
        },
        spec,
        policy,
    )


def run_baselines(spec: NetworkSpec, policy: PricedPolicy) -> dict[str, Any]:
    """The priced policy beside the baselines on common random numbers (module docs)."""
    started = time.perf_counter()
    pairwise = pairwise_index_plan(spec)
    pairwise_seconds = time.perf_counter() - started

    def priced(stock: np.ndarray, phase: int) -> np.ndarray:
        return policy.plan_batch(stock, phase=phase)

    plans: dict[str, Plan] = {
        "priced": priced,
        "do_nothing": do_nothing_plan(spec),
        "balance_cover": balance_cover_plan(spec),
        "pairwise_index": pairwise,
    }
    started = time.perf_counter()
    report = simulate_plans(
        spec,
        plans,
        days=365,
        replications=30,
        rng=np.random.default_rng(0),
        warmup_days=50,
        reference="priced",
    )
    outcomes = {}
    for outcome in report.outcomes:
        difference = outcome.difference_to_reference
        assert difference is not None
        outcomes[outcome.name] = {
            "profit_per_day": outcome.profit_per_day.mean,
            "difference": [difference.mean, difference.low, difference.high],
            "fill_rate": outcome.fill_rate.mean,
            "units_moved_per_night": outcome.units_moved_per_night.mean,
        }
    return {
        "name": spec.name,
        "pairwise_build_seconds": pairwise_seconds,
        "simulation_seconds": time.perf_counter() - started,
        "outcomes": outcomes,
    }


def run_api(spec: NetworkSpec, requests: int = 300) -> dict[str, Any]:
    """Recommendation latency of a priced network through the API (module docs)."""
    with tempfile.TemporaryDirectory() as folder:
        url = f"sqlite:///{folder}/priced.db"
        engine = make_engine(url)
        upgrade(engine)
        settings = Settings(database_url=url, poll_interval=0.01)
        factory = make_session_factory(engine)
        with factory.begin() as session:
            key = create_key(session, get_or_create_tenant(session, "bench"), "write")[1]
        with TestClient(create_app(settings)) as client:
            client.headers["Authorization"] = f"Bearer {key}"
            document = json.loads(spec.model_dump_json(by_alias=True)) | {"mode": "auto"}
            created = client.post("/v1/networks", json=document)
            assert created.status_code == 201, created.text
            started = time.perf_counter()
            Worker(settings, factory, "bench").run(until_idle=True)
            solve_seconds = time.perf_counter() - started
            path = f"/v1/networks/{created.json()['id']}/recommendation"
            rng = np.random.default_rng(0)
            seconds = []
            for _ in range(requests):
                stock = {loc.id: int(rng.integers(0, loc.capacity + 1)) for loc in spec.locations}
                started = time.perf_counter()
                answer = client.post(path, json={"stock": stock})
                seconds.append(time.perf_counter() - started)
                assert answer.status_code == 200 and answer.json()["method"] == "priced"
        engine.dispose()
    ms = np.array(seconds) * 1000.0
    return {
        "name": spec.name,
        "requests": requests,
        "solve_seconds": solve_seconds,
        "p50_ms": float(np.percentile(ms, 50)),
        "p95_ms": float(np.percentile(ms, 95)),
        "target_p50_ms": 20.0,
    }


def run_small(stores: int, capacity: int, neighbours: int | None, seed: int) -> dict[str, Any]:
    spec = large_network(stores, capacity, seed, neighbours=neighbours, discount=0.97)
    exact = solve_network(spec)
    started = time.perf_counter()
    policy = solve_priced(spec)
    seconds = time.perf_counter() - started
    optimum = exact.values[0]
    stocks = np.indices(policy.shape).reshape(stores, -1).T
    bounds = np.array([policy.upper_bound(tuple(int(u) for u in s)) for s in stocks])
    values = evaluate_plan_exactly(spec, policy, "discounted")[0]
    scale = float(np.abs(optimum).mean())
    slack = (bounds - optimum) / scale
    loss = (optimum - values) / scale
    return {
        "name": f"{stores} stores x {capacity}",
        "stores": stores,
        "capacity": capacity,
        "lanes": len(spec.lanes),
        "stock_states": int(optimum.size),
        "exact_seconds": float(exact.seconds["total"]),
        "priced_seconds": seconds,
        "bound_slack_median": float(np.median(slack)),
        "bound_slack_max": float(slack.max()),
        "bound_below_optimum": bool(slack.min() < -1e-9),
        "policy_loss_median": float(np.median(loss)),
        "policy_loss_max": float(loss.max()),
        "certified_gap": policy.certificate.certified_gap,
    }


def _print_large(row: dict[str, Any]) -> None:
    stages = row["seconds_by_stage"]
    target = f"<={row['target_seconds']:g}s" + (
        f", <={row['target_gap']:.1%}" if row["target_gap"] is not None else ""
    )
    print(
        f"{row['name']:<18} {row['lanes']:>5} {row['stock_states']:>9} {row['iterations']:>5} "
        f"{'yes' if row['converged'] else 'no':>4} {stages['pricing']:>8.1f} "
        f"{stages.get('reference_pricing', 0.0):>8.1f} {stages.get('trade_limit', 0.0):>8.1f} "
        f"{row['trade_limit'] or '-'!s:>5} {stages['certify']:>8.1f} "
        f"{row['seconds']:>8.1f} {row['certified_gap']:>7.2%} {row['replications']:>5} "
        f"{target:>16} {'pass' if row['target_met'] else 'FAIL':>5}",
        flush=True,
    )


def _print_small(row: dict[str, Any]) -> None:
    print(
        f"{row['name']:<18} {row['lanes']:>5} {row['stock_states']:>9} "
        f"{row['exact_seconds']:>8.2f} {row['priced_seconds']:>8.2f} "
        f"{row['bound_slack_median']:>9.2%} {row['bound_slack_max']:>9.2%} "
        f"{row['policy_loss_median']:>9.3%} {row['policy_loss_max']:>9.3%} "
        f"{row['certified_gap']:>7.2%}",
        flush=True,
    )


def main(argv: Sequence[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description="Benchmark the priced solver.")
    parser.add_argument("--quick", action="store_true", help="12 stores and the small table")
    parser.add_argument("--out", type=Path, default=DEFAULT_OUT, help="JSON results file")
    args = parser.parse_args(argv)
    facts = solve.machine_facts()
    print(
        f"stockrelay priced benchmark: numpy {facts['numpy']}, scipy {facts['scipy']}, "
        f"{facts['cpu_count']} CPUs; BLAS single-threaded"
    )
    print(
        f"{'network':<18} {'lanes':>5} {'states':>9} {'iter':>5} {'conv':>4} {'price s':>8} "
        f"{'ref s':>8} {'limit s':>8} {'limit':>5} {'cert s':>8} {'total s':>8} {'gap':>7} "
        f"{'reps':>5} {'target':>16} "
        f"{'':>5}"
    )
    large = []
    solved = []
    for stores, capacity, neighbours, target_s, target_gap in LARGE[:1] if args.quick else LARGE:
        row, spec, policy = run_large(stores, capacity, neighbours, target_s, target_gap)
        large.append(row)
        solved.append((row["name"], spec, policy))
        _print_large(row)
    print()
    print(
        f"{'network':<18} {'policy':<15} {'profit/day':>11} {'vs priced':>10} "
        f"{'95% interval':>22} {'fill':>7} {'moved':>6}"
    )
    baselines = []
    for name, spec, policy in solved:
        row = run_baselines(spec, policy)
        baselines.append(row)
        for policy_name, outcome in row["outcomes"].items():
            mean, low, high = outcome["difference"]
            print(
                f"{name:<18} {policy_name:<15} {outcome['profit_per_day']:>11.2f} "
                f"{mean:>+10.2f} {f'[{low:+.2f}, {high:+.2f}]':>22} "
                f"{outcome['fill_rate']:>7.2%} {outcome['units_moved_per_night']:>6.1f}",
                flush=True,
            )
    api = run_api(solved[0][1])
    print()
    print(
        f"recommendations through the API ({api['name']}): p50 {api['p50_ms']:.1f} ms, "
        f"p95 {api['p95_ms']:.1f} ms over {api['requests']} requests (target p50 <= 20 ms); "
        f"worker solve {api['solve_seconds']:.1f} s"
    )
    print()
    print(
        f"{'network':<18} {'lanes':>5} {'states':>9} {'exact s':>8} {'priced s':>8} "
        f"{'slack p50':>9} {'slack max':>9} {'loss p50':>9} {'loss max':>9} {'gap':>7}"
    )
    small = []
    for stores, capacity, neighbours, seed in SMALL:
        row = run_small(stores, capacity, neighbours, seed)
        small.append(row)
        _print_small(row)
    print(
        "gap: certified gap at the reference stock (95% interval); slack and loss relative to "
        "the mean |optimal value| over all stock states."
    )
    report = {
        "benchmark": "priced",
        "quick": args.quick,
        "machine": facts,
        "revision": solve.solver_revision(),
        "large": large,
        "baselines": baselines,
        "api": api,
        "small": small,
    }
    solve.write_report(args.out, report)
    return 0


if __name__ == "__main__":
    sys.exit(main())
