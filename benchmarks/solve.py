"""Benchmark of Howard's policy iteration on transfer networks of growing size, on one core.

Usage: .venv/bin/python benchmarks/solve.py [--quick] [--out PATH] [--cap SECONDS]

Networks (scenarios of our own):
  * two hardware stores sharing pressure washers, Quayside (busy, short of stock) and Elmfield
    (quiet, over-supplied), with lanes both ways of at most 5 units a night; each store holds
    `capacity` units and its daily demand and replenishment grow with it, so a larger stockroom
    belongs to a busier store (a full stockroom is about four days of Quayside's demand and
    twelve of Elmfield's at every size);
  * three stores, Quayside, Elmfield and Northgate, 30 units each, lanes both ways between every
    pair of at most 3 units a night.

Every case runs twice: as above, and with a dispatch cost on every lane (a van paid per night it
drives, DISPATCH_COSTS), named "+ dispatch".

Per case it reports sizes, build and solve seconds (measured separately), the tracemalloc peak of
the solve, the process's max RSS so far, iterations, matrix-vector products, residual, error
bound and convergence, and checks the project's speed targets where one is set. A table goes to
stdout and everything to JSON (default benchmarks/results/solve.json).

BLAS runs single-threaded: the thread-count variables are set below, before numpy is imported.
A solve that runs past `--cap` seconds is interrupted (SIGALRM, so Unix only) and reported as
capped, without times.
"""

import os

# One core: must be set before numpy (and its BLAS) is first imported.
os.environ["OPENBLAS_NUM_THREADS"] = "1"
os.environ["OMP_NUM_THREADS"] = "1"
os.environ["MKL_NUM_THREADS"] = "1"

import argparse
import gc
import json
import platform
import resource
import signal
import statistics
import subprocess
import sys
import time
import tracemalloc
from collections.abc import Callable, Iterator, Sequence
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path
from types import FrameType
from typing import Any

import numpy as np
import scipy

from solver import (
    Criterion,
    NetworkSpec,
    PolicyResult,
    TransferModel,
    build_transfer_model,
    solve_policy_iteration,
)

THREAD_VARIABLES = ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS")
DEFAULT_OUT = Path(__file__).resolve().parent / "results" / "solve.json"

# A case whose first solve is quicker than this is "small": median of SMALL_RUNS further runs.
# Otherwise "large": best of up to LARGE_RUNS runs, stopping once REPEAT_BUDGET is spent.
SMALL_SECONDS = 0.5
SMALL_RUNS = 7
LARGE_RUNS = 3
REPEAT_BUDGET = 20.0
BUILD_RUNS = 5
DEFAULT_CAP = 60.0
MAX_ITER = 200

TWO_STORE_CAPACITIES = (20, 50, 100, 200)
QUICK_CAPACITIES = (20, 50)
DISCOUNTS = (0.9, 0.99, 0.999)
# Fixed cost per night a lane is used in the "+ dispatch" cases, currency: a van and a driver.
DISPATCH_COSTS = {2: 9.0, 3: 6.5}
# Discount stored in the specification of average-criterion cases; the criterion ignores it.
UNUSED_DISCOUNT = 0.99


@dataclass(frozen=True)
class Case:
    """One benchmark case: a network, a criterion and, where the project sets one, a target."""

    name: str
    spec: NetworkSpec
    criterion: Criterion
    target_seconds: float | None

    @property
    def discount(self) -> float | None:
        return self.spec.discount if self.criterion == "discounted" else None


@dataclass(frozen=True)
class Timing:
    """Solve seconds, how they were summarised ("median" or "best") and over how many runs;
    cpu_seconds: the least CPU time of the process over those runs (time.process_time), which
    waiting for a core shared with other work does not inflate."""

    seconds: float
    statistic: str
    runs: int
    cpu_seconds: float


class _CaseTimeout(Exception):
    pass


# -- networks ---------------------------------------------------------------------------------


def _dispatch(cost: float) -> dict[str, float]:
    """A lane's dispatch cost field; absent at 0, so that the networks without dispatch costs
    also load in a solver that predates the field (for before-and-after runs)."""
    return {"dispatch_cost": cost} if cost else {}


