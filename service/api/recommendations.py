"""Recommendations: one network's closing stock, or a batch of them."""

from __future__ import annotations

import logging
from typing import Any

from fastapi import APIRouter, Request
from pydantic import ValidationError

from service.api.deps import CacheDep, SessionDep, TenantDep, get_network
from service.api.views import recommendation_out
from service.policies import recommend
from service.problems import problem_body, problem_for
from service.schemas import (
    BatchItem,
    BatchOutcome,
    BatchRequest,
    BatchResponse,
    Problem,
    RecommendationOut,
    RecommendationRequest,
)

router = APIRouter(tags=["recommendations"])
log = logging.getLogger(__name__)


@router.post("/v1/networks/{network_id}/recommendation", response_model=RecommendationOut)
def recommend_transfers(
    network_id: int,
    body: RecommendationRequest,
    session: SessionDep,
    cache: CacheDep,
    tenant_id: TenantDep,
) -> RecommendationOut:
    """Tonight's transfers from this closing stock, and what they are worth."""
    network = get_network(session, tenant_id, network_id)
    served, recommendation = recommend(session, cache, network, body.stock, body.criterion)
    return recommendation_out(network_id, body.criterion, served, recommendation)


@router.post("/v1/recommendations/batch", response_model=BatchResponse)
def recommend_batch(
    body: BatchRequest,
    request: Request,
    session: SessionDep,
    cache: CacheDep,
    tenant_id: TenantDep,
) -> BatchResponse:
    """Up to 1,000 recommendations, answered in order: one result or one problem per item, so a
    bad item never fails the others."""
    return BatchResponse(
        items=[
            _one(index, raw, request, session, cache, tenant_id)
            for index, raw in enumerate(body.items)
        ]
    )


def _one(
    index: int,
    raw: Any,
    request: Request,
    session: SessionDep,
    cache: CacheDep,
    tenant_id: int,
) -> BatchOutcome:
    try:
        item = BatchItem.model_validate(raw)
    except ValidationError as exc:
        errors = [
            {
                "pointer": f"/items/{index}" + "".join(f"/{part}" for part in error["loc"]),
                "detail": error["msg"],
            }
            for error in exc.errors(include_url=False)
        ]
        detail = "; ".join(f"{e['pointer']}: {e['detail']}" for e in errors)
        body = problem_body(request, 422, "invalid-input", "Invalid input", detail, errors=errors)
        return BatchOutcome(problem=Problem.model_validate(body))
    try:
        network = get_network(session, tenant_id, item.network_id)
        served, recommendation = recommend(session, cache, network, item.stock, item.criterion)
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
    return BatchOutcome(
        result=recommendation_out(item.network_id, item.criterion, served, recommendation)
    )
