"""Domain errors and their RFC 9457 problem details (`application/problem+json`).

Code raises the exceptions below (or solver errors); this module alone turns them, and request
validation errors, into responses. Every problem carries a stable `type`, a human `detail`, the
request path as `instance` and the request id; validation problems list one JSON pointer per
offending field in `errors`.
"""

from __future__ import annotations

import logging
import uuid
from collections.abc import Sequence
from typing import Any

from fastapi import FastAPI, Request
from fastapi.encoders import jsonable_encoder
from fastapi.exceptions import RequestValidationError
from fastapi.responses import JSONResponse
from sqlalchemy.exc import OperationalError
from starlette.exceptions import HTTPException as StarletteHTTPException

from service.analysis import AnalysisInputError
from service.logs import REQUEST_ID
from service.policies import (
    PolicyNotReadyError,
    PolicyNotSolvedError,
    StockProblemsError,
    UnknownNetworkError,
)
from solver import InvalidStockError, ModelTooLargeError, NotUnichainError

__all__ = [
    "PROBLEM_RESPONSES",
    "ApiProblem",
    "Conflict",
    "Forbidden",
    "InvalidInput",
    "NotFound",
    "PreconditionFailed",
    "PreconditionRequired",
    "RateLimited",
    "RequestId",
    "Unauthorized",
    "UnsupportedMedia",
    "install_problem_handlers",
    "problem_body",
]

log = logging.getLogger(__name__)

PROBLEM_JSON = "application/problem+json"
TYPE_BASE = "https://stockrelay.dev/problems/"
REQUEST_ID_HEADER = "X-Request-ID"
RETRY_AFTER_SECONDS = 5


class ApiProblem(Exception):
    """An error the client can act on."""

    status = 400
    slug = "bad-request"
    title = "Bad request"
    headers: dict[str, str] | None = None

    def __init__(self, detail: str, **extensions: Any) -> None:
        super().__init__(detail)
        self.detail = detail
        self.extensions = extensions


class Unauthorized(ApiProblem):
    status, slug, title = 401, "unauthorized", "Unauthorized"

    def __init__(self, detail: str) -> None:
        super().__init__(detail)
        self.headers = {"WWW-Authenticate": 'Bearer realm="stockrelay"'}


class Forbidden(ApiProblem):
    status, slug, title = 403, "forbidden", "Forbidden"


class RateLimited(ApiProblem):
    status, slug, title = 429, "rate-limited", "Too many requests"

    def __init__(self, detail: str, *, retry_after: str) -> None:
        super().__init__(detail)
        self.headers = {"Retry-After": retry_after}


class NotFound(ApiProblem):
    status, slug, title = 404, "not-found", "Not found"


class Conflict(ApiProblem):
    status, slug, title = 409, "conflict", "Conflict"


class UnsupportedMedia(ApiProblem):
    status, slug, title = 415, "unsupported-media-type", "Unsupported media type"


class PreconditionFailed(ApiProblem):
    status, slug, title = 412, "version-mismatch", "Version mismatch"


class PreconditionRequired(ApiProblem):
    status, slug, title = 428, "if-match-required", "If-Match required"


class InvalidInput(ApiProblem):
    """422 with one pointer per problem: errors = [{"pointer": "/stock/hilltop", "detail": ...}]."""

    status, slug, title = 422, "invalid-input", "Invalid input"

    def __init__(self, detail: str, errors: Sequence[tuple[str, str]]) -> None:
        super().__init__(
            detail, errors=[{"pointer": pointer, "detail": text} for pointer, text in errors]
        )


def problem_body(
    request: Request | None, status: int, slug: str, title: str, detail: str, **extensions: Any
) -> dict[str, Any]:
    body: dict[str, Any] = {
        "type": TYPE_BASE + slug,
        "title": title,
        "status": status,
        "detail": detail,
    }
    if request is not None:
        body["instance"] = request.url.path
        body["request_id"] = getattr(request.state, "request_id", None)
    body.update(extensions)
    return body


def _respond(
    request: Request,
    status: int,
    slug: str,
    title: str,
    detail: str,
    headers: dict[str, str] | None = None,
    **extensions: Any,
) -> JSONResponse:
    return JSONResponse(
        jsonable_encoder(problem_body(request, status, slug, title, detail, **extensions)),
        status_code=status,
        media_type=PROBLEM_JSON,
        headers=headers,
    )


