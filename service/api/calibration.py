"""Sales history and calibration: the ERP pushes daily rows per location; stockrelay estimates
demand (censored at stock-outs) and replenishment, shows how sure it is, and turns the estimates
into a new network version on request, or by itself past a configured threshold."""

from __future__ import annotations

import csv
import io
import json
from dataclasses import asdict
from typing import Annotated, Any

from fastapi import APIRouter, Depends, Query, Request, Response, status
from pydantic import ValidationError
from sqlalchemy.orm import Session
from starlette.concurrency import run_in_threadpool

from service import history
from service.api.deps import (
    NetworkId,
    Reader,
    SessionDep,
    SettingsDep,
    Writer,
    get_network,
    media_type,
)
from service.api.schemas.calibration import (
    MAX_HISTORY_ROWS,
    AutoApplyOut,
    CalibrationOut,
    CalibrationSettingsIn,
    CalibrationSettingsOut,
    EstimateOut,
    HistoryOut,
    HistoryRowIn,
    HistoryStored,
    HistoryUpload,
    LocationCalibrationOut,
    LocationHistoryOut,
    WeekdayTestOut,
)
from service.api.schemas.jobs import JobOut
from service.api.schemas.networks import NetworkCreated, NetworkOut
from service.api.versions import IfMatch, check_if_match, etag
from service.api.views import network_out
from service.errors import HistoryInputError
from service.estimates import (
    AutoApplied,
    CalibrationOptions,
    CalibrationOverrides,
    Proposal,
    apply_estimates,
    options_for,
    propose,
    save_options,
)
from service.history import SalesRow
from service.problems import PROBLEM_RESPONSES, InvalidInput, UnsupportedMedia
from service.settings import Settings
from solver.estimation import CountEstimate, WeekdayEffect
from solver.spec import WEEKDAYS

router = APIRouter(prefix="/v1/networks/{network_id}", tags=["calibration"])

CSV_COLUMNS = ("date", "location", "units_sold", "stock_at_open", "units_received")

_UPLOAD_DOC: dict[str, Any] = {
    "requestBody": {
        "required": True,
        "content": {
            "application/json": {"schema": {"$ref": "#/components/schemas/HistoryUpload"}},
            "text/csv": {
                "schema": {"type": "string"},
                "example": "date,location,units_sold,stock_at_open,units_received\n"
                "2026-11-30,riverside,4,4,3\n2026-11-30,hilltop,1,6,0\n",
            },
        },
    }
}


# -- history -----------------------------------------------------------------------------------


