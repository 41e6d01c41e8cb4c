"""Benchmark of assortments: many items over one store layout (issue 16).

Usage: .venv/bin/python benchmarks/assortment.py [--quick] [--out PATH]

Scenario of our own: a hardware chain of 4 stores (quay, mill, abbey, fort) on a ring road,
lanes both ways between neighbours (8 lanes, at most 2 units of an item per lane a night, unit
costs 0.7 to 1.3, a dispatch cost of 2.0 on the two long lanes). 5,000 items (1,000 with
--quick), each an item network of its own: capacities 4 to 7 per store, margins 6 to 18,
Poisson or negative binomial demand of 4% to 25% of capacity a day, Poisson replenishment.
Items with identical parameters share one policy, so the items are spread over D distinct
policies (40, or 8 with --quick), most of them exact and stationary, some weekly (a weekend
peak at the quay) and some priced (solver.priced), as a real assortment mixes them. Closing
stocks are drawn uniformly within each item's capacities (seed 0).

Sections, one function each (`SECTIONS`), each returning its part of the JSON report:

* bulk_moves: solver.assortment.assortment_moves for all items at once, without and with shared
  truck capacity (each lane's truck set to 60% of the uncoupled load, counted in units, and
  again in volumes of 0.2 to 3.0 per unit; and a truck of twice the load, which never binds);
  item-locations per second (items x stores / wall seconds, median of repeated runs after a
  warm-up, and per CPU second, as the machine is shared) against the target of 50,000 per API
  process; for the shared runs the sharing cost, the allocation's gap to its bound and the
  pricing iterations. Beside them, one item at a time through each policy's recommend() (what
  a per-item request computes today).
* sharing_quality: the allocation on the 60% trucks (units) beside the best assignment over the
  same candidates, solved exactly by scipy.optimize.milp (HiGHS branch and bound, stopped
  after 300 s): what the allocation misses, as currency and as a share of the sharing cost,
  and how far its bound lies above the best value.
* policy_memory: bytes of each distinct policy's arrays once decoded from storage
  (service.codec round trip), per exact, weekly and priced policy, the stored (compressed)
  bytes, and the bytes solver.assortment derives and keeps beside each policy it has served
  (after bulk_moves; 0 when that section did not run).

* service: items created, solved by 1 and 2 worker processes on SQLite and PostgreSQL, the
  closing reports to pick lists, and bulk recommendations, all through the HTTP API
  (benchmarks/assortment_service.py). History and calibration: benchmarks/assortment_history.py.
 A table goes to stdout and everything to JSON (default
benchmarks/results/assortment.json) through the shared writer of benchmarks/solve.py. BLAS runs
single-threaded, as in benchmarks/solve.py.
"""

import os

# One core: must be set before numpy (and its BLAS) is first imported.
os.environ["OPENBLAS_NUM_THREADS"] = "1"
os.environ["OMP_NUM_THREADS"] = "1"
os.environ["MKL_NUM_THREADS"] = "1"

import argparse
import sys
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
from numpy.typing import NDArray
from scipy import sparse
from scipy.optimize import Bounds, LinearConstraint, milp

sys.path.insert(0, str(Path(__file__).resolve().parent))

import assortment_service  # the sections through the HTTP API and worker processes
import solve  # machine facts, revision and the shared JSON writer

from service.codec import decode_policy, encode_policy
from solver import NetworkSpec, PricedOptions, solve_network
from solver.assortment import ItemPolicy, assortment_moves, derived_bytes
from solver.priced import solve_priced

DEFAULT_OUT = Path(__file__).resolve().parent / "results" / "assortment.json"
TARGET_ITEM_LOCATIONS_PER_SECOND = 50_000.0

STORES = ("quay", "mill", "abbey", "fort")
# (from, to, unit cost, dispatch cost): a ring road, both ways.
LANES = (
    ("quay", "mill", 0.7, 0.0),
    ("mill", "quay", 0.7, 0.0),
    ("mill", "abbey", 0.9, 0.0),
    ("abbey", "mill", 0.9, 0.0),
    ("abbey", "fort", 1.3, 2.0),
    ("fort", "abbey", 1.3, 2.0),
    ("fort", "quay", 1.1, 0.0),
    ("quay", "fort", 1.1, 0.0),
)
LANE_LIMIT = 2
# Shared trucks carry this share of the uncoupled load (binding on every lane that moves).
TRUCK_SHARE = 0.6
# ... and, to show what an unused truck costs, twice the uncoupled load (never binding).
ROOMY_SHARE = 2.0
PRICED_OPTIONS = PricedOptions(replications=16, target_half_width=0.01)
# The exact assignment by HiGHS is a reference, not a contender: stop it after this long.
MILP_SECONDS = 300.0


