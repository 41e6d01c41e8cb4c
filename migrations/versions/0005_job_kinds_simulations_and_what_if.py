"""job kinds: simulations and what-if comparisons on the solve queue; one live job per
specification and criterion applies to solves only

Revision ID: 0005
Revises: 0004
Create Date: 2026-12-02
"""

from __future__ import annotations

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

revision: str = "0005"
down_revision: str | None = "0004"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None

# Autogenerate does not see a changed WHERE clause of a partial index: both are written out.
_LIVE_BEFORE = "state IN ('queued', 'running')"
_LIVE_SOLVES = "state IN ('queued', 'running') AND kind = 'solve'"


def _drop_live_index(where: str) -> None:
    with op.batch_alter_table("solve_jobs", schema=None) as batch_op:
        batch_op.drop_index(
            "uq_solve_jobs_live", sqlite_where=sa.text(where), postgresql_where=sa.text(where)
        )


def _create_live_index(where: str) -> None:
    with op.batch_alter_table("solve_jobs", schema=None) as batch_op:
        batch_op.create_index(
            "uq_solve_jobs_live",
            ["tenant_id", "spec_hash", "criterion"],
            unique=True,
            sqlite_where=sa.text(where),
            postgresql_where=sa.text(where),
        )


def upgrade() -> None:
    with op.batch_alter_table("solve_jobs", schema=None) as batch_op:
        batch_op.add_column(
            sa.Column("kind", sa.String(length=16), server_default="solve", nullable=False)
        )
        batch_op.add_column(sa.Column("params", sa.Text(), nullable=True))
        batch_op.add_column(sa.Column("result", sa.Text(), nullable=True))
    _drop_live_index(_LIVE_BEFORE)
    _create_live_index(_LIVE_SOLVES)


def downgrade() -> None:
    # Without `kind`, a simulation would count as a live solve: they go first.
    op.execute(sa.text("DELETE FROM solve_jobs WHERE kind <> 'solve'"))
    # The index names `kind`: dropped before the column (SQLite rebuilds the table for it).
    _drop_live_index(_LIVE_SOLVES)
    with op.batch_alter_table("solve_jobs", schema=None) as batch_op:
        batch_op.drop_column("result")
        batch_op.drop_column("params")
        batch_op.drop_column("kind")
    _create_live_index(_LIVE_BEFORE)
