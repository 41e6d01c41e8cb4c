"""The FastAPI application."""

from __future__ import annotations

import logging
from collections.abc import AsyncIterator
from contextlib import asynccontextmanager

from fastapi import FastAPI
from sqlalchemy.exc import OperationalError

from service.api import (
    analysis,
    calibration,
    closing,
    health,
    jobs,
    networks,
    ops,
    pictures,
    policies,
    recommendations,
)
from service.api.deps import KeyCache
from service.db.migrate import require_migrated
from service.db.session import make_engine, make_session_factory
from service.logs import configure_server_logging
from service.metrics import MeteredPolicyCache
from service.middleware import BodySizeLimit, Idempotency
from service.problems import RequestId, install_problem_handlers
from service.ratelimit import RateLimiter
from service.settings import Settings

__all__ = ["create_app"]

log = logging.getLogger(__name__)

DESCRIPTION = """\
stockrelay answers "what should we move tonight, and what is it worth?" for networks of retail
locations sharing a scarce item. Each network version is solved exactly (a Markov decision
process, Howard's policy iteration) by background workers; recommendations are read from the
cached optimal policy. Errors are RFC 9457 problem details (application/problem+json).

Every /v1 request needs `Authorization: Bearer <API key>` (`stockrelay keys create`); read
scope for GET, write scope for POST, PUT and DELETE. POST and PUT accept an `Idempotency-Key`.
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
    )
    app.state.settings = settings
    install_problem_handlers(app)
    for module in (
        networks,
        recommendations,
        closing,
        policies,
        pictures,
        calibration,
        analysis,
        jobs,
        health,
        ops,
    ):
        app.include_router(module.router)
    # Added last = outermost: request ids first (also handed to the log lines), then the body
    # limit, then idempotent replays.
    app.add_middleware(
        Idempotency, sessions=lambda: app.state.sessions, ttl_seconds=settings.idempotency_seconds
    )
    app.add_middleware(BodySizeLimit, max_bytes=settings.max_body_bytes)
    app.add_middleware(RequestId)
    return app
