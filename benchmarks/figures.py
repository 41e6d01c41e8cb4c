"""Pictures of the demo network's policy, for the README.

Usage: .venv/bin/python benchmarks/figures.py [--network PATH] [--out DIR]

Solves the network (default service/data/demo_network.json) under the discounted criterion with
solver.solve_network and draws, with the same functions as the API's /policy.svg and
/value.svg, the net units moved into the second location by closing stock (annotated) and the
value. Writes demo_policy.svg, demo_policy.png, demo_value.svg and demo_value.png to DIR
(default benchmarks/figures/) and prints each path with its size.
"""

from __future__ import annotations

import argparse
import json
from pathlib import Path

from service.pictures import (
    ImageFormat,
    caption,
    choose_plane,
    net_inflow_grid,
    render_moves,
    render_values,
    value_grid,
    value_label,
)
from solver import NetworkSpec, solve_network

ROOT = Path(__file__).resolve().parent.parent
DEMO = ROOT / "service" / "data" / "demo_network.json"
FORMATS: tuple[ImageFormat, ...] = ("svg", "png")


def main() -> None:
    parser = argparse.ArgumentParser(description="Draw the demo network's policy and value.")
    parser.add_argument("--network", type=Path, default=DEMO, help="network specification")
    parser.add_argument("--out", type=Path, default=ROOT / "benchmarks" / "figures")
    args = parser.parse_args()

    spec = NetworkSpec.model_validate(json.loads(args.network.read_text(encoding="utf-8")))
    result = solve_network(spec)
    plane = choose_plane(result, None, None, {})
    moves = net_inflow_grid(result, plane)
    values = value_grid(result, plane)
    source = args.network.name
    args.out.mkdir(parents=True, exist_ok=True)
    for image_format in FORMATS:
        pictures = {
            "demo_policy": render_moves(
                moves,
                x_id=plane.x_id,
                y_id=plane.y_id,
                title=caption(spec.name, f"net moves, discounted policy ({source})", plane),
                image_format=image_format,
                annotate=True,
            ),
            "demo_value": render_values(
                values,
                x_id=plane.x_id,
                y_id=plane.y_id,
                title=caption(spec.name, f"value of the discounted policy ({source})", plane),
                colour_label=value_label(result.criterion),
                image_format=image_format,
            ),
        }
        for stem, body in pictures.items():
            path = args.out / f"{stem}.{image_format}"
            path.write_bytes(body)
            print(
                f"wrote {path.relative_to(ROOT) if path.is_relative_to(ROOT) else path}"
                f"  ({len(body):,} bytes)"
            )


if __name__ == "__main__":
    main()
