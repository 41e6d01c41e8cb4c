"""assortments: store layouts shared by many items (each item a network), and the pick lists
of their closing nights

Revision ID: 0009
Revises: 0008
Create Date: 2026-12-02
"""

from __future__ import annotations

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

revision: str = "0009"
down_revision: str | None = "0008"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None


def upgrade() -> None:
    op.create_table(
        "assortments",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("tenant_id", sa.Integer(), nullable=False),
        sa.Column("name", sa.String(length=200), nullable=False),
        sa.Column("layout_json", sa.Text(), nullable=False),
        sa.Column("layout_version", sa.Integer(), nullable=False),
        sa.Column("criteria", sa.Text(), nullable=False),
        sa.Column("mode", sa.String(length=8), nullable=False),
        sa.Column("closing_cutoff", sa.Time(), nullable=True),
        sa.Column("archived", sa.Boolean(), nullable=False),
        sa.Column("created_at", sa.DateTime(), nullable=False),
        sa.ForeignKeyConstraint(
            ["tenant_id"], ["tenants.id"], name=op.f("fk_assortments_tenant_id_tenants")
        ),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_assortments")),
        sa.UniqueConstraint("tenant_id", "name", name=op.f("uq_assortments_tenant_id")),
    )
    with op.batch_alter_table("assortments", schema=None) as batch_op:
        batch_op.create_index(batch_op.f("ix_assortments_tenant_id"), ["tenant_id"], unique=False)
    op.create_table(
        "pick_lists",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("assortment_id", sa.Integer(), nullable=False),
        sa.Column("business_date", sa.Date(), nullable=False),
        sa.Column("revision", sa.Integer(), nullable=False),
        sa.Column("computed_at", sa.DateTime(), nullable=False),
        sa.Column("body", sa.LargeBinary(), nullable=False),
        sa.Column("summary", sa.Text(), nullable=False),
        sa.ForeignKeyConstraint(
            ["assortment_id"],
            ["assortments.id"],
            name=op.f("fk_pick_lists_assortment_id_assortments"),
        ),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_pick_lists")),
        sa.UniqueConstraint(
            "assortment_id", "business_date", "revision", name=op.f("uq_pick_lists_assortment_id")
        ),
    )
    with op.batch_alter_table("networks", schema=None) as batch_op:
        batch_op.add_column(sa.Column("assortment_id", sa.Integer(), nullable=True))
        batch_op.add_column(sa.Column("item_code", sa.String(length=100), nullable=True))
        batch_op.add_column(sa.Column("unit_volume", sa.Float(), nullable=True))
        batch_op.create_index(
            batch_op.f("ix_networks_assortment_id"), ["assortment_id"], unique=False
        )
        batch_op.create_foreign_key(
            batch_op.f("fk_networks_assortment_id_assortments"),
            "assortments",
            ["assortment_id"],
            ["id"],
        )


def downgrade() -> None:
    with op.batch_alter_table("networks", schema=None) as batch_op:
        batch_op.drop_constraint(
            batch_op.f("fk_networks_assortment_id_assortments"), type_="foreignkey"
        )
        batch_op.drop_index(batch_op.f("ix_networks_assortment_id"))
        batch_op.drop_column("unit_volume")
        batch_op.drop_column("item_code")
        batch_op.drop_column("assortment_id")
    op.drop_table("pick_lists")
    with op.batch_alter_table("assortments", schema=None) as batch_op:
        batch_op.drop_index(batch_op.f("ix_assortments_tenant_id"))
    op.drop_table("assortments")