def _parse_json(raw: bytes) -> list[HistoryRowIn]:
    try:
        document = json.loads(raw)
    except (UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise InvalidInput(f"the body is not JSON: {exc}", [("", "not JSON")]) from exc
    try:
        return HistoryUpload.model_validate(document).rows
    except ValidationError as exc:
        errors = [
            ("".join(f"/{part}" for part in error["loc"]), error["msg"])
            for error in exc.errors(include_url=False)
        ]
        raise _invalid(errors) from exc


def _parse_csv(raw: bytes) -> list[HistoryRowIn]:
    """Rows of a CSV upload with a header naming the five columns (any order); pointers name
    the line and the column, e.g. "/line/7/units_sold"."""
    try:
        text = raw.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        raise InvalidInput("the CSV is not UTF-8", [("", "not UTF-8")]) from exc
    reader = csv.DictReader(io.StringIO(text))
    header = [name.strip() for name in reader.fieldnames or []]
    missing = [name for name in CSV_COLUMNS if name not in header]
    extra = [name for name in header if name not in CSV_COLUMNS]
    if missing or extra:
        problems = [("/line/1", f"missing column {name!r}") for name in missing]
        problems += [("/line/1", f"unknown column {name!r}") for name in extra]
        raise _invalid(problems)
    reader.fieldnames = header
    rows: list[HistoryRowIn] = []
    errors: list[tuple[str, str]] = []
    for number, record in enumerate(reader, start=2):
        if len(rows) + len(errors) >= MAX_HISTORY_ROWS:
            raise _invalid([(f"/line/{number}", f"more than {MAX_HISTORY_ROWS:,} rows")])
        if None in record or any(value is None for value in record.values()):
            errors.append((f"/line/{number}", "expected 5 fields"))
            continue
        values: dict[str, Any] = {key: value.strip() for key, value in record.items()}
        for key in ("units_sold", "stock_at_open", "units_received"):
            text_value = values[key]
            values[key] = int(text_value) if text_value.lstrip("-").isdigit() else text_value
        try:
            rows.append(HistoryRowIn.model_validate(values))
        except ValidationError as exc:
            errors += [
                (f"/line/{number}/" + "/".join(str(p) for p in error["loc"]), error["msg"])
                for error in exc.errors(include_url=False)
            ]
    if errors:
        raise _invalid(errors)
    if not rows:
        raise _invalid([("/line/2", "no rows")])
    return rows


def _invalid(errors: list[tuple[str, str]]) -> HistoryInputError:
    return HistoryInputError(errors)


def _locations(session: Session, network_id: int) -> list[LocationHistoryOut]:
    return [
        LocationHistoryOut(
            location=item.location,
            days=item.days,
            sold_out_days=item.sold_out_days,
            first_date=item.first_date,
            last_date=item.last_date,
        )
        for item in history.summary(session, network_id)
    ]


@router.post(
    "/history",
    response_model=HistoryStored,
    openapi_extra=_UPLOAD_DOC,
    responses={415: PROBLEM_RESPONSES[415]},
)
async def upload_history(
    network_id: NetworkId,
    request: Request,
    session: SessionDep,
    caller: Writer,
    settings: SettingsDep,
) -> HistoryStored:
    """Store daily rows (JSON or CSV with a header); a row for a day already stored replaces
    it. With an automatic-apply threshold configured, a new estimate that moves a parameter by
    more than the threshold becomes the next version at once."""
    raw = await request.body()
    media = media_type(request)
    if media not in ("text/csv", "application/json", ""):
        raise UnsupportedMedia(f"send application/json or text/csv, not {media}")
    # Parsing and the database work block: off the event loop, in one hop.
    return await run_in_threadpool(
        _store_history, raw, media == "text/csv", network_id, session, caller.tenant_id, settings
    )


def _store_history(
    raw: bytes,
    csv_upload: bool,
    network_id: int,
    session: Session,
    tenant_id: int,
    settings: Settings,
) -> HistoryStored:
    rows = _parse_csv(raw) if csv_upload else _parse_json(raw)
    network = get_network(session, tenant_id, network_id)
    stored = history.store_history(
        session,
        network,
        [
            SalesRow(r.location, r.date, r.units_sold, r.stock_at_open, r.units_received)
            for r in rows
        ],
        csv_upload=csv_upload,
        limits=settings.size_limits,
    )
    return HistoryStored(
        network_id=network.id,
        received=stored.received,
        inserted=stored.inserted,
        replaced=stored.replaced,
        locations=_locations(session, network.id),
        auto_apply=None if stored.auto_apply is None else _auto_apply_out(stored.auto_apply),
    )


def _auto_apply_out(applied: AutoApplied) -> AutoApplyOut:
    written = applied.written
    return AutoApplyOut(
        applied=written is not None,
        reason=applied.reason,
        version=None if written is None else written.version.number,
        jobs=[] if written is None else [JobOut.model_validate(job) for job in written.jobs],
    )


@router.get("/history", response_model=HistoryOut)
def history_summary(network_id: NetworkId, session: SessionDep, caller: Reader) -> HistoryOut:
    """Days of history stored per location."""
    network = get_network(session, caller.tenant_id, network_id)
    return HistoryOut(network_id=network.id, locations=_locations(session, network.id))


# -- calibration -------------------------------------------------------------------------------


def _estimate(estimate: CountEstimate) -> EstimateOut:
    return EstimateOut.model_validate(estimate, from_attributes=True)


def _weekday(effect: WeekdayEffect | None) -> WeekdayTestOut | None:
    if effect is None:
        return None
    return WeekdayTestOut(
        significant=effect.significant,
        p_value=effect.p_value,
        statistic=effect.statistic,
        df=effect.df,
        summary=effect.summary,
        means={day: estimate.mean for day, estimate in zip(WEEKDAYS, effect.weekdays, strict=True)},
    )


def _calibration_out(network_id: int, proposal: Proposal) -> CalibrationOut:
    locations = []
    for item in proposal.locations:
        calibration = item.calibration
        locations.append(
            LocationCalibrationOut(
                location=item.location,
                first_date=item.first_date,
                last_date=item.last_date,
                days=0 if calibration is None else calibration.days,
                sold_out_days=0 if calibration is None else calibration.censored_days,
                days_without_stock=0 if calibration is None else calibration.days_without_stock,
                demand=None if calibration is None else _estimate(calibration.demand),
                replenishment=None if calibration is None else _estimate(calibration.replenishment),
                current_demand=item.current_demand.model_dump(mode="json"),
                current_replenishment=item.current_replenishment.model_dump(mode="json"),
                changes=item.changes,
                weekday_demand=_weekday(item.weekday_demand),
                weekday_replenishment=_weekday(item.weekday_replenishment),
                warnings=[] if calibration is None else list(calibration.warnings),
                error=item.error,
            )
        )
    options = proposal.options
    return CalibrationOut(
        network_id=network_id,
        based_on_version=proposal.based_on.number,
        would_create_version=proposal.based_on.number + 1,
        calibrated_locations=len(proposal.calibrated),
        largest_change=proposal.largest_change,
        settings=CalibrationSettingsIn(**asdict(options)),
        locations=locations,
        spec=proposal.spec,
        spec_hash=proposal.spec_hash,
    )


def overrides(
    window_days: Annotated[
        int | None,
        Query(ge=7, le=36_600, description="Override: use only the most recent days."),
    ] = None,
    half_life_days: Annotated[
        float | None,
        Query(gt=0, le=36_600, description="Override: recency half-life in days."),
    ] = None,
    confidence: Annotated[
        float | None,
        Query(ge=0.5, lt=1, description="Override: confidence of the intervals."),
    ] = None,
) -> CalibrationOverrides:
    return CalibrationOverrides(window_days, half_life_days, confidence)


OverridesDep = Annotated[CalibrationOverrides, Depends(overrides)]


@router.get("/calibration", response_model=CalibrationOut)
def get_calibration(
    network_id: NetworkId,
    session: SessionDep,
    caller: Reader,
    response: Response,
    query: OverridesDep,
) -> CalibrationOut:
    """Estimates from the stored history beside the current parameters and the naive
    averages, with intervals, days used, warnings, and the version they would produce."""
    network = get_network(session, caller.tenant_id, network_id)
    proposal = propose(session, network, query.over(options_for(session, network.id)))
    response.headers["ETag"] = etag(proposal.based_on.number)
    return _calibration_out(network.id, proposal)


@router.post(
    "/calibration/apply",
    status_code=status.HTTP_201_CREATED,
    response_model=NetworkCreated,
)
def apply_calibration(
    network_id: NetworkId,
    session: SessionDep,
    caller: Writer,
    settings: SettingsDep,
    response: Response,
    query: OverridesDep,
    if_match: IfMatch = None,
) -> NetworkOut:
    """Make the estimates the next version (If-Match: the current version) and queue its
    solves for the criteria the current version was solved for."""
    network = get_network(session, caller.tenant_id, network_id)
    written = apply_estimates(
        session,
        network,
        query.over(options_for(session, network.id)),
        limits=settings.size_limits,
        check_current=lambda current: check_if_match(network.id, current.number, if_match),
    )
    number, jobs = written.version.number, written.jobs
    response.headers["ETag"] = etag(number)
    response.headers["Location"] = f"/v1/networks/{network.id}"
    return network_out(session, network, jobs)


@router.get("/calibration/settings", response_model=CalibrationSettingsOut)
def get_calibration_settings(
    network_id: NetworkId, session: SessionDep, caller: Reader
) -> CalibrationSettingsOut:
    network = get_network(session, caller.tenant_id, network_id)
    options = options_for(session, network.id)
    return CalibrationSettingsOut(network_id=network.id, **asdict(options))


@router.put("/calibration/settings", response_model=CalibrationSettingsOut)
def put_calibration_settings(
    network_id: NetworkId, body: CalibrationSettingsIn, session: SessionDep, caller: Writer
) -> CalibrationSettingsOut:
    """How estimates are made, and the threshold for applying them automatically. Turning
    receipts_sell_same_day off is a conflict while stored days sold more than their stock at
    open (the problem's `days` names them): send those days again first."""
    network = get_network(session, caller.tenant_id, network_id)
    save_options(session, network, CalibrationOptions(**body.model_dump()))
    return CalibrationSettingsOut(network_id=network.id, **body.model_dump())
