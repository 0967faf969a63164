"""Reconciliation jobs and their answered rows.

Revision ID: 0003_jobs
Revises: 0002_keys_audit
Create Date: 2026-12-02
"""

from __future__ import annotations

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

revision: str = "0003_jobs"
down_revision: str | None = "0002_keys_audit"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None


def upgrade() -> None:
    op.create_table(
        "reconciliation_jobs",
        sa.Column("id", sa.String(length=36), nullable=False),
        sa.Column("team_id", sa.Integer(), nullable=False),
        sa.Column("collection_id", sa.Integer(), nullable=False),
        sa.Column("state", sa.String(length=16), nullable=False),
        sa.Column("format", sa.String(length=16), nullable=False),
        sa.Column("input", sa.LargeBinary(), nullable=False),
        sa.Column("rows_total", sa.Integer(), nullable=False),
        sa.Column("rows_done", sa.Integer(), server_default="0", nullable=False),
        sa.Column("counts", sa.JSON(), nullable=False),
        sa.Column("error", sa.Text(), nullable=True),
        sa.Column("owner", sa.String(length=128), nullable=True),
        sa.Column("attempts", sa.Integer(), server_default="0", nullable=False),
        sa.Column("created_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("updated_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("started_at", sa.DateTime(timezone=True), nullable=True),
        sa.Column("finished_at", sa.DateTime(timezone=True), nullable=True),
        sa.ForeignKeyConstraint(
            ["collection_id"],
            ["collections.id"],
            name=op.f("fk_reconciliation_jobs_collection_id_collections"),
            ondelete="CASCADE",
        ),
        sa.ForeignKeyConstraint(
            ["team_id"],
            ["teams.id"],
            name=op.f("fk_reconciliation_jobs_team_id_teams"),
            ondelete="CASCADE",
        ),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_reconciliation_jobs")),
    )
    op.create_index(
        op.f("ix_reconciliation_jobs_state"),
        "reconciliation_jobs",
        ["state", "created_at"],
        unique=False,
    )
    op.create_table(
        "reconciliation_rows",
        sa.Column("job_id", sa.String(length=36), nullable=False),
        sa.Column("row", sa.Integer(), nullable=False),
        sa.Column("verdict", sa.String(length=16), nullable=False),
        sa.Column("cue_margin", sa.Float(), nullable=True),
        sa.Column("data", sa.JSON(), nullable=False),
        sa.ForeignKeyConstraint(
            ["job_id"],
            ["reconciliation_jobs.id"],
            name=op.f("fk_reconciliation_rows_job_id_reconciliation_jobs"),
            ondelete="CASCADE",
        ),
        sa.PrimaryKeyConstraint("job_id", "row", name=op.f("pk_reconciliation_rows")),
    )


def downgrade() -> None:
    op.drop_table("reconciliation_rows")
    op.drop_index(op.f("ix_reconciliation_jobs_state"), table_name="reconciliation_jobs")
    op.drop_table("reconciliation_jobs")
