"""An assortment's sales history in one upload, and the calibration of every item as one run of
jobs shared by the workers."""

from __future__ import annotations

from collections.abc import Callable
from typing import Annotated, Any

from fastapi import APIRouter, Request, Response, status
from fastapi.concurrency import run_in_threadpool

from service import assortment_history, history_upload
from service.api.assortments import (
    AssortmentId,
    bulk_upload_doc,
    find_or_404,
    read_lines,
    storing_whole,
)
from service.api.deps import Reader, SessionDep, SettingsDep, Writer, id_path, media_type
from service.api.schemas.assortments import (
    AssortmentHistoryOut,
    CalibrationChangeOut,
    CalibrationFailureOut,
    CalibrationRunIn,
    CalibrationRunOut,
    HistoryUploadOut,
    LocationHistoryCountsOut,
)
from service.assortment_history import HistoryCounts, RunSummary
from service.errors import NoItemsError
from service.estimates import CalibrationOverrides
from service.problems import PROBLEM_RESPONSES, Conflict, NotFound, UnsupportedMedia

router = APIRouter(prefix="/v1/assortments", tags=["assortments"])

RunId = Annotated[int, id_path("The calibration run's id.")]

_CSV_EXAMPLE = (
    "date,item,location,units_sold,stock_at_open,units_received\n"
    "2026-11-30,DRL-18V,harbour,3,7,2\n"
    "2026-11-30,DRL-18V,old-town,1,4,0\n"
    "2026-11-30,SAW-CIRC,harbour,0,2,1\n"
)
_UPLOAD_DOC = bulk_upload_doc(_CSV_EXAMPLE, "rows")


@router.post(
    "/{assortment_id}/history",
    response_model=HistoryUploadOut,
    openapi_extra=_UPLOAD_DOC,
    responses={413: PROBLEM_RESPONSES[413], 415: PROBLEM_RESPONSES[415]},
)
async def upload_history(
    assortment_id: AssortmentId,
    request: Request,
    session: SessionDep,
    caller: Writer,
    settings: SettingsDep,
) -> HistoryUploadOut:
    """Daily rows of every item in one upload: CSV (`date,item,location,units_sold,
    stock_at_open,units_received`), JSON lines (a row per line) or `{"rows": [...]}`. All or
    nothing: any bad row refuses the whole upload with every problem's line; a day stored
    already is replaced."""
    media = media_type(request)
    parsers: dict[str, Callable[[list[str]], list[history_upload.HistoryLine]]] = {
        "text/csv": history_upload.parse_csv,
        "application/x-ndjson": history_upload.parse_json_lines,
        "application/jsonl": history_upload.parse_json_lines,
        "application/json": lambda lines: history_upload.parse_json_document(
            "\n".join(lines).encode("utf-8")
        ),
    }
    if media not in parsers:
        raise UnsupportedMedia(
            f"send text/csv, application/x-ndjson or application/json, not {media}"
        )
    lines = await read_lines(request, settings.max_upload_bytes)

    def work() -> HistoryUploadOut:
        assortment = find_or_404(session, caller.tenant_id, assortment_id)
        conflict = (
            "another upload stored some of these days at the same moment; send this one again "
            "(a repeat replaces them)"
        )
        with storing_whole(session, "upload", conflict):
            rows = parsers[media](lines)
            stored = assortment_history.store_history(session, assortment, rows)
        return HistoryUploadOut(
            assortment_id=assortment.id,
            received=stored.received,
            inserted=stored.inserted,
            replaced=stored.replaced,
            items=stored.items,
        )

    return await run_in_threadpool(work)


@router.get("/{assortment_id}/history", response_model=AssortmentHistoryOut)
def history_summary(
    assortment_id: AssortmentId, session: SessionDep, caller: Reader
) -> AssortmentHistoryOut:
    """Days of history stored for the items, in all and per location."""
    assortment = find_or_404(session, caller.tenant_id, assortment_id)
    summary = assortment_history.history_summary(session, assortment)
    return AssortmentHistoryOut(
        assortment_id=assortment.id,
        items=summary.items,
        **_counts_out(summary.total),
        locations=[
            LocationHistoryCountsOut(location=location, **_counts_out(counts))
            for location, counts in summary.locations.items()
        ],
    )


def _counts_out(counts: HistoryCounts) -> dict[str, Any]:
    """The fields of HistoryCountsOut."""
    return {
        "rows": counts.rows,
        "days": counts.days,
        "items_with_history": counts.items,
        "first_date": counts.first_date,
        "last_date": counts.last_date,
    }


def _run_out(summary: RunSummary) -> CalibrationRunOut:
    return CalibrationRunOut(
        run=summary.run,
        assortment_id=summary.assortment_id,
        state=summary.state,
        created_at=summary.created_at,
        finished_at=summary.finished_at,
        chunks=summary.chunks,
        chunks_queued=summary.chunks_queued,
        chunks_running=summary.chunks_running,
        chunks_done=summary.chunks_done,
        chunks_failed=summary.chunks_failed,
        items=summary.items,
        calibrated=summary.calibrated,
        unchanged=summary.unchanged,
        skipped=summary.skipped,
        failed=summary.failed,
        jobs_queued=summary.jobs_queued,
        largest_changes=[CalibrationChangeOut.model_validate(c) for c in summary.changes],
        failures=[CalibrationFailureOut.model_validate(f) for f in summary.failures],
    )


@router.post(
    "/{assortment_id}/calibration",
    status_code=status.HTTP_202_ACCEPTED,
    response_model=CalibrationRunOut,
)
def start_calibration(
    assortment_id: AssortmentId,
    session: SessionDep,
    caller: Writer,
    response: Response,
    body: CalibrationRunIn | None = None,
) -> CalibrationRunOut:
    """Estimate every item from its history and make the estimates each changed item's next
    version (its solves queued), as one run of jobs that the workers share; follow it at the
    Location given."""
    assortment = find_or_404(session, caller.tenant_id, assortment_id)
    request = body or CalibrationRunIn()
    try:
        jobs = assortment_history.start_calibration(
            session,
            assortment,
            CalibrationOverrides(request.window_days, request.half_life_days, request.confidence),
            request.items_per_chunk,
        )
    except NoItemsError as exc:
        raise Conflict(str(exc)) from exc
    summary = assortment_history.run_summary(session, assortment, jobs[0])
    assert summary is not None
    response.headers["Location"] = f"/v1/assortments/{assortment.id}/calibration/{jobs[0]}"
    return _run_out(summary)


@router.get("/{assortment_id}/calibration/{run}", response_model=CalibrationRunOut)
def get_calibration_run(
    assortment_id: AssortmentId, run: RunId, session: SessionDep, caller: Reader
) -> CalibrationRunOut:
    """Progress (chunks by state) and, over the finished chunks, what changed."""
    assortment = find_or_404(session, caller.tenant_id, assortment_id)
    summary = assortment_history.run_summary(session, assortment, run)
    if summary is None:
        raise NotFound(f"no calibration run {run} of assortment {assortment.id}")
    return _run_out(summary)
