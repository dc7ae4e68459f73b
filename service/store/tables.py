"""The store's tables (SQLAlchemy 2.0 declarative). The schema itself exists only through the
Alembic migrations in ``migrations/``; a test keeps these models and the migrations equal.

Strings that filters compare use binary collation (``C`` on PostgreSQL, SQLite's default
``BINARY``) so that both databases order text by code point, as the in-memory engine does.
"""

from __future__ import annotations

import datetime as dt
from typing import Any

from sqlalchemy import (
    JSON,
    BigInteger,
    Boolean,
    DateTime,
    Float,
    ForeignKey,
    Index,
    Integer,
    LargeBinary,
    String,
    Text,
    UniqueConstraint,
)
from sqlalchemy.orm import DeclarativeBase, Mapped, mapped_column
from sqlalchemy.types import TypeDecorator


class UtcDateTime(TypeDecorator[dt.datetime]):
    """Timezone-aware UTC datetimes on both databases (SQLite keeps no offset)."""

    impl = DateTime(timezone=True)
    cache_ok = True

    def process_bind_param(self, value: dt.datetime | None, dialect: Any) -> dt.datetime | None:
        if value is None:
            return None
        if value.tzinfo is None:
            raise ValueError("naive datetimes are not stored")
        return value.astimezone(dt.UTC)

    def process_result_value(self, value: dt.datetime | None, dialect: Any) -> dt.datetime | None:
        if value is None:
            return None
        if value.tzinfo is None:
            return value.replace(tzinfo=dt.UTC)
        return value.astimezone(dt.UTC)


def binary_text(length: int | None = None) -> Any:
    """A string column compared by code point on every backend."""
    base = String(length) if length else Text()
    return base.with_variant(String(length, collation="C"), "postgresql")


class Base(DeclarativeBase):
    pass


class CollectionRow(Base):
    __tablename__ = "collections"

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    name: Mapped[str] = mapped_column(binary_text(63), unique=True)
    description: Mapped[str] = mapped_column(Text, default="")
    attributes: Mapped[dict[str, Any]] = mapped_column(JSON)
    chunking: Mapped[dict[str, Any]] = mapped_column(JSON)
    cite_attributes: Mapped[list[str]] = mapped_column(JSON)
    answer_caution: Mapped[str | None] = mapped_column(Text, nullable=True)
    settings: Mapped[dict[str, Any]] = mapped_column(JSON)
    embedder: Mapped[str] = mapped_column(String(64))
    # Chunks of this generation are the ones queries see; a rebuild writes generation + 1 and
    # switches this number once every document is done.
    chunk_generation: Mapped[int] = mapped_column(Integer, default=0)
    rebuild_done: Mapped[int | None] = mapped_column(Integer, nullable=True)
    rebuild_total: Mapped[int | None] = mapped_column(Integer, nullable=True)
    revision: Mapped[int] = mapped_column(BigInteger, default=0)
    created_at: Mapped[dt.datetime] = mapped_column(UtcDateTime)
    updated_at: Mapped[dt.datetime] = mapped_column(UtcDateTime)


class DocumentRow(Base):
    __tablename__ = "documents"
    __table_args__ = (UniqueConstraint("collection_id", "external_id"),)

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    collection_id: Mapped[int] = mapped_column(
        ForeignKey("collections.id", ondelete="CASCADE"), index=True
    )
    external_id: Mapped[str] = mapped_column(binary_text(128))
    title: Mapped[str] = mapped_column(Text)
    media_type: Mapped[str] = mapped_column(String(32))
    source_url: Mapped[str | None] = mapped_column(Text, nullable=True)
    content_hash: Mapped[str] = mapped_column(String(64))
    source_text: Mapped[str] = mapped_column(Text)
    text: Mapped[str] = mapped_column(Text)
    sections: Mapped[list[Any]] = mapped_column(JSON)
    attributes: Mapped[dict[str, Any]] = mapped_column(JSON)
    access: Mapped[list[str]] = mapped_column(JSON)
    created_at: Mapped[dt.datetime] = mapped_column(UtcDateTime)
    updated_at: Mapped[dt.datetime] = mapped_column(UtcDateTime)


class DocumentGroupRow(Base):
    """One row per access group of a document, so listings can filter by access in SQL."""

    __tablename__ = "document_groups"

    document_id: Mapped[int] = mapped_column(
        ForeignKey("documents.id", ondelete="CASCADE"), primary_key=True
    )
    group_name: Mapped[str] = mapped_column(binary_text(128), primary_key=True)


