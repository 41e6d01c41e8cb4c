"""For operators: Prometheus metrics and a status page for people.

GET /metrics needs no key, as is usual for a scrape target: it shows counts, times and network
ids, never a tenant's name, network names or data. GET /status is a tenant's own view and takes
the key in a form a browser can send (HTTP Basic)."""

from __future__ import annotations

import base64
import binascii
from typing import Annotated

from fastapi import APIRouter, Depends, Query, Request
from fastapi.responses import HTMLResponse, Response
from prometheus_client.exposition import CONTENT_TYPE_PLAIN_0_0_4
from starlette.datastructures import Headers

from service import auth
from service.api.deps import MAX_ID, CacheDep, SessionDep, get_identity, sessions_of
from service.auth import Identity
from service.errors import UnknownNetworkChoice
from service.metrics import render_metrics
from service.problems import PROBLEM_RESPONSES, Forbidden, NotFound, Unauthorized
from service.status_page import gather, render

__all__ = ["router"]

router = APIRouter(tags=["operations"])

# No script, no outside resource, not framed: only the page's own inline styles and SVG.
_PAGE_HEADERS = {
    "Content-Security-Policy": "default-src 'none'; style-src 'unsafe-inline'; "
    "img-src data:; frame-ancestors 'none'; form-action 'none'; base-uri 'none'",
    "X-Content-Type-Options": "nosniff",
    "Referrer-Policy": "no-referrer",
    # A tenant's page: never kept by a shared cache, nor by the browser after the session.
    "Cache-Control": "no-store",
}


class SignInRequired(Unauthorized):
    """401 with a Basic challenge, so that a browser asks for the key."""

    def __init__(self, detail: str) -> None:
        super().__init__(detail)
        self.headers = {"WWW-Authenticate": 'Basic realm="stockrelay", charset="UTF-8"'}


def presented_key(authorization: str) -> str | None:
    """The API key in an Authorization header: `Bearer KEY`, or HTTP Basic with the key as the
    password (any user name). None when there is none."""
    scheme, _, credentials = authorization.partition(" ")
    credentials = credentials.strip()
    if scheme.lower() == "bearer":
        return credentials or None
    if scheme.lower() != "basic":
        return None
    try:
        decoded = base64.b64decode(credentials, validate=True).decode("utf-8")
    except (binascii.Error, UnicodeDecodeError):
        return None
    _user, colon, password = decoded.partition(":")
    if not colon or not password:
        return None
    return password


async def page_reader(request: Request) -> Identity:
    """The caller of a page, with read scope; 401 with a Basic challenge otherwise.

    The key is checked exactly as for the API (key cache, revocation, rate limit) by handing it
    on as a bearer token."""
    key = presented_key(request.headers.get("authorization", ""))
    if key is None:
        raise SignInRequired(
            "sign in with an API key as the password (any user name), or send "
            "Authorization: Bearer <API key>"
        )
    headers = Headers(scope=request.scope).mutablecopy()
    headers["authorization"] = f"Bearer {key}"
    # The same scope otherwise: request.state (request id, identity) is shared with `request`.
    as_bearer = Request({**request.scope, "headers": headers.raw}, request.receive)
    try:
        identity = await get_identity(as_bearer)
    except Unauthorized as exc:
        raise SignInRequired(exc.detail) from exc
    if not auth.scope_allows(identity.scope, "read"):
        raise Forbidden(f"key {identity.key_prefix} has no read scope")
    return identity


PageReader = Annotated[Identity, Depends(page_reader)]


@router.get(
    "/metrics",
    response_class=Response,
    responses={
        200: {
            "description": "Prometheus text format 0.0.4.",
            "content": {CONTENT_TYPE_PLAIN_0_0_4: {"schema": {"type": "string"}}},
        }
    },
)
def metrics(request: Request) -> Response:
    """Prometheus metrics; no key needed, as usual for scrape targets (nothing of a tenant's
    beyond network ids: see service/metrics.py for every metric). Solve, job, queue and policy
    metrics are read from the database at each scrape and are the same from every API process;
    recommendation latency and policy cache lookups are this API process's own (summed over the
    processes of the server when PROMETHEUS_MULTIPROC_DIR is set)."""
    body = render_metrics(lambda: sessions_of(request))
    return Response(content=body, media_type=CONTENT_TYPE_PLAIN_0_0_4)


@router.get(
    "/status",
    response_class=HTMLResponse,
    responses={
        200: {"description": "An HTML page.", "content": {"text/html": {}}},
        **{status: PROBLEM_RESPONSES[status] for status in (401, 403, 404, 422, 429, 503)},
    },
)
def status_page(
    session: SessionDep,
    cache: CacheDep,
    caller: PageReader,
    network: Annotated[
        int | None,
        Query(
            ge=1, le=MAX_ID, description="The network whose policy is pictured; default: the first."
        ),
    ] = None,
) -> HTMLResponse:
    """The caller's networks (current version, solve state per criterion), the queue, the
    latest jobs and a heatmap of one network's policy, as an HTML page for people. A browser
    signs in with HTTP Basic: any user name, the API key as the password (or send
    Authorization: Bearer <API key>); read scope suffices."""
    try:
        view = gather(session, cache, caller.tenant_id, caller.tenant, network)
    except UnknownNetworkChoice as exc:
        raise NotFound(str(exc)) from exc
    return HTMLResponse(render(view), headers=_PAGE_HEADERS)
