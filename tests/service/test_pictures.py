"""Tests of the policy pictures: the pictured grids against the solver's own recommendations,
the drawings (well-formed and reproducible SVG, decodable PNG, cell labels read back), and the
HTTP endpoints with their problems."""

from __future__ import annotations

import io
import itertools
import re
import xml.etree.ElementTree as ET
from functools import cache
from typing import Any

import numpy as np
import pytest
from fastapi.testclient import TestClient
from matplotlib.image import imread
from numpy.testing import assert_allclose, assert_array_equal
from sqlalchemy import Engine

from service.errors import PlaneError
from service.pictures import (
    ANNOTATE_MAX_CELLS,
    Plane,
    choose_plane,
    net_inflow_grid,
    parse_fixed_stock,
    render_moves,
    render_values,
    value_grid,
)
from solver import NetworkSpec, PolicyResult, solve_network
from tests.service.api_support import (
    assert_problem,
    create_network,
    demo_document,
    make_key,
    pointers,
    run_worker,
    sqlite_only,
    weekly_document,
)

# The SVG 1.1 namespace (W3C, Scalable Vector Graphics 1.1, section 5.1.2).
SVG = "{http://www.w3.org/2000/svg}"
# The first eight bytes of every PNG file (W3C/ISO 15948, PNG specification, section 5.2).
PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"
PICTURES = ("policy.svg", "policy.png", "value.svg", "value.png")


def _location(
    location_id: str, capacity: int, demand: float, replenishment: float
) -> dict[str, Any]:
    return {
        "id": location_id,
        "capacity": capacity,
        "unit_margin": 20.0,
        "holding_cost": 0.4,
        "stockout_penalty": 5.0,
        "demand": {"dist": "poisson", "mean": demand},
        "replenishment": {"dist": "poisson", "mean": replenishment},
    }


def _lane(source: str, target: str, max_units: int = 2) -> dict[str, Any]:
    return {"from": source, "to": target, "unit_cost": 0.8, "max_units": max_units}


# Scenarios of our own: unequal capacities (a transposed grid cannot pass for the right one)
# and unequal demand, so that the policies move stock both ways.
TWO_DEPOTS: dict[str, Any] = {
    "name": "Paint rollers: two depots",
    "discount": 0.95,
    "locations": [_location("depot-a", 5, 2.2, 1.0), _location("depot-b", 4, 1.0, 1.6)],
    "lanes": [_lane("depot-a", "depot-b", 3), _lane("depot-b", "depot-a", 3)],
}
THREE_YARDS: dict[str, Any] = {
    "name": "Step ladders: three yards",
    "discount": 0.95,
    "locations": [
        _location("north", 4, 2.0, 0.8),
        _location("east", 3, 0.6, 1.4),
        _location("south", 5, 1.5, 1.5),
    ],
    "lanes": [
        _lane("north", "east"),
        _lane("east", "south"),
        _lane("south", "north"),
        _lane("north", "south"),
    ],
}


@cache
def solved(name: str) -> tuple[NetworkSpec, PolicyResult]:
    document = {"two": TWO_DEPOTS, "three": THREE_YARDS}[name]
    spec = NetworkSpec.model_validate(document)
    return spec, solve_network(spec)


def recommended_inflow(spec: NetworkSpec, flows: tuple[int, ...], location: str) -> int:
    """Units arriving at `location` minus units leaving it, from a recommendation's flows."""
    arriving = sum(
        units for lane, units in zip(spec.lanes, flows, strict=True) if lane.to == location
    )
    leaving = sum(
        units for lane, units in zip(spec.lanes, flows, strict=True) if lane.from_ == location
    )
    return arriving - leaving


