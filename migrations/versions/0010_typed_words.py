"""typed words: the criterion, a job's kind and state, a network's solving mode and a solve's
method take only the service's words, checked by the database

Revision ID: 0010
Revises: 0009
Create Date: 2026-12-02

The words are written out here, as they were when this revision was made; a revision that adds
a word replaces its constraint.
"""

from __future__ import annotations

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

revision: str = "0010"
down_revision: str | None = "0009"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None

_CRITERION = ("criterion", "criterion", ("discounted", "average"))
_METHOD = ("solve_method", "method", ("exact", "priced"))
_MODE = ("solve_mode", "mode", ("exact", "priced", "auto"))

# table: (name of the check, column, words) for each typed column.
_CHECKS: dict[str, list[tuple[str, str, tuple[str, ...]]]] = {
    "networks": [_MODE],
    "assortments": [_MODE],
    "network_versions": [_METHOD],
    "solve_jobs": [
        _CRITERION,
        ("job_kind", "kind", ("solve", "simulate", "what_if", "calibrate")),
        ("job_state", "state", ("queued", "running", "done", "failed")),
        _METHOD,
    ],
    "policies": [_CRITERION, _METHOD],
    "instructions": [_CRITERION],
}

# SQLite rebuilds solve_jobs to add its checks; its partial index goes and comes back by hand.
_LIVE_SOLVES = "state IN ('queued', 'running') AND kind = 'solve'"
_LIVE_COLUMNS = ["tenant_id", "spec_hash", "criterion", "method"]


def _live_index(create: bool) -> None:
    where = {"sqlite_where": sa.text(_LIVE_SOLVES), "postgresql_where": sa.text(_LIVE_SOLVES)}
    if create:
        op.create_index("uq_solve_jobs_live", "solve_jobs", _LIVE_COLUMNS, unique=True, **where)
    else:
        op.drop_index("uq_solve_jobs_live", table_name="solve_jobs", **where)


def upgrade() -> None:
    _live_index(create=False)
    for table, checks in _CHECKS.items():
        with op.batch_alter_table(table, schema=None) as batch_op:
            for name, column, words in checks:
                listed = ", ".join(f"'{word}'" for word in words)
                batch_op.create_check_constraint(
                    op.f(f"ck_{table}_{name}"), sa.text(f"{column} IN ({listed})")
                )
    _live_index(create=True)


def downgrade() -> None:
    _live_index(create=False)
    for table, checks in _CHECKS.items():
        with op.batch_alter_table(table, schema=None) as batch_op:
            for name, _column, _words in checks:
                batch_op.drop_constraint(op.f(f"ck_{table}_{name}"), type_="check")
    _live_index(create=True)