class AttributeValueRow(Base):
    """One row per scalar attribute value, one per element of a keyword list.

    ``position`` is 0 for scalars, the element index for list elements, and -1 for the single
    marker row of an empty list (an empty list is a value, not NULL). A missing attribute has
    no rows at all. Integers fill both ``int_value`` and ``real_value`` so they compare with
    numbers; dates are days and datetimes microseconds since the Unix epoch in ``int_value``.
    """

    __tablename__ = "attribute_values"
    __table_args__ = (
        Index("ix_attribute_values_name_int", "name", "int_value"),
        Index("ix_attribute_values_name_real", "name", "real_value"),
        Index("ix_attribute_values_name_text", "name", "text_value"),
    )

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    document_id: Mapped[int] = mapped_column(
        ForeignKey("documents.id", ondelete="CASCADE"), index=True
    )
    name: Mapped[str] = mapped_column(binary_text(63))
    position: Mapped[int] = mapped_column(Integer)
    int_value: Mapped[int | None] = mapped_column(BigInteger, nullable=True)
    real_value: Mapped[float | None] = mapped_column(Float, nullable=True)
    bool_value: Mapped[bool | None] = mapped_column(Boolean, nullable=True)
    text_value: Mapped[str | None] = mapped_column(binary_text(), nullable=True)
    text_folded: Mapped[str | None] = mapped_column(binary_text(), nullable=True)
    text_unaccented: Mapped[str | None] = mapped_column(binary_text(), nullable=True)
    text_folded_unaccented: Mapped[str | None] = mapped_column(binary_text(), nullable=True)


class ChunkRow(Base):
    __tablename__ = "chunks"
    __table_args__ = (UniqueConstraint("document_id", "generation", "ordinal"),)

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    document_id: Mapped[int] = mapped_column(
        ForeignKey("documents.id", ondelete="CASCADE"), index=True
    )
    generation: Mapped[int] = mapped_column(Integer)
    ordinal: Mapped[int] = mapped_column(Integer)
    text: Mapped[str] = mapped_column(Text)
    char_start: Mapped[int] = mapped_column(Integer)
    char_end: Mapped[int] = mapped_column(Integer)
    tokens: Mapped[int] = mapped_column(Integer)
    section: Mapped[str] = mapped_column(Text)
    embedded_text_hash: Mapped[str] = mapped_column(String(64))


class EmbeddingRow(Base):
    """Embeddings keyed by (embedder, hash of the embedded text): the cache and the vectors."""

    __tablename__ = "embeddings"

    embedder: Mapped[str] = mapped_column(String(64), primary_key=True)
    text_hash: Mapped[str] = mapped_column(String(64), primary_key=True)
    dimensions: Mapped[int] = mapped_column(Integer)
    vector: Mapped[bytes] = mapped_column(LargeBinary)


class ChangeRow(Base):
    """The per-collection change log that lets every index catch up with writes made elsewhere."""

    __tablename__ = "changes"
    __table_args__ = (Index("ix_changes_collection_revision", "collection_id", "revision"),)

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    collection_id: Mapped[int] = mapped_column(ForeignKey("collections.id", ondelete="CASCADE"))
    revision: Mapped[int] = mapped_column(BigInteger)
    document_id: Mapped[str | None] = mapped_column(binary_text(128), nullable=True)
    operation: Mapped[str] = mapped_column(String(16))
    created_at: Mapped[dt.datetime] = mapped_column(UtcDateTime)


class ApiKeyRow(Base):
    __tablename__ = "api_keys"

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    name: Mapped[str] = mapped_column(binary_text(128), unique=True)
    lookup: Mapped[str] = mapped_column(String(32), unique=True)
    salt: Mapped[bytes] = mapped_column(LargeBinary)
    secret_hash: Mapped[bytes] = mapped_column(LargeBinary)
    role: Mapped[str] = mapped_column(String(16))
    groups: Mapped[list[str]] = mapped_column(JSON)
    collections: Mapped[list[str] | None] = mapped_column(JSON, nullable=True)
    created_at: Mapped[dt.datetime] = mapped_column(UtcDateTime)
    last_used_at: Mapped[dt.datetime | None] = mapped_column(UtcDateTime, nullable=True)
    revoked_at: Mapped[dt.datetime | None] = mapped_column(UtcDateTime, nullable=True)