def planes(spec: NetworkSpec) -> list[Plane]:
    """Every plane: each ordered pair of axes, each fixed stock of the other locations."""
    capacity = {location.id: location.capacity for location in spec.locations}
    found = []
    for x_id, y_id in itertools.permutations(spec.location_ids, 2):
        others = [i for i in spec.location_ids if i not in (x_id, y_id)]
        for levels in itertools.product(*(range(capacity[i] + 1) for i in others)):
            found.append(Plane(x_id, y_id, dict(zip(others, levels, strict=True))))
    return found


def stock_at(spec: NetworkSpec, plane: Plane, x_units: int, y_units: int) -> list[int]:
    stock = {**plane.fixed, plane.x_id: x_units, plane.y_id: y_units}
    return [stock[location] for location in spec.location_ids]


def texts(svg: bytes) -> list[str]:
    """Every piece of text in an SVG document, parsed as XML (fails on malformed XML)."""
    root = ET.fromstring(svg)
    assert root.tag == f"{SVG}svg"
    return ["".join(node.itertext()) for node in root.iter(f"{SVG}text")]


def words(svg: bytes) -> str:
    """All the text of an SVG document, lines joined by spaces (long labels are wrapped)."""
    return " ".join(texts(svg))


def cell_labels(svg: bytes, shape: tuple[int, int]) -> np.ndarray:
    """The units written in each cell of an annotated moves picture, indexed [y, x]."""
    root = ET.fromstring(svg)
    grid = np.full(shape, np.iinfo(np.int64).min, dtype=np.int64)
    for group in root.iter(f"{SVG}g"):
        gid = group.get("id", "")
        if gid.startswith("cell-x"):
            x, y = (int(part) for part in gid.removeprefix("cell-x").split("-y"))
            text = "".join(group.itertext()).strip().replace("\N{MINUS SIGN}", "-")
            grid[y, x] = int(text)
    return grid


def svg_aspect(svg: bytes) -> float:
    root = ET.fromstring(svg)
    width, height = (float(root.get(side, "").removesuffix("pt")) for side in ("width", "height"))
    return width / height


# -- grids -------------------------------------------------------------------------------------


@pytest.mark.parametrize("name", ["two", "three"])
def test_net_inflow_grid_equals_the_recommended_transfers_at_every_state(name: str) -> None:
    spec, result = solved(name)
    capacity = {location.id: location.capacity for location in spec.locations}
    signs: set[int] = set()
    for plane in planes(spec):
        grid = net_inflow_grid(result, plane)
        assert grid.shape == (capacity[plane.y_id] + 1, capacity[plane.x_id] + 1)
        for (y_units, x_units), units in np.ndenumerate(grid):
            flows = result.recommend(stock_at(spec, plane, x_units, y_units)).flows
            assert units == recommended_inflow(spec, flows, plane.y_id), (plane, x_units, y_units)
        signs.update(np.sign(grid).ravel().tolist())
    # Otherwise a sign error could pass unseen.
    assert signs == {-1, 0, 1}


@pytest.mark.parametrize("name", ["two", "three"])
def test_value_grid_equals_the_recommended_expected_value_at_every_state(name: str) -> None:
    spec, result = solved(name)
    for plane in planes(spec):
        grid = value_grid(result, plane)
        expected = np.array(
            [
                [
                    result.recommend(stock_at(spec, plane, x_units, y_units)).expected_value
                    for x_units in range(grid.shape[1])
                ]
                for y_units in range(grid.shape[0])
            ]
        )
        # The optimal policy's value is the value of its own choice, up to evaluation accuracy.
        assert_allclose(grid, expected, rtol=1e-9)


def test_two_location_grid_is_the_net_move_from_x_to_y() -> None:
    _, result = solved("two")
    grid = net_inflow_grid(result, choose_plane(result, None, None, {}))
    flows = result.policy_flows().reshape(*result.shape, len(result.lanes))
    # Lane 0 runs depot-a -> depot-b, lane 1 back; rows of the grid are depot-b's stock.
    assert_array_equal(grid, (flows[..., 0] - flows[..., 1]).T)