@dataclass(frozen=True)
class Assortment:
    """Items over the layout: distinct policies, each item's policy, closing stocks, volumes."""

    policies: tuple[ItemPolicy, ...]
    kinds: tuple[str, ...]
    policy_of: NDArray[np.int64]
    stocks: NDArray[np.int64]
    unit_volume: NDArray[np.float64]
    solve_seconds: float

    @property
    def n_items(self) -> int:
        return int(self.policy_of.size)


def item_network(rng: np.random.Generator, *, weekly: bool) -> NetworkSpec:
    """One item of the chain (module docs), drawn from rng."""
    locations: list[dict[str, Any]] = []
    for i, store in enumerate(STORES):
        capacity = int(rng.integers(4, 8))
        mean = round(float(rng.uniform(0.04, 0.25)) * capacity, 3)
        demand: dict[str, Any] = (
            {"dist": "poisson", "mean": mean}
            if rng.random() < 0.7
            else {"dist": "negative_binomial", "mean": mean, "variance": round(2.2 * mean, 3)}
        )
        if weekly and i == 0:
            demand = {
                "weekly": {
                    day: {"dist": "poisson", "mean": round(mean * factor, 3)}
                    for day, factor in zip(
                        ("mon", "tue", "wed", "thu", "fri", "sat", "sun"),
                        (0.7, 0.7, 0.8, 0.9, 1.3, 1.8, 1.2),
                        strict=True,
                    )
                }
            }
        locations.append(
            {
                "id": store,
                "capacity": capacity,
                "unit_margin": round(float(rng.uniform(6.0, 18.0)), 2),
                "holding_cost": round(float(rng.uniform(0.02, 0.3)), 3),
                "stockout_penalty": round(float(rng.uniform(0.0, 2.0)), 2),
                "demand": demand,
                "replenishment": {
                    "dist": "poisson",
                    "mean": round(mean * float(rng.uniform(0.6, 1.4)), 3),
                },
            }
        )
    lanes = [
        {"from": a, "to": b, "unit_cost": cost, "dispatch_cost": dispatch, "max_units": LANE_LIMIT}
        for a, b, cost, dispatch in LANES
    ]
    return NetworkSpec.model_validate(
        {"name": "hardware item", "discount": 0.97, "locations": locations, "lanes": lanes}
    )


def make_assortment(items: int, distinct: int, seed: int = 0) -> Assortment:
    """`distinct` policies (one in eight weekly, one in eight priced, the rest exact and
    stationary) spread over `items` items; closing stocks uniform within capacities."""
    rng = np.random.default_rng(seed)
    policies: list[ItemPolicy] = []
    kinds: list[str] = []
    started = time.perf_counter()
    for k in range(distinct):
        kind = ("weekly", "priced", *["exact"] * 6)[k % 8]
        spec = item_network(rng, weekly=kind == "weekly")
        if kind == "priced":
            policies.append(solve_priced(spec, options=PRICED_OPTIONS))
        else:
            policies.append(solve_network(spec))
        kinds.append(kind)
    solve_seconds = time.perf_counter() - started
    policy_of = rng.integers(0, distinct, size=items)
    caps = np.array([p.capacities for p in policies], dtype=np.int64)[policy_of]
    stocks = rng.integers(0, caps + 1).astype(np.int64)
    volume = np.round(rng.uniform(0.2, 3.0, size=items), 2)
    return Assortment(tuple(policies), tuple(kinds), policy_of, stocks, volume, solve_seconds)


# -- measurement -----------------------------------------------------------------------------


def _timed(run: Callable[[], object], repeats: int) -> tuple[float, float]:
    """Median wall seconds and least CPU seconds of `repeats` runs after one warm-up."""
    run()
    walls, cpus = [], []
    for _ in range(repeats):
        wall, cpu = time.perf_counter(), time.process_time()
        run()
        walls.append(time.perf_counter() - wall)
        cpus.append(time.process_time() - cpu)
    return float(np.median(walls)), float(min(cpus))


