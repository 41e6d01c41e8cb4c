"""The FastAPI application."""

from __future__ import annotations

from collections.abc import AsyncIterator
from contextlib import asynccontextmanager

from fastapi import FastAPI

from service.api import closing, health, jobs, networks, policies, recommendations
from service.db.migrate import require_migrated
from service.db.session import make_engine, make_session_factory
from service.policies import PolicyCache
from service.problems import install_problem_handlers
from service.settings import Settings

__all__ = ["create_app"]

DESCRIPTION = """\
stockrelay answers "what should we move tonight, and what is it worth?" for networks of retail
locations sharing a scarce item. Each network version is solved exactly (a Markov decision
process, Howard's policy iteration) by background workers; recommendations are read from the
cached optimal policy. Errors are RFC 9457 problem details (application/problem+json).
"""


def create_app(settings: Settings | None = None) -> FastAPI:
    """The API. The engine is built in the lifespan, which refuses a database that is not at the
    schema revision this code needs."""
    settings = settings or Settings()

    @asynccontextmanager
    async def lifespan(app: FastAPI) -> AsyncIterator[None]:
        engine = make_engine(settings.database_url)
        try:
            require_migrated(engine)
            app.state.engine = engine
            app.state.sessions = make_session_factory(engine)
            app.state.policy_cache = PolicyCache(settings.policy_cache_size)
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
    for module in (networks, recommendations, closing, policies, jobs, health):
        app.include_router(module.router)
    return app