class TraceRow(Base):
    """A request's trace: its whole ``body``, and the summary a listing shows without reading
    the body (``candidates`` and ``hits`` are null where the request failed before knowing
    them)."""

    __tablename__ = "traces"
    __table_args__ = (Index("ix_traces_key_id_created_at", "key_id", "created_at"),)

    id: Mapped[str] = mapped_column(String(36), primary_key=True)
    key_id: Mapped[int | None] = mapped_column(Integer, nullable=True, index=True)
    collection: Mapped[str] = mapped_column(binary_text(63))
    route: Mapped[str] = mapped_column(String(16))
    created_at: Mapped[dt.datetime] = mapped_column(UtcDateTime, index=True)
    body: Mapped[dict[str, Any]] = mapped_column(JSON)
    query: Mapped[str | None] = mapped_column(Text, nullable=True)
    candidates: Mapped[int | None] = mapped_column(Integer, nullable=True)
    hits: Mapped[int | None] = mapped_column(Integer, nullable=True)
    outcome: Mapped[str | None] = mapped_column(String(16), nullable=True)
    reason: Mapped[str | None] = mapped_column(String(64), nullable=True)
    milliseconds: Mapped[float | None] = mapped_column(Float, nullable=True)


class StoreIdentityRow(Base):
    """The one row naming this store, written by the migration that made it.

    A server remembers the id it found at start and checks it in every write transaction, so a
    store that was removed or replaced under it refuses writes instead of taking them.
    ``checked_at`` is what a readiness probe writes to learn that the store takes writes again.
    """

    __tablename__ = "store_identity"

    store_id: Mapped[str] = mapped_column(String(36), primary_key=True)
    created_at: Mapped[dt.datetime] = mapped_column(UtcDateTime)
    checked_at: Mapped[dt.datetime] = mapped_column(UtcDateTime)


class JobRow(Base):
    """A document write sent as a job: what it holds, who sent it, how far it got.

    ``payload`` is the job's input (the documents, and for the command line where each came
    from); it is read only by the worker that runs the job. ``documents_done`` moves in the same
    transaction as the batch it counts, so a job taken over after a crash resumes exactly where
    the store says it stopped. ``lease_expires_at`` is when another worker may take it over.
    """

    __tablename__ = "jobs"
    __table_args__ = (
        Index("ix_jobs_state_created", "state", "created_at"),
        Index("ix_jobs_key_created", "key_id", "created_at"),
    )

    id: Mapped[str] = mapped_column(String(36), primary_key=True)
    collection: Mapped[str] = mapped_column(binary_text(63))
    kind: Mapped[str] = mapped_column(String(16))
    state: Mapped[str] = mapped_column(String(16))
    key_id: Mapped[int | None] = mapped_column(Integer, nullable=True)
    key_name: Mapped[str] = mapped_column(String(128))
    caller: Mapped[dict[str, Any]] = mapped_column(JSON)
    payload: Mapped[dict[str, Any]] = mapped_column(JSON, deferred=True)
    batch_documents: Mapped[int] = mapped_column(Integer)
    skip_invalid: Mapped[bool] = mapped_column(Boolean)
    documents: Mapped[int] = mapped_column(Integer)
    documents_done: Mapped[int] = mapped_column(Integer, default=0)
    chunks: Mapped[int] = mapped_column(Integer, default=0)
    embedded: Mapped[int] = mapped_column(Integer, default=0)
    cached: Mapped[int] = mapped_column(Integer, default=0)
    results: Mapped[list[dict[str, Any]]] = mapped_column(JSON)
    errors: Mapped[list[dict[str, Any]]] = mapped_column(JSON)
    failure: Mapped[dict[str, Any] | None] = mapped_column(JSON, nullable=True)
    cancel_requested: Mapped[bool] = mapped_column(Boolean, default=False)
    worker: Mapped[str | None] = mapped_column(String(200), nullable=True)
    attempts: Mapped[int] = mapped_column(Integer, default=0)
    lease_expires_at: Mapped[dt.datetime | None] = mapped_column(UtcDateTime, nullable=True)
    created_at: Mapped[dt.datetime] = mapped_column(UtcDateTime)
    started_at: Mapped[dt.datetime | None] = mapped_column(UtcDateTime, nullable=True)
    finished_at: Mapped[dt.datetime | None] = mapped_column(UtcDateTime, nullable=True)
