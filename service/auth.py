"""API keys: high-entropy bearer tokens, stored only as their SHA-256.

A key reads `sr_<prefix>_<secret>`: the prefix (public) finds the row and names the key in
listings; the secret, 256 random bits, is shown once at creation. A fast hash is enough for
random tokens of this length (nothing to brute-force from a dictionary); comparison is
constant-time.
"""

from __future__ import annotations

import hashlib
import hmac
import secrets
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Literal

from sqlalchemy.orm import Session

from service.db.base import utcnow
from service.db.keys import add_key, key_by_prefix, keys_with_tenants, tenant_name
from service.db.tables import ApiKey, Tenant

__all__ = [
    "SCOPES",
    "Identity",
    "Scope",
    "authenticate",
    "create_key",
    "list_keys",
    "revoke_key",
    "scope_allows",
]

Scope = Literal["read", "write", "admin"]
SCOPES: tuple[Scope, ...] = ("read", "write", "admin")
_RANK: dict[str, int] = {scope: rank for rank, scope in enumerate(SCOPES)}
_PREFIX = "sr_"


@dataclass(frozen=True)
class Identity:
    """Who is calling: the key's tenant and scope. Never holds the key."""

    key_id: int
    tenant_id: int
    tenant: str
    key_prefix: str
    scope: Scope


def scope_allows(held: str, needed: Scope) -> bool:
    """admin includes write, write includes read."""
    return _RANK.get(held, -1) >= _RANK[needed]


def _digest(key: str) -> str:
    return hashlib.sha256(key.encode("utf-8")).hexdigest()


def create_key(
    session: Session, tenant: Tenant, scope: Scope, label: str | None = None
) -> tuple[ApiKey, str]:
    """A new key for `tenant`; returns the row and the key itself (shown once, never stored)."""
    prefix = secrets.token_hex(5)
    key = f"{_PREFIX}{prefix}_{secrets.token_urlsafe(32)}"
    return add_key(session, tenant.id, prefix, _digest(key), scope, label), key


def authenticate(session: Session, key: str) -> Identity | None:
    """The identity of a valid, unrevoked key; None for anything else."""
    if not key.startswith(_PREFIX) or key.count("_") < 2:
        return None
    prefix = key[len(_PREFIX) :].split("_", 1)[0]
    row = key_by_prefix(session, prefix)
    if row is None or row.revoked_at is not None:
        return None
    if not hmac.compare_digest(row.key_hash, _digest(key)):
        return None
    name = tenant_name(session, row.tenant_id)
    return Identity(row.id, row.tenant_id, name, row.prefix, row.scope)  # type: ignore[arg-type]


def list_keys(session: Session) -> Sequence[tuple[ApiKey, str]]:
    """Every key with its tenant's name, oldest first."""
    return keys_with_tenants(session)


def revoke_key(session: Session, prefix: str) -> bool:
    """Revoke the key with this prefix (or full key); False when there is none or it was
    revoked already."""
    if prefix.startswith(_PREFIX):
        prefix = prefix[len(_PREFIX) :].split("_", 1)[0]
    row = key_by_prefix(session, prefix)
    if row is None or row.revoked_at is not None:
        return False
    row.revoked_at = utcnow()
    return True