def problem_for(exc: Exception) -> tuple[int, str, str, str, dict[str, Any]] | None:
    """(status, slug, title, detail, extensions) for a domain error, None for anything else.
    Shared by the handlers and by batch requests, whose items fail one by one."""
    if isinstance(exc, ApiProblem):
        return exc.status, exc.slug, exc.title, exc.detail, exc.extensions
    if isinstance(exc, StockProblemsError):
        errors = [
            {"pointer": "/stock/" + _escape(location), "detail": what}
            for location, what in exc.problems
        ]
        return 422, "invalid-stock", "Invalid stock", str(exc), {"errors": errors}
    if isinstance(exc, InvalidStockError):
        return 422, "invalid-stock", "Invalid stock", str(exc), {}
    if isinstance(exc, AnalysisInputError):
        errors = [{"pointer": pointer, "detail": what} for pointer, what in exc.errors]
        return 422, InvalidInput.slug, InvalidInput.title, str(exc), {"errors": errors}
    if isinstance(exc, UnknownNetworkError):
        return 404, NotFound.slug, NotFound.title, str(exc), {}
    if isinstance(exc, PolicyNotSolvedError):
        # 409, never 503 + Retry-After: no job will produce this policy by waiting.
        return (
            409,
            "policy-not-solved",
            "Not solved for this criterion",
            str(exc),
            {"criteria": exc.criteria, "job_state": exc.job_state},
        )
    if isinstance(exc, PolicyNotReadyError):
        return 503, "policy-not-ready", "Policy not ready", str(exc), {"job_state": exc.job_state}
    if isinstance(exc, ModelTooLargeError):
        return (
            422,
            "network-too-large",
            "Network too large",
            str(exc),
            {
                "states": exc.states,
                "pairs": exc.pairs,
            },
        )
    if isinstance(exc, NotUnichainError):
        return 422, "not-unichain", "Average criterion undefined", str(exc), {}
    return None


DOMAIN_ERRORS: tuple[type[Exception], ...] = (
    ApiProblem,
    AnalysisInputError,
    InvalidStockError,
    PolicyNotReadyError,
    PolicyNotSolvedError,
    UnknownNetworkError,
    ModelTooLargeError,
    NotUnichainError,
)


def _escape(token: str) -> str:
    """A JSON pointer reference token (RFC 6901)."""
    return token.replace("~", "~0").replace("/", "~1")


def _body_parts(parts: list[int | str], document: Any, missing: bool) -> list[int | str]:
    """`parts` without the tags pydantic adds to `loc` for a discriminated union: a tag names
    the union member chosen (e.g. "pmf", or "weekly" before the days of a weekly value), not a
    member of the request body. Validation only descends into what the body holds, so any other
    part that is not there is a tag, except the last part of a `missing` error."""
    kept: list[int | str] = []
    node = document
    for position, part in enumerate(parts):
        in_dict = isinstance(node, dict) and part in node
        if in_dict or (isinstance(node, list) and isinstance(part, int) and 0 <= part < len(node)):
            node = node[part]
        elif missing and position == len(parts) - 1:
            node = None
        else:
            continue  # a union tag
        kept.append(part)
    return kept


def _pointer(loc: Sequence[int | str], body: Any = None, missing: bool = False) -> str:
    # FastAPI prefixes the part of the request: ("body", "stock", "hilltop").
    parts = list(loc[1:]) if loc and loc[0] in ("body", "query", "path", "header") else list(loc)
    where = loc[0] if loc and loc[0] in ("query", "path", "header") else None
    if where is None:
        parts = _body_parts(parts, body, missing)
    pointer = "".join("/" + _escape(str(p)) for p in parts)
    return f"{where}:{pointer}" if where else pointer


