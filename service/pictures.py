"""Pictures of a policy: heatmaps of tonight's net move, and of the value, over closing stock.

A picture shows one plane of the state space: the closing stock of one location along x, of
another along y, every other location held at a fixed stock. Slicing (`choose_plane`,
`net_inflow_grid`, `value_grid`) turns a PolicyResult into a plain array indexed
[y stock, x stock]; rendering (`render_moves`, `render_values`) turns such an array into SVG or
PNG bytes and knows nothing of policies, so another selector (a weekday, say) needs only another
slicing function.

A priced policy (solver.PricedPolicy) has no table over stock states: its slices are computed
for the plane's stocks only, the moves from its nightly plan (plan_batch) and the "value" from
its upper bound on the optimal value at each stock (the sum of the per-store values plus the
price terms), which is what the value picture of a priced network shows.

Rendering uses matplotlib's object-oriented API on a Figure of its own with the Agg canvas (no
pyplot state), so requests may render concurrently in the thread pool. SVG output is
reproducible byte for byte: element ids are hashed with a fixed salt and no date is written.
"""

from __future__ import annotations

import io
import math
import re
import textwrap
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Literal, TypeVar

import matplotlib
import numpy as np
from matplotlib.axes import Axes
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.colorbar import Colorbar
from matplotlib.colors import (
    BoundaryNorm,
    Colormap,
    LinearSegmentedColormap,
    ListedColormap,
    Normalize,
)
from matplotlib.figure import Figure
from matplotlib.image import AxesImage
from matplotlib.ticker import MaxNLocator, MultipleLocator, ScalarFormatter
from numpy.typing import NDArray

from service.errors import PlaneError
from solver import PolicyResult
from solver.priced_result import PricedPolicy

__all__ = [
    "ANNOTATE_MAX_CELLS",
    "ImageFormat",
    "Plane",
    "caption",
    "choose_plane",
    "net_inflow_grid",
    "parse_fixed_stock",
    "render_moves",
    "render_values",
    "value_grid",
    "value_label",
]

ImageFormat = Literal["svg", "png"]

# Cell labels stay legible up to this many cells along either axis; beyond, they are omitted.
ANNOTATE_MAX_CELLS = 30

# The SVG writer reads these from the process-wide rcParams at save time; they are constants
# for every picture this process draws, so they are set once here rather than per render
# (rc_context would swap global state under renders running in other threads).
# A fixed salt makes clip-path and image ids, and hence the bytes, reproducible; text stays
# text (not glyph paths) so that pictures are smaller and their labels searchable.
matplotlib.rcParams["svg.hashsalt"] = "stockrelay-pictures"
matplotlib.rcParams["svg.fonttype"] = "none"

PNG_DPI = 120
_SVG_METADATA: dict[str, str | None] = {"Date": None}

# Our own scales. Moves: slate blue where the y location sends, warm ochre-to-brick where it
# receives, around a warm paper white for "no move". Values: paper white to deep pine.
_MOVES_COLOURS = ["#27476e", "#7d9cc0", "#f3efe6", "#e0a458", "#8c3b1f"]
_VALUES_COLOURS = ["#f5f1e3", "#cfd9a8", "#7fae8a", "#3b7a6b", "#173f3a"]
_DARK_INK = "#1c1c1c"
_LIGHT_INK = "#fbfaf6"
# A typographic minus, as matplotlib writes on the axes.
_MINUS = "\N{MINUS SIGN}"

_Cell = TypeVar("_Cell", bound=np.generic)

_FIXED_ITEM = re.compile(r"^([A-Za-z0-9][A-Za-z0-9._-]*):(-?[0-9]{1,9})$")


@dataclass(frozen=True)
class Plane:
    """A plane of the state space: location `x_id` along x, `y_id` along y, every other
    location at its `fixed` closing stock (units, by location id, in network order)."""

    x_id: str
    y_id: str
    fixed: Mapping[str, int]


def parse_fixed_stock(text: str) -> dict[str, int]:
    """`id:units` items separated by commas (e.g. "garden:3,yard:5") as units by location id;
    PlaneError for anything else, a repeated location included."""
    fixed: dict[str, int] = {}
    for item in text.split(","):
        match = _FIXED_ITEM.match(item.strip())
        if match is None:
            raise PlaneError(
                [("at", f"{item.strip()!r} is not location:units (e.g. garden:3,yard:5)")]
            )
        location, units = match.group(1), int(match.group(2))
        if location in fixed:
            raise PlaneError([("at", f"{location} is given more than once")])
        fixed[location] = units
    return fixed


