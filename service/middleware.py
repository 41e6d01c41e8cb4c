"""ASGI middleware: request body size limit, and idempotent replays of POST and PUT.

Body size: a request whose Content-Length, or whose streamed body, exceeds the limit gets 413
before any route sees it.

Idempotency-Key (on POST and PUT under /v1): the first request with a key claims it (a row in
`idempotency_records`, keyed by API key, key, method and path), runs, and its response is kept
until it expires. Records belong to the API key that sent the request: no other key, even of
the same tenant, ever sees them. A repeat runs the route's own checks first (authentication,
scope, rate limit: `service.api.deps.require`, which raises `RepeatAllowed` once they pass);
only then does it get the kept response, marked `Stockrelay-Replay-Of: <the first request's
id>`; the same key with a different body is 422; a repeat while the first is still running is
409. Only responses of
requests that ran are kept: 2xx and the route's own 4xx, never a refusal before the route
(401, 403, 429), a 503 or a server error; those release the key, so the client's retry runs.
"""

from __future__ import annotations

import hashlib
import json
import logging
import re
from collections.abc import Awaitable, Callable, MutableMapping
from datetime import timedelta
from typing import Any

from sqlalchemy.exc import SQLAlchemyError
from sqlalchemy.orm import Session, sessionmaker
from starlette.concurrency import run_in_threadpool

from service import auth
from service.db.base import utcnow
from service.db.idempotency import claim_record, settle_record
from service.db.tables import IdempotencyRecord
from service.problems import PROBLEM_JSON, problem_body

__all__ = ["BodySizeLimit", "Idempotency", "RepeatAllowed", "repeat_allowed"]

log = logging.getLogger(__name__)

Scope = MutableMapping[str, Any]
Message = MutableMapping[str, Any]
Receive = Callable[[], Awaitable[Message]]
Send = Callable[[Message], Awaitable[None]]
ASGIApp = Callable[[Scope, Receive, Send], Awaitable[None]]

IDEMPOTENCY_HEADER = b"idempotency-key"
# On a replayed answer: the id (X-Request-ID) of the request that produced it.
REPLAY_HEADER = b"stockrelay-replay-of"
_MAX_KEY_LENGTH = 200
# Answers given before the route ran, or that a retry may change: never kept, never replayed.
_NOT_KEPT = frozenset({0, 401, 403, 429, 503})
# scope["state"] key: set while a repeat waits for the route's checks, and by those checks.
_REPEAT = "idempotent_repeat"
_CLEARED = "cleared"


def _unguarded(scope: Scope) -> bool:
    """Only /v1 routes check keys (and so call repeat_allowed)."""
    return not str(scope.get("path", "")).startswith("/v1/")


class RepeatAllowed(Exception):
    """Raised by the route's checks when a repeat passed authentication, scope and rate limit:
    the route does not run, the middleware answers with the kept response."""


def repeat_allowed(scope: Scope) -> None:
    """Called by the route's checks once they pass: raises RepeatAllowed during a repeat."""
    state = scope.get("state", {})
    if state.get(_REPEAT) is not None:
        state[_REPEAT] = _CLEARED
        raise RepeatAllowed


async def send_problem(
    send: Send,
    scope: Scope,
    status: int,
    slug: str,
    title: str,
    detail: str,
    headers: dict[str, str] | None = None,
    **extensions: Any,
) -> None:
    body = problem_body(None, status, slug, title, detail, **extensions)
    body["instance"] = scope.get("path")
    body["request_id"] = scope.get("state", {}).get("request_id")
    raw = json.dumps(body).encode()
    header_list = [
        (b"content-type", PROBLEM_JSON.encode()),
        (b"content-length", str(len(raw)).encode()),
    ]
    header_list += [(k.lower().encode(), v.encode()) for k, v in (headers or {}).items()]
    await send({"type": "http.response.start", "status": status, "headers": header_list})
    await send({"type": "http.response.body", "body": raw})


def _header(scope: Scope, name: bytes) -> str | None:
    for key, value in scope.get("headers", []):
        if key == name:
            return str(value.decode("latin-1"))
    return None


class _TooLarge(Exception):
    pass


async def _read_body(receive: Receive, limit: int) -> bytes:
    chunks, size = [], 0
    while True:
        message = await receive()
        if message["type"] == "http.disconnect":
            break
        chunk = message.get("body", b"")
        size += len(chunk)
        if size > limit:
            raise _TooLarge
        chunks.append(chunk)
        if not message.get("more_body", False):
            break
    return b"".join(chunks)


def _replaying(body: bytes, receive: Receive) -> Receive:
    """The body already read, then the client's own messages (so that a streaming response
    still learns of a real disconnect, and only of a real one)."""
    sent = False

    async def replay() -> Message:
        nonlocal sent
        if sent:
            return await receive()
        sent = True
        return {"type": "http.request", "body": body, "more_body": False}

    return replay


# Bulk uploads of an assortment (items, history, closing reports): streamed to the route,
# which reads them as they arrive and enforces the larger upload limit itself.
UPLOAD_PATH = re.compile(r"^/v1/assortments/\d+/(items|history|locations/[^/]+/closing-report)$")


