"""closing corrections (audit rows) and instruction revisions; a closing cut-off time per
network; same-day selling of receipts as a calibration setting

Revision ID: 0006
Revises: 0005
Create Date: 2026-12-02
"""

from __future__ import annotations

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

revision: str = "0006"
down_revision: str | None = "0005"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None


def upgrade() -> None:
    op.create_table(
        "closing_corrections",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("network_id", sa.Integer(), nullable=False),
        sa.Column("location_id", sa.String(length=64), nullable=False),
        sa.Column("business_date", sa.Date(), nullable=False),
        sa.Column("old_units", sa.Integer(), nullable=False),
        sa.Column("new_units", sa.Integer(), nullable=False),
        sa.Column("revision", sa.Integer(), nullable=False),
        sa.Column("key_prefix", sa.String(length=32), nullable=False),
        sa.Column("corrected_at", sa.DateTime(), nullable=False),
        sa.ForeignKeyConstraint(
            ["network_id"], ["networks.id"], name=op.f("fk_closing_corrections_network_id_networks")
        ),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_closing_corrections")),
    )
    with op.batch_alter_table("closing_corrections", schema=None) as batch_op:
        batch_op.create_index(
            "ix_closing_corrections_network_day", ["network_id", "business_date"], unique=False
        )

    with op.batch_alter_table("calibration_settings", schema=None) as batch_op:
        batch_op.add_column(
            sa.Column(
                "receipts_sell_same_day",
                sa.Boolean(),
                server_default=sa.text("false"),
                nullable=False,
            )
        )

    with op.batch_alter_table("instructions", schema=None) as batch_op:
        batch_op.add_column(sa.Column("revision", sa.Integer(), server_default="1", nullable=False))

    with op.batch_alter_table("networks", schema=None) as batch_op:
        batch_op.add_column(sa.Column("closing_cutoff", sa.Time(), nullable=True))


def downgrade() -> None:
    for table, column in (
        ("networks", "closing_cutoff"),
        ("instructions", "revision"),
        ("calibration_settings", "receipts_sell_same_day"),
    ):
        _drop_column(table, column)

    with op.batch_alter_table("closing_corrections", schema=None) as batch_op:
        batch_op.drop_index("ix_closing_corrections_network_day")

    op.drop_table("closing_corrections")


def _drop_column(table: str, column: str) -> None:
    """SQLite drops it in place (3.35 and later): a batch rebuild of a table that others
    reference (networks) would fail their foreign keys, which are enforced."""
    if op.get_bind().dialect.name == "sqlite":
        op.execute(sa.text(f"ALTER TABLE {table} DROP COLUMN {column}"))
    else:
        op.drop_column(table, column)