def choose_plane(
    result: PolicyResult | PricedPolicy, x: str | None, y: str | None, fixed: Mapping[str, int]
) -> Plane:
    """The plane through `result`'s state space with `x` and `y` on the axes (default: the
    first locations, in network order, not already on the other axis) and the other locations
    at `fixed` units (default: half their capacity, rounded down). PlaneError names every
    unknown location, a location on both axes, a fixed stock outside 0..capacity, and a fixed
    stock given for a location on an axis."""
    ids = result.location_ids
    capacity = dict(zip(ids, result.capacities, strict=True))
    problems: list[tuple[str, str]] = []
    for parameter, location in (("x", x), ("y", y)):
        if location is not None and location not in capacity:
            problems.append((parameter, f"unknown location {location!r}"))
    if x is not None and x == y:
        problems.append(("y", f"{y} is already on the x axis; choose two different locations"))
    if problems:
        raise PlaneError(problems)
    x_id = x if x is not None else next(i for i in ids if i != y)
    y_id = y if y is not None else next(i for i in ids if i != x_id)
    for location, units in fixed.items():
        if location not in capacity:
            problems.append(("at", f"unknown location {location!r}"))
        elif location in (x_id, y_id):
            problems.append(("at", f"{location} is on an axis; give stock only for the others"))
        elif not 0 <= units <= capacity[location]:
            problems.append(("at", f"{location}: {units} units is outside 0..{capacity[location]}"))
    if problems:
        raise PlaneError(problems)
    others = {
        location: fixed.get(location, capacity[location] // 2)
        for location in ids
        if location not in (x_id, y_id)
    }
    return Plane(x_id=x_id, y_id=y_id, fixed=others)


def net_inflow_grid(
    result: PolicyResult | PricedPolicy, plane: Plane, phase: int = 0
) -> NDArray[np.int64]:
    """Net units the policy moves tonight into the y-axis location (units arriving there minus
    units leaving it, over all lanes) at every closing stock of `plane`, for closing counts in
    `phase` (the weekday, for a weekly policy; see PolicyResult.phase_of).

    Returns shape (capacity_y + 1, capacity_x + 1), indexed [y stock, x stock]. With two
    locations this is the net number of units moved from the x location to the y location.
    """
    y = result.location_ids.index(plane.y_id)
    into_y = np.array([int(b == y) - int(a == y) for a, b in result.lanes], dtype=np.int64)
    if isinstance(result, PricedPolicy):
        stocks = _plane_stocks(result, plane)
        moved = np.asarray(result.plan_batch(stocks.reshape(-1, stocks.shape[-1]), phase=phase))
        grid: NDArray[np.int64] = (moved @ into_y).astype(np.int64).reshape(stocks.shape[:2])
        return grid
    per_flow = result.flows @ into_y
    return _plane_of(per_flow[result.action[phase]], result, plane)


def value_grid(
    result: PolicyResult | PricedPolicy, plane: Plane, phase: int = 0
) -> NDArray[np.float64]:
    """The policy's value (currency units: expected discounted profit, or the relative value
    under the average criterion) at every closing stock of `plane`, in `phase`; for a priced
    policy, the upper bound on the optimal value there.

    Returns shape (capacity_y + 1, capacity_x + 1), indexed [y stock, x stock].
    """
    if isinstance(result, PricedPolicy):
        stocks = _plane_stocks(result, plane)
        bounds = [
            result.upper_bound(stock, phase=phase)
            for stock in stocks.reshape(-1, stocks.shape[-1]).tolist()
        ]
        return np.array(bounds, dtype=np.float64).reshape(stocks.shape[:2])
    return _plane_of(result.values[phase], result, plane)


def _plane_stocks(result: PricedPolicy, plane: Plane) -> NDArray[np.int64]:
    """The closing stocks of `plane`, shape (capacity_y + 1, capacity_x + 1, N), indexed
    [y stock, x stock]."""
    ids = result.location_ids
    x, y = ids.index(plane.x_id), ids.index(plane.y_id)
    rows, cols = result.capacities[y] + 1, result.capacities[x] + 1
    stocks = np.zeros((rows, cols, len(ids)), dtype=np.int64)
    for i, location in enumerate(ids):
        if location not in (plane.x_id, plane.y_id):
            stocks[..., i] = plane.fixed[location]
    stocks[..., y] = np.arange(rows)[:, None]
    stocks[..., x] = np.arange(cols)[None, :]
    return stocks


def _plane_of(per_state: NDArray[_Cell], result: PolicyResult, plane: Plane) -> NDArray[_Cell]:
    ids = result.location_ids
    x, y = ids.index(plane.x_id), ids.index(plane.y_id)
    index = tuple(
        slice(None) if location in (plane.x_id, plane.y_id) else plane.fixed[location]
        for location in ids
    )
    cut = per_state.reshape(result.shape)[index]
    # The two free axes keep network order: (y, x) already when y comes first.
    return np.ascontiguousarray(cut if y < x else cut.T)


def caption(network_name: str, subject: str, plane: Plane) -> str:
    """A picture's title: the network, what is shown, and the stock held fixed off the axes."""
    lines = [network_name, subject]
    if plane.fixed:
        held = ", ".join(f"{location} {units}" for location, units in plane.fixed.items())
        lines.append(f"other locations' closing stock: {held}")
    return "\n".join(lines)


def value_label(criterion: str) -> str:
    """What a value picture's colour measures, in which unit."""
    if criterion == "average":
        return "relative value (currency units; 0 when every location is empty)"
    return "expected discounted profit (currency units)"


def render_moves(
    grid: NDArray[np.integer],
    *,
    x_id: str,
    y_id: str,
    title: str,
    image_format: ImageFormat,
    annotate: bool = False,
) -> bytes:
    """A heatmap of net units moved into `y_id`; grid shape (ny, nx) indexed [y stock, x stock].

    Diverging colours centred on zero, one colour per unit; the colour bar says which sign
    means receiving. `annotate` writes the units in every cell when the grid has at most
    ANNOTATE_MAX_CELLS cells along each axis (otherwise it is ignored).
    """
    reach = max(1, int(np.abs(grid).max(initial=0)))
    # One colour per integer from -reach to +reach, sampled so that 0 takes the neutral middle.
    scale = LinearSegmentedColormap.from_list("stockrelay-moves", _MOVES_COLOURS)
    cmap = ListedColormap(scale(np.linspace(0.0, 1.0, 2 * reach + 1)))
    norm = BoundaryNorm(np.arange(-reach - 0.5, reach + 1.0), cmap.N)

    figure, axes = _heatmap_figure(grid.shape, x_id, y_id, title)
    image = _draw_cells(axes, grid, cmap, norm)
    colorbar = figure.colorbar(image, ax=axes, shrink=0.9)
    ticks = _symmetric_ticks(reach)
    colorbar.set_ticks(ticks, labels=[_signed(t) for t in ticks])
    colorbar.set_label(_wrap(f"net units moved into {y_id} tonight", _bar_length(figure)))
    # The ends of the bar say what the sign means; the bar's label names the location.
    colorbar.ax.set_title("+ receives", fontsize="small")
    colorbar.ax.set_xlabel(f"{_MINUS} sends", fontsize="small")
    if annotate and max(grid.shape) <= ANNOTATE_MAX_CELLS:
        _write_cells(figure, axes, grid, cmap, norm)
    return _save(figure, image_format)


def render_values(
    grid: NDArray[np.floating],
    *,
    x_id: str,
    y_id: str,
    title: str,
    colour_label: str,
    image_format: ImageFormat,
) -> bytes:
    """A heatmap of values (currency units); grid shape (ny, nx) indexed [y stock, x stock].
    Sequential colours from the lowest value to the highest, the colour bar labelled
    `colour_label`."""
    cmap = LinearSegmentedColormap.from_list("stockrelay-values", _VALUES_COLOURS)
    low, high = float(grid.min()), float(grid.max())
    # A flat grid still needs a range to draw a colour bar over.
    norm = Normalize(low, high if high > low else low + 1.0)

    figure, axes = _heatmap_figure(grid.shape, x_id, y_id, title)
    image = _draw_cells(axes, grid, cmap, norm)
    colorbar = figure.colorbar(image, ax=axes, shrink=0.9)
    _plain_numbers(colorbar)
    colorbar.set_label(_wrap(colour_label, _bar_length(figure)))
    return _save(figure, image_format)


def _heatmap_figure(
    shape: tuple[int, ...], x_id: str, y_id: str, title: str
) -> tuple[Figure, Axes]:
    ny, nx = shape
    # Square cells, the plot at most about 5 inches across; small grids get larger cells.
    cell = min(0.42, 5.0 / max(nx, ny))
    width = max(4.8, nx * cell + 2.8)
    title = _wrap(title, width - 0.4)
    height = max(4.2, ny * cell + 1.2 + 0.22 * title.count("\n"))
    figure = Figure(figsize=(width, height), layout="constrained")
    FigureCanvasAgg(figure)
    axes = figure.add_subplot()
    axes.set_xlabel(_wrap(f"{x_id}: closing stock (units)", width - 2.0))
    axes.set_ylabel(_wrap(f"{y_id}: closing stock (units)", height - 1.4))
    axes.set_title(title, fontsize="medium")
    for axis, cells in ((axes.xaxis, nx), (axes.yaxis, ny)):
        # Every stock level while they fit side by side, else about ten whole numbers.
        if cells <= 20:
            axis.set_major_locator(MultipleLocator(1))
        else:
            axis.set_major_locator(MaxNLocator(nbins=10, integer=True))
    if max(nx, ny) <= ANNOTATE_MAX_CELLS:
        # Thin rules between cells make single stock levels easy to read off.
        axes.set_xticks(np.arange(-0.5, nx), minor=True)
        axes.set_yticks(np.arange(-0.5, ny), minor=True)
        axes.grid(which="minor", color=_LIGHT_INK, linewidth=0.6)
        axes.tick_params(which="minor", length=0)
    return figure, axes


def _draw_cells(axes: Axes, grid: NDArray[np.number], cmap: Colormap, norm: Normalize) -> AxesImage:
    # Unsampled ("none"): crisp cell edges in SVG at any zoom, nearest-neighbour in PNG.
    return axes.imshow(
        grid, cmap=cmap, norm=norm, origin="lower", interpolation="none", aspect="equal"
    )


def _wrap(text: str, inches: float) -> str:
    """`text` with every line broken to fit about `inches` at the default 10-point font (DejaVu
    Sans: about 13 lower-case characters an inch, fewer capitals)."""
    width = max(12, int(inches * 11))
    return "\n".join(
        "\n".join(textwrap.wrap(line, width, break_on_hyphens=False)) or line
        for line in text.split("\n")
    )


def _bar_length(figure: Figure) -> float:
    # The colour bar spans 0.9 of the axes, which are a little shorter than the figure.
    return 0.8 * figure.get_figheight()


def _symmetric_ticks(reach: int) -> list[int]:
    step = max(1, math.ceil(reach / 4))
    positive = list(range(step, reach + 1, step))
    return [-t for t in reversed(positive)] + [0] + positive


def _signed(units: int) -> str:
    return f"{units:+d}".replace("-", _MINUS) if units else "0"


def _write_cells(
    figure: Figure,
    axes: Axes,
    grid: NDArray[np.integer],
    cmap: ListedColormap,
    norm: BoundaryNorm,
) -> None:
    ny, nx = grid.shape
    cell_points = figure.get_figwidth() * 72 * 0.6 / max(nx, ny)
    size = max(5.0, min(10.0, 0.42 * cell_points))
    for (row, column), units in np.ndenumerate(grid):
        red, green, blue, _ = cmap(norm(units))
        # Approximate lightness (ITU-R BT.709 weights on the sRGB values): light ink on dark.
        dark = 0.2126 * red + 0.7152 * green + 0.0722 * blue < 0.5
        text = axes.text(
            column,
            row,
            _signed(int(units)),
            ha="center",
            va="center",
            fontsize=size,
            color=_LIGHT_INK if dark else _DARK_INK,
        )
        # A stable id per cell, so that the numbers can be read back from the SVG.
        text.set_gid(f"cell-x{column}-y{row}")


def _plain_numbers(colorbar: Colorbar) -> None:
    # Values far from zero but close together (a million, give or take a dozen) would otherwise
    # be labelled as small numbers plus an offset ("+1e6") in a corner, which readers miss.
    formatter = ScalarFormatter(useOffset=False)
    formatter.set_scientific(False)
    colorbar.formatter = formatter
    colorbar.update_ticks()


def _save(figure: Figure, image_format: ImageFormat) -> bytes:
    buffer = io.BytesIO()
    if image_format == "svg":
        figure.savefig(buffer, format="svg", metadata=_SVG_METADATA)
    else:
        figure.savefig(buffer, format="png", dpi=PNG_DPI)
    return buffer.getvalue()
