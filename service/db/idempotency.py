"""Idempotency records: the first response to a POST or PUT sent with an Idempotency-Key,
claimed before the route runs and settled with its answer (service.middleware).

Every function takes the caller's Session and leaves committing to it.
"""

from __future__ import annotations

from datetime import datetime, timedelta

from sqlalchemy import delete, select
from sqlalchemy.exc import IntegrityError
from sqlalchemy.orm import Session

from service.db.tables import IdempotencyRecord

__all__ = ["claim_record", "settle_record"]


def claim_record(
    session: Session,
    *,
    key_id: int,
    key: str,
    method: str,
    path: str,
    body_hash: str,
    request_id: str,
    now: datetime,
    ttl: timedelta,
) -> int | IdempotencyRecord:
    """Drop expired records, then claim (key id, key, method, path): the id of the fresh claim,
    or the record that holds it already (detached from the session)."""
    session.execute(delete(IdempotencyRecord).where(IdempotencyRecord.expires_at < now))
    record = IdempotencyRecord(
        api_key_id=key_id,
        request_id=request_id[:100],
        key=key,
        method=method,
        path=path,
        body_hash=body_hash,
        status=0,
        headers="[]",
        body=b"",
        created_at=now,
        expires_at=now + ttl,
    )
    try:
        with session.begin_nested():
            session.add(record)
        return record.id
    except IntegrityError:
        existing = session.scalars(
            select(IdempotencyRecord).where(
                IdempotencyRecord.api_key_id == key_id,
                IdempotencyRecord.key == key,
                IdempotencyRecord.method == method,
                IdempotencyRecord.path == path,
            )
        ).one()
        session.expunge(existing)
        return existing


def settle_record(
    session: Session, record_id: int, *, keep: bool, status: int, headers: str, body: bytes
) -> None:
    """Store the route's answer on the claim, or drop the claim when it is not to be kept."""
    record = session.get(IdempotencyRecord, record_id)
    if record is None:
        return
    if not keep:
        session.delete(record)
        return
    record.status = status
    record.headers = headers
    record.body = body
