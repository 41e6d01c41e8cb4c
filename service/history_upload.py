"""Sales history of a whole assortment as uploaded: CSV with a header, JSON lines (one row per
line) or one JSON document `{"rows": [...]}`.

A row is one item's business day at one location: `date, item, location, units_sold,
stock_at_open, units_received` (CSV columns in any order, all six required). Parsing checks
each row on its own (a date, counts that are whole numbers from 0 to MAX_COUNT); whether the
item and the location exist and whether the day keeps the stock rules is the assortment's
business (service.assortment_history). Every problem names where it is: `/line/<n>/<column>`
in CSV (line 1 is the header) and JSON lines, `/rows/<k>/<field>` in a JSON document.
"""

from __future__ import annotations

import json
import re
from collections.abc import Iterable
from datetime import date
from typing import Any, NamedTuple

from service.errors import ItemUploadError
from service.item_upload import MAX_PROBLEMS, csv_records

__all__ = [
    "COLUMNS",
    "MAX_COUNT",
    "MAX_ROWS",
    "HistoryLine",
    "parse_csv",
    "parse_json_document",
    "parse_json_lines",
]

COLUMNS = ("date", "item", "location", "units_sold", "stock_at_open", "units_received")
_COUNTS = ("units_sold", "stock_at_open", "units_received")
# The single-network upload's bound on a day's count (service.schemas).
MAX_COUNT = 10_000_000
# Rows of one upload: 1,000 items x 4 stores x 250 days, with room to spare.
MAX_ROWS = 1_000_000
_DATE = re.compile(r"^\d{4}-\d{2}-\d{2}$")
_COUNT = re.compile(r"^[0-9]+$")


class HistoryLine(NamedTuple):
    """One parsed row; `where` is its pointer without the column ("/line/7", "/rows/3")."""

    where: str
    item: str
    location: str
    date: date
    units_sold: int
    stock_at_open: int
    units_received: int


class _Collector:
    def __init__(self) -> None:
        self.rows: list[HistoryLine] = []
        self.problems: list[tuple[str, str]] = []

    def problem(self, where: str, message: str) -> None:
        self.problems.append((where, message))
        if len(self.problems) >= MAX_PROBLEMS:
            raise ItemUploadError([*self.problems, ("", f"stopped after {MAX_PROBLEMS} problems")])

    def add(self, where: str, values: dict[str, Any], *, text: bool) -> None:
        """Check one row's fields (`text`: as CSV strings, else as JSON values)."""
        if len(self.rows) >= MAX_ROWS:
            raise ItemUploadError([(where, f"more than {MAX_ROWS:,} rows in one upload")])
        bad = False
        day = _date(values["date"])
        if day is None:
            self.problem(f"{where}/date", "expected a date as YYYY-MM-DD")
            bad = True
        for name in ("item", "location"):
            value = values[name]
            if not isinstance(value, str):
                self.problem(f"{where}/{name}", "expected text")
                bad = True
            elif not value.strip():
                self.problem(f"{where}/{name}", "required")
                bad = True
        counts = []
        for name in _COUNTS:
            count = _count(values[name], text=text)
            if count is None:
                self.problem(f"{where}/{name}", f"expected a whole number from 0 to {MAX_COUNT:,}")
                bad = True
            counts.append(count)
        if bad:
            return
        assert day is not None
        sold, at_open, received = (int(count or 0) for count in counts)
        self.rows.append(
            HistoryLine(
                where,
                values["item"].strip(),
                values["location"].strip(),
                day,
                sold,
                at_open,
                received,
            )
        )

    def result(self) -> list[HistoryLine]:
        if self.problems:
            raise ItemUploadError(self.problems)
        if not self.rows:
            raise ItemUploadError([("", "the upload holds no rows")])
        return self.rows


def _date(value: Any) -> date | None:
    if not isinstance(value, str) or not _DATE.match(value.strip()):
        return None
    try:
        return date.fromisoformat(value.strip())
    except ValueError:
        return None


def _count(value: Any, *, text: bool) -> int | None:
    if text:
        if not isinstance(value, str) or not _COUNT.match(value.strip()):
            return None
        number = int(value)
    elif isinstance(value, int) and not isinstance(value, bool):
        number = value
    else:
        return None
    return number if 0 <= number <= MAX_COUNT else None


def parse_csv(lines: Iterable[str]) -> list[HistoryLine]:
    """Rows of a CSV upload; `lines` are the text's lines (line 1 the header)."""
    header, records = csv_records(lines, COLUMNS, COLUMNS)
    collector = _Collector()
    width = len(header)
    for number, record in records:
        if len(record) != width:
            if any(value.strip() for value in record):
                collector.problem(
                    f"/line/{number}", f"expected {width} fields, found {len(record)}"
                )
            continue
        collector.add(f"/line/{number}", dict(zip(header, record, strict=True)), text=True)
    return collector.result()


def _json_row(collector: _Collector, where: str, document: Any) -> None:
    if not isinstance(document, dict):
        collector.problem(where, "expected an object with " + ", ".join(COLUMNS))
        return
    missing = [name for name in COLUMNS if name not in document]
    unknown = [name for name in document if name not in COLUMNS]
    for name in missing:
        collector.problem(f"{where}/{name}", "required")
    for name in unknown:
        collector.problem(f"{where}/{name}", "unknown field")
    if not missing and not unknown:
        collector.add(where, document, text=False)


def parse_json_lines(lines: Iterable[str]) -> list[HistoryLine]:
    """One row per non-blank line."""
    collector = _Collector()
    for number, line in enumerate(lines, start=1):
        if not line.strip():
            continue
        try:
            document = json.loads(line)
        except json.JSONDecodeError as exc:
            collector.problem(f"/line/{number}", f"not JSON: {exc.msg}")
            continue
        _json_row(collector, f"/line/{number}", document)
    return collector.result()


def parse_json_document(raw: bytes) -> list[HistoryLine]:
    """Rows of `{"rows": [...]}`."""
    try:
        document = json.loads(raw)
    except (UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise ItemUploadError([("", f"the body is not JSON: {exc}")]) from exc
    if not isinstance(document, dict) or set(document) != {"rows"}:
        raise ItemUploadError([("", 'expected {"rows": [...]} and nothing else')])
    if not isinstance(document["rows"], list):
        raise ItemUploadError([("/rows", "expected a list of rows")])
    collector = _Collector()
    for k, row in enumerate(document["rows"]):
        _json_row(collector, f"/rows/{k}", row)
    return collector.result()
