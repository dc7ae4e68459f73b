"""Queries and writes over the tables, so use cases never build SQL themselves."""

from __future__ import annotations

import datetime as dt
import logging
from collections.abc import Iterable, Iterator, Sequence
from dataclasses import dataclass
from typing import Any, NamedTuple

import numpy as np
from sqlalchemy import (
    ColumnElement,
    Connection,
    Engine,
    Row,
    and_,
    bindparam,
    delete,
    exists,
    func,
    insert,
    or_,
    select,
    update,
)
from sqlalchemy.dialects import postgresql, sqlite
from sqlalchemy.orm import Session

from service.errors import StorageUnavailable
from service.store.driver_query import DriverQuery
from service.store.identity import StoreGuard
from service.store.tables import (
    ApiKeyRow,
    AttributeValueRow,
    ChangeRow,
    ChunkRow,
    CollectionRow,
    DocumentGroupRow,
    DocumentRow,
    EmbeddingRow,
    StoreIdentityRow,
    TraceRow,
)

log = logging.getLogger("excerpta.store")


def utcnow() -> dt.datetime:
    return dt.datetime.now(dt.UTC)


# Collections ------------------------------------------------------------------------------------


def collection_by_name(session: Session, name: str) -> CollectionRow | None:
    return session.scalars(select(CollectionRow).where(CollectionRow.name == name)).first()


def lock_collection(session: Session, name: str) -> CollectionRow | None:
    """The named collection, read under its row lock (PostgreSQL's ``FOR UPDATE``).

    Every write to a collection's documents, and every change of the collection itself, takes
    this lock before it reads anything else, so writers of one collection run one at a time and
    always lock in the same order: the collection, then its rows. (SQLite has no row locks and
    needs none: a write transaction holds the database's write lock from its start.)
    """
    return session.scalars(
        select(CollectionRow).where(CollectionRow.name == name).with_for_update()
    ).first()


def lock_collection_names(session: Session) -> None:
    """The lock a collection's creation takes (the store's identity row), so that two
    creations of one name run one after the other instead of one failing on the unique name."""
    session.execute(select(StoreIdentityRow.store_id).with_for_update())


def all_collections(session: Session) -> list[CollectionRow]:
    return list(session.scalars(select(CollectionRow).order_by(CollectionRow.name)))


def bump_revision(
    session: Session, collection: CollectionRow, operations: Iterable[tuple[str | None, str]]
) -> int:
    """Advance the collection's revision once and log each (document id, operation) under it.

    The UPDATE takes the row lock first, so concurrent writers (threads, the CLI, replicas)
    serialise on it and every revision number is used exactly once.
    """
    session.execute(
        update(CollectionRow)
        .where(CollectionRow.id == collection.id)
        .values(revision=CollectionRow.revision + 1, updated_at=utcnow())
    )
    revision = session.scalar(
        select(CollectionRow.revision).where(CollectionRow.id == collection.id)
    )
    assert revision is not None
    collection.revision = revision
    now = utcnow()
    session.add_all(
        ChangeRow(
            collection_id=collection.id,
            revision=revision,
            document_id=document_id,
            operation=operation,
            created_at=now,
        )
        for document_id, operation in operations
    )
    return revision


def collection_state(
    session: Session, collection_id: int
) -> Row[dt.datetime, int, list[str], str | None, dict[str, Any]] | None:
    """The parts of a collection a query reads that can change without a new revision, and
    when it was made (another collection may have taken a deleted one's id)."""
    return session.execute(
        select(
            CollectionRow.created_at,
            CollectionRow.revision,
            CollectionRow.cite_attributes,
            CollectionRow.answer_caution,
            CollectionRow.settings,
        ).where(CollectionRow.id == collection_id)
    ).first()


def changes_since(session: Session, collection_id: int, revision: int) -> list[ChangeRow]:
    return list(
        session.scalars(
            select(ChangeRow)
            .where(ChangeRow.collection_id == collection_id, ChangeRow.revision > revision)
            .order_by(ChangeRow.revision, ChangeRow.id)
        )
    )


# Documents --------------------------------------------------------------------------------------