def two_store_network(
    capacity: int, discount: float, *, busier: bool = True, dispatch: float = 0.0
) -> NetworkSpec:
    """Quayside (busy) and Elmfield (quiet). With `busier`, demand and replenishment per day scale
    with the stockroom; without, they stay at the 20-unit store's, so a large stockroom holds
    weeks of stock and the chain mixes slowly (the hard case for policy evaluation). `dispatch`:
    the fixed cost of each lane per night it is used."""
    size = capacity / 20 if busier else 1.0
    return NetworkSpec.model_validate(
        {
            "name": f"Pressure washers: Quayside and Elmfield, {capacity} units each",
            "discount": discount,
            "locations": [
                {
                    "id": "quayside",
                    "capacity": capacity,
                    "unit_margin": 27.5,
                    "holding_cost": 0.12,
                    "stockout_penalty": 3.5,
                    "demand": {
                        "dist": "negative_binomial",
                        "mean": 4.6 * size,
                        "variance": 7.4 * size,
                    },
                    "replenishment": {"dist": "poisson", "mean": 3.2 * size},
                },
                {
                    "id": "elmfield",
                    "capacity": capacity,
                    "unit_margin": 24.0,
                    "holding_cost": 0.09,
                    "stockout_penalty": 2.5,
                    "demand": {"dist": "poisson", "mean": 1.7 * size},
                    "replenishment": {"dist": "poisson", "mean": 2.9 * size},
                },
            ],
            "lanes": [
                {"from": "quayside", "to": "elmfield", "unit_cost": 1.6, "max_units": 5}
                | _dispatch(dispatch),
                {"from": "elmfield", "to": "quayside", "unit_cost": 1.35, "max_units": 5}
                | _dispatch(dispatch),
            ],
        }
    )


def three_store_network(discount: float, *, dispatch: float = 0.0) -> NetworkSpec:
    """Quayside, Elmfield and Northgate, 30 units each, lanes both ways between every pair;
    `dispatch` as in two_store_network."""
    lane_costs = {
        ("quayside", "elmfield"): 1.6,
        ("elmfield", "quayside"): 1.35,
        ("quayside", "northgate"): 2.2,
        ("northgate", "quayside"): 2.05,
        ("elmfield", "northgate"): 1.1,
        ("northgate", "elmfield"): 1.25,
    }
    return NetworkSpec.model_validate(
        {
            "name": "Pressure washers: Quayside, Elmfield and Northgate, 30 units each",
            "discount": discount,
            "locations": [
                {
                    "id": "quayside",
                    "capacity": 30,
                    "unit_margin": 27.5,
                    "holding_cost": 0.12,
                    "stockout_penalty": 3.5,
                    "demand": {"dist": "negative_binomial", "mean": 6.4, "variance": 10.5},
                    "replenishment": {"dist": "poisson", "mean": 4.7},
                },
                {
                    "id": "elmfield",
                    "capacity": 30,
                    "unit_margin": 24.0,
                    "holding_cost": 0.09,
                    "stockout_penalty": 2.5,
                    "demand": {"dist": "poisson", "mean": 2.6},
                    "replenishment": {"dist": "poisson", "mean": 4.1},
                },
                {
                    "id": "northgate",
                    "capacity": 30,
                    "unit_margin": 25.8,
                    "holding_cost": 0.1,
                    "stockout_penalty": 3.0,
                    "demand": {"dist": "poisson", "mean": 3.9},
                    "replenishment": {"dist": "poisson", "mean": 4.4},
                },
            ],
            "lanes": [
                {"from": a, "to": b, "unit_cost": cost, "max_units": 3} | _dispatch(dispatch)
                for (a, b), cost in lane_costs.items()
            ],
        }
    )