def install_problem_handlers(app: FastAPI) -> None:
    @app.exception_handler(RequestValidationError)
    async def validation(request: Request, exc: RequestValidationError) -> JSONResponse:
        errors = [
            {
                "pointer": _pointer(error.get("loc", ()), exc.body, error.get("type") == "missing"),
                "detail": error.get("msg", "invalid"),
            }
            for error in exc.errors()
        ]
        summary = "; ".join(f"{e['pointer']}: {e['detail']}" for e in errors)
        return _respond(
            request, 422, "invalid-input", "Invalid input", summary or "invalid", errors=errors
        )

    @app.exception_handler(StarletteHTTPException)
    async def http_error(request: Request, exc: StarletteHTTPException) -> JSONResponse:
        slug = {400: "malformed-body", 404: "not-found", 405: "method-not-allowed"}.get(
            exc.status_code, "http-error"
        )
        return _respond(
            request,
            exc.status_code,
            slug,
            str(exc.detail) if exc.status_code != 404 else "Not found",
            str(exc.detail),
            headers=getattr(exc, "headers", None),
        )

    @app.exception_handler(OperationalError)
    async def database_down(request: Request, exc: OperationalError) -> JSONResponse:
        log.error("request %s: database unavailable: %s", request.state.request_id, exc.orig)
        return _respond(
            request,
            503,
            "database-unavailable",
            "Database unavailable",
            "the database cannot be reached; try again shortly",
            headers={"Retry-After": str(RETRY_AFTER_SECONDS)},
        )

    async def domain(request: Request, exc: Exception) -> JSONResponse:
        known = problem_for(exc)
        assert known is not None
        status, slug, title, detail, extensions = known
        headers = {"Retry-After": str(RETRY_AFTER_SECONDS)} if status == 503 else None
        if isinstance(exc, ApiProblem) and exc.headers:
            headers = exc.headers
        return _respond(request, status, slug, title, detail, headers, **extensions)

    for domain_error in DOMAIN_ERRORS:
        app.add_exception_handler(domain_error, domain)

    @app.exception_handler(Exception)
    async def bug(request: Request, exc: Exception) -> JSONResponse:
        # Runs outside the middleware stack: the request id is in request.state, but the
        # response header must be set here.
        log.exception("request %s failed", getattr(request.state, "request_id", None))
        request_id = getattr(request.state, "request_id", "unknown")
        return _respond(
            request,
            500,
            "internal-error",
            "Internal error",
            f"an internal error occurred; quote request id {request_id}",
            headers={REQUEST_ID_HEADER: request_id},
        )


class RequestId:
    """Pure ASGI middleware: a request id from X-Request-ID (or a new one) in request.state, on
    the response, and in service.logs.REQUEST_ID for the log lines written while the request is
    handled. (Starlette's BaseHTTPMiddleware would cost a task per request.)"""

    def __init__(self, app: Any) -> None:
        self.app = app

    async def __call__(self, scope: Any, receive: Any, send: Any) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        incoming = ""
        for name, value in scope.get("headers", []):
            if name == b"x-request-id":
                incoming = value.decode("latin-1")[:100]
        request_id = incoming or uuid.uuid4().hex
        scope.setdefault("state", {})["request_id"] = request_id
        header = (b"x-request-id", request_id.encode("latin-1"))

        async def send_with_id(message: Any) -> None:
            if message["type"] == "http.response.start":
                headers = [h for h in message.get("headers", []) if h[0] != b"x-request-id"]
                message["headers"] = [*headers, header]
            await send(message)

        token = REQUEST_ID.set(request_id)
        try:
            await self.app(scope, receive, send_with_id)
        finally:
            REQUEST_ID.reset(token)


_PROBLEM_STATUSES = {
    400: "The request body is not readable JSON",
    401: "No valid API key",
    403: "The key lacks the scope",
    404: "No such network, location or job (for this key's tenant)",
    409: "Conflicts with the current state",
    412: "If-Match names an older version",
    413: "Request body too large",
    415: "Unsupported media type",
    422: "Invalid input; `errors` points at each offending field",
    428: "If-Match required",
    429: "Too many requests for this key; see Retry-After",
    503: "Policy not ready, or database unavailable; see Retry-After",
}

# Documented on every /v1 route: the problems it may answer with, as application/problem+json.
PROBLEM_RESPONSES: dict[int | str, dict[str, Any]] = {
    status: {
        "description": description,
        "content": {PROBLEM_JSON: {"schema": {"$ref": "#/components/schemas/Problem"}}},
    }
    for status, description in _PROBLEM_STATUSES.items()
}
