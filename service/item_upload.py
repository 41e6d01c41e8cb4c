"""Items of an assortment as uploaded: CSV (one row per item and location), JSON lines (one
item per line) or one JSON document `{"items": [...]}`.

Parsing reads line by line, so an upload is checked as it arrives; every problem names where it
is: `/line/<n>/<column>` in CSV (line 1 is the header), `/line/<n>/...` in JSON lines and
`/items/<k>/...` in a JSON document. Nothing is stored unless the whole upload is valid.

CSV columns (any order; `item`, `location`, `capacity`, `unit_margin`, `demand_mean` and
`replenishment_mean` required): `item, location, capacity, unit_margin, holding_cost,
stockout_penalty, demand_mean, demand_variance, replenishment_mean, unit_volume,
keep_at_least, max_units_out, max_units_in, lane_limits`. Demand is Poisson, or negative
binomial when `demand_variance` exceeds `demand_mean`; replenishment is Poisson. An item's
`unit_volume` and `lane_limits` ("north>south:2;south>north:0", 0 keeping the item off a lane)
are the item's, given on any of its rows and equal where repeated. Weekly laws and limits need
the JSON forms.
"""

from __future__ import annotations

import contextlib
import csv
import json
from collections.abc import Iterable, Iterator, Sequence
from dataclasses import dataclass, field
from typing import Any

from pydantic import ValidationError

from service.assortment_spec import ItemSpec, Layout, compose_spec
from service.errors import ItemUploadError
from service.json_pointer import json_pointer
from solver import NetworkSpec

__all__ = [
    "CSV_COLUMNS",
    "MAX_ITEMS",
    "MAX_PROBLEMS",
    "ParsedItem",
    "csv_records",
    "parse_csv",
    "parse_json_document",
    "parse_json_lines",
]

MAX_ITEMS = 20_000
# Problems reported at most: past this many the upload is hopeless, and a reply listing every
# bad row of 40,000 would itself be a problem.
MAX_PROBLEMS = 100

CSV_COLUMNS = (
    "item",
    "location",
    "capacity",
    "unit_margin",
    "holding_cost",
    "stockout_penalty",
    "demand_mean",
    "demand_variance",
    "replenishment_mean",
    "unit_volume",
    "keep_at_least",
    "max_units_out",
    "max_units_in",
    "lane_limits",
)
_REQUIRED = ("item", "location", "capacity", "unit_margin", "demand_mean", "replenishment_mean")
_INTEGERS = ("capacity", "keep_at_least", "max_units_out", "max_units_in")
_AMOUNTS = ("unit_margin", "holding_cost", "stockout_penalty")


@dataclass(frozen=True)
class ParsedItem:
    """An item that composes to a valid network on the layout; `where` is its first line
    (CSV, JSON lines) or index (JSON document)."""

    where: str
    spec: ItemSpec
    network: NetworkSpec


@dataclass
class _Collector:
    layout: Layout
    items: list[ParsedItem] = field(default_factory=list)
    problems: list[tuple[str, str]] = field(default_factory=list)
    seen: dict[str, str] = field(default_factory=dict)

    def problem(self, where: str, message: str) -> None:
        self.problems.append((where, message))
        if len(self.problems) >= MAX_PROBLEMS:
            raise ItemUploadError([*self.problems, ("", f"stopped after {MAX_PROBLEMS} problems")])

    def validation(self, where: str, exc: ValidationError) -> None:
        for error in exc.errors(include_url=False):
            parts = [part for part in error["loc"] if part not in _UNION_TAGS]
            self.problem(where + json_pointer(*parts), error["msg"])

    def add(self, where: str, document: Any) -> None:
        if len(self.items) >= MAX_ITEMS:
            raise ItemUploadError([(where, f"more than {MAX_ITEMS:,} items in one upload")])
        try:
            spec = ItemSpec.model_validate(document)
        except ValidationError as exc:
            self.validation(where, exc)
            return
        if spec.item in self.seen:
            self.problem(
                where + "/item", f"item {spec.item!r} given twice (first at {self.seen[spec.item]})"
            )
            return
        self.seen[spec.item] = where
        try:
            network = compose_spec(self.layout, spec)
        except ValidationError as exc:
            self.validation(where, exc)
            return
        except ValueError as exc:
            self.problem(where, str(exc))
            return
        self.items.append(ParsedItem(where, spec, network))

    def result(self) -> list[ParsedItem]:
        if self.problems:
            raise ItemUploadError(self.problems)
        if not self.items:
            raise ItemUploadError([("", "the upload holds no items")])
        return self.items