def documents_by_external_id(
    session: Session, collection_id: int, external_ids: Sequence[str]
) -> dict[str, DocumentRow]:
    found: dict[str, DocumentRow] = {}
    for start in range(0, len(external_ids), 500):
        part = external_ids[start : start + 500]
        rows = session.scalars(
            select(DocumentRow).where(
                DocumentRow.collection_id == collection_id, DocumentRow.external_id.in_(part)
            )
        )
        found.update((row.external_id, row) for row in rows)
    return found


def visible_condition(groups: frozenset[str] | None) -> ColumnElement[bool] | None:
    """SQL for "the caller may see this document"; None means everything (an admin)."""
    if groups is None:
        return None
    has_groups = exists().where(DocumentGroupRow.document_id == DocumentRow.id)
    if not groups:
        return ~has_groups
    shares_group = exists().where(
        DocumentGroupRow.document_id == DocumentRow.id,
        DocumentGroupRow.group_name.in_(sorted(groups)),
    )
    return or_(~has_groups, shares_group)


def _document_conditions(
    collection_id: int,
    groups: frozenset[str] | None,
    condition: ColumnElement[bool] | None = None,
) -> list[ColumnElement[bool]]:
    """The documents of a collection that the caller sees and, if given, the filter matches."""
    conditions: list[ColumnElement[bool]] = [DocumentRow.collection_id == collection_id]
    visible = visible_condition(groups)
    if visible is not None:
        conditions.append(visible)
    if condition is not None:
        conditions.append(condition)
    return conditions


def count_documents(
    session: Session, collection_id: int, groups: frozenset[str] | None
) -> tuple[int, int]:
    """Documents and live chunks of the current generation the caller can see."""
    conditions = _document_conditions(collection_id, groups)
    documents = session.scalar(select(func.count(DocumentRow.id)).where(*conditions)) or 0
    generation = select(CollectionRow.chunk_generation).where(CollectionRow.id == collection_id)
    chunks = (
        session.scalar(
            select(func.count(ChunkRow.id))
            .join(DocumentRow, ChunkRow.document_id == DocumentRow.id)
            .where(*conditions, ChunkRow.generation == generation.scalar_subquery())
        )
        or 0
    )
    return documents, chunks


def count_matching_documents(
    session: Session,
    collection_id: int,
    *,
    groups: frozenset[str] | None,
    condition: ColumnElement[bool] | None,
) -> int:
    conditions = _document_conditions(collection_id, groups, condition)
    return session.scalar(select(func.count(DocumentRow.id)).where(*conditions)) or 0


def list_documents(
    session: Session,
    collection_id: int,
    *,
    groups: frozenset[str] | None,
    condition: ColumnElement[bool] | None,
    after: str | None,
    limit: int,
) -> list[DocumentRow]:
    conditions = _document_conditions(collection_id, groups, condition)
    if after is not None:
        conditions.append(DocumentRow.external_id > after)
    query = select(DocumentRow).where(*conditions).order_by(DocumentRow.external_id).limit(limit)
    return list(session.scalars(query))


def matching_document_ids(
    session: Session,
    collection_id: int,
    *,
    groups: frozenset[str] | None,
    condition: ColumnElement[bool] | None,
) -> list[tuple[int, str]]:
    conditions = _document_conditions(collection_id, groups, condition)
    rows = session.execute(select(DocumentRow.id, DocumentRow.external_id).where(*conditions))
    return [(row[0], row[1]) for row in rows]


def delete_documents(session: Session, document_pks: Sequence[int]) -> None:
    for start in range(0, len(document_pks), 500):
        part = list(document_pks[start : start + 500])
        # Children first: SQLite's foreign-key cascade is on, but explicit deletes keep the
        # behaviour identical on every backend and connection.
        session.execute(delete(ChunkRow).where(ChunkRow.document_id.in_(part)))
        session.execute(delete(AttributeValueRow).where(AttributeValueRow.document_id.in_(part)))
        session.execute(delete(DocumentGroupRow).where(DocumentGroupRow.document_id.in_(part)))
        session.execute(delete(DocumentRow).where(DocumentRow.id.in_(part)))


