"""Benchmark of demand and replenishment estimation from sales history, on one core.

Usage: .venv/bin/python benchmarks/calibration.py [--days N] [--locations N] [--runs N]
                                                  [--out PATH]

Scenario (our own): a chain of 50 hardware stores selling cordless drill kits, with three years
(1,095 days) of daily history per store, drawn by a seeded generator. Store k has
mean demand between 1.5 and 12 a day; stock at open is drawn around that mean, so that about
half of the days with stock sell out, and about 3% of the days open with no stock at all.
Data sets:

  * poisson:       Poisson demand and receipts, the same every weekday; the negative binomial
                   is fitted for the test but (mostly) not chosen;
  * overdispersed: negative binomial demand (variance = mean + 0.35 mean^2) and batchy receipts
                   (variance = 3 x mean): the negative binomial is chosen, with profile intervals
                   for its mean and variance;
  * weekend peak:  Poisson demand 60% higher on Saturdays and Sundays (pooled over the week it
                   looks overdispersed, so the weekday test fits the shared-dispersion model).

Cases: calibrate_location (demand and replenishment) on poisson, overdispersed, and
overdispersed with a 90-day half-life; weekday_effect on poisson and weekend peak. Then the
coverage of the 95% intervals, censored estimate against the plain average of sales, over many
simulated histories with frequent stock-outs.

Each case is timed over all stores (calibrate_location: demand and replenishment, or
weekday_effect), best of `--runs` runs after one warm-up; per-store median and maximum come from
the best run. A table goes to stdout and everything to JSON (default
benchmarks/results/calibration.json). BLAS runs single-threaded, as in benchmarks/solve.py.
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
import statistics
import sys
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import scipy
from numpy.typing import NDArray

from solver.estimation import (
    LocationCalibration,
    WeekdayEffect,
    calibrate_location,
    weekday_effect,
)

DEFAULT_OUT = Path(__file__).resolve().parent / "results" / "calibration.json"
DEFAULT_DAYS = 3 * 365
DEFAULT_LOCATIONS = 50
DEFAULT_RUNS = 3
SEED = 20_261_202
DISPERSION = 0.35
WEEKEND_LIFT = 1.6
HALF_LIFE_DAYS = 90.0


@dataclass(frozen=True)
class Store:
    """One store's daily history: units sold, stock at open, units received, weekday."""

    sold: NDArray[np.int64]
    stock: NDArray[np.int64]
    received: NDArray[np.int64]
    weekday: NDArray[np.int64]


def _counts(
    rng: np.random.Generator, mean: NDArray[np.float64], overdispersed: bool, dispersion: float
) -> NDArray[np.int64]:
    if not overdispersed:
        return rng.poisson(mean)
    # Negative binomial with variance mean + dispersion mean^2: numpy's n = 1/dispersion,
    # p = n / (n + mean).
    n = 1.0 / dispersion
    return rng.negative_binomial(n, n / (n + mean))


def make_stores(
    n_locations: int,
    n_days: int,
    *,
    overdispersed: bool,
    weekend_lift: float,
    rng: np.random.Generator,
) -> list[Store]:
    """Seeded histories of `n_locations` stores over `n_days` days (see the module docstring)."""
    stores = []
    weekday = np.arange(n_days) % 7
    lift = np.where(weekday >= 5, weekend_lift, 1.0)
    for k in range(n_locations):
        base = 1.5 + 10.5 * k / max(n_locations - 1, 1)
        demand = _counts(rng, base * lift, overdispersed, DISPERSION)
        stock = rng.integers(max(1, int(0.5 * base)), int(1.6 * base) + 2, n_days)
        stock[rng.random(n_days) < 0.03] = 0
        # Batchy receipts: variance three times the mean (dispersion 2 / mean).
        receipts_mean = np.full(n_days, base)
        received = _counts(rng, receipts_mean, overdispersed, 2.0 / base)
        stores.append(Store(np.minimum(demand, stock), stock, received, weekday))
    return stores


@dataclass(frozen=True)
class Case:
    name: str
    data: str
    run: Callable[[Store], LocationCalibration | WeekdayEffect]


def _calibrate(half_life: float | None) -> Callable[[Store], LocationCalibration]:
    def run(store: Store) -> LocationCalibration:
        return calibrate_location(store.sold, store.stock, store.received, half_life_days=half_life)

    return run


def _weekday(store: Store) -> WeekdayEffect:
    return weekday_effect(store.sold, store.stock, store.weekday)


