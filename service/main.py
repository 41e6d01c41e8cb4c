"""The FastAPI application."""

from __future__ import annotations

import logging
from collections.abc import AsyncIterator
from contextlib import asynccontextmanager
from typing import Any

from fastapi import FastAPI, Request, Response
from sqlalchemy.exc import OperationalError

from service.api import (
    analysis,
    assortment_closing,
    assortment_history,
    assortments,
    calibration,
    closing,
    health,
    jobs,
    networks,
    ops,
    pictures,
    policy_export,
    problem_types,
    recommendations,
)
from service.api.deps import KeyCache
from service.api.docs import UPLOAD_MODELS, add_component_schemas, document_problems, install_docs
from service.db.migrate import require_migrated
from service.db.session import make_engine, make_session_factory
from service.logs import configure_server_logging
from service.metrics import MeteredPolicyCache
from service.middleware import BodySizeLimit, Idempotency, RepeatAllowed
from service.problems import RequestId, install_problem_handlers
from service.ratelimit import RateLimiter
from service.serving import PolicyCache
from service.settings import Settings

__all__ = ["create_app"]

log = logging.getLogger(__name__)

DESCRIPTION = """\
stockrelay answers "what should we move tonight, and what is it worth?" for networks of retail
locations sharing a scarce item. Each network version is solved exactly (a Markov decision
process, Howard's policy iteration) by background workers; recommendations are read from the
cached optimal policy. Errors are RFC 9457 problem details (application/problem+json).

Every /v1 request needs `Authorization: Bearer <API key>` (`stockrelay keys create`). Read
scope answers GET and recommendations, and may start simulations and what-if comparisons (they
change no stored network or policy; since they cost solver time, a tenant has at most
`STOCKRELAY_ANALYSIS_MAX_LIVE_JOBS` (4) of them queued or running at once, 429 beyond); write
scope also creates and changes networks and closing counts. Operations that need more than
read scope list 403. POST and PUT accept an `Idempotency-Key`. Each problem's `type` is a path
of this service (`/problems/<slug>`) that describes it.
"""


def create_app(settings: Settings | None = None) -> FastAPI:
    """The API. The engine is built in the lifespan, which refuses a database that is not at the
    schema revision this code needs. A database that cannot be reached at start is not refused:
    requests answer 503 and /readyz fails until it returns."""
    settings = settings or Settings()
    # Requests solve what-if comparisons and simulations beside other processes. Here, not in
    # the lifespan: OpenBLAS takes its thread count only from the main thread.
    settings.limit_blas_threads()

    @asynccontextmanager
    async def lifespan(app: FastAPI) -> AsyncIterator[None]:
        configure_server_logging(settings)
        engine = make_engine(settings.database_url, pool_size=settings.database_pool_size)
        try:
            try:
                require_migrated(engine)
            except OperationalError as exc:
                log.warning("database unreachable at start (%s); /readyz will say so", exc.orig)
            app.state.engine = engine
            app.state.sessions = make_session_factory(engine)
            app.state.policy_cache = MeteredPolicyCache(settings.policy_cache_size)
            app.state.item_policy_cache = PolicyCache(settings.item_policy_cache_size)
            app.state.key_cache = KeyCache(settings.key_cache_seconds)
            app.state.rate_limiter = RateLimiter(
                settings.rate_limit_per_second, settings.rate_limit_burst
            )
            yield
        finally:
            engine.dispose()

    app = FastAPI(
        title="stockrelay",
        version="0.1.0",
        description=DESCRIPTION,
        lifespan=lifespan,
        docs_url=None,  # served by install_docs, from local files
        redoc_url=None,
    )
    app.state.settings = settings
    install_problem_handlers(app)
    install_docs(app)

    @app.exception_handler(RepeatAllowed)
    async def repeat_allowed(request: Request, exc: RepeatAllowed) -> Response:
        # Never sent: the Idempotency middleware answers with the kept response instead.
        return Response(status_code=204)

    for module in (
        networks,
        recommendations,
        closing,
        policy_export,
        pictures,
        calibration,
        analysis,
        assortments,
        assortment_closing,
        assortment_history,
        jobs,
        health,
        ops,
        problem_types,
    ):
        document_problems(module.router)
        app.include_router(module.router)
    generate_openapi = app.openapi

    def openapi() -> dict[str, Any]:
        # FastAPI's documented way to extend the document: generated once, then amended.
        if app.openapi_schema is None:
            add_component_schemas(generate_openapi(), UPLOAD_MODELS)
        return app.openapi_schema  # type: ignore[return-value]

    app.openapi = openapi  # type: ignore[method-assign]
    # Added last = outermost: request ids first (also handed to the log lines), then the body
    # limit, then idempotent replays.
    app.add_middleware(
        Idempotency, sessions=lambda: app.state.sessions, ttl_seconds=settings.idempotency_seconds
    )
    app.add_middleware(
        BodySizeLimit,
        max_bytes=settings.max_body_bytes,
        max_upload_bytes=settings.max_upload_bytes,
    )
    app.add_middleware(RequestId)
    return app