def documents_with_attributes(
    session: Session, collection_id: int, names: Sequence[str]
) -> list[DocumentRow]:
    """The collection's documents holding a value for any of the named attributes."""
    holders = (
        select(AttributeValueRow.document_id)
        .where(AttributeValueRow.name.in_(sorted(names)))
        .distinct()
    )
    query = select(DocumentRow).where(
        DocumentRow.collection_id == collection_id, DocumentRow.id.in_(holders)
    )
    return list(session.scalars(query.order_by(DocumentRow.id)))


def delete_attribute_values(
    session: Session, document_pks: Sequence[int], names: Sequence[str]
) -> None:
    for start in range(0, len(document_pks), 500):
        part = list(document_pks[start : start + 500])
        session.execute(
            delete(AttributeValueRow).where(
                AttributeValueRow.document_id.in_(part), AttributeValueRow.name.in_(sorted(names))
            )
        )


def replace_document_children(
    session: Session,
    document: DocumentRow,
    *,
    attribute_rows: Sequence[dict[str, Any]],
    groups: Sequence[str],
) -> None:
    session.execute(delete(AttributeValueRow).where(AttributeValueRow.document_id == document.id))
    session.execute(delete(DocumentGroupRow).where(DocumentGroupRow.document_id == document.id))
    session.add_all(AttributeValueRow(document_id=document.id, **row) for row in attribute_rows)
    session.add_all(DocumentGroupRow(document_id=document.id, group_name=g) for g in groups)


def replace_chunks(
    session: Session, document_pk: int, generation: int, chunks: Sequence[dict[str, Any]]
) -> None:
    session.execute(
        delete(ChunkRow).where(
            ChunkRow.document_id == document_pk, ChunkRow.generation == generation
        )
    )
    session.add_all(ChunkRow(document_id=document_pk, generation=generation, **c) for c in chunks)


def chunk_counts(session: Session, document_pks: Sequence[int], generation: int) -> dict[int, int]:
    """Chunks of each document in one generation, in one query per 500 documents."""
    counts: dict[int, int] = {}
    for start in range(0, len(document_pks), 500):
        part = list(document_pks[start : start + 500])
        rows = session.execute(
            select(ChunkRow.document_id, func.count(ChunkRow.id))
            .where(ChunkRow.document_id.in_(part), ChunkRow.generation == generation)
            .group_by(ChunkRow.document_id)
        )
        counts.update((document_pk, count) for document_pk, count in rows)
    return counts


def chunks_of(session: Session, document_pk: int, generation: int) -> list[ChunkRow]:
    return list(
        session.scalars(
            select(ChunkRow)
            .where(ChunkRow.document_id == document_pk, ChunkRow.generation == generation)
            .order_by(ChunkRow.ordinal)
        )
    )


def documents_without_generation(
    session: Session, collection_id: int, generation: int, limit: int
) -> list[DocumentRow]:
    has_chunks = exists().where(
        ChunkRow.document_id == DocumentRow.id, ChunkRow.generation == generation
    )
    return list(
        session.scalars(
            select(DocumentRow)
            .where(DocumentRow.collection_id == collection_id, ~has_chunks)
            .order_by(DocumentRow.id)
            .limit(limit)
        )
    )


def drop_generations_except(session: Session, collection_id: int, generation: int) -> None:
    document_ids = select(DocumentRow.id).where(DocumentRow.collection_id == collection_id)
    session.execute(
        delete(ChunkRow).where(
            ChunkRow.document_id.in_(document_ids), ChunkRow.generation != generation
        )
    )


# Rows fetched at a time while an index is read from the store.
INDEX_ROWS_PER_FETCH = 2_000


