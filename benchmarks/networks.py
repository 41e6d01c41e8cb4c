"""Large benchmark networks (scenarios of our own), shared by benchmarks/priced.py and anyone who
needs a big network: `large_network(n_stores, capacity, seed)`.

Garden-centre branches sharing one seasonal item (patio heaters), placed at random in a 60 km
square. Each branch sells on average 6% to 16% of its stockroom a day; its weekly deliveries
cover 60% to 140% of that, so some branches run short while others overflow. Demand is Poisson
at even-numbered branches and negative binomial (variance twice the mean) at odd ones. Lanes
join every pair of branches (`neighbours=None`) or each branch to its nearest `neighbours`
(both ways); a unit costs 0.6 plus 0.07 per km to move, at most 3 to 5 units a lane a night,
and the network moves at most 2 units per branch a night.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from solver import NetworkSpec

__all__ = ["large_network"]


def large_network(
    n_stores: int,
    capacity: int,
    seed: int = 0,
    *,
    neighbours: int | None = None,
    discount: float = 0.99,
) -> NetworkSpec:
    """A network of `n_stores` branches of `capacity` units each (see the module docstring)."""
    rng = np.random.default_rng(seed)
    where = rng.uniform(0.0, 60.0, size=(n_stores, 2))
    distance = np.linalg.norm(where[:, None, :] - where[None, :, :], axis=2)
    locations: list[dict[str, Any]] = []
    for i in range(n_stores):
        mean = float(rng.uniform(0.06, 0.16) * capacity)
        supply = mean * float(rng.uniform(0.6, 1.4))
        demand: dict[str, Any] = (
            {"dist": "poisson", "mean": round(mean, 3)}
            if i % 2 == 0
            else {
                "dist": "negative_binomial",
                "mean": round(mean, 3),
                "variance": round(2 * mean, 3),
            }
        )
        locations.append(
            {
                "id": f"branch-{i:02d}",
                "capacity": capacity,
                "unit_margin": round(float(rng.uniform(8.0, 15.0)), 2),
                "holding_cost": round(float(rng.uniform(0.05, 0.2)), 3),
                "stockout_penalty": round(float(rng.uniform(0.0, 3.0)), 2),
                "demand": demand,
                "replenishment": {"dist": "poisson", "mean": round(supply, 3)},
            }
        )
    lanes = []
    for i in range(n_stores):
        order = [j for j in np.argsort(distance[i]) if j != i]
        chosen = order if neighbours is None else order[:neighbours]
        for j in chosen:
            lanes.append((i, int(j)))
    if neighbours is not None:
        # Both ways along every chosen pair.
        lanes = sorted(set(lanes) | {(j, i) for i, j in lanes})
    return NetworkSpec.model_validate(
        {
            "name": f"{n_stores} garden centres, capacity {capacity}",
            "discount": discount,
            "max_units_per_night": 2 * n_stores,
            "locations": locations,
            "lanes": [
                {
                    "from": f"branch-{i:02d}",
                    "to": f"branch-{j:02d}",
                    "unit_cost": round(0.6 + 0.07 * float(distance[i, j]), 2),
                    "max_units": int(rng.integers(3, 6)),
                }
                for i, j in lanes
            ],
        }
    )
