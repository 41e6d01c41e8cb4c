"""ASGI middleware: request body size limit, and idempotent replays of POST and PUT.

Body size: a request whose Content-Length, or whose streamed body, exceeds the limit gets 413
before any route sees it.

Idempotency-Key (on POST and PUT): the first request with a key claims it (a row in
`idempotency_records`, keyed by tenant, key, method and path), runs, and its response is kept
until it expires. A repeat with the same body gets that response again, marked
`Idempotent-Replayed: true`; the same key with a different body is 422; a repeat while the first
is still running is 409. A first request that ends in a server error releases the key, so the
client's retry runs again.
"""

from __future__ import annotations

import hashlib
import json
import logging
from collections.abc import Awaitable, Callable, MutableMapping
from datetime import timedelta
from typing import Any

from sqlalchemy import delete, select
from sqlalchemy.exc import IntegrityError, SQLAlchemyError
from sqlalchemy.orm import Session, sessionmaker
from starlette.concurrency import run_in_threadpool

from service import auth
from service.db.base import utcnow
from service.db.tables import IdempotencyRecord
from service.problems import PROBLEM_JSON, problem_body

__all__ = ["BodySizeLimit", "Idempotency"]

log = logging.getLogger(__name__)

Scope = MutableMapping[str, Any]
Message = MutableMapping[str, Any]
Receive = Callable[[], Awaitable[Message]]
Send = Callable[[Message], Awaitable[None]]
ASGIApp = Callable[[Scope, Receive, Send], Awaitable[None]]

IDEMPOTENCY_HEADER = b"idempotency-key"
_MAX_KEY_LENGTH = 200


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


class BodySizeLimit:
    def __init__(self, app: ASGIApp, max_bytes: int) -> None:
        self.app = app
        self.max_bytes = max_bytes

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        declared = _header(scope, b"content-length")
        if declared is not None and declared.isdigit() and int(declared) > self.max_bytes:
            await self._refuse(scope, send)
            return
        try:
            body = await _read_body(receive, self.max_bytes)
        except _TooLarge:
            await self._refuse(scope, send)
            return
        await self.app(scope, _replaying(body, receive), send)

    async def _refuse(self, scope: Scope, send: Send) -> None:
        await send_problem(
            send,
            scope,
            413,
            "body-too-large",
            "Request body too large",
            f"request bodies are limited to {self.max_bytes:,} bytes",
            limit=self.max_bytes,
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
        if key is None or scope["method"] not in ("POST", "PUT"):
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
        tenant_id = await run_in_threadpool(self._tenant, scope)
        if tenant_id is None:  # unauthenticated: the route answers 401
            await self.app(scope, receive, send)
            return
        body = await _read_body(receive, 1 << 62)
        digest = hashlib.sha256(body).hexdigest()
        method, path = scope["method"], scope["path"]
        claimed = await run_in_threadpool(self._claim, tenant_id, key, method, path, digest)
        if isinstance(claimed, IdempotencyRecord):
            await self._answer_repeat(scope, send, claimed, digest)
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

    def _tenant(self, scope: Scope) -> int | None:
        authorization = _header(scope, b"authorization") or ""
        if not authorization.lower().startswith("bearer "):
            return None
        try:
            with self.sessions()() as session:
                identity = auth.authenticate(session, authorization[7:].strip())
        except SQLAlchemyError:
            return None  # the route reports the database problem
        return None if identity is None else identity.tenant_id

    def _claim(
        self, tenant_id: int, key: str, method: str, path: str, digest: str
    ) -> int | IdempotencyRecord:
        """The id of a fresh claim, or the record that holds the key already."""
        now = utcnow()
        with self.sessions().begin() as session:
            session.execute(delete(IdempotencyRecord).where(IdempotencyRecord.expires_at < now))
            record = IdempotencyRecord(
                tenant_id=tenant_id,
                key=key,
                method=method,
                path=path,
                body_hash=digest,
                status=0,
                headers="[]",
                body=b"",
                created_at=now,
                expires_at=now + self.ttl,
            )
            try:
                with session.begin_nested():
                    session.add(record)
                return record.id
            except IntegrityError:
                existing = session.scalars(
                    select(IdempotencyRecord).where(
                        IdempotencyRecord.tenant_id == tenant_id,
                        IdempotencyRecord.key == key,
                        IdempotencyRecord.method == method,
                        IdempotencyRecord.path == path,
                    )
                ).one()
                session.expunge(existing)
                return existing

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
        headers.append((b"idempotent-replayed", b"true"))
        await send({"type": "http.response.start", "status": record.status, "headers": headers})
        await send({"type": "http.response.body", "body": record.body})

    def _settle(
        self, record_id: int, status: int, headers: list[tuple[bytes, bytes]], body: bytes
    ) -> None:
        with self.sessions().begin() as session:
            record = session.get(IdempotencyRecord, record_id)
            if record is None:
                return
            if status == 0 or status >= 500:
                session.delete(record)  # nothing to replay: let the retry run
                return
            record.status = status
            record.headers = json.dumps(
                [
                    [k.decode("latin-1"), v.decode("latin-1")]
                    for k, v in headers
                    if k.lower() != b"x-request-id"
                ]
            )
            record.body = body