def index_rows(
    session: Session, collection_id: int, generation: int, external_ids: Sequence[str] | None
) -> Iterator[tuple[DocumentRow, ChunkRow, bytes]]:
    """Every chunk of the generation with its document and vector, for building an index;
    ``external_ids`` narrows it to those documents.

    One statement, so each document and its chunks come from one snapshot even under
    PostgreSQL's READ COMMITTED; and documents are re-read even when the session already holds
    them, since an object from an earlier statement may be of an older version. The rows are
    fetched a slice at a time as they are consumed, so a large collection is never held whole
    as rows; the session must stay open until they are.
    """
    query = (
        select(DocumentRow, ChunkRow, EmbeddingRow.vector)
        .join(ChunkRow, ChunkRow.document_id == DocumentRow.id)
        # The collection is joined before the embeddings, whose condition names it: PostgreSQL
        # refuses a join condition on a table that comes later in the FROM clause.
        .join(CollectionRow, CollectionRow.id == DocumentRow.collection_id)
        .join(
            EmbeddingRow,
            (EmbeddingRow.text_hash == ChunkRow.embedded_text_hash)
            & (EmbeddingRow.embedder == CollectionRow.embedder),
        )
        .where(DocumentRow.collection_id == collection_id, ChunkRow.generation == generation)
        .order_by(DocumentRow.id, ChunkRow.ordinal)
        .execution_options(populate_existing=True, yield_per=INDEX_ROWS_PER_FETCH)
    )
    if external_ids is not None:
        query = query.where(DocumentRow.external_id.in_(list(external_ids)))
    for row in session.execute(query):
        yield row[0], row[1], row[2]


# Embeddings -------------------------------------------------------------------------------------


def cached_embeddings(
    session: Session, embedder: str, hashes: Sequence[str]
) -> dict[str, np.ndarray]:
    found: dict[str, np.ndarray] = {}
    unique = sorted(set(hashes))
    for start in range(0, len(unique), 500):
        part = unique[start : start + 500]
        rows = session.execute(
            select(EmbeddingRow.text_hash, EmbeddingRow.vector).where(
                EmbeddingRow.embedder == embedder, EmbeddingRow.text_hash.in_(part)
            )
        )
        for text_hash, blob in rows:
            found[text_hash] = np.frombuffer(blob, dtype=np.float32)
    return found


def store_embeddings(session: Session, embedder: str, vectors: dict[str, np.ndarray]) -> None:
    """Insert each embedding, or keep the row already there: another writer may store the same
    text at the same moment, and the first one stored is the one every index uses.

    Rows go in hash order, so two writers storing overlapping sets lock the same keys in the
    same order and can never deadlock each other.
    """
    if not vectors:
        return
    dialect = postgresql if session.get_bind().dialect.name == "postgresql" else sqlite
    rows = [
        {
            "embedder": embedder,
            "text_hash": text_hash,
            "dimensions": int(vectors[text_hash].shape[0]),
            "vector": np.asarray(vectors[text_hash], dtype=np.float32).tobytes(),
        }
        for text_hash in sorted(vectors)
    ]
    for start in range(0, len(rows), 500):
        session.execute(
            dialect.insert(EmbeddingRow.__table__).on_conflict_do_nothing(),
            rows[start : start + 500],
        )


# Keys and traces --------------------------------------------------------------------------------


# Every query authenticates and records a trace, so those statements are built once: the key
# lookup runs on the driver's cursor (see ``driver_query``), the trace insert on a plain
# connection; building a statement, or going through an ORM session, costs several times as
# much as running it.


class StoredKey(NamedTuple):
    id: int
    name: str
    salt: bytes
    secret_hash: bytes
    role: str
    groups: list[str]
    collections: list[str] | None
    last_used_at: dt.datetime | None
    revoked_at: dt.datetime | None


# The columns in ``StoredKey``'s order, so a row unpacks into it field by field.
_KEY_FOR_LOOKUP = select(*(getattr(ApiKeyRow, name) for name in StoredKey._fields)).where(
    ApiKeyRow.lookup == bindparam("lookup")
)
_INSERT_TRACE = insert(TraceRow)


