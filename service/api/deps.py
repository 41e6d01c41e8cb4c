"""Dependencies shared by the routers: settings, one session per request, the policy cache,
and the tenant of the request."""

from __future__ import annotations

from collections.abc import Iterator
from typing import Annotated

from fastapi import Depends, Request
from sqlalchemy.orm import Session, sessionmaker

from service.db import repository
from service.db.tables import Network
from service.policies import PolicyCache
from service.problems import NotFound
from service.settings import Settings

__all__ = ["CacheDep", "SessionDep", "SettingsDep", "TenantDep", "get_network"]

DEFAULT_TENANT = "default"


# Reading app.state never blocks: async dependencies run on the event loop, where a plain `def`
# would cost a hand-off to the thread pool and back on every request.
async def get_settings(request: Request) -> Settings:
    settings: Settings = request.app.state.settings
    return settings


def get_session(request: Request) -> Iterator[Session]:
    factory: sessionmaker[Session] = request.app.state.sessions
    with factory.begin() as session:
        yield session


async def get_cache(request: Request) -> PolicyCache:
    cache: PolicyCache = request.app.state.policy_cache
    return cache


SettingsDep = Annotated[Settings, Depends(get_settings)]
SessionDep = Annotated[Session, Depends(get_session)]
CacheDep = Annotated[PolicyCache, Depends(get_cache)]


def get_tenant(session: SessionDep) -> int:
    """The tenant whose networks the request may see. One tenant until API keys arrive."""
    return repository.get_or_create_tenant(session, DEFAULT_TENANT).id


TenantDep = Annotated[int, Depends(get_tenant)]


def get_network(
    session: Session, tenant_id: int, network_id: int, *, archived_ok: bool = False
) -> Network:
    """The tenant's network, or 404 (another tenant's network looks exactly like a missing one)."""
    network = session.get(Network, network_id)
    if network is None or network.tenant_id != tenant_id or (network.archived and not archived_ok):
        raise NotFound(f"no network {network_id}")
    return network