def benchmark_cases(quick: bool, dispatch: bool = True) -> list[Case]:
    """The benchmark cases, each without and (unless not `dispatch`) with dispatch costs;
    `quick` keeps the two-store networks of capacity 20 and 50."""
    cases: list[Case] = []
    for extra in ("", " + dispatch") if dispatch else ("",):
        dispatch2 = DISPATCH_COSTS[2] if extra else 0.0
        dispatch3 = DISPATCH_COSTS[3] if extra else 0.0
        for busier, label in ((True, "2 stores"), (False, "2 slow stores")):
            for capacity in QUICK_CAPACITIES if quick else TWO_STORE_CAPACITIES:
                targets: dict[float | None, float] = (
                    {0.9: 0.1, 0.999: 0.3, None: 0.3} if capacity == 100 else {}
                )
                for discount in DISCOUNTS:
                    cases.append(
                        Case(
                            f"{label} c={capacity} d={discount}{extra}",
                            two_store_network(
                                capacity, discount, busier=busier, dispatch=dispatch2
                            ),
                            "discounted",
                            targets.get(discount),
                        )
                    )
                cases.append(
                    Case(
                        f"{label} c={capacity} average{extra}",
                        two_store_network(
                            capacity, UNUSED_DISCOUNT, busier=busier, dispatch=dispatch2
                        ),
                        "average",
                        targets.get(None),
                    )
                )
        if not quick:
            cases.append(
                Case(
                    f"3 stores c=30 d=0.99{extra}",
                    three_store_network(0.99, dispatch=dispatch3),
                    "discounted",
                    0.5,
                )
            )
            cases.append(
                Case(
                    f"3 stores c=30 average{extra}",
                    three_store_network(UNUSED_DISCOUNT, dispatch=dispatch3),
                    "average",
                    0.5,
                )
            )
    return cases


# -- measurement ------------------------------------------------------------------------------


@contextmanager
def _deadline(seconds: float) -> Iterator[None]:
    """Raise _CaseTimeout in the main thread once `seconds` of wall clock have passed."""

    def expire(signum: int, frame: FrameType | None) -> None:
        raise _CaseTimeout

    previous = signal.signal(signal.SIGALRM, expire)
    signal.setitimer(signal.ITIMER_REAL, seconds)
    try:
        yield
    finally:
        signal.setitimer(signal.ITIMER_REAL, 0.0)
        signal.signal(signal.SIGALRM, previous)


def _timed(run: Callable[[], object]) -> float:
    gc.collect()
    start = time.perf_counter()
    run()
    return time.perf_counter() - start


def time_build(spec: NetworkSpec) -> float:
    """Median seconds of build_transfer_model over BUILD_RUNS runs."""
    return statistics.median(_timed(lambda: build_transfer_model(spec)) for _ in range(BUILD_RUNS))


def _cpu_timed(run: Callable[[], object]) -> tuple[float, float]:
    """(wall seconds, CPU seconds of this process) of one run."""
    gc.collect()
    wall, cpu = time.perf_counter(), time.process_time()
    run()
    return time.perf_counter() - wall, time.process_time() - cpu


def time_solve(solve: Callable[[], PolicyResult], first: tuple[float, float]) -> Timing:
    """Repeat a solve whose first run took `first` (wall, CPU) seconds (see SMALL_SECONDS)."""
    if first[0] < SMALL_SECONDS:
        # The first run is a warm-up; the median of the next ones is reported.
        pairs = [_cpu_timed(solve) for _ in range(SMALL_RUNS)]
        runs = [wall for wall, _ in pairs]
        cpu = min(c for _, c in pairs)
        return Timing(statistics.median(runs), "median", len(runs), cpu)
    pairs = [first]
    while len(pairs) < LARGE_RUNS and sum(w for w, _ in pairs) + first[0] <= REPEAT_BUDGET:
        pairs.append(_cpu_timed(solve))
    return Timing(min(w for w, _ in pairs), "best", len(pairs), min(c for _, c in pairs))


def traced_peak_mb(solve: Callable[[], PolicyResult]) -> float:
    """Peak of memory allocated during one solve (tracemalloc; numpy reports its buffers)."""
    gc.collect()
    tracemalloc.start()
    try:
        solve()
        peak = tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()
    return peak / 2**20


def max_rss_mb() -> float:
    """High-water mark of the process's resident memory so far (ru_maxrss is KiB on Linux)."""
    scale = 2**20 if sys.platform == "darwin" else 2**10
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * scale / 2**20


