"""Recommendations: one network's closing stock, or a batch of them.

These are the hot paths: each runs all of its database work in one hop to the thread pool, and
logs one audit line per recommendation served (request id, tenant, network, version, latency;
never the key)."""

from __future__ import annotations

import json
import logging
import time
from datetime import date
from typing import Any

from fastapi import APIRouter, Request
from pydantic import ValidationError
from sqlalchemy.orm import Session
from starlette.concurrency import run_in_threadpool

from service.api.deps import CacheDep, NetworkId, Reader, sessions_of
from service.api.schemas.problem_types import Problem
from service.api.schemas.recommendations import (
    BatchItem,
    BatchOutcome,
    BatchRequest,
    BatchResponse,
    RecommendationOut,
    RecommendationRequest,
)
from service.api.views import recommendation_out
from service.auth import Identity
from service.json_pointer import json_pointer
from service.metrics import observe_recommendation
from service.notes import notes_for
from service.problems import POLICY_NOT_READY, problem_body, problem_for
from service.serving import NetworkRef, PolicyCache, recommend

router = APIRouter(tags=["recommendations"])
log = logging.getLogger(__name__)
audit = logging.getLogger("stockrelay.audit")


def _audit(request: Request, caller: Identity, out: RecommendationOut, started: float) -> None:
    audit.info(
        json.dumps(
            {
                "event": "recommendation",
                "request_id": request.state.request_id,
                "tenant": caller.tenant,
                "network_id": out.network_id,
                "version": out.version,
                "criterion": out.criterion,
                "stale": out.stale,
                "latency_ms": round(1000 * (time.perf_counter() - started), 3),
            }
        )
    )


def _recommend_one(
    session: Session,
    cache: PolicyCache,
    tenant_id: int,
    network_id: NetworkId,
    stock: dict[str, int],
    criterion: str | None,
    business_date: date | None,
) -> RecommendationOut:
    served, recommendation, night_of = recommend(
        session,
        cache,
        NetworkRef(network_id, tenant_id),
        stock,
        criterion,
        business_date=business_date,
    )
    notes = notes_for(session, network_id, served, recommendation, night_of)
    return recommendation_out(network_id, served, recommendation, night_of, notes=notes)


@router.post(
    "/v1/networks/{network_id}/recommendation",
    response_model=RecommendationOut,
    responses=POLICY_NOT_READY,
)
async def recommend_transfers(
    network_id: NetworkId,
    body: RecommendationRequest,
    request: Request,
    cache: CacheDep,
    caller: Reader,
) -> RecommendationOut:
    """Tonight's transfers from this closing stock, and what they are worth."""
    started = time.perf_counter()

    def work() -> RecommendationOut:
        with sessions_of(request).begin() as session:
            return _recommend_one(
                session,
                cache,
                caller.tenant_id,
                network_id,
                body.stock,
                body.criterion,
                body.business_date,
            )

    out = await run_in_threadpool(work)
    _audit(request, caller, out, started)
    observe_recommendation("single", started)
    return out


@router.post("/v1/recommendations/batch", response_model=BatchResponse)
async def recommend_batch(
    body: BatchRequest, request: Request, cache: CacheDep, caller: Reader
) -> BatchResponse:
    """Up to 1,000 recommendations, answered in order: one result or one problem per item, so a
    bad item never fails the others."""
    started = time.perf_counter()

    def work() -> BatchResponse:
        with sessions_of(request).begin() as session:
            return BatchResponse(
                items=[
                    _one(index, raw, request, session, cache, caller.tenant_id)
                    for index, raw in enumerate(body.items)
                ]
            )

    response = await run_in_threadpool(work)
    for outcome in response.items:
        if outcome.result is not None:
            _audit(request, caller, outcome.result, started)
    observe_recommendation("batch", started)
    return response


def _one(
    index: int,
    raw: Any,
    request: Request,
    session: Session,
    cache: PolicyCache,
    tenant_id: int,
) -> BatchOutcome:
    try:
        item = BatchItem.model_validate(raw)
    except ValidationError as exc:
        errors = [
            {
                "pointer": json_pointer("items", index, *error["loc"]),
                "detail": error["msg"],
            }
            for error in exc.errors(include_url=False)
        ]
        detail = "; ".join(f"{e['pointer']}: {e['detail']}" for e in errors)
        body = problem_body(request, 422, "invalid-input", "Invalid input", detail, errors=errors)
        return BatchOutcome(problem=Problem.model_validate(body))
    try:
        with session.begin_nested():
            out = _recommend_one(
                session,
                cache,
                tenant_id,
                item.network_id,
                item.stock,
                item.criterion,
                item.business_date,
            )
    except Exception as exc:
        known = problem_for(exc)
        if known is None:
            log.exception("request %s: batch item %d failed", request.state.request_id, index)
            known = (500, "internal-error", "Internal error", "this item failed", {})
        status, slug, title, detail, extensions = known
        if "errors" in extensions:
            # Pointers into this item of the batch, not into a single request's body.
            extensions = {
                **extensions,
                "errors": [
                    {**error, "pointer": f"/items/{index}{error['pointer']}"}
                    for error in extensions["errors"]
                ],
            }
        body = problem_body(request, status, slug, title, detail, item=index, **extensions)
        return BatchOutcome(problem=Problem.model_validate(body))
    return BatchOutcome(result=out)
