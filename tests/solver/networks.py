"""Small networks for solver tests: scenarios of our own, plus the published example that
tests/solver/test_policy_iteration.py checks against its source."""

from __future__ import annotations

from typing import Any

from solver import NetworkSpec

WEEK = ("mon", "tue", "wed", "thu", "fri", "sat", "sun")


def poisson(mean: float) -> dict[str, Any]:
    return {"dist": "poisson", "mean": mean}


def negative_binomial(mean: float, variance: float) -> dict[str, Any]:
    return {"dist": "negative_binomial", "mean": mean, "variance": variance}


def pmf(*p: float) -> dict[str, Any]:
    return {"dist": "pmf", "p": list(p)}


def location(
    location_id: str,
    capacity: int,
    demand: dict[str, Any],
    replenishment: dict[str, Any],
    *,
    margin: float = 10.0,
    holding: float = 0.2,
    penalty: float = 1.0,
) -> dict[str, Any]:
    """A location as in the JSON input; amounts in currency units."""
    return {
        "id": location_id,
        "capacity": capacity,
        "unit_margin": margin,
        "holding_cost": holding,
        "stockout_penalty": penalty,
        "demand": demand,
        "replenishment": replenishment,
    }


def weekly(*days: Any) -> dict[str, Any]:
    """A weekly field (demand, replenishment or lane limit) from seven values, Monday first."""
    assert len(days) == len(WEEK)
    return {"weekly": dict(zip(WEEK, days, strict=True))}


def two_stores(
    *,
    capacities: tuple[int, int] = (6, 5),
    demand: tuple[dict[str, Any], dict[str, Any]] = (
        {"dist": "poisson", "mean": 2.2},
        {"dist": "poisson", "mean": 1.3},
    ),
    replenishment: tuple[dict[str, Any], dict[str, Any]] = (
        {"dist": "poisson", "mean": 1.6},
        {"dist": "poisson", "mean": 1.9},
    ),
    margins: tuple[float, float] = (12.5, 14.0),
    holding: tuple[float, float] = (0.0, 0.0),
    penalty: tuple[float, float] = (0.0, 0.0),
    costs: tuple[float, float] = (1.5, 1.75),
    limits: tuple[int, int] = (3, 2),
    discount: float = 0.95,
    max_units_per_night: int | None = None,
) -> NetworkSpec:
    """Two hardware stores sharing one tool, lanes both ways."""
    ids = ("north", "south")
    return NetworkSpec.model_validate(
        {
            "name": "two stores",
            "discount": discount,
            "max_units_per_night": max_units_per_night,
            "locations": [
                {
                    "id": ids[i],
                    "capacity": capacities[i],
                    "unit_margin": margins[i],
                    "holding_cost": holding[i],
                    "stockout_penalty": penalty[i],
                    "demand": demand[i],
                    "replenishment": replenishment[i],
                }
                for i in range(2)
            ],
            "lanes": [
                {"from": "north", "to": "south", "unit_cost": costs[0], "max_units": limits[0]},
                {"from": "south", "to": "north", "unit_cost": costs[1], "max_units": limits[1]},
            ],
        }
    )


def published_two_location_example() -> NetworkSpec:
    """Sutton and Barto, Reinforcement Learning: An Introduction, 2nd ed. (2018), Example 4.2:
    capacity 20 at both locations, at most 5 units moved per night at 2 per unit, 10 per unit
    served, Poisson demand with means 3 and 4, Poisson returns (our replenishment) with means 3
    and 2, discount 0.9. The book lets a move overfill a location; our rules forbid that."""
    location = {"capacity": 20, "unit_margin": 10.0}
    return NetworkSpec.model_validate(
        {
            "name": "published example",
            "discount": 0.9,
            "max_units_per_night": 5,
            "locations": [
                {
                    **location,
                    "id": "first",
                    "demand": {"dist": "poisson", "mean": 3},
                    "replenishment": {"dist": "poisson", "mean": 3},
                },
                {
                    **location,
                    "id": "second",
                    "demand": {"dist": "poisson", "mean": 4},
                    "replenishment": {"dist": "poisson", "mean": 2},
                },
            ],
            "lanes": [
                {"from": "first", "to": "second", "unit_cost": 2.0, "max_units": 5},
                {"from": "second", "to": "first", "unit_cost": 2.0, "max_units": 5},
            ],
        }
    )
