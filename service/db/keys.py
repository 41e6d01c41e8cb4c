"""Tenants and their API keys (rows only: service.auth makes and checks the keys).

Every function takes the caller's Session and leaves committing to it.
"""

from __future__ import annotations

from collections.abc import Sequence

from sqlalchemy import select
from sqlalchemy.orm import Session

from service.db.tables import ApiKey, Tenant

__all__ = [
    "add_key",
    "get_or_create_tenant",
    "get_tenant",
    "key_by_prefix",
    "keys_with_tenants",
    "tenant_name",
]


def get_or_create_tenant(session: Session, name: str) -> Tenant:
    tenant = session.scalars(select(Tenant).where(Tenant.name == name)).one_or_none()
    if tenant is None:
        tenant = Tenant(name=name)
        session.add(tenant)
        session.flush()
    return tenant


def get_tenant(session: Session, tenant_id: int) -> Tenant:
    return session.get_one(Tenant, tenant_id)


def tenant_name(session: Session, tenant_id: int) -> str:
    return session.get_one(Tenant, tenant_id).name


def add_key(
    session: Session, tenant_id: int, prefix: str, key_hash: str, scope: str, label: str | None
) -> ApiKey:
    """A new key row (its id assigned)."""
    row = ApiKey(tenant_id=tenant_id, prefix=prefix, key_hash=key_hash, scope=scope, label=label)
    session.add(row)
    session.flush()
    return row


def key_by_prefix(session: Session, prefix: str) -> ApiKey | None:
    return session.scalars(select(ApiKey).where(ApiKey.prefix == prefix)).one_or_none()


def keys_with_tenants(session: Session) -> Sequence[tuple[ApiKey, str]]:
    """Every key with its tenant's name, oldest first."""
    rows = session.execute(
        select(ApiKey, Tenant.name).join(Tenant, Tenant.id == ApiKey.tenant_id).order_by(ApiKey.id)
    ).all()
    return [(key, name) for key, name in rows]