def _rate_row(name: str, a: Assortment, wall: float, cpu: float, items: int) -> dict[str, Any]:
    cells = items * len(STORES)
    rate = cells / wall
    return {
        "name": name,
        "items": items,
        "item_locations": cells,
        "seconds": wall,
        "cpu_seconds": cpu,
        "item_locations_per_second": rate,
        "item_locations_per_cpu_second": cells / cpu if cpu > 0 else None,
        "target_per_second": TARGET_ITEM_LOCATIONS_PER_SECOND,
        "target_met": rate >= TARGET_ITEM_LOCATIONS_PER_SECOND,
        "target_met_cpu": cpu > 0 and cells / cpu >= TARGET_ITEM_LOCATIONS_PER_SECOND,
    }


# -- sections --------------------------------------------------------------------------------


def bulk_moves(a: Assortment, quick: bool) -> dict[str, Any]:
    """Moves for every item at once, uncoupled and with shared trucks (module docs)."""
    repeats = 3 if quick else 7
    rows: list[dict[str, Any]] = []

    def uncoupled() -> Any:
        return assortment_moves(a.policies, a.policy_of, a.stocks)

    free = uncoupled()
    wall, cpu = _timed(uncoupled, repeats)
    rows.append(_rate_row("uncoupled", a, wall, cpu, a.n_items) | {"moving_items": _moving(free)})

    trucks = (
        ("units", np.ones(a.n_items), TRUCK_SHARE),
        ("volume", a.unit_volume, TRUCK_SHARE),
        ("units", np.ones(a.n_items), ROOMY_SHARE),
    )
    for unit, volume, share in trucks:
        load = (free.flows * volume[:, None]).sum(axis=0)
        capacity = _truck(share * load, unit)

        def shared(capacity: NDArray[np.float64] = capacity, unit: str = unit) -> Any:
            return assortment_moves(
                a.policies,
                a.policy_of,
                a.stocks,
                truck_capacity=capacity,
                unit_volume=a.unit_volume if unit == "volume" else None,
            )

        result = shared()
        allocation = result.sharing
        assert allocation is not None
        used = (result.flows * volume[:, None]).sum(axis=0)
        assert np.all(used <= capacity + 1e-9), "shared capacity exceeded"
        wall, cpu = _timed(shared, repeats)
        rows.append(
            _rate_row(f"trucks at {share:.0%} of load ({unit})", a, wall, cpu, a.n_items)
            | {
                "moving_items": _moving(result),
                "truck_share": share,
                "uncoupled_value": allocation.unconstrained_value,
                "value": allocation.value,
                "bound": allocation.bound,
                "sharing_cost": allocation.sharing_cost,
                "gap": allocation.gap,
                "pricing_iterations": allocation.iterations,
                "converged": allocation.converged,
            }
        )

    # One item at a time through its policy's recommend(), on a sample.
    sample = min(a.n_items, 300 if quick else 1_000)

    def one_by_one() -> None:
        for m in range(sample):
            policy = a.policies[a.policy_of[m]]
            policy.recommend(tuple(int(u) for u in a.stocks[m]))

    wall, cpu = _timed(one_by_one, 1)
    rows.append(_rate_row("one item at a time (recommend)", a, wall, cpu, sample))
    return {"rows": rows}


def sharing_quality(a: Assortment, quick: bool) -> dict[str, Any]:
    """The allocation on trucks at 60% of the uncoupled load (units) against the best
    assignment over the same candidates, found exactly by scipy.optimize.milp (HiGHS)."""
    free = assortment_moves(a.policies, a.policy_of, a.stocks)
    capacity = _truck(TRUCK_SHARE * free.flows.sum(axis=0), "units")
    moves = assortment_moves(a.policies, a.policy_of, a.stocks, truck_capacity=capacity)
    allocation, choices = moves.sharing, moves.candidates
    assert allocation is not None and choices is not None
    k, m = choices.item.size, choices.n_items
    one_each = sparse.csr_matrix((np.ones(k), (choices.item, np.arange(k))), shape=(m, k))
    # Less each item's value of moving nothing (one candidate per item, so the same argmax):
    # HiGHS's relative gap then applies to what the moves are worth, not to the stock's value.
    nothing = np.zeros(m)
    idle = ~choices.flows.any(axis=1)
    nothing[choices.item[idle]] = choices.value[idle]
    shift = float(nothing.sum())
    started = time.perf_counter()
    best = milp(
        -(choices.value - nothing[choices.item]),
        constraints=[
            LinearConstraint(one_each, 1.0, 1.0),
            LinearConstraint(sparse.csr_matrix(choices.flows.T.astype(float)), -np.inf, capacity),
        ],
        integrality=np.ones(k),
        bounds=Bounds(0, 1),
        options={"time_limit": MILP_SECONDS, "mip_rel_gap": 1e-9},
    )
    seconds = time.perf_counter() - started
    optimum = float(-best.fun) + shift if best.status == 0 else None
    row: dict[str, Any] = {
        "items": m,
        "candidates": k,
        "truck_share": TRUCK_SHARE,
        "uncoupled_value": allocation.unconstrained_value,
        "value": allocation.value,
        "bound": allocation.bound,
        "sharing_cost": allocation.sharing_cost,
        "milp_status": int(best.status),
        "milp_seconds": seconds,
        "best_value": optimum,
    }
    if optimum is not None:
        row["loss"] = optimum - allocation.value
        row["loss_share_of_sharing_cost"] = row["loss"] / max(allocation.sharing_cost, 1e-12)
        row["bound_slack"] = allocation.bound - optimum
    return row


