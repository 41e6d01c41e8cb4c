"""The network specification: one clear message per problem."""

from __future__ import annotations

import copy
from typing import Any

import pytest
from pydantic import ValidationError

from solver import NetworkSpec

VALID: dict[str, Any] = {
    "name": "paint mixers",
    "locations": [
        {
            "id": "dockside",
            "capacity": 5,
            "unit_margin": 30.0,
            "demand": {"dist": "poisson", "mean": 1.2},
            "replenishment": {"dist": "pmf", "p": [0.6, 0.4]},
        },
        {
            "id": "uptown",
            "capacity": 4,
            "unit_margin": 28.0,
            "demand": {"dist": "negative_binomial", "mean": 1.5, "variance": 2.5},
            "replenishment": {"dist": "poisson", "mean": 0.8},
        },
    ],
    "lanes": [{"from": "dockside", "to": "uptown", "unit_cost": 3.0, "max_units": 2}],
}


def errors_of(document: dict[str, Any]) -> list[tuple[str, str]]:
    with pytest.raises(ValidationError) as info:
        NetworkSpec.model_validate(document)
    return [(".".join(map(str, e["loc"])), e["msg"]) for e in info.value.errors()]


def test_valid_specification_round_trips_through_json() -> None:
    spec = NetworkSpec.model_validate(VALID)
    assert spec.discount == 0.99
    assert spec.locations[0].holding_cost == 0.0
    again = NetworkSpec.model_validate_json(spec.model_dump_json(by_alias=True))
    assert again == spec
    assert spec.model_dump(by_alias=True)["lanes"][0]["from"] == "dockside"


@pytest.mark.parametrize(
    ("path", "value", "where", "fragment"),
    [
        (
            ("locations", 0, "demand", "mean"),
            -1.0,
            "locations.0.demand.poisson.mean",
            "greater than or equal to 0",
        ),
        (("locations", 0, "capacity"), 0, "locations.0.capacity", "greater than or equal to 1"),
        (("locations", 1, "demand", "variance"), 1.5, "locations.1.demand", "exceed the mean"),
        (("locations", 0, "replenishment", "p"), [0.5, 0.4], "locations.0.replenishment", "sum"),
        (("locations", 0, "unit_margin"), float("nan"), "locations.0.unit_margin", "finite"),
        (("discount",), 1.0, "discount", "less than 1"),
        (("lanes", 0, "max_units"), 0, "lanes.0.max_units", "greater than or equal to 1"),
        (("lanes", 0, "unit_cost"), -0.5, "lanes.0.unit_cost", "greater than or equal to 0"),
    ],
)
def test_field_problems_are_reported_where_they_are(
    path: tuple[str | int, ...], value: object, where: str, fragment: str
) -> None:
    document = copy.deepcopy(VALID)
    target: Any = document
    for part in path[:-1]:
        target = target[part]
    target[path[-1]] = value
    problems = errors_of(document)
    assert any(loc.startswith(where) and fragment in msg for loc, msg in problems), problems


def test_every_network_problem_is_reported_at_once() -> None:
    document = copy.deepcopy(VALID)
    document["locations"][1]["id"] = "dockside"
    document["lanes"] = [
        {"from": "dockside", "to": "warehouse", "unit_cost": 1.0, "max_units": 1},
        {"from": "dockside", "to": "dockside", "unit_cost": 1.0, "max_units": 1},
        {"from": "dockside", "to": "warehouse", "unit_cost": 2.0, "max_units": 1},
    ]
    problems = dict(errors_of(document))
    assert "duplicate location id 'dockside'" in problems["locations.1.id"]
    assert problems["lanes.0.to"] == "unknown location 'warehouse'"
    assert "to itself" in problems["lanes.1"]
    assert "duplicate lane" in problems["lanes.2"]


def test_unknown_fields_and_distributions_are_refused() -> None:
    document = copy.deepcopy(VALID)
    document["locations"][0]["colour"] = "red"
    document["locations"][1]["demand"] = {"dist": "uniform", "low": 0}
    locations = [loc for loc, _ in errors_of(document)]
    assert "locations.0.colour" in locations
    assert any(loc.startswith("locations.1.demand") for loc in locations)


def test_a_single_location_is_not_a_network() -> None:
    document = copy.deepcopy(VALID)
    document["locations"] = document["locations"][:1]
    assert any(loc == "locations" for loc, _ in errors_of(document))
