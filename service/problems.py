"""Domain errors and their RFC 9457 problem details (`application/problem+json`).

Code raises the exceptions below (or solver errors); this module alone turns them, and request
validation errors, into responses. Every problem carries a stable `type`, a human `detail`, the
request path as `instance` and the request id; validation problems list one JSON pointer per
offending field in `errors`.

A problem's `type` is a relative URI, `/problems/<slug>`, that this service answers itself
(GET, no key): the title and a short description of that kind of problem (PROBLEM_TYPES).
"""

from __future__ import annotations

import logging
import uuid
from collections.abc import Callable, Sequence
from typing import Any

from fastapi import FastAPI, Request
from fastapi.encoders import jsonable_encoder
from fastapi.exceptions import RequestValidationError
from fastapi.responses import JSONResponse
from sqlalchemy.exc import OperationalError
from starlette.exceptions import HTTPException as StarletteHTTPException

from service.errors import (
    AnalysisCapError,
    AnalysisInputError,
    AssortmentExistsError,
    ClosingConflictError,
    ClosingCountsError,
    ClosingInputError,
    ConcurrentUploadError,
    HistoryInputError,
    InputError,
    ItemUploadError,
    NetworkNameTakenError,
    NothingToApplyError,
    PickListIssuedError,
    PickListNotReadyError,
    PlaneError,
    PolicyNotReadyError,
    PolicyNotSolvedError,
    SettingsConflictError,
    StockProblemsError,
    UnknownJobError,
    UnknownLocationError,
    UnknownNetworkError,
)
from service.json_pointer import json_pointer
from service.logs import REQUEST_ID
from solver import InvalidStockError, ModelTooLargeError, NotUnichainError

