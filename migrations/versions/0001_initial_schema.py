"""create tenants, networks, versions, solve jobs and policies

Revision ID: 0001
Revises:
Create Date: 2026-12-02
"""

from __future__ import annotations

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

revision: str = "0001"
down_revision: str | None = None
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None


def upgrade() -> None:
    op.create_table(
        "tenants",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("name", sa.String(length=100), nullable=False),
        sa.Column("created_at", sa.DateTime(), nullable=False),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_tenants")),
        sa.UniqueConstraint("name", name=op.f("uq_tenants_name")),
    )
    op.create_table(
        "networks",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("tenant_id", sa.Integer(), nullable=False),
        sa.Column("name", sa.String(length=200), nullable=False),
        sa.Column("archived", sa.Boolean(), nullable=False),
        sa.Column("created_at", sa.DateTime(), nullable=False),
        sa.ForeignKeyConstraint(
            ["tenant_id"], ["tenants.id"], name=op.f("fk_networks_tenant_id_tenants")
        ),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_networks")),
        sa.UniqueConstraint("tenant_id", "name", name=op.f("uq_networks_tenant_id")),
    )
    with op.batch_alter_table("networks", schema=None) as batch_op:
        batch_op.create_index(batch_op.f("ix_networks_tenant_id"), ["tenant_id"], unique=False)

    op.create_table(
        "network_versions",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("network_id", sa.Integer(), nullable=False),
        sa.Column("number", sa.Integer(), nullable=False),
        sa.Column("spec_json", sa.Text(), nullable=False),
        sa.Column("spec_hash", sa.String(length=64), nullable=False),
        sa.Column("created_at", sa.DateTime(), nullable=False),
        sa.ForeignKeyConstraint(
            ["network_id"], ["networks.id"], name=op.f("fk_network_versions_network_id_networks")
        ),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_network_versions")),
        sa.UniqueConstraint("network_id", "number", name=op.f("uq_network_versions_network_id")),
    )
    with op.batch_alter_table("network_versions", schema=None) as batch_op:
        batch_op.create_index(
            batch_op.f("ix_network_versions_spec_hash"), ["spec_hash"], unique=False
        )

    op.create_table(
        "solve_jobs",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("tenant_id", sa.Integer(), nullable=False),
        sa.Column("version_id", sa.Integer(), nullable=False),
        sa.Column("spec_hash", sa.String(length=64), nullable=False),
        sa.Column("criterion", sa.String(length=16), nullable=False),
        sa.Column("state", sa.String(length=16), nullable=False),
        sa.Column("attempts", sa.Integer(), nullable=False),
        sa.Column("lease_owner", sa.String(length=200), nullable=True),
        sa.Column("lease_expires_at", sa.DateTime(), nullable=True),
        sa.Column("created_at", sa.DateTime(), nullable=False),
        sa.Column("started_at", sa.DateTime(), nullable=True),
        sa.Column("finished_at", sa.DateTime(), nullable=True),
        sa.Column("solve_seconds", sa.Float(), nullable=True),
        sa.Column("iterations", sa.Integer(), nullable=True),
        sa.Column("residual", sa.Float(), nullable=True),
        sa.Column("error", sa.Text(), nullable=True),
        sa.ForeignKeyConstraint(
            ["tenant_id"], ["tenants.id"], name=op.f("fk_solve_jobs_tenant_id_tenants")
        ),
        sa.ForeignKeyConstraint(
            ["version_id"],
            ["network_versions.id"],
            name=op.f("fk_solve_jobs_version_id_network_versions"),
        ),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_solve_jobs")),
    )
    with op.batch_alter_table("solve_jobs", schema=None) as batch_op:
        batch_op.create_index("ix_solve_jobs_state_id", ["state", "id"], unique=False)
        batch_op.create_index(batch_op.f("ix_solve_jobs_version_id"), ["version_id"], unique=False)
        batch_op.create_index(
            "uq_solve_jobs_live",
            ["tenant_id", "spec_hash", "criterion"],
            unique=True,
            sqlite_where=sa.text("state IN ('queued', 'running')"),
            postgresql_where=sa.text("state IN ('queued', 'running')"),
        )

    op.create_table(
        "policies",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("tenant_id", sa.Integer(), nullable=False),
        sa.Column("spec_hash", sa.String(length=64), nullable=False),
        sa.Column("criterion", sa.String(length=16), nullable=False),
        sa.Column("job_id", sa.Integer(), nullable=True),
        sa.Column("arrays", sa.LargeBinary(), nullable=False),
        sa.Column("layout", sa.Text(), nullable=False),
        sa.Column("checksum", sa.String(length=64), nullable=False),
        sa.Column("meta", sa.Text(), nullable=False),
        sa.Column("gain", sa.Float(), nullable=True),
        sa.Column("residual", sa.Float(), nullable=False),
        sa.Column("error_bound", sa.Float(), nullable=False),
        sa.Column("iterations", sa.Integer(), nullable=False),
        sa.Column("solve_seconds", sa.Float(), nullable=False),
        sa.Column("solved_at", sa.DateTime(), nullable=False),
        sa.ForeignKeyConstraint(
            ["job_id"], ["solve_jobs.id"], name=op.f("fk_policies_job_id_solve_jobs")
        ),
        sa.ForeignKeyConstraint(
            ["tenant_id"], ["tenants.id"], name=op.f("fk_policies_tenant_id_tenants")
        ),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_policies")),
        sa.UniqueConstraint(
            "tenant_id", "spec_hash", "criterion", name=op.f("uq_policies_tenant_id")
        ),
    )


def downgrade() -> None:
    op.drop_table("policies")
    with op.batch_alter_table("solve_jobs", schema=None) as batch_op:
        batch_op.drop_index(
            "uq_solve_jobs_live",
            sqlite_where=sa.text("state IN ('queued', 'running')"),
            postgresql_where=sa.text("state IN ('queued', 'running')"),
        )
        batch_op.drop_index(batch_op.f("ix_solve_jobs_version_id"))
        batch_op.drop_index("ix_solve_jobs_state_id")

    op.drop_table("solve_jobs")
    with op.batch_alter_table("network_versions", schema=None) as batch_op:
        batch_op.drop_index(batch_op.f("ix_network_versions_spec_hash"))

    op.drop_table("network_versions")
    with op.batch_alter_table("networks", schema=None) as batch_op:
        batch_op.drop_index(batch_op.f("ix_networks_tenant_id"))

    op.drop_table("networks")
    op.drop_table("tenants")
