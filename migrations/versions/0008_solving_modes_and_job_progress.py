"""solving modes: a network's mode, the method of each version, job and policy (an exact and a
priced policy of one specification are kept apart), and the progress of running solves

Revision ID: 0008
Revises: 0007
Create Date: 2026-12-02
"""

from __future__ import annotations

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

revision: str = "0008"
down_revision: str | None = "0007"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None

_LIVE_SOLVES = "state IN ('queued', 'running') AND kind = 'solve'"


def _method_column() -> sa.Column[str]:
    return sa.Column("method", sa.String(length=8), server_default="exact", nullable=False)


def _live_index(columns: list[str]) -> None:
    with op.batch_alter_table("solve_jobs", schema=None) as batch_op:
        batch_op.drop_index(
            "uq_solve_jobs_live",
            sqlite_where=sa.text(_LIVE_SOLVES),
            postgresql_where=sa.text(_LIVE_SOLVES),
        )
        batch_op.create_index(
            "uq_solve_jobs_live",
            columns,
            unique=True,
            sqlite_where=sa.text(_LIVE_SOLVES),
            postgresql_where=sa.text(_LIVE_SOLVES),
        )


def upgrade() -> None:
    with op.batch_alter_table("networks", schema=None) as batch_op:
        batch_op.add_column(
            sa.Column("mode", sa.String(length=8), server_default="auto", nullable=False)
        )
    with op.batch_alter_table("network_versions", schema=None) as batch_op:
        batch_op.add_column(_method_column())
    with op.batch_alter_table("solve_jobs", schema=None) as batch_op:
        batch_op.add_column(_method_column())
        batch_op.add_column(sa.Column("progress", sa.Text(), nullable=True))
    _live_index(["tenant_id", "spec_hash", "criterion", "method"])
    with op.batch_alter_table("policies", schema=None) as batch_op:
        batch_op.add_column(_method_column())
        batch_op.drop_constraint(batch_op.f("uq_policies_tenant_id"), type_="unique")
        batch_op.create_unique_constraint(
            batch_op.f("uq_policies_tenant_id"),
            ["tenant_id", "spec_hash", "criterion", "method"],
        )


def downgrade() -> None:
    # Priced solves and policies have no place in the older schema: they go first.
    op.execute(sa.text("DELETE FROM policies WHERE method <> 'exact'"))
    op.execute(sa.text("DELETE FROM solve_jobs WHERE method <> 'exact'"))
    with op.batch_alter_table("policies", schema=None) as batch_op:
        batch_op.drop_constraint(batch_op.f("uq_policies_tenant_id"), type_="unique")
        batch_op.create_unique_constraint(
            batch_op.f("uq_policies_tenant_id"), ["tenant_id", "spec_hash", "criterion"]
        )
        batch_op.drop_column("method")
    _live_index(["tenant_id", "spec_hash", "criterion"])
    for table, column in (
        ("solve_jobs", "progress"),
        ("solve_jobs", "method"),
        ("network_versions", "method"),
        ("networks", "mode"),
    ):
        _drop_column(table, column)


def _drop_column(table: str, column: str) -> None:
    """SQLite drops it in place (3.35 and later): a batch rebuild of a table that others
    reference would fail their foreign keys, which are enforced."""
    if op.get_bind().dialect.name == "sqlite":
        op.execute(sa.text(f"ALTER TABLE {table} DROP COLUMN {column}"))
    else:
        op.drop_column(table, column)
