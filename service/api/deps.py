"""Dependencies shared by the routers: settings, one session per request, the policy cache,
and the caller's identity (API key, tenant, scope), rate-limited per key."""

from __future__ import annotations

import hashlib
import threading
import time
from collections.abc import Iterator
from typing import Annotated, Any

from fastapi import Depends, Path, Request
from sqlalchemy.orm import Session, sessionmaker
from starlette.concurrency import run_in_threadpool

from service import auth, networks
from service.auth import Identity, Scope
from service.middleware import repeat_allowed
from service.networks import Network
from service.problems import (
    Forbidden,
    NotFound,
    RateLimited,
    Unauthorized,
)
from service.ratelimit import RateLimiter
from service.serving import PolicyCache
from service.settings import Settings

__all__ = [
    "Admin",
    "CacheDep",
    "ItemCacheDep",
    "JobId",
    "NetworkId",
    "Reader",
    "Require",
    "SessionDep",
    "SettingsDep",
    "Writer",
    "get_network",
    "id_path",
    "media_type",
    "sessions_of",
]


# Reading app.state never blocks: async dependencies run on the event loop, where a plain `def`
# would cost a hand-off to the thread pool and back on every request.
async def get_settings(request: Request) -> Settings:
    settings: Settings = request.app.state.settings
    return settings


def sessions_of(request: Request) -> sessionmaker[Session]:
    factory: sessionmaker[Session] = request.app.state.sessions
    return factory


def get_session(request: Request) -> Iterator[Session]:
    with sessions_of(request).begin() as session:
        yield session


async def get_cache(request: Request) -> PolicyCache:
    cache: PolicyCache = request.app.state.policy_cache
    return cache


async def get_item_cache(request: Request) -> PolicyCache:
    cache: PolicyCache = request.app.state.item_policy_cache
    return cache


# Ids are 32-bit in the database; larger ones can only be absent (and must not overflow a driver).
MAX_ID = 2_147_483_647


def id_path(description: str) -> Any:
    """A path parameter holding a row's id, described as `description`."""
    return Path(ge=1, le=MAX_ID, description=description)


NetworkId = Annotated[int, id_path("A network's id.")]
JobId = Annotated[int, id_path("A solve job's id.")]

SettingsDep = Annotated[Settings, Depends(get_settings)]
# scope="function": the transaction commits before the response is sent, so a client that
# acts on a 201 at once finds what it created, and a failed commit is the client's answer too.
SessionDep = Annotated[Session, Depends(get_session, scope="function")]
CacheDep = Annotated[PolicyCache, Depends(get_cache)]
# Decoded policies of assortment items, keyed by (policy id, criterion).
ItemCacheDep = Annotated[PolicyCache, Depends(get_item_cache)]


class KeyCache:
    """Identities of recently seen keys, by SHA-256 of the key, for `seconds`: a revoked key
    stops working within that time. Keeps the key itself nowhere."""

    def __init__(self, seconds: float) -> None:
        self.seconds = seconds
        self._entries: dict[str, tuple[float, Identity]] = {}
        self._lock = threading.Lock()

    def get(self, digest: str) -> Identity | None:
        with self._lock:
            entry = self._entries.get(digest)
        if entry is None or entry[0] < time.monotonic():
            return None
        return entry[1]

    def put(self, digest: str, identity: Identity) -> None:
        with self._lock:
            if len(self._entries) > 10_000:
                self._entries.clear()
            self._entries[digest] = (time.monotonic() + self.seconds, identity)


def _lookup(request: Request, key: str) -> Identity | None:
    with sessions_of(request)() as session:
        return auth.authenticate(session, key)


async def get_identity(request: Request) -> Identity:
    """The caller, from `Authorization: Bearer KEY`; 401 without a valid key, 429 over the
    key's request rate."""
    header = request.headers.get("authorization", "")
    scheme, _, key = header.partition(" ")
    key = key.strip()
    if scheme.lower() != "bearer" or not key:
        raise Unauthorized("send Authorization: Bearer <API key>")
    keys: KeyCache = request.app.state.key_cache
    digest = hashlib.sha256(key.encode()).hexdigest()
    identity = keys.get(digest)
    if identity is None:
        identity = await run_in_threadpool(_lookup, request, key)
        if identity is None:
            raise Unauthorized("the API key is not valid (unknown, malformed or revoked)")
        keys.put(digest, identity)
    limiter: RateLimiter = request.app.state.rate_limiter
    wait = limiter.acquire(identity.key_prefix)
    if wait > 0:
        raise RateLimited(
            f"more than {limiter.rate:g} requests per second with key {identity.key_prefix}",
            retry_after=RateLimiter.retry_after(wait),
        )
    request.state.identity = identity
    return identity


class Require:
    """Dependency: the caller, with at least `scope`. Every /v1 route depends on one: a repeated
    Idempotency-Key gets its kept answer only after these checks pass (service.middleware), and
    the OpenAPI document lists 403 only where a key may lack the scope."""

    def __init__(self, scope: Scope) -> None:
        self.scope: Scope = scope

    async def __call__(
        self, request: Request, identity: Annotated[Identity, Depends(get_identity)]
    ) -> Identity:
        if not auth.scope_allows(identity.scope, self.scope):
            raise Forbidden(
                f"this needs a key with {self.scope} scope; key {identity.key_prefix} "
                f"has {identity.scope}"
            )
        repeat_allowed(request.scope)
        return identity


def require(scope: Scope) -> Require:
    return Require(scope)


Reader = Annotated[Identity, Depends(require("read"))]
Writer = Annotated[Identity, Depends(require("write"))]
Admin = Annotated[Identity, Depends(require("admin"))]


def media_type(request: Request) -> str:
    """The media type of the request's body, without parameters (JSON when not given)."""
    return request.headers.get("content-type", "application/json").split(";")[0].strip()


def get_network(
    session: Session, tenant_id: int, network_id: int, *, archived_ok: bool = False
) -> Network:
    """The tenant's network, or 404 (another tenant's network looks exactly like a missing one)."""
    network = networks.tenant_network(session, tenant_id, network_id)
    if network is None:
        raise NotFound(f"no network {network_id}")
    if network.archived and not archived_ok:
        raise NotFound(
            f"network {network_id} is archived: it is kept (GET /v1/networks/{network_id}) but "
            "serves and accepts nothing more"
        )
    return network