def run_case(case: Case, cap: float) -> dict[str, Any]:
    build_seconds = time_build(case.spec)
    model: TransferModel = build_transfer_model(case.spec)

    def solve() -> PolicyResult:
        return solve_policy_iteration(model, criterion=case.criterion, max_iter=MAX_ITER)

    row: dict[str, Any] = {
        "name": case.name,
        "network": case.spec.name,
        "locations": model.n_locations,
        "capacity": int(model.capacities.max()),
        "criterion": case.criterion,
        "discount": case.discount,
        "states": model.n_states,
        "flows": model.n_flows,
        "pairs": model.n_pairs,
        "build_seconds": build_seconds,
        "target_seconds": case.target_seconds,
    }
    try:
        with _deadline(cap):
            gc.collect()
            start, cpu = time.perf_counter(), time.process_time()
            result = solve()
            first = (time.perf_counter() - start, time.process_time() - cpu)
    except _CaseTimeout:
        met = None if case.target_seconds is None else False
        row.update(capped=True, cap_seconds=cap, seconds=None, target_met=met)
        row["max_rss_mb"] = max_rss_mb()
        return row

    timing = time_solve(solve, first)
    row.update(
        capped=False,
        seconds=timing.seconds,
        cpu_seconds=timing.cpu_seconds,
        statistic=timing.statistic,
        runs=timing.runs,
        target_met=None if case.target_seconds is None else timing.seconds < case.target_seconds,
        phase_seconds=dict(result.seconds),
        peak_mb=traced_peak_mb(solve),
        max_rss_mb=max_rss_mb(),
        iterations=result.iterations,
        matvecs=result.evaluation_sweeps,
        residual=result.residual,
        error_bound=result.error_bound,
        converged=result.converged,
        method=result.method,
        gain=result.gain,
    )
    return row


# -- reporting --------------------------------------------------------------------------------


def solver_revision() -> dict[str, Any]:
    """The commit measured, and whether solver/ differs from it (None outside a git checkout)."""
    repo = Path(__file__).resolve().parent.parent

    def git(*args: str) -> str | None:
        try:
            done = subprocess.run(
                ["git", *args], cwd=repo, capture_output=True, text=True, check=True, timeout=10
            )
        except (OSError, subprocess.SubprocessError):
            return None
        return done.stdout.strip()

    status = git("status", "--porcelain", "--", "solver")
    return {
        "commit": git("rev-parse", "HEAD"),
        "solver_modified": None if status is None else bool(status),
    }


def machine_facts() -> dict[str, Any]:
    facts: dict[str, Any] = {
        "python": platform.python_version(),
        "platform": platform.platform(),
        "processor": platform.processor() or platform.machine(),
        "numpy": np.__version__,
        "scipy": scipy.__version__,
        "cpu_count": os.cpu_count(),
        "usable_cpus": len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else None,
        "thread_variables": {name: os.environ.get(name) for name in THREAD_VARIABLES},
    }
    try:
        blas = np.show_config(mode="dicts")["Build Dependencies"]["blas"]
        facts["blas"] = {key: blas.get(key) for key in ("name", "version")}
    except (TypeError, KeyError):
        facts["blas"] = None
    try:
        from threadpoolctl import threadpool_info  # type: ignore[import-not-found, unused-ignore]
    except ImportError:
        facts["threadpools"] = "threadpoolctl not installed"
    else:
        facts["threadpools"] = [
            {key: pool.get(key) for key in ("user_api", "internal_api", "num_threads", "version")}
            for pool in threadpool_info()
        ]
    return facts


_COLUMNS = (
    ("case", 38),
    ("states", 7),
    ("flows", 5),
    ("pairs", 9),
    ("build s", 8),
    ("solve s", 8),
    ("cpu s", 8),
    ("timing", 7),
    ("target", 12),
    ("peak MB", 8),
    ("RSS MB", 7),
    ("iter", 4),
    ("matvecs", 7),
    ("residual", 8),
    ("err bound", 9),
    ("conv", 4),
)


def _cells(row: dict[str, Any]) -> list[str]:
    target = row["target_seconds"]
    if row["capped"]:
        solve, cpu, timing = f">{row['cap_seconds']:g}", "", "capped"
        verdict = f"<{target:g} fail" if target is not None else ""
        rest = ["", f"{row['max_rss_mb']:.0f}", "", "", "", "", "no"]
    else:
        solve, timing = f"{row['seconds']:.4f}", f"{row['statistic']}x{row['runs']}"
        cpu = f"{row['cpu_seconds']:.4f}"
        verdict = ""
        if target is not None:
            verdict = f"<{target:g} {'pass' if row['target_met'] else 'FAIL'}"
        rest = [
            f"{row['peak_mb']:.1f}",
            f"{row['max_rss_mb']:.0f}",
            str(row["iterations"]),
            str(row["matvecs"]),
            f"{row['residual']:.1e}",
            f"{row['error_bound']:.1e}",
            "yes" if row["converged"] else "no",
        ]
    head = [
        row["name"],
        str(row["states"]),
        str(row["flows"]),
        str(row["pairs"]),
        f"{row['build_seconds']:.4f}",
        solve,
        cpu,
        timing,
        verdict,
    ]
    return head + rest


