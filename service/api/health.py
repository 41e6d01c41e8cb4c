"""Liveness and readiness."""

from __future__ import annotations

from fastapi import APIRouter, Request
from fastapi.responses import JSONResponse
from sqlalchemy import Engine

from service.problems import PROBLEM_JSON, problem_body
from service.readiness import not_ready_reason

router = APIRouter(tags=["health"])

# Carries Settings.run_token: how `stockrelay run` tells its own API from another server.
RUN_HEADER = "Stockrelay-Run"


@router.get("/healthz")
def healthz() -> dict[str, str]:
    """The process is alive."""
    return {"status": "ok"}


@router.get("/readyz", responses={503: {"description": "Database unreachable or not migrated"}})
def readyz(request: Request) -> JSONResponse:
    """The database answers and is at the schema revision this code needs."""
    engine: Engine = request.app.state.engine
    token = request.app.state.settings.run_token
    ours = {RUN_HEADER: token} if token else {}
    detail = not_ready_reason(engine)
    if detail is not None:
        body = problem_body(request, 503, "not-ready", "Not ready", detail)
        headers = {"Retry-After": "5", **ours}
        return JSONResponse(body, 503, media_type=PROBLEM_JSON, headers=headers)
    return JSONResponse({"status": "ready"}, headers=ours)