class BodySizeLimit:
    def __init__(self, app: ASGIApp, max_bytes: int, max_upload_bytes: int | None = None) -> None:
        self.app = app
        self.max_bytes = max_bytes
        self.max_upload_bytes = max_upload_bytes or max_bytes

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        declared = _header(scope, b"content-length")
        if UPLOAD_PATH.match(str(scope.get("path", ""))):
            if (
                declared is not None
                and declared.isdigit()
                and int(declared) > self.max_upload_bytes
            ):
                await self._refuse(scope, send, self.max_upload_bytes)
                return
            await self.app(scope, receive, send)
            return
        if declared is not None and declared.isdigit() and int(declared) > self.max_bytes:
            await self._refuse(scope, send)
            return
        try:
            body = await _read_body(receive, self.max_bytes)
        except _TooLarge:
            await self._refuse(scope, send)
            return
        await self.app(scope, _replaying(body, receive), send)

    async def _refuse(self, scope: Scope, send: Send, limit: int | None = None) -> None:
        limit = limit or self.max_bytes
        await send_problem(
            send,
            scope,
            413,
            "body-too-large",
            "Request body too large",
            f"request bodies are limited to {limit:,} bytes",
            limit=limit,
        )


class Idempotency:
    def __init__(
        self, app: ASGIApp, sessions: Callable[[], sessionmaker[Session]], ttl_seconds: float
    ) -> None:
        self.app = app
        self.sessions = sessions
        self.ttl = timedelta(seconds=ttl_seconds)

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        key = _header(scope, IDEMPOTENCY_HEADER) if scope["type"] == "http" else None
        if key is None or scope["method"] not in ("POST", "PUT") or _unguarded(scope):
            await self.app(scope, receive, send)
            return
        if not 1 <= len(key) <= _MAX_KEY_LENGTH:
            await send_problem(
                send,
                scope,
                422,
                "invalid-idempotency-key",
                "Invalid Idempotency-Key",
                f"Idempotency-Key must be 1 to {_MAX_KEY_LENGTH} characters",
            )
            return
        key_id = await run_in_threadpool(self._key_id, scope)
        if key_id is None:  # unauthenticated: the route answers 401
            await self.app(scope, receive, send)
            return
        body = await _read_body(receive, 1 << 62)
        digest = hashlib.sha256(body).hexdigest()
        method, path = scope["method"], scope["path"]
        request_id = str(scope.get("state", {}).get("request_id") or "")
        claimed = await run_in_threadpool(
            self._claim, key_id, key, method, path, digest, request_id
        )
        if isinstance(claimed, IdempotencyRecord):
            await self._repeat(scope, _replaying(body, receive), send, claimed, digest)
            return

        status, headers, chunks = 0, [], []

        async def capture(message: Message) -> None:
            nonlocal status, headers
            if message["type"] == "http.response.start":
                status, headers = message["status"], list(message.get("headers", []))
            elif message["type"] == "http.response.body":
                chunks.append(message.get("body", b""))
            await send(message)

        try:
            await self.app(scope, _replaying(body, receive), capture)
        finally:
            await run_in_threadpool(self._settle, claimed, status, headers, b"".join(chunks))

    async def _repeat(
        self, scope: Scope, receive: Receive, send: Send, record: IdempotencyRecord, digest: str
    ) -> None:
        """Run the route's checks; when they pass, answer for the kept record, else pass their
        refusal on (kept nowhere)."""
        state = scope.setdefault("state", {})
        state[_REPEAT] = record.id
        messages: list[Message] = []

        async def hold(message: Message) -> None:
            messages.append(message)

        await self.app(scope, receive, hold)
        if state.pop(_REPEAT, None) == _CLEARED:
            await self._answer_repeat(scope, send, record, digest)
            return
        for message in messages:
            await send(message)

    def _key_id(self, scope: Scope) -> int | None:
        authorization = _header(scope, b"authorization") or ""
        if not authorization.lower().startswith("bearer "):
            return None
        try:
            with self.sessions()() as session:
                identity = auth.authenticate(session, authorization[7:].strip())
        except SQLAlchemyError:
            return None  # the route reports the database problem
        return None if identity is None else identity.key_id

    def _claim(
        self, key_id: int, key: str, method: str, path: str, digest: str, request_id: str
    ) -> int | IdempotencyRecord:
        """The id of a fresh claim, or the record that holds the key already."""
        with self.sessions().begin() as session:
            return claim_record(
                session,
                key_id=key_id,
                key=key,
                method=method,
                path=path,
                body_hash=digest,
                request_id=request_id,
                now=utcnow(),
                ttl=self.ttl,
            )

    async def _answer_repeat(
        self, scope: Scope, send: Send, record: IdempotencyRecord, digest: str
    ) -> None:
        if record.body_hash != digest:
            await send_problem(
                send,
                scope,
                422,
                "idempotency-key-reused",
                "Idempotency-Key reused",
                "this Idempotency-Key was used with a different request body; use a new key",
            )
            return
        if record.status == 0:
            await send_problem(
                send,
                scope,
                409,
                "request-in-progress",
                "Request in progress",
                "the first request with this Idempotency-Key is still running; retry shortly",
                headers={"Retry-After": "1"},
            )
            return
        headers = [
            (k.encode("latin-1"), v.encode("latin-1")) for k, v in json.loads(record.headers)
        ]
        headers.append((REPLAY_HEADER, record.request_id.encode("latin-1")))
        await send({"type": "http.response.start", "status": record.status, "headers": headers})
        await send({"type": "http.response.body", "body": record.body})

    def _settle(
        self, record_id: int, status: int, headers: list[tuple[bytes, bytes]], body: bytes
    ) -> None:
        kept = json.dumps(
            [
                [k.decode("latin-1"), v.decode("latin-1")]
                for k, v in headers
                if k.lower() != b"x-request-id"
            ]
        )
        with self.sessions().begin() as session:
            # Not kept: the route did not run, or may answer otherwise now.
            settle_record(
                session,
                record_id,
                keep=not (status in _NOT_KEPT or status >= 500),
                status=status,
                headers=kept,
                body=body,
            )