CASES = (
    Case("calibrate", "poisson", _calibrate(None)),
    Case("calibrate", "overdispersed", _calibrate(None)),
    Case(f"calibrate, half-life {HALF_LIFE_DAYS:g} d", "overdispersed", _calibrate(HALF_LIFE_DAYS)),
    Case("weekday test", "poisson", _weekday),
    Case("weekday test", "weekend peak", _weekday),
)


def _timed_pass(
    case: Case, stores: Sequence[Store]
) -> tuple[float, list[float], list[LocationCalibration | WeekdayEffect]]:
    gc.collect()
    per_store, results = [], []
    start = time.perf_counter()
    for store in stores:
        begin = time.perf_counter()
        results.append(case.run(store))
        per_store.append(time.perf_counter() - begin)
    return time.perf_counter() - start, per_store, results


def run_case(case: Case, stores: Sequence[Store], runs: int) -> dict[str, Any]:
    _timed_pass(case, stores)  # warm-up
    best = min((_timed_pass(case, stores) for _ in range(runs)), key=lambda done: done[0])
    total, per_store, results = best
    row: dict[str, Any] = {
        "case": case.name,
        "data": case.data,
        "locations": len(stores),
        "days": int(stores[0].sold.size),
        "seconds": total,
        "runs": runs,
        "statistic": "best",
        "per_location_median_seconds": statistics.median(per_store),
        "per_location_max_seconds": max(per_store),
    }
    if isinstance(results[0], LocationCalibration):
        calibrations = [r for r in results if isinstance(r, LocationCalibration)]
        row["demand_negative_binomial"] = sum(
            c.demand.family == "negative_binomial" for c in calibrations
        )
        row["replenishment_negative_binomial"] = sum(
            c.replenishment.family == "negative_binomial" for c in calibrations
        )
        row["sold_out_share"] = float(
            np.mean([c.censored_days / (c.days - c.days_without_stock) for c in calibrations])
        )
    else:
        effects = [r for r in results if isinstance(r, WeekdayEffect)]
        row["demand_negative_binomial"] = sum(e.family == "negative_binomial" for e in effects)
        row["significant"] = sum(e.significant for e in effects)
    return row


def distinct_pairs(stores: Sequence[Store]) -> float:
    """Mean number of distinct (sold, sold out) pairs per store: what the likelihood sums over."""
    counts = []
    for d in stores:
        with_stock = d.stock > 0
        sold_out = d.sold[with_stock] == d.stock[with_stock]
        counts.append(np.unique(d.sold[with_stock] * 2 + sold_out).size)
    return float(np.mean(counts))


def machine_facts() -> dict[str, Any]:
    return {
        "python": platform.python_version(),
        "platform": platform.platform(),
        "processor": platform.processor() or platform.machine(),
        "numpy": np.__version__,
        "scipy": scipy.__version__,
        "cpu_count": os.cpu_count(),
        "thread_variables": {
            name: os.environ.get(name)
            for name in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS")
        },
    }


_COLUMNS = (
    ("case", 30),
    ("data", 14),
    ("locations", 9),
    ("days", 5),
    ("seconds", 8),
    ("median s", 9),
    ("max s", 7),
    ("NB chosen", 9),
    ("notes", 28),
)


def _line(cells: Sequence[str]) -> str:
    return "  ".join(
        cell.ljust(width) if i in (0, 1, 8) else cell.rjust(width)
        for i, (cell, (_, width)) in enumerate(zip(cells, _COLUMNS, strict=True))
    )


def _cells(row: dict[str, Any]) -> list[str]:
    if "significant" in row:
        notes = f"{row['significant']} significant"
    else:
        notes = (
            f"receipts NB {row['replenishment_negative_binomial']}, "
            f"sold out {row['sold_out_share']:.0%}"
        )
    return [
        row["case"],
        row["data"],
        str(row["locations"]),
        str(row["days"]),
        f"{row['seconds']:.3f}",
        f"{row['per_location_median_seconds']:.4f}",
        f"{row['per_location_max_seconds']:.3f}",
        str(row["demand_negative_binomial"]),
        notes,
    ]


# Coverage scenarios (our own): true Poisson demand of 4 a day; stock at open fixed at a level
# that sells out on the given share of days; 90 days or a year of history.
COVERAGE_MEAN = 4.0
COVERAGE_SCENARIOS = ((90, 8), (90, 4), (90, 3), (365, 4), (365, 3))
COVERAGE_SEEDS = 400


