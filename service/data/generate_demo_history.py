"""Writes demo_history.csv: 120 business days of sales history for the demo network's two
hardware stores, from a seeded generator of our own (not real data).

Riverside sells more drill kits than the demo specification assumes (overdispersed, mean 3.3 a
day) and often opens with little stock, so many of its days sell out; Hilltop is close to its
specification. Run: .venv/bin/python service/data/generate_demo_history.py
"""

from __future__ import annotations

import csv
from datetime import date, timedelta
from pathlib import Path

import numpy as np

OUT = Path(__file__).with_name("demo_history.csv")
FIRST_DAY = date(2026, 7, 1)
DAYS = 120


def main() -> None:
    rng = np.random.default_rng(20261201)
    rows = []
    for day in range(DAYS):
        when = (FIRST_DAY + timedelta(days=day)).isoformat()
        # Riverside: negative binomial demand, mean 3.3, variance 5.5 (n = mean^2 / (var - mean)).
        mean, variance = 3.3, 5.5
        demand = int(rng.negative_binomial(mean**2 / (variance - mean), mean / variance))
        at_open = int(rng.integers(1, 7))
        rows.append((when, "riverside", min(demand, at_open), at_open, int(rng.poisson(2.1))))
        # Hilltop: Poisson demand, mean 1.8, usually well stocked.
        at_open = int(rng.integers(2, 8))
        sold = min(int(rng.poisson(1.8)), at_open)
        rows.append((when, "hilltop", sold, at_open, int(rng.choice(4, p=[0.4, 0.3, 0.2, 0.1]))))
    with OUT.open("w", newline="") as sink:
        writer = csv.writer(sink)
        writer.writerow(["date", "location", "units_sold", "stock_at_open", "units_received"])
        writer.writerows(rows)
    print(f"wrote {OUT} ({len(rows)} rows)")


if __name__ == "__main__":
    main()