def _truck(room: NDArray[np.float64], unit: str) -> NDArray[np.float64]:
    """Truck capacities: whole units, or volumes to two decimals (rounded down)."""
    if unit == "units":
        return np.floor(room)
    rounded: NDArray[np.float64] = np.floor(room * 100.0) / 100.0
    return rounded


def _moving(moves: Any) -> int:
    return int(np.count_nonzero(moves.flows.any(axis=1)))


def policy_memory(a: Assortment, quick: bool) -> dict[str, Any]:
    """Bytes of each distinct policy's decoded arrays, and its stored size."""
    rows: list[dict[str, Any]] = []
    for policy, kind in zip(a.policies, a.kinds, strict=True):
        encoded = encode_policy(policy)
        decoded = decode_policy(encoded.arrays, encoded.layout, encoded.checksum, encoded.meta)
        rows.append(
            {
                "kind": kind,
                "stock_states": int(np.prod(policy.shape)),
                "decoded_bytes": _array_bytes(decoded),
                "stored_bytes": len(encoded.arrays),
                "derived_bytes": derived_bytes(policy),
            }
        )
    summary: dict[str, dict[str, Any]] = {}
    for kind in sorted({str(row["kind"]) for row in rows}):
        of_kind = [row for row in rows if row["kind"] == kind]
        summary[kind] = {
            "policies": len(of_kind),
            "median_states": float(np.median([r["stock_states"] for r in of_kind])),
            "median_decoded_bytes": float(np.median([r["decoded_bytes"] for r in of_kind])),
            "max_decoded_bytes": int(max(r["decoded_bytes"] for r in of_kind)),
            "median_stored_bytes": float(np.median([r["stored_bytes"] for r in of_kind])),
            "median_derived_bytes": float(np.median([r["derived_bytes"] for r in of_kind])),
        }
    return {"policies": rows, "by_kind": summary}


def _array_bytes(policy: ItemPolicy) -> int:
    """Bytes held by the policy's numpy arrays (what a cached policy keeps in memory, less
    the few hundred bytes of Python objects around them)."""
    total = 0
    for value in vars(policy).values():
        if isinstance(value, np.ndarray):
            total += value.nbytes
        elif isinstance(value, tuple) and value and isinstance(value[0], np.ndarray):
            total += sum(v.nbytes for v in value)
    return total


Section = Callable[[Assortment, bool], dict[str, Any]]


def service(a: Assortment, quick: bool) -> dict[str, Any]:
    """Create, solve (1 and 2 worker processes, SQLite and PostgreSQL), closing to pick lists
    and bulk recommendations through the HTTP API (benchmarks/assortment_service.py; its own
    items over the same kind of layout)."""
    report: dict[str, Any] = assortment_service.run_service_sections(quick)
    return report


SECTIONS: dict[str, Section] = {
    "bulk_moves": bulk_moves,
    "sharing_quality": sharing_quality,
    "policy_memory": policy_memory,
    "service": service,
}


# -- report ----------------------------------------------------------------------------------


def print_bulk(section: dict[str, Any]) -> None:
    print(
        f"{'bulk moves':<34} {'items':>6} {'item-loc':>8} {'seconds':>8} {'cpu s':>7} "
        f"{'item-loc/s':>10} {'per cpu s':>10} {'target wall/cpu':>20} {'sharing cost':>12} "
        f"{'gap':>8} {'iter':>4}"
    )
    for row in section["rows"]:
        target = ""
        if not row["name"].startswith("one item"):
            verdict = "/".join(
                "pass" if met else "FAIL" for met in (row["target_met"], row["target_met_cpu"])
            )
            target = f">={row['target_per_second']:,.0f} {verdict}"
        sharing = (
            f"{row['sharing_cost']:>12.2f} {row['gap']:>8.2f} {row['pricing_iterations']:>4}"
            if "sharing_cost" in row
            else ""
        )
        per_cpu = row["item_locations_per_cpu_second"]
        print(
            f"{row['name']:<34} {row['items']:>6} {row['item_locations']:>8} "
            f"{row['seconds']:>8.4f} {row['cpu_seconds']:>7.4f} "
            f"{row['item_locations_per_second']:>10,.0f} "
            f"{per_cpu:>10,.0f} {target:>20} {sharing}"
        )
    print(
        "seconds: median wall time of repeated runs after a warm-up; cpu s: least CPU time of "
        "the process (not inflated by waiting for a shared core); gap: the allocation's bound "
        "less its value (currency); iter: pricing iterations."
    )


