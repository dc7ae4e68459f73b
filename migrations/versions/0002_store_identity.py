"""store identity: one row naming this store, written once when the store is made

Revision ID: 0002_store_identity
Revises: 0001
Create Date: 2026-12-03
"""

import datetime as dt
import uuid
from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

revision: str = "0002_store_identity"
down_revision: str | None = "0001"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None


def upgrade() -> None:
    table = op.create_table(
        "store_identity",
        sa.Column("store_id", sa.String(length=36), nullable=False),
        sa.Column("created_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("checked_at", sa.DateTime(timezone=True), nullable=False),
        sa.PrimaryKeyConstraint("store_id"),
    )
    now = dt.datetime.now(dt.UTC)
    op.bulk_insert(table, [{"store_id": str(uuid.uuid4()), "created_at": now, "checked_at": now}])


def downgrade() -> None:
    op.drop_table("store_identity")