def test_default_axes_follow_network_order_and_others_sit_at_half_capacity() -> None:
    _, result = solved("three")
    assert choose_plane(result, None, None, {}) == Plane("north", "east", {"south": 2})
    assert choose_plane(result, "north", None, {}) == Plane("north", "east", {"south": 2})
    assert choose_plane(result, "east", None, {}) == Plane("east", "north", {"south": 2})
    assert choose_plane(result, None, "north", {}) == Plane("east", "north", {"south": 2})
    assert choose_plane(result, "south", "east", {"north": 4}) == Plane(
        "south", "east", {"north": 4}
    )


def test_fixed_stock_is_parsed_from_location_units_items() -> None:
    assert parse_fixed_stock("garden:3,yard:5") == {"garden": 3, "yard": 5}
    assert parse_fixed_stock(" shed.2:0 ") == {"shed.2": 0}
    assert parse_fixed_stock("garden:-1") == {"garden": -1}  # refused later, against capacity
    for malformed in ("", "garden", "garden:", "garden:x", "garden:3,,yard:5", "a:1:2", ":3"):
        with pytest.raises(PlaneError):
            parse_fixed_stock(malformed)
    with pytest.raises(PlaneError, match="more than once"):
        parse_fixed_stock("garden:1,garden:2")


# -- drawings ----------------------------------------------------------------------------------


def test_annotated_cells_carry_the_grid_and_large_grids_go_unannotated() -> None:
    grid = np.array([[0, 1, 2], [-1, 0, 3], [-2, -3, 0], [4, 0, -4]], dtype=np.int64)
    drawn = render_moves(grid, x_id="a", y_id="b", title="t", image_format="svg", annotate=True)
    assert_array_equal(cell_labels(drawn, grid.shape), grid)
    plain = render_moves(grid, x_id="a", y_id="b", title="t", image_format="svg")
    assert not (cell_labels(plain, grid.shape) == grid).any()

    side = ANNOTATE_MAX_CELLS + 1
    large = np.arange(side * side, dtype=np.int64).reshape(side, side) % 7 - 3
    assert render_moves(
        large, x_id="a", y_id="b", title="t", image_format="svg", annotate=True
    ) == render_moves(large, x_id="a", y_id="b", title="t", image_format="svg")


def test_value_picture_labels_its_colour_bar_in_whole_numbers() -> None:
    # Values a million apart from zero but only a dozen from each other: matplotlib's default
    # would label the bar 50, 52, ... with an offset "+1e6" in the corner.
    grid = np.linspace(1_000_050.0, 1_000_062.0, 12).reshape(3, 4)
    drawn = texts(
        render_values(
            grid, x_id="a", y_id="b", title="t", colour_label="profit (coins)", image_format="svg"
        )
    )
    assert "profit (coins)" in " ".join(drawn)
    assert {"1000050", "1000062"} <= set(drawn)
    assert not [text for text in drawn if re.search(r"1e6|e\+0?6", text)]


# -- HTTP --------------------------------------------------------------------------------------


def _solved_network(client: TestClient, engine: Engine, document: dict[str, Any]) -> int:
    network_id: int = create_network(client, document)["id"]
    run_worker(engine)
    return network_id


@sqlite_only
def test_policy_svg_is_labelled_xml_with_cache_headers(client: TestClient, engine: Engine) -> None:
    network_id = _solved_network(client, engine, demo_document())
    response = client.get(f"/v1/networks/{network_id}/policy.svg")
    assert response.status_code == 200, response.text
    assert response.headers["content-type"] == "image/svg+xml"
    assert response.headers["Cache-Control"] == "private, max-age=60"
    assert response.headers["X-Policy-Version"] == "1"
    found = words(response.content)
    assert "riverside: closing stock (units)" in found
    assert "hilltop: closing stock (units)" in found
    assert "net units moved into hilltop tonight" in found
    # The ends of the colour bar say what the sign means.
    assert {"+ receives", "\N{MINUS SIGN} sends"} <= set(texts(response.content))
    # The title: the network, then the version and criterion.
    assert demo_document()["name"] in found
    assert "version 1 · net moves, discounted policy" in found


