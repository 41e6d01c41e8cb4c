"""closing counts and kept instructions

Revision ID: 0002
Revises: 0001
Create Date: 2026-12-02
"""

from __future__ import annotations

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

revision: str = "0002"
down_revision: str | None = "0001"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None


def upgrade() -> None:
    op.create_table(
        "closing_counts",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("network_id", sa.Integer(), nullable=False),
        sa.Column("location_id", sa.String(length=64), nullable=False),
        sa.Column("business_date", sa.Date(), nullable=False),
        sa.Column("units", sa.Integer(), nullable=False),
        sa.Column("reported_at", sa.DateTime(), nullable=False),
        sa.ForeignKeyConstraint(
            ["network_id"], ["networks.id"], name=op.f("fk_closing_counts_network_id_networks")
        ),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_closing_counts")),
        sa.UniqueConstraint(
            "network_id", "location_id", "business_date", name=op.f("uq_closing_counts_network_id")
        ),
    )
    op.create_table(
        "instructions",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("network_id", sa.Integer(), nullable=False),
        sa.Column("business_date", sa.Date(), nullable=False),
        sa.Column("version_id", sa.Integer(), nullable=False),
        sa.Column("criterion", sa.String(length=16), nullable=False),
        sa.Column("plan", sa.Text(), nullable=False),
        sa.Column("computed_at", sa.DateTime(), nullable=False),
        sa.ForeignKeyConstraint(
            ["network_id"], ["networks.id"], name=op.f("fk_instructions_network_id_networks")
        ),
        sa.ForeignKeyConstraint(
            ["version_id"],
            ["network_versions.id"],
            name=op.f("fk_instructions_version_id_network_versions"),
        ),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_instructions")),
        sa.UniqueConstraint("network_id", "business_date", name=op.f("uq_instructions_network_id")),
    )


def downgrade() -> None:
    op.drop_table("instructions")
    op.drop_table("closing_counts")
