"""Solve time of this solver against another checkout of it, case by case, on a shared machine.

Usage: .venv/bin/python benchmarks/compare.py OTHER_CHECKOUT [--rounds N] [--runs N] [--out PATH]

OTHER_CHECKOUT is a folder holding another version's `solver/` package (e.g. made with
`git archive <commit> solver | tar -x -C /tmp/before`). Each round starts one fresh process per
solver, alternating, and each process solves every case of benchmarks/solve.py without dispatch
costs (the cases an older solver can read) --runs times after a warm-up; per case the least CPU
time of the process over all rounds is kept (time.process_time: waiting for a core that other
work holds does not count, and the minimum discards the runs that other work disturbed most).
A table goes to stdout and everything to JSON (default benchmarks/results/compare.json).
"""

import os

# One core: must be set before numpy (and its BLAS) is first imported.
os.environ["OPENBLAS_NUM_THREADS"] = "1"
os.environ["OMP_NUM_THREADS"] = "1"
os.environ["MKL_NUM_THREADS"] = "1"

import argparse
import json
import subprocess
import sys
import time
from collections.abc import Sequence
from pathlib import Path

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent
DEFAULT_OUT = HERE / "results" / "compare.json"


def child(checkout: Path, runs: int) -> None:
    """Time every case with the solver of `checkout`; JSON {case: least CPU seconds} to stdout."""
    sys.path.insert(0, str(checkout))
    sys.path.insert(1, str(HERE))
    import solve  # after the path is set: it imports that checkout's solver

    from solver import build_transfer_model, solve_policy_iteration

    times = {}
    for case in solve.benchmark_cases(quick=False, dispatch=False):
        model = build_transfer_model(case.spec)
        solve_policy_iteration(model, criterion=case.criterion)  # warm-up
        best = float("inf")
        for _ in range(runs):
            start = time.process_time()
            solve_policy_iteration(model, criterion=case.criterion, max_iter=solve.MAX_ITER)
            best = min(best, time.process_time() - start)
        times[case.name] = best
    json.dump(times, sys.stdout)


def measure(checkout: Path, runs: int) -> dict[str, float]:
    done = subprocess.run(
        [sys.executable, __file__, "--child", str(checkout), "--runs", str(runs)],
        capture_output=True,
        text=True,
        check=True,
    )
    times: dict[str, float] = json.loads(done.stdout)
    return times


def main(argv: Sequence[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description="Compare solve times with another checkout.")
    parser.add_argument("other", type=Path, help="folder holding the other solver/ package")
    parser.add_argument("--rounds", type=int, default=3)
    parser.add_argument("--runs", type=int, default=7, help="timed solves per case and round")
    parser.add_argument("--out", type=Path, default=DEFAULT_OUT, help="JSON results file")
    parser.add_argument("--child", action="store_true", help=argparse.SUPPRESS)
    args = parser.parse_args(argv)
    if args.child:
        child(args.other, args.runs)
        return 0

    best: dict[str, dict[str, float]] = {"other": {}, "this": {}}
    for _ in range(args.rounds):
        for label, checkout in (("other", args.other), ("this", ROOT)):
            for case, seconds in measure(checkout, args.runs).items():
                best[label][case] = min(seconds, best[label].get(case, float("inf")))
    print("| case | CPU s, other | CPU s, this | this / other |")
    print("|---|---:|---:|---:|")
    for case, other in best["other"].items():
        this = best["this"][case]
        print(f"| {case} | {other:.4f} | {this:.4f} | {this / other:.2f} |")
    load = os.getloadavg()
    print("load average (1, 5, 15 min): {:.2f}, {:.2f}, {:.2f}".format(*load))

    sys.path.insert(0, str(HERE))
    import solve

    solve.write_report(
        args.out,
        {
            "benchmark": "compare",
            "other": str(args.other),
            "rounds": args.rounds,
            "runs": args.runs,
            "statistic": "least CPU seconds over rounds x runs",
            "load_average": list(load),
            "revision": solve.solver_revision(),
            "cpu_seconds": best,
        },
    )
    return 0


if __name__ == "__main__":
    sys.exit(main())