@sqlite_only
def test_policy_png_decodes_to_the_aspect_of_the_svg(client: TestClient, engine: Engine) -> None:
    network_id = _solved_network(client, engine, demo_document())
    for picture in ("policy", "value"):
        png = client.get(f"/v1/networks/{network_id}/{picture}.png")
        assert png.status_code == 200, png.text
        assert png.headers["content-type"] == "image/png"
        assert png.content.startswith(PNG_SIGNATURE)
        pixels = imread(io.BytesIO(png.content), format="png")
        assert pixels.ndim == 3 and pixels.shape[2] in (3, 4)
        svg = client.get(f"/v1/networks/{network_id}/{picture}.svg").content
        height, width = pixels.shape[:2]
        # Whole pixels: the aspect may differ by the rounding of one pixel per side.
        assert width / height == pytest.approx(svg_aspect(svg), abs=2 / height)
        # The demo grid is 15 riverside levels by 10 hilltop ones: wider than tall.
        assert width > height


@sqlite_only
def test_value_pictures_name_the_unit_of_each_criterion(client: TestClient, engine: Engine) -> None:
    network_id = _solved_network(client, engine, demo_document(criteria=["discounted", "average"]))
    path = f"/v1/networks/{network_id}/value.svg"
    assert "expected discounted profit (currency units)" in words(client.get(path).content)
    average = client.get(path, params={"criterion": "average"})
    assert average.status_code == 200, average.text
    found = words(average.content)
    assert "relative value (currency units; 0 when every location is empty)" in found
    assert re.search(r"value of the average policy, profit per day [0-9,]+\.[0-9]{2}", found)


@sqlite_only
def test_slices_of_three_locations_show_the_served_policy(
    client: TestClient, engine: Engine
) -> None:
    network_id = _solved_network(client, engine, THREE_YARDS)
    _, result = solved("three")
    path = f"/v1/networks/{network_id}/policy.svg"
    cases: list[tuple[dict[str, str], Plane]] = [
        ({}, Plane("north", "east", {"south": 2})),
        ({"x": "south", "y": "north", "at": "east:1"}, Plane("south", "north", {"east": 1})),
        ({"x": "east", "y": "south", "at": "north:4"}, Plane("east", "south", {"north": 4})),
        ({"y": "south"}, Plane("north", "south", {"east": 1})),
    ]
    for params, plane in cases:
        response = client.get(path, params={**params, "annotate": "true"})
        assert response.status_code == 200, response.text
        expected = net_inflow_grid(result, plane)
        assert_array_equal(cell_labels(response.content, expected.shape), expected)
        found = words(response.content)
        assert f"{plane.x_id}: closing stock (units)" in found
        assert f"{plane.y_id}: closing stock (units)" in found
        held = ", ".join(f"{location} {units}" for location, units in plane.fixed.items())
        assert f"other locations' closing stock: {held}" in found, found


@sqlite_only
def test_bad_axes_or_fixed_stock_are_422_naming_the_parameter(
    client: TestClient, engine: Engine
) -> None:
    network_id = _solved_network(client, engine, THREE_YARDS)
    cases = [
        ({"x": "west"}, "query:/x", "unknown location"),
        ({"y": "west"}, "query:/y", "unknown location"),
        ({"x": "east", "y": "east"}, "query:/y", "already on the x axis"),
        ({"x": "north", "y": "east", "at": "south:6"}, "query:/at", "outside 0..5"),
        ({"at": "south:-1"}, "query:/at", "outside 0..5"),
        ({"at": "west:1"}, "query:/at", "unknown location"),
        ({"at": "north:1"}, "query:/at", "on an axis"),
        ({"at": "south=3"}, "query:/at", "not location:units"),
        ({"at": "south:3,"}, "query:/at", "not location:units"),
        ({"at": ""}, "query:/at", "not location:units"),
        ({"at": "south:1,south:2"}, "query:/at", "more than once"),
        ({"criterion": "median"}, "query:/criterion", ""),
        ({"annotate": "perhaps"}, "query:/annotate", ""),
    ]
    for params, pointer, detail in cases:
        for picture in PICTURES:
            if "annotate" in params and picture.startswith("value"):
                continue
            response = client.get(f"/v1/networks/{network_id}/{picture}", params=params)
            problem = assert_problem(response, 422, "invalid-input")
            assert pointers(problem) == [pointer], (params, problem)
            assert detail in problem["errors"][0]["detail"], (params, problem)


