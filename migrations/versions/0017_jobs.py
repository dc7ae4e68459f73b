"""jobs: every document write sent as a job, with its state, counts and per-document results

Revision ID: 0017_jobs
Revises: 0002_store_identity
Create Date: 2026-12-03
"""

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

revision: str = "0017_jobs"
down_revision: str | None = "0002_store_identity"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None


def _binary(length: int) -> sa.types.TypeEngine[str]:
    return sa.String(length=length).with_variant(
        sa.String(length=length, collation="C"), "postgresql"
    )


def upgrade() -> None:
    op.create_table(
        "jobs",
        sa.Column("id", sa.String(length=36), nullable=False),
        sa.Column("collection", _binary(63), nullable=False),
        sa.Column("kind", sa.String(length=16), nullable=False),
        sa.Column("state", sa.String(length=16), nullable=False),
        sa.Column("key_id", sa.Integer(), nullable=True),
        sa.Column("key_name", sa.String(length=128), nullable=False),
        sa.Column("caller", sa.JSON(), nullable=False),
        sa.Column("payload", sa.JSON(), nullable=False),
        sa.Column("batch_documents", sa.Integer(), nullable=False),
        sa.Column("skip_invalid", sa.Boolean(), nullable=False),
        sa.Column("documents", sa.Integer(), nullable=False),
        sa.Column("documents_done", sa.Integer(), nullable=False),
        sa.Column("chunks", sa.Integer(), nullable=False),
        sa.Column("embedded", sa.Integer(), nullable=False),
        sa.Column("cached", sa.Integer(), nullable=False),
        sa.Column("results", sa.JSON(), nullable=False),
        sa.Column("errors", sa.JSON(), nullable=False),
        sa.Column("failure", sa.JSON(), nullable=True),
        sa.Column("cancel_requested", sa.Boolean(), nullable=False),
        sa.Column("worker", sa.String(length=200), nullable=True),
        sa.Column("attempts", sa.Integer(), nullable=False),
        sa.Column("lease_expires_at", sa.DateTime(timezone=True), nullable=True),
        sa.Column("created_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("started_at", sa.DateTime(timezone=True), nullable=True),
        sa.Column("finished_at", sa.DateTime(timezone=True), nullable=True),
        sa.PrimaryKeyConstraint("id"),
    )
    op.create_index("ix_jobs_state_created", "jobs", ["state", "created_at"])
    op.create_index("ix_jobs_key_created", "jobs", ["key_id", "created_at"])


def downgrade() -> None:
    op.drop_index("ix_jobs_key_created", table_name="jobs")
    op.drop_index("ix_jobs_state_created", table_name="jobs")
    op.drop_table("jobs")