class KeyReader:
    """The key check every request runs, and the rare write that marks a key used."""

    def __init__(self, engine: Engine, store: StoreGuard) -> None:
        self._engine = engine
        self._store = store
        self._lookup = DriverQuery(engine, _KEY_FOR_LOOKUP)

    def by_lookup(self, lookup: str) -> StoredKey | None:
        try:
            row = self._lookup.first({"lookup": lookup})
        except Exception as exc:
            error = self._store.explain(exc)
            if error is None:
                raise
            raise error from exc
        return None if row is None else StoredKey(*row)

    def mark_used(self, key_id: int, when: dt.datetime) -> None:
        """Note a key's use. It is bookkeeping: a store that refuses writes (full, read-only,
        gone) does not fail the request for it; the failure is logged and kept for /readyz."""
        try:
            with self._engine.begin() as connection:
                self._store.check(connection)
                connection.execute(
                    update(ApiKeyRow).where(ApiKeyRow.id == key_id).values(last_used_at=when)
                )
        except StorageUnavailable as exc:
            self._store.failed(exc.message)
            log.warning("a key's last use was not recorded: %s", exc.message)
        except Exception as exc:
            error = self._store.explain(exc)
            if error is None:
                raise
            log.warning("a key's last use was not recorded: %s", error.message)


def insert_traces(connection: Connection, rows: list[dict[str, Any]]) -> None:
    """Rows of ``id``, ``key_id``, ``collection``, ``route``, ``created_at``, ``body`` and the
    summary columns."""
    connection.execute(_INSERT_TRACE, rows)


def key_by_name(session: Session, name: str) -> ApiKeyRow | None:
    return session.scalars(select(ApiKeyRow).where(ApiKeyRow.name == name)).first()


def all_keys(session: Session) -> list[ApiKeyRow]:
    return list(session.scalars(select(ApiKeyRow).order_by(ApiKeyRow.created_at, ApiKeyRow.id)))


def trace_by_id(session: Session, trace_id: str) -> TraceRow | None:
    return session.get(TraceRow, trace_id)


@dataclass(frozen=True, kw_only=True)
class TraceCriteria:
    """Which traces a listing shows: ``owner`` None means every key's; ``since`` inclusive,
    ``until`` exclusive; ``before`` the (created_at, id) a page continues after."""

    owner: int | None
    collection: str | None
    route: str | None
    since: dt.datetime | None
    until: dt.datetime | None
    before: tuple[dt.datetime, str] | None


_SUMMARY_COLUMNS = (
    TraceRow.id,
    TraceRow.key_id,
    TraceRow.collection,
    TraceRow.route,
    TraceRow.created_at,
    TraceRow.query,
    TraceRow.candidates,
    TraceRow.hits,
    TraceRow.outcome,
    TraceRow.reason,
    TraceRow.milliseconds,
)


def trace_summaries(
    session: Session, criteria: TraceCriteria, *, limit: int
) -> list[dict[str, Any]]:
    """Summary columns of the matching traces, newest first (ties by id, descending)."""
    statement = select(*_SUMMARY_COLUMNS)
    if criteria.owner is not None:
        statement = statement.where(TraceRow.key_id == criteria.owner)
    if criteria.collection is not None:
        statement = statement.where(TraceRow.collection == criteria.collection)
    if criteria.route is not None:
        statement = statement.where(TraceRow.route == criteria.route)
    if criteria.since is not None:
        statement = statement.where(TraceRow.created_at >= criteria.since)
    if criteria.until is not None:
        statement = statement.where(TraceRow.created_at < criteria.until)
    if criteria.before is not None:
        created, trace_id = criteria.before
        statement = statement.where(
            or_(
                TraceRow.created_at < created,
                and_(TraceRow.created_at == created, TraceRow.id < trace_id),
            )
        )
    statement = statement.order_by(TraceRow.created_at.desc(), TraceRow.id.desc()).limit(limit)
    return [dict(row._mapping) for row in session.execute(statement)]


def prune_traces(session: Session, *, older_than: dt.datetime, keep: int) -> None:
    session.execute(delete(TraceRow).where(TraceRow.created_at < older_than))
    cutoff = session.scalar(
        select(TraceRow.created_at).order_by(TraceRow.created_at.desc()).offset(keep).limit(1)
    )
    if cutoff is not None:
        session.execute(delete(TraceRow).where(TraceRow.created_at <= cutoff))