def test_unknown_network_is_404_and_before_the_solve_503(client: TestClient) -> None:
    network_id = create_network(client)["id"]
    for picture in PICTURES:
        assert_problem(client.get(f"/v1/networks/{network_id + 1}/{picture}"), 404, "not-found")
        response = client.get(f"/v1/networks/{network_id}/{picture}")
        assert_problem(response, 503, "policy-not-ready")
        assert int(response.headers["Retry-After"]) > 0
        # A malformed slice is refused whether or not the policy is ready.
        malformed = client.get(f"/v1/networks/{network_id}/{picture}", params={"at": "x"})
        assert_problem(malformed, 422, "invalid-input")


@sqlite_only
def test_identical_requests_give_identical_svg_bytes(client: TestClient, engine: Engine) -> None:
    network_id = _solved_network(client, engine, THREE_YARDS)
    for picture in ("policy.svg", "value.svg"):
        path = f"/v1/networks/{network_id}/{picture}"
        params = {"x": "south", "at": "east:2"}
        first, second = client.get(path, params=params), client.get(path, params=params)
        assert first.status_code == 200, first.text
        assert first.content == second.content
        # ... and a different slice is a different picture.
        assert client.get(path, params={"x": "south", "at": "east:3"}).content != first.content


@sqlite_only
def test_pictures_need_only_a_read_key(client: TestClient, engine: Engine) -> None:
    network_id = _solved_network(client, engine, demo_document())
    reader = {"Authorization": f"Bearer {make_key(engine, scope='read')}"}
    for picture in PICTURES:
        path = f"/v1/networks/{network_id}/{picture}"
        assert client.get(path, headers=reader).status_code == 200
        assert_problem(client.get(path, headers={"Authorization": ""}), 401, "unauthorized")


def test_weekly_policy_is_pictured_for_the_chosen_night(client: TestClient, engine: Engine) -> None:
    document = weekly_document()
    network_id = create_network(client, document)["id"]
    run_worker(engine)
    result = solve_network(NetworkSpec.model_validate(document))
    plane = choose_plane(result, None, None, {})
    for weekday in range(7):
        phase = result.phase_of(weekday)
        grid = net_inflow_grid(result, plane, phase)
        for hilltop, riverside in itertools.product(*(range(n) for n in grid.shape)):
            moves = result.recommend([riverside, hilltop], phase=phase).flows
            # Lane 0 runs riverside -> hilltop, lane 1 back (the demo's lanes).
            assert grid[hilltop, riverside] == moves[0] - moves[1]
    # Sunday night the weekly demo's lanes are closed: nothing moves anywhere.
    assert not net_inflow_grid(result, plane, result.phase_of(6)).any()
    assert net_inflow_grid(result, plane, result.phase_of(4)).any()

    sunday = client.get(f"/v1/networks/{network_id}/policy.svg?weekday=sun")
    assert sunday.status_code == 200
    assert "sun night" in sunday.text
    assert sunday.content != client.get(f"/v1/networks/{network_id}/policy.svg?weekday=fri").content
    assert_problem(client.get(f"/v1/networks/{network_id}/policy.svg?weekday=funday"), 422)