def coverage(days: int, stock: int, seeds: int) -> dict[str, Any]:
    """How often the 95% intervals cover the true mean, censored estimate against the plain
    average (mean +- 1.96 s / sqrt(n)), over `seeds` simulated histories."""
    from scipy import stats

    rng = np.random.default_rng(SEED + days + stock)
    censored_hits = naive_hits = 0
    estimates, naives = [], []
    for _ in range(seeds):
        sold = np.minimum(rng.poisson(COVERAGE_MEAN, days), stock)
        at_open = np.full(days, stock)
        fit = calibrate_location(sold, at_open, np.zeros(days, dtype=np.int64)).demand
        low, high = fit.mean_interval
        censored_hits += low <= COVERAGE_MEAN <= high
        half = 1.96 * sold.std(ddof=1) / np.sqrt(days)
        naive_hits += abs(sold.mean() - COVERAGE_MEAN) <= half
        estimates.append(fit.mean)
        naives.append(sold.mean())
    return {
        "days": days,
        "stock_at_open": stock,
        "sold_out_share": float(stats.poisson(COVERAGE_MEAN).sf(stock - 1)),
        "seeds": seeds,
        "censored_coverage": censored_hits / seeds,
        "naive_coverage": naive_hits / seeds,
        "censored_mean": float(np.mean(estimates)),
        "naive_mean": float(np.mean(naives)),
    }


def main(argv: Sequence[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description="Benchmark demand and replenishment estimation.")
    parser.add_argument("--days", type=int, default=DEFAULT_DAYS, help="days of history")
    parser.add_argument("--locations", type=int, default=DEFAULT_LOCATIONS, help="stores")
    parser.add_argument("--runs", type=int, default=DEFAULT_RUNS, help="timed runs per case")
    parser.add_argument("--out", type=Path, default=DEFAULT_OUT, help="JSON results file")
    args = parser.parse_args(argv)

    rng = np.random.default_rng(SEED)
    n, days = args.locations, args.days
    data = {
        "poisson": make_stores(n, days, overdispersed=False, weekend_lift=1.0, rng=rng),
        "overdispersed": make_stores(n, days, overdispersed=True, weekend_lift=1.0, rng=rng),
        "weekend peak": make_stores(
            n, days, overdispersed=False, weekend_lift=WEEKEND_LIFT, rng=rng
        ),
    }
    facts = machine_facts()
    print(
        f"stockrelay calibration benchmark: numpy {facts['numpy']}, scipy {facts['scipy']}, "
        f"{facts['cpu_count']} CPUs; BLAS single-threaded"
    )
    pairs = {name: distinct_pairs(stores) for name, stores in data.items()}
    print(
        "distinct (sold, sold out) pairs per store: "
        + ", ".join(f"{name} {value:.1f}" for name, value in pairs.items())
    )
    print(_line([name for name, _ in _COLUMNS]))
    print(_line(["-" * width for _, width in _COLUMNS]))
    started = time.perf_counter()
    rows = []
    for case in CASES:
        row = run_case(case, data[case.data], args.runs)
        rows.append(row)
        print(_line(_cells(row)), flush=True)
    total = time.perf_counter() - started
    print(
        f"seconds: all stores, best of {args.runs} runs after a warm-up; median s / max s: one "
        "store in the best run; NB chosen: stores whose demand is negative binomial."
    )
    print(f"total wall time {total:.1f} s")

    print(
        f"\ncoverage of 95% intervals for a true mean of {COVERAGE_MEAN:g} a day, "
        f"{COVERAGE_SEEDS} seeds:"
    )
    print(
        "| days | stock at open | days sold out | censored covers | plain average covers "
        "| mean censored estimate | mean plain average |"
    )
    print("|---:|---:|---:|---:|---:|---:|---:|")
    covered = []
    for days, stock in COVERAGE_SCENARIOS:
        row = coverage(days, stock, COVERAGE_SEEDS)
        covered.append(row)
        print(
            f"| {days} | {stock} | {row['sold_out_share']:.0%} | {row['censored_coverage']:.1%} "
            f"| {row['naive_coverage']:.1%} | {row['censored_mean']:.2f} | "
            f"{row['naive_mean']:.2f} |",
            flush=True,
        )

    report = {
        "benchmark": "calibration",
        "settings": {
            "days": args.days,
            "locations": args.locations,
            "runs": args.runs,
            "seed": SEED,
            "dispersion": DISPERSION,
            "weekend_lift": WEEKEND_LIFT,
            "half_life_days": HALF_LIFE_DAYS,
        },
        "machine": facts,
        "distinct_pairs_per_store": pairs,
        "total_seconds": total,
        "cases": rows,
        "coverage": covered,
    }
    args.out.parent.mkdir(parents=True, exist_ok=True)
    args.out.write_text(json.dumps(report, indent=2) + "\n")
    print(f"wrote {args.out}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