__all__ = [
    "POLICY_NOT_READY",
    "PROBLEM_RESPONSES",
    "PROBLEM_TYPES",
    "TYPE_BASE",
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
TYPE_BASE = "/problems/"
REQUEST_ID_HEADER = "X-Request-ID"
RETRY_AFTER_SECONDS = 5


# slug -> (title, what it means and what to do). Every problem this service answers with has an
# entry; GET /problems/<slug> serves it.
PROBLEM_TYPES: dict[str, tuple[str, str]] = {
    "bad-request": ("Bad request", "The request cannot be handled as sent; `detail` says why."),
    "malformed-body": (
        "Malformed body",
        "The request body is not readable JSON. Send a JSON document with "
        "Content-Type: application/json.",
    ),
    "unauthorized": (
        "Unauthorized",
        "No valid API key: send `Authorization: Bearer <key>` with a key from "
        "`stockrelay keys create` that has not been revoked.",
    ),
    "forbidden": (
        "Forbidden",
        "The key is valid but its scope is too low for this request (read < write < admin).",
    ),
    "rate-limited": (
        "Too many requests",
        "This key sent more requests per second than allowed; wait for Retry-After seconds.",
    ),
    "not-found": (
        "Not found",
        "No such network, location, job or path for this key's tenant (another tenant's "
        "objects look exactly like missing ones).",
    ),
    "method-not-allowed": ("Method not allowed", "The path exists but not with this method."),
    "conflict": (
        "Conflict",
        "The request contradicts the current state (e.g. a name already taken); `detail` says "
        "which and what to do instead.",
    ),
    "version-mismatch": (
        "Version mismatch",
        "If-Match names an older version of the network: read the current version and decide "
        "again.",
    ),
    "if-match-required": (
        "If-Match required",
        'Changing a network needs If-Match with its current version number, e.g. If-Match: "3".',
    ),
    "unsupported-media-type": (
        "Unsupported media type",
        "The body's Content-Type is not one this route reads; `detail` lists those it does.",
    ),
    "body-too-large": (
        "Request body too large",
        "The body exceeds the service's limit (`limit`, in bytes); split the upload.",
    ),
    "invalid-input": (
        "Invalid input",
        "A field of the request is invalid; `errors` holds one JSON pointer (RFC 6901) and a "
        "reason per offending field.",
    ),
    "invalid-stock": (
        "Invalid stock",
        "A closing stock is missing, unknown or outside 0..capacity of its location; `errors` "
        "points at each one.",
    ),
    "network-too-large": (
        "Network too large",
        "The network has more stock states or state-move pairs than the solver accepts here "
        "(`states`, `pairs`); lower capacities or lane limits.",
    ),
    "not-unichain": (
        "Average criterion undefined",
        "Some stock levels never reach each other, so one long-run average profit does not "
        "exist; use the discounted criterion or change the network.",
    ),
    "invalid-idempotency-key": (
        "Invalid Idempotency-Key",
        "An Idempotency-Key must be 1 to 200 characters.",
    ),
    "idempotency-key-reused": (
        "Idempotency-Key reused",
        "This Idempotency-Key was sent before with another body; use a new key for a new request.",
    ),
    "request-in-progress": (
        "Request in progress",
        "The first request with this Idempotency-Key is still running; retry after Retry-After.",
    ),
    "policy-not-ready": (
        "Policy not ready",
        "The network's policy is still being solved (`job_state`); retry after Retry-After.",
    ),
    "policy-not-solved": (
        "Not solved for this criterion",
        "No solve of the network's current version is queued or running for this criterion, "
        "so waiting will not help: ask for one of the criteria in use (`criteria`), or add "
        "the criterion with a PUT of the network.",
    ),
    "database-unavailable": (
        "Database unavailable",
        "The database cannot be reached; nothing was changed. Retry after Retry-After.",
    ),
    "not-ready": (
        "Not ready",
        "The service cannot serve yet: its database is unreachable or not migrated.",
    ),
    "http-error": ("HTTP error", "An HTTP-level refusal; `status` and `detail` say which."),
    "internal-error": (
        "Internal error",
        "A fault of the service, not of the request; quote the request id when reporting it.",
    ),
}


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


def _pointed(errors: Sequence[tuple[str, str]]) -> dict[str, Any]:
    return {"errors": [{"pointer": pointer, "detail": what} for pointer, what in errors]}


def _stock_problems(exc: Exception) -> dict[str, Any]:
    assert isinstance(exc, StockProblemsError)
    return _pointed([(json_pointer("stock", location), what) for location, what in exc.problems])


def _input_errors(exc: Exception) -> dict[str, Any]:
    assert isinstance(exc, InputError)
    return _pointed(exc.errors)


def _query_errors(exc: Exception) -> dict[str, Any]:
    # Pointers in the form the validation handler uses for query parameters ("query:/x").
    assert isinstance(exc, PlaneError)
    return _pointed([(f"query:/{parameter}", what) for parameter, what in exc.errors])


def _not_solved(exc: Exception) -> dict[str, Any]:
    assert isinstance(exc, PolicyNotSolvedError)
    return {"criteria": exc.criteria, "job_state": exc.job_state}


def _not_ready(exc: Exception) -> dict[str, Any]:
    assert isinstance(exc, PolicyNotReadyError)
    return {"job_state": exc.job_state}


def _too_large(exc: Exception) -> dict[str, Any]:
    assert isinstance(exc, ModelTooLargeError)
    return {"states": exc.states, "pairs": exc.pairs}


def _missing(exc: Exception) -> dict[str, Any]:
    assert isinstance(exc, ClosingConflictError)
    return {} if exc.missing is None else {"missing": exc.missing}


def _history_days(exc: Exception) -> dict[str, Any]:
    assert isinstance(exc, SettingsConflictError)
    return {"days": [{"location": location, "date": day.isoformat()} for location, day in exc.days]}


def _nothing(exc: Exception) -> dict[str, Any]:
    return {}


def _missing_locations(exc: Exception) -> dict[str, Any]:
    assert isinstance(exc, PickListNotReadyError)
    return {"missing_locations": exc.missing}


# Domain error (service.errors, solver.errors) -> (status, problem type slug, the extensions
# of its body). The most specific class of an error's MRO that is listed decides, so a
# PolicyNotSolvedError is not read as the PolicyNotReadyError it also is. Titles are those of
# PROBLEM_TYPES.
PROBLEM_OF: dict[type[Exception], tuple[int, str, Callable[[Exception], dict[str, Any]]]] = {
    StockProblemsError: (422, "invalid-stock", _stock_problems),
    InvalidStockError: (422, "invalid-stock", _nothing),
    AnalysisInputError: (422, "invalid-input", _input_errors),
    PlaneError: (422, "invalid-input", _query_errors),
    UnknownNetworkError: (404, "not-found", _nothing),
    NetworkNameTakenError: (409, "conflict", _nothing),
    NothingToApplyError: (409, "conflict", _nothing),
    ConcurrentUploadError: (409, "conflict", _nothing),
    SettingsConflictError: (409, "conflict", _history_days),
    HistoryInputError: (422, "invalid-input", _input_errors),
    ClosingInputError: (422, "invalid-input", _input_errors),
    UnknownLocationError: (404, "not-found", _nothing),
    ClosingConflictError: (409, "conflict", _missing),
    UnknownJobError: (404, "not-found", _nothing),
    AnalysisCapError: (429, "rate-limited", _nothing),
    ItemUploadError: (422, "invalid-input", _input_errors),
    ClosingCountsError: (422, "invalid-input", _input_errors),
    AssortmentExistsError: (409, "conflict", _nothing),
    PickListIssuedError: (409, "conflict", _nothing),
    PickListNotReadyError: (409, "conflict", _missing_locations),
    # 409, never 503 + Retry-After: no job will produce this policy by waiting.
    PolicyNotSolvedError: (409, "policy-not-solved", _not_solved),
    PolicyNotReadyError: (503, "policy-not-ready", _not_ready),
    ModelTooLargeError: (422, "network-too-large", _too_large),
    NotUnichainError: (422, "not-unichain", _nothing),
}


def problem_for(exc: Exception) -> tuple[int, str, str, str, dict[str, Any]] | None:
    """(status, slug, title, detail, extensions) for a domain error, None for anything else.
    Shared by the handlers and by batch requests, whose items fail one by one."""
    if isinstance(exc, ApiProblem):
        return exc.status, exc.slug, exc.title, exc.detail, exc.extensions
    for kind in type(exc).__mro__:
        if kind in PROBLEM_OF:
            status, slug, extensions = PROBLEM_OF[kind]
            return status, slug, PROBLEM_TYPES[slug][0], str(exc), extensions(exc)
    return None


DOMAIN_ERRORS: tuple[type[Exception], ...] = (ApiProblem, *PROBLEM_OF)


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
    pointer = json_pointer(*parts)
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
        if isinstance(exc, AnalysisCapError):
            headers = {"Retry-After": exc.retry_after}
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
    400: "The request body cannot be read",
    401: "No valid API key",
    403: "The key lacks the scope",
    404: "No such network, location or job (for this key's tenant)",
    409: "Conflicts with the current state, or a request with this Idempotency-Key is running",
    412: "If-Match names an older version",
    413: "Request body too large",
    415: "Unsupported media type",
    422: "Invalid input; `errors` points at each offending field",
    428: "If-Match required",
    429: "Too many requests for this key; see Retry-After",
    503: "Database unavailable; see Retry-After",
}


def _problem_response(description: str) -> dict[str, Any]:
    return {
        "description": description,
        "content": {PROBLEM_JSON: {"schema": {"$ref": "#/components/schemas/Problem"}}},
    }


# The problems an operation may answer with, as application/problem+json; service.api.docs
# picks those that can happen to each /v1 operation.
PROBLEM_RESPONSES: dict[int | str, dict[str, Any]] = {
    status: _problem_response(description) for status, description in _PROBLEM_STATUSES.items()
}

# For a decorator's `responses`: a route that reads a solved policy.
POLICY_NOT_READY: dict[int | str, dict[str, Any]] = {
    503: _problem_response("Policy not ready, or database unavailable; see Retry-After")
}