def print_memory(section: dict[str, Any]) -> None:
    print(
        f"{'policy memory':<14} {'policies':>8} {'states':>7} {'decoded B':>10} "
        f"{'max B':>10} {'stored B':>9} {'derived B':>9}"
    )
    for kind, row in section["by_kind"].items():
        print(
            f"{kind:<14} {row['policies']:>8} {row['median_states']:>7.0f} "
            f"{row['median_decoded_bytes']:>10,.0f} {row['max_decoded_bytes']:>10,} "
            f"{row['median_stored_bytes']:>9,.0f} {row['median_derived_bytes']:>9,.0f}"
        )
    print(
        "decoded B: the policy's numpy arrays after a storage round trip (median; max B the "
        "largest); stored B: its compressed blob; derived B: what solver.assortment keeps beside "
        "it after serving moves with shared trucks (flow shifts, costs, smaller flows)."
    )


def print_quality(row: dict[str, Any]) -> None:
    print(
        f"{'sharing quality':<16} {'items':>6} {'cands':>6} {'sharing cost':>12} "
        f"{'loss vs best':>12} {'of cost':>8} {'bound slack':>11} {'milp s':>7}"
    )
    if row["best_value"] is None:
        print(
            f"{'':<16} milp stopped with status {row['milp_status']} ({row['milp_seconds']:.0f} s)"
        )
        return
    print(
        f"{'trucks at 60%':<16} {row['items']:>6} {row['candidates']:>6} "
        f"{row['sharing_cost']:>12.2f} {row['loss']:>12.2f} "
        f"{row['loss_share_of_sharing_cost']:>8.1%} {row['bound_slack']:>11.2f} "
        f"{row['milp_seconds']:>7.1f}"
    )
    print(
        "loss vs best: the best assignment over the same candidates (scipy.optimize.milp, "
        "HiGHS) less the allocation's value, currency; of cost: that loss as a share of what "
        "the sharing costs; bound slack: the allocation's bound less the best value."
    )


PRINTERS: dict[str, Callable[[dict[str, Any]], None]] = {
    "bulk_moves": print_bulk,
    "sharing_quality": print_quality,
    "policy_memory": print_memory,
    "service": assortment_service.print_service,
}


def main(argv: Sequence[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description="Benchmark assortments (many items, one layout).")
    parser.add_argument(
        "--quick", action="store_true", help="1,000 items over 8 distinct policies, fewer repeats"
    )
    parser.add_argument("--out", type=Path, default=DEFAULT_OUT, help="JSON results file")
    parser.add_argument(
        "--sections",
        nargs="+",
        choices=sorted(SECTIONS),
        default=list(SECTIONS),
        help="sections to run (default: all)",
    )
    args = parser.parse_args(argv)
    facts = solve.machine_facts()
    items, distinct = (1_000, 8) if args.quick else (5_000, 40)
    print(f"stockrelay assortment benchmark: {items} items x {len(STORES)} stores, ", end="")
    print(f"{distinct} distinct policies; numpy {facts['numpy']}, BLAS single-threaded")
    assortment = make_assortment(items, distinct)
    print(f"solved the distinct policies in {assortment.solve_seconds:.1f} s\n")
    report: dict[str, Any] = {
        "machine": facts,
        "revision": solve.solver_revision(),
        "quick": args.quick,
        "items": items,
        "stores": len(STORES),
        "lanes": len(LANES),
        "distinct_policies": distinct,
        "policy_kinds": {k: assortment.kinds.count(k) for k in sorted(set(assortment.kinds))},
        "solve_seconds": assortment.solve_seconds,
    }
    for name in args.sections:
        section = SECTIONS[name](assortment, args.quick)
        report[name] = section
        PRINTERS[name](section)
        print()
    solve.write_report(args.out, report)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