def _line(cells: Sequence[str]) -> str:
    return "  ".join(
        cell.ljust(width) if i == 0 else cell.rjust(width)
        for i, (cell, (_, width)) in enumerate(zip(cells, _COLUMNS, strict=True))
    )


def print_header(facts: dict[str, Any]) -> None:
    threads = ", ".join(f"{k}={v}" for k, v in facts["thread_variables"].items())
    print(
        f"stockrelay solve benchmark: numpy {facts['numpy']}, scipy {facts['scipy']}, "
        f"{facts['cpu_count']} CPUs; BLAS single-threaded ({threads})"
    )
    print(_line([name for name, _ in _COLUMNS]))
    print(_line(["-" * width for _, width in _COLUMNS]))


def print_notes() -> None:
    print(
        "solve s: solve_policy_iteration only (build timed separately, median of "
        f"{BUILD_RUNS}); timing: median of {SMALL_RUNS} runs after a warm-up when a solve takes "
        f"< {SMALL_SECONDS:g} s, else best of up to {LARGE_RUNS} within {REPEAT_BUDGET:g} s."
    )
    print(
        "cpu s: least CPU time of the process over those runs (not inflated by waiting for a "
        "shared core); peak MB: tracemalloc peak during one solve; RSS MB: process max RSS so far "
        "(getrusage, cumulative); matvecs: result.evaluation_sweeps; target: the project's "
        "one-core target, pass when solve s is below it."
    )


def write_report(path: Path, report: dict[str, Any]) -> None:
    """`report` as indented JSON at `path` (its folder created if need be)."""
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text(json.dumps(report, indent=2) + "\n")
    print(f"wrote {path}")


def main(argv: Sequence[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description="Benchmark the policy-iteration solver.")
    parser.add_argument(
        "--quick", action="store_true", help="two-store networks of capacity 20 and 50 only"
    )
    parser.add_argument("--out", type=Path, default=DEFAULT_OUT, help="JSON results file")
    parser.add_argument(
        "--without-dispatch",
        action="store_true",
        help="leave out the cases with dispatch costs (e.g. to measure an older solver)",
    )
    parser.add_argument(
        "--cap",
        type=float,
        default=DEFAULT_CAP,
        help="interrupt a solve after this many seconds and report it as capped",
    )
    args = parser.parse_args(argv)

    facts = machine_facts()
    facts["baseline_max_rss_mb"] = max_rss_mb()
    print_header(facts)
    started = time.perf_counter()
    rows = []
    for case in benchmark_cases(args.quick, dispatch=not args.without_dispatch):
        row = run_case(case, args.cap)
        rows.append(row)
        print(_line(_cells(row)), flush=True)
    total = time.perf_counter() - started
    print_notes()
    print(f"total wall time {total:.1f} s")
    # The machine may be shared: wall times grow with its load, CPU seconds much less.
    load = os.getloadavg()
    print("load average (1, 5, 15 min): {:.2f}, {:.2f}, {:.2f}".format(*load))

    report = {
        "benchmark": "solve",
        "quick": args.quick,
        "blas_threads": "single (thread variables set to 1 before importing numpy)",
        "settings": {
            "max_iter": MAX_ITER,
            "cap_seconds": args.cap,
            "small_seconds": SMALL_SECONDS,
            "small_runs": SMALL_RUNS,
            "large_runs": LARGE_RUNS,
            "repeat_budget_seconds": REPEAT_BUDGET,
            "build_runs": BUILD_RUNS,
        },
        "machine": facts,
        "revision": solver_revision(),
        "total_seconds": total,
        "load_average": list(load),
        "cases": rows,
    }
    write_report(args.out, report)
    return 0


if __name__ == "__main__":
    sys.exit(main())
