"""initial schema

Revision ID: 0001
Revises:
Create Date: 2026-12-02
"""

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

revision: str = "0001"
down_revision: str | None = None
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None


def upgrade() -> None:
    op.create_table(
        "api_keys",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column(
            "name",
            sa.String(length=128).with_variant(sa.String(length=128, collation="C"), "postgresql"),
            nullable=False,
        ),
        sa.Column("lookup", sa.String(length=32), nullable=False),
        sa.Column("salt", sa.LargeBinary(), nullable=False),
        sa.Column("secret_hash", sa.LargeBinary(), nullable=False),
        sa.Column("role", sa.String(length=16), nullable=False),
        sa.Column("groups", sa.JSON(), nullable=False),
        sa.Column("collections", sa.JSON(), nullable=True),
        sa.Column("created_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("last_used_at", sa.DateTime(timezone=True), nullable=True),
        sa.Column("revoked_at", sa.DateTime(timezone=True), nullable=True),
        sa.PrimaryKeyConstraint("id"),
        sa.UniqueConstraint("lookup"),
        sa.UniqueConstraint("name"),
    )
    op.create_table(
        "collections",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column(
            "name",
            sa.String(length=63).with_variant(sa.String(length=63, collation="C"), "postgresql"),
            nullable=False,
        ),
        sa.Column("description", sa.Text(), nullable=False),
        sa.Column("attributes", sa.JSON(), nullable=False),
        sa.Column("chunking", sa.JSON(), nullable=False),
        sa.Column("cite_attributes", sa.JSON(), nullable=False),
        sa.Column("answer_caution", sa.Text(), nullable=True),
        sa.Column("settings", sa.JSON(), nullable=False),
        sa.Column("embedder", sa.String(length=64), nullable=False),
        sa.Column("chunk_generation", sa.Integer(), nullable=False),
        sa.Column("rebuild_done", sa.Integer(), nullable=True),
        sa.Column("rebuild_total", sa.Integer(), nullable=True),
        sa.Column("revision", sa.BigInteger(), nullable=False),
        sa.Column("created_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("updated_at", sa.DateTime(timezone=True), nullable=False),
        sa.PrimaryKeyConstraint("id"),
        sa.UniqueConstraint("name"),
    )
    op.create_table(
        "embeddings",
        sa.Column("embedder", sa.String(length=64), nullable=False),
        sa.Column("text_hash", sa.String(length=64), nullable=False),
        sa.Column("dimensions", sa.Integer(), nullable=False),
        sa.Column("vector", sa.LargeBinary(), nullable=False),
        sa.PrimaryKeyConstraint("embedder", "text_hash"),
    )
    op.create_table(
        "traces",
        sa.Column("id", sa.String(length=36), nullable=False),
        sa.Column("key_id", sa.Integer(), nullable=True),
        sa.Column(
            "collection",
            sa.String(length=63).with_variant(sa.String(length=63, collation="C"), "postgresql"),
            nullable=False,
        ),
        sa.Column("route", sa.String(length=16), nullable=False),
        sa.Column("created_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("body", sa.JSON(), nullable=False),
        sa.PrimaryKeyConstraint("id"),
    )
    with op.batch_alter_table("traces", schema=None) as batch_op:
        batch_op.create_index(batch_op.f("ix_traces_created_at"), ["created_at"], unique=False)
        batch_op.create_index(batch_op.f("ix_traces_key_id"), ["key_id"], unique=False)

    op.create_table(
        "changes",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("collection_id", sa.Integer(), nullable=False),
        sa.Column("revision", sa.BigInteger(), nullable=False),
        sa.Column(
            "document_id",
            sa.String(length=128).with_variant(sa.String(length=128, collation="C"), "postgresql"),
            nullable=True,
        ),
        sa.Column("operation", sa.String(length=16), nullable=False),
        sa.Column("created_at", sa.DateTime(timezone=True), nullable=False),
        sa.ForeignKeyConstraint(["collection_id"], ["collections.id"], ondelete="CASCADE"),
        sa.PrimaryKeyConstraint("id"),
    )
    with op.batch_alter_table("changes", schema=None) as batch_op:
        batch_op.create_index(
            "ix_changes_collection_revision", ["collection_id", "revision"], unique=False
        )

    op.create_table(
        "documents",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("collection_id", sa.Integer(), nullable=False),
        sa.Column(
            "external_id",
            sa.String(length=128).with_variant(sa.String(length=128, collation="C"), "postgresql"),
            nullable=False,
        ),
        sa.Column("title", sa.Text(), nullable=False),
        sa.Column("media_type", sa.String(length=32), nullable=False),
        sa.Column("source_url", sa.Text(), nullable=True),
        sa.Column("content_hash", sa.String(length=64), nullable=False),
        sa.Column("source_text", sa.Text(), nullable=False),
        sa.Column("text", sa.Text(), nullable=False),
        sa.Column("sections", sa.JSON(), nullable=False),
        sa.Column("attributes", sa.JSON(), nullable=False),
        sa.Column("access", sa.JSON(), nullable=False),
        sa.Column("created_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("updated_at", sa.DateTime(timezone=True), nullable=False),
        sa.ForeignKeyConstraint(["collection_id"], ["collections.id"], ondelete="CASCADE"),
        sa.PrimaryKeyConstraint("id"),
        sa.UniqueConstraint("collection_id", "external_id"),
    )
    with op.batch_alter_table("documents", schema=None) as batch_op:
        batch_op.create_index(
            batch_op.f("ix_documents_collection_id"), ["collection_id"], unique=False
        )

    op.create_table(
        "attribute_values",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("document_id", sa.Integer(), nullable=False),
        sa.Column(
            "name",
            sa.String(length=63).with_variant(sa.String(length=63, collation="C"), "postgresql"),
            nullable=False,
        ),
        sa.Column("position", sa.Integer(), nullable=False),
        sa.Column("int_value", sa.BigInteger(), nullable=True),
        sa.Column("real_value", sa.Float(), nullable=True),
        sa.Column("bool_value", sa.Boolean(), nullable=True),
        sa.Column(
            "text_value",
            sa.Text().with_variant(sa.String(collation="C"), "postgresql"),
            nullable=True,
        ),
        sa.Column(
            "text_folded",
            sa.Text().with_variant(sa.String(collation="C"), "postgresql"),
            nullable=True,
        ),
        sa.Column(
            "text_unaccented",
            sa.Text().with_variant(sa.String(collation="C"), "postgresql"),
            nullable=True,
        ),
        sa.Column(
            "text_folded_unaccented",
            sa.Text().with_variant(sa.String(collation="C"), "postgresql"),
            nullable=True,
        ),
        sa.ForeignKeyConstraint(["document_id"], ["documents.id"], ondelete="CASCADE"),
        sa.PrimaryKeyConstraint("id"),
    )
    with op.batch_alter_table("attribute_values", schema=None) as batch_op:
        batch_op.create_index(
            batch_op.f("ix_attribute_values_document_id"), ["document_id"], unique=False
        )
        batch_op.create_index("ix_attribute_values_name_int", ["name", "int_value"], unique=False)
        batch_op.create_index("ix_attribute_values_name_real", ["name", "real_value"], unique=False)
        batch_op.create_index("ix_attribute_values_name_text", ["name", "text_value"], unique=False)

    op.create_table(
        "chunks",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("document_id", sa.Integer(), nullable=False),
        sa.Column("generation", sa.Integer(), nullable=False),
        sa.Column("ordinal", sa.Integer(), nullable=False),
        sa.Column("text", sa.Text(), nullable=False),
        sa.Column("char_start", sa.Integer(), nullable=False),
        sa.Column("char_end", sa.Integer(), nullable=False),
        sa.Column("tokens", sa.Integer(), nullable=False),
        sa.Column("section", sa.Text(), nullable=False),
        sa.Column("embedded_text_hash", sa.String(length=64), nullable=False),
        sa.ForeignKeyConstraint(["document_id"], ["documents.id"], ondelete="CASCADE"),
        sa.PrimaryKeyConstraint("id"),
        sa.UniqueConstraint("document_id", "generation", "ordinal"),
    )
    with op.batch_alter_table("chunks", schema=None) as batch_op:
        batch_op.create_index(batch_op.f("ix_chunks_document_id"), ["document_id"], unique=False)

    op.create_table(
        "document_groups",
        sa.Column("document_id", sa.Integer(), nullable=False),
        sa.Column(
            "group_name",
            sa.String(length=128).with_variant(sa.String(length=128, collation="C"), "postgresql"),
            nullable=False,
        ),
        sa.ForeignKeyConstraint(["document_id"], ["documents.id"], ondelete="CASCADE"),
        sa.PrimaryKeyConstraint("document_id", "group_name"),
    )


def downgrade() -> None:
    op.drop_table("document_groups")
    with op.batch_alter_table("chunks", schema=None) as batch_op:
        batch_op.drop_index(batch_op.f("ix_chunks_document_id"))

    op.drop_table("chunks")
    with op.batch_alter_table("attribute_values", schema=None) as batch_op:
        batch_op.drop_index("ix_attribute_values_name_text")
        batch_op.drop_index("ix_attribute_values_name_real")
        batch_op.drop_index("ix_attribute_values_name_int")
        batch_op.drop_index(batch_op.f("ix_attribute_values_document_id"))

    op.drop_table("attribute_values")
    with op.batch_alter_table("documents", schema=None) as batch_op:
        batch_op.drop_index(batch_op.f("ix_documents_collection_id"))

    op.drop_table("documents")
    with op.batch_alter_table("changes", schema=None) as batch_op:
        batch_op.drop_index("ix_changes_collection_revision")

    op.drop_table("changes")
    with op.batch_alter_table("traces", schema=None) as batch_op:
        batch_op.drop_index(batch_op.f("ix_traces_key_id"))
        batch_op.drop_index(batch_op.f("ix_traces_created_at"))

    op.drop_table("traces")
    op.drop_table("embeddings")
    op.drop_table("collections")
    op.drop_table("api_keys")
