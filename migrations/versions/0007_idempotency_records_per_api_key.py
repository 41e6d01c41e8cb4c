"""idempotency records belong to the API key that sent the request (not to its tenant), and
keep the first request's id

Revision ID: 0007
Revises: 0006
Create Date: 2026-12-02
"""

from __future__ import annotations

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

revision: str = "0007"
down_revision: str | None = "0006"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None


def _forget_kept_responses() -> None:
    # A kept response cannot be given an owner it never had (a tenant's record names no key,
    # a key's record is not the tenant's to replay). They expire within a day anyway; dropping
    # them only means a repeat in flight across the upgrade runs once more.
    op.execute(sa.text("DELETE FROM idempotency_records"))


def upgrade() -> None:
    _forget_kept_responses()
    with op.batch_alter_table("idempotency_records", schema=None) as batch_op:
        batch_op.add_column(sa.Column("api_key_id", sa.Integer(), nullable=False))
        batch_op.add_column(sa.Column("request_id", sa.String(length=100), nullable=False))
        batch_op.drop_constraint(batch_op.f("uq_idempotency_records_tenant_id"), type_="unique")
        batch_op.create_unique_constraint(
            batch_op.f("uq_idempotency_records_api_key_id"), ["api_key_id", "key", "method", "path"]
        )
        batch_op.drop_constraint(
            batch_op.f("fk_idempotency_records_tenant_id_tenants"), type_="foreignkey"
        )
        batch_op.create_foreign_key(
            batch_op.f("fk_idempotency_records_api_key_id_api_keys"),
            "api_keys",
            ["api_key_id"],
            ["id"],
        )
        batch_op.drop_column("tenant_id")


def downgrade() -> None:
    _forget_kept_responses()
    with op.batch_alter_table("idempotency_records", schema=None) as batch_op:
        batch_op.add_column(sa.Column("tenant_id", sa.Integer(), nullable=False))
        batch_op.drop_constraint(
            batch_op.f("fk_idempotency_records_api_key_id_api_keys"), type_="foreignkey"
        )
        batch_op.create_foreign_key(
            batch_op.f("fk_idempotency_records_tenant_id_tenants"),
            "tenants",
            ["tenant_id"],
            ["id"],
        )
        batch_op.drop_constraint(batch_op.f("uq_idempotency_records_api_key_id"), type_="unique")
        batch_op.create_unique_constraint(
            batch_op.f("uq_idempotency_records_tenant_id"), ["tenant_id", "key", "method", "path"]
        )
        batch_op.drop_column("request_id")
        batch_op.drop_column("api_key_id")
