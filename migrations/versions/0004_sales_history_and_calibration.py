"""sales history, calibration settings, calibrated versions

Revision ID: 0004
Revises: 0003
Create Date: 2026-12-02
"""

from __future__ import annotations

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

revision: str = "0004"
down_revision: str | None = "0003"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None


def upgrade() -> None:
    op.create_table(
        "calibration_settings",
        sa.Column("network_id", sa.Integer(), nullable=False),
        sa.Column("window_days", sa.Integer(), nullable=True),
        sa.Column("half_life_days", sa.Float(), nullable=True),
        sa.Column("confidence", sa.Float(), nullable=False),
        sa.Column("auto_apply_threshold", sa.Float(), nullable=True),
        sa.Column("updated_at", sa.DateTime(), nullable=False),
        sa.ForeignKeyConstraint(
            ["network_id"],
            ["networks.id"],
            name=op.f("fk_calibration_settings_network_id_networks"),
        ),
        sa.PrimaryKeyConstraint("network_id", name=op.f("pk_calibration_settings")),
    )
    op.create_table(
        "sales_history",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("network_id", sa.Integer(), nullable=False),
        sa.Column("location_id", sa.String(length=64), nullable=False),
        sa.Column("business_date", sa.Date(), nullable=False),
        sa.Column("units_sold", sa.Integer(), nullable=False),
        sa.Column("stock_at_open", sa.Integer(), nullable=False),
        sa.Column("units_received", sa.Integer(), nullable=False),
        sa.Column("reported_at", sa.DateTime(), nullable=False),
        sa.ForeignKeyConstraint(
            ["network_id"], ["networks.id"], name=op.f("fk_sales_history_network_id_networks")
        ),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_sales_history")),
        sa.UniqueConstraint(
            "network_id", "location_id", "business_date", name=op.f("uq_sales_history_network_id")
        ),
    )
    with op.batch_alter_table("network_versions", schema=None) as batch_op:
        batch_op.add_column(sa.Column("calibrated_at", sa.DateTime(), nullable=True))


def downgrade() -> None:
    with op.batch_alter_table("network_versions", schema=None) as batch_op:
        batch_op.drop_column("calibrated_at")

    op.drop_table("sales_history")
    op.drop_table("calibration_settings")