# Tags pydantic puts into error locations of discriminated unions; a pointer names fields only.
_UNION_TAGS = {"poisson", "negative_binomial", "pmf", "weekly", "units", "function-after"}


def parse_json_document(raw: bytes, layout: Layout) -> list[ParsedItem]:
    """Items of `{"items": [...]}`."""
    try:
        document = json.loads(raw)
    except (UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise ItemUploadError([("", f"the body is not JSON: {exc}")]) from exc
    if not isinstance(document, dict) or not isinstance(document.get("items"), list):
        raise ItemUploadError([("", 'expected {"items": [...]}')])
    if set(document) != {"items"}:
        raise ItemUploadError([("", 'expected {"items": [...]} and nothing else')])
    collector = _Collector(layout)
    for k, item in enumerate(document["items"]):
        collector.add(f"/items/{k}", item)
    return collector.result()


def parse_json_lines(lines: Iterable[str], layout: Layout) -> list[ParsedItem]:
    """One item per non-blank line."""
    collector = _Collector(layout)
    for number, line in enumerate(lines, start=1):
        if not line.strip():
            continue
        where = f"/line/{number}"
        try:
            document = json.loads(line)
        except json.JSONDecodeError as exc:
            collector.problem(where, f"not JSON: {exc.msg}")
            continue
        collector.add(where, document)
    return collector.result()


def _number(text: str) -> int | float | str:
    try:
        return int(text)
    except ValueError:
        pass
    try:
        return float(text)
    except ValueError:
        return text


def _lane_limits(text: str) -> dict[str, Any] | str:
    limits: dict[str, Any] = {}
    for part in filter(None, (p.strip() for p in text.split(";"))):
        lane, _, units = part.rpartition(":")
        if not lane or not units.strip().isdigit():
            return f"expected lanes as from>to:units separated by ';', not {part!r}"
        limits[lane.strip()] = int(units)
    return limits


@dataclass
class _CsvItem:
    first: int
    unit_volume: tuple[int, Any] | None = None
    lane_limits: tuple[int, Any] | None = None
    locations: dict[str, dict[str, Any]] = field(default_factory=dict)
    bad: bool = False


def _rows(lines: Iterable[str]) -> Iterator[tuple[int, list[str]]]:
    """CSV records with the line each starts on (a quoted field may span lines)."""
    reader = csv.reader(lines)
    previous = 0
    for record in reader:
        yield previous + 1, record
        previous = reader.line_num


def csv_records(
    lines: Iterable[str], required: Sequence[str], known: Sequence[str]
) -> tuple[list[str], Iterator[tuple[int, list[str]]]]:
    """The header of a CSV upload (which must name every `required` column, only `known` ones,
    each once) and its records after the header, each with the line it starts on (line 1 is
    the header); ItemUploadError naming every fault of the header at /line/1."""
    records = _rows(lines)
    try:
        _, header = next(records)
    except StopIteration:
        raise ItemUploadError([("/line/1", "the CSV is empty")]) from None
    header = [name.strip().lstrip("\ufeff") for name in header]
    missing = [name for name in required if name not in header]
    unknown = [name for name in header if name not in known]
    doubled = sorted({name for name in header if header.count(name) > 1})
    if missing or unknown or doubled:
        problems = [("/line/1", f"missing column {name!r}") for name in missing]
        problems += [("/line/1", f"unknown column {name!r}") for name in unknown]
        problems += [("/line/1", f"column {name!r} given twice") for name in doubled]
        raise ItemUploadError(problems)
    return header, records


def parse_csv(lines: Iterable[str], layout: Layout) -> list[ParsedItem]:
    """Items of a CSV upload (module docstring); `lines` are the text's lines."""
    collector = _Collector(layout)
    header, records = csv_records(lines, _REQUIRED, CSV_COLUMNS)
    items: dict[str, _CsvItem] = {}
    for number, record in records:
        if not any(value.strip() for value in record):
            continue
        where = f"/line/{number}"
        if len(record) != len(header):
            collector.problem(where, f"expected {len(header)} fields, found {len(record)}")
            continue
        values = {name: value.strip() for name, value in zip(header, record, strict=True)}
        empty = [name for name in _REQUIRED if not values[name]]
        if empty:
            for name in empty:
                collector.problem(f"{where}/{name}", "required")
            continue
        code = values["item"]
        entry = items.setdefault(code, _CsvItem(first=number))
        location = values["location"]
        if location in entry.locations:
            collector.problem(f"{where}/location", f"item {code!r} has location {location!r} twice")
            entry.bad = True
            continue
        row: dict[str, Any] = {"_line": number}
        for name in (*_INTEGERS, *_AMOUNTS):
            if values.get(name):
                row[name] = _number(values[name])
        mean = _number(values["demand_mean"])
        variance = _number(values["demand_variance"]) if values.get("demand_variance") else None
        numbers = isinstance(mean, int | float) and isinstance(variance, int | float)
        if variance is None or (numbers and variance == mean):
            row["demand"] = {"dist": "poisson", "mean": mean}
        elif numbers and variance < mean:  # type: ignore[operator]
            collector.problem(
                f"{where}/demand_variance",
                f"a variance ({variance:g}) below the mean ({mean:g}) is not a demand law "
                "stockrelay models; leave it empty for Poisson demand",
            )
            entry.bad = True
            continue
        else:
            row["demand"] = {"dist": "negative_binomial", "mean": mean, "variance": variance}
        row["replenishment"] = {"dist": "poisson", "mean": _number(values["replenishment_mean"])}
        entry.locations[location] = row
        for name in ("unit_volume", "lane_limits"):
            if not values.get(name):
                continue
            value: Any = (
                _number(values[name]) if name == "unit_volume" else _lane_limits(values[name])
            )
            if isinstance(value, str) and name == "lane_limits":
                collector.problem(f"{where}/{name}", value)
                entry.bad = True
                continue
            given = getattr(entry, name)
            if given is not None and given[1] != value:
                collector.problem(
                    f"{where}/{name}",
                    f"item {code!r} has {name} {given[1]!r} on line {given[0]} and {value!r} here",
                )
                entry.bad = True
                continue
            setattr(entry, name, (number, value))
    for code, entry in items.items():
        if entry.bad:
            continue
        lines_of = {loc: row.pop("_line") for loc, row in entry.locations.items()}
        document: dict[str, Any] = {"item": code, "locations": entry.locations}
        if entry.unit_volume is not None:
            document["unit_volume"] = entry.unit_volume[1]
        if entry.lane_limits is not None:
            document["lane_limits"] = entry.lane_limits[1]
        _add_csv_item(collector, entry.first, document, lines_of)
    return collector.result()


_CSV_FIELD = {
    "capacity": "capacity",
    "unit_margin": "unit_margin",
    "holding_cost": "holding_cost",
    "stockout_penalty": "stockout_penalty",
    "keep_at_least": "keep_at_least",
    "max_units_out": "max_units_out",
    "max_units_in": "max_units_in",
}


def _add_csv_item(
    collector: _Collector, first: int, document: dict[str, Any], lines_of: dict[str, int]
) -> None:
    """Validate one item assembled from CSV rows; problems point at the row and column."""
    sub = _Collector(collector.layout, seen=collector.seen)
    with contextlib.suppress(ItemUploadError):
        sub.add(f"/line/{first}", document)
    for where, message in sub.problems:
        collector.problem(_csv_pointer(where, first, lines_of), message)
    collector.items.extend(sub.items)


def _csv_pointer(where: str, first: int, lines_of: dict[str, int]) -> str:
    """/line/<first>/locations/<loc>/<field>[/...] -> /line/<loc's line>/<csv column>."""
    parts = where.split("/")[3:]
    if len(parts) >= 3 and parts[0] == "locations" and parts[1] in lines_of:
        line = lines_of[parts[1]]
        name = parts[2]
        if name in ("demand", "replenishment"):
            column = "demand_variance" if parts[3:4] == ["variance"] else f"{name}_mean"
            return f"/line/{line}/{column}"
        return f"/line/{line}/{_CSV_FIELD.get(name, name)}"
    if parts[:1] == ["lane_limits"] or parts[:1] == ["unit_volume"]:
        return f"/line/{first}/{parts[0]}"
    return f"/line/{first}" + ("/" + "/".join(parts) if parts else "")
