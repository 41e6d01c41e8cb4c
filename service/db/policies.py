"""Stored policies: one per (tenant, specification hash, criterion, method); written by
service.db.jobs.store_policy when a solve finishes.

Every function takes the caller's Session and leaves committing to it.
"""

from __future__ import annotations

from sqlalchemy import (
    delete,
    select,
)
from sqlalchemy.orm import Session

from service.db.tables import (
    Policy,
)

__all__ = [
    "delete_policy",
    "policy_for",
]


def policy_for(
    session: Session, tenant_id: int, spec_hash: str, criterion: str, method: str = "exact"
) -> Policy | None:
    return session.scalars(
        select(Policy).where(
            Policy.tenant_id == tenant_id,
            Policy.spec_hash == spec_hash,
            Policy.criterion == criterion,
            Policy.method == method,
        )
    ).one_or_none()


def delete_policy(session: Session, policy_id: int) -> None:
    session.execute(delete(Policy).where(Policy.id == policy_id))
