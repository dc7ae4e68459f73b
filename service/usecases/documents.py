"""Ingesting, reading, listing and deleting documents.

A batch is validated whole before anything is written; parsing, chunking and embedding happen
before the write transaction opens, and the transaction replaces each document's rows at once,
so a reader sees the old version or the new one and a rejected batch leaves the store as it was.
"""

from __future__ import annotations

import json
import re
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from functools import partial
from typing import Any

import numpy as np
from sqlalchemy.orm import Session

from service.attributes import (
    AttributeValue,
    AttributeValueError,
    Schema,
    normalize_value,
    to_json_value,
)
from service.embedding.base import Embedder
from service.errors import (
    Busy,
    DocumentNotFound,
    InvalidDocuments,
    InvalidRequest,
    LimitExceeded,
)
from service.filters.check import check_filter
from service.filters.parse import parse_filter
from service.index.records import chunk_id
from service.store import repository
from service.store.attribute_rows import attribute_value_rows
from service.store.failures import BUSY_MESSAGE
from service.store.filter_sql import compile_filter
from service.store.tables import CollectionRow, DocumentRow
from service.usecases.callers import Caller, Role
from service.usecases.collections import attribute_schema, load_collection, lock_collection
from service.usecases.drafts import (
    MaterialisedDocument,
    PreparedDocument,
    Vectors,
    chunk_rows,
    content_hash,
    embed_drafts,
    materialise,
)
from service.usecases.runtime import Runtime

DOCUMENT_ID = re.compile(r"[A-Za-z0-9._:-]{1,128}")
MEDIA_TYPES = ("text/plain", "text/markdown", "text/html")
DOCUMENT_FIELDS = {"id", "title", "text", "media_type", "source_url", "attributes", "access"}
_WORD = re.compile(r"\w", re.UNICODE)
_GROUP = re.compile(r"[A-Za-z0-9._:-]{1,128}")


class DocumentProblem(ValueError):
    def __init__(self, reason: str, message: str) -> None:
        super().__init__(message)
        self.reason = reason
        self.message = message


def prepare_document(raw: Any, index: int, schema: Schema) -> PreparedDocument:
    if not isinstance(raw, dict):
        raise DocumentProblem("invalid_document", "Each document must be a JSON object.")
    unknown = sorted(set(raw) - DOCUMENT_FIELDS)
    if unknown:
        raise DocumentProblem("unknown_field", f"Documents have no field {unknown[0]!r}.")
    external_id = raw.get("id")
    if not isinstance(external_id, str) or not DOCUMENT_ID.fullmatch(external_id):
        raise DocumentProblem("invalid_id", "The id must match [A-Za-z0-9._:-]{1,128}.")
    text = raw.get("text")
    if not isinstance(text, str) or not _WORD.search(text):
        raise DocumentProblem("missing_text", "The text must hold at least one word.")
    _check_text(text, "text")
    title = raw.get("title", external_id)
    if title is None:
        title = external_id
    if not isinstance(title, str) or len(title) > 1000:
        raise DocumentProblem(
            "invalid_title", "The title must be a string of at most 1000 characters."
        )
    _check_text(title, "title")
    title = " ".join(title.split()) or external_id
    media_type = raw.get("media_type", "text/plain")
    if media_type not in MEDIA_TYPES:
        raise DocumentProblem(
            "invalid_media_type", "The media_type must be text/plain, text/markdown or text/html."
        )
    source_url = raw.get("source_url")
    if source_url is not None and (not isinstance(source_url, str) or len(source_url) > 2000):
        raise DocumentProblem(
            "invalid_source_url", "The source_url must be a string of at most 2000 characters."
        )
    if isinstance(source_url, str):
        _check_text(source_url, "source_url")
    attributes_raw = raw.get("attributes") or {}
    if not isinstance(attributes_raw, dict):
        raise DocumentProblem("invalid_attributes", "The attributes must be a JSON object.")
    attributes: dict[str, AttributeValue] = {}
    for name, value in attributes_raw.items():
        if name not in schema:
            known = ", ".join(sorted(schema)) or "none"
            raise DocumentProblem(
                "unknown_attribute",
                f"Attribute {name!r} is not in the collection's schema (known: {known}).",
            )
        if value is None:
            continue
        try:
            attributes[name] = normalize_value(name, schema[name], value)
        except AttributeValueError as exc:
            raise DocumentProblem(
                "invalid_attribute", f"{str(exc)[0].upper()}{str(exc)[1:]}."
            ) from None
    access_raw = raw.get("access") or []
    if not isinstance(access_raw, list) or not all(
        isinstance(g, str) and _GROUP.fullmatch(g) for g in access_raw
    ):
        raise DocumentProblem(
            "invalid_access",
            "The access list must hold group names matching [A-Za-z0-9._:-]{1,128}.",
        )
    access = tuple(sorted(set(access_raw)))
    attributes_json = {name: to_json_value(attributes[name]) for name in sorted(attributes)}
    return PreparedDocument(
        index=index,
        external_id=external_id,
        title=title,
        media_type=media_type,
        source_url=source_url,
        source_text=text,
        attributes=attributes,
        attributes_json=attributes_json,
        access=access,
        content_hash=content_hash(
            title=title,
            text=text,
            media_type=media_type,
            source_url=source_url,
            attributes_json=attributes_json,
            access=access,
        ),
    )


def _check_text(value: str, field: str) -> None:
    if "\x00" in value:
        raise DocumentProblem("invalid_text", f"The {field} must not contain NUL characters.")
    try:
        value.encode("utf-8")
    except UnicodeEncodeError:
        raise DocumentProblem("invalid_text", f"The {field} is not valid Unicode text.") from None


def check_batch_limits(runtime: Runtime, documents: Sequence[Any]) -> None:
    """What a batch is refused for before it becomes a job: no documents, too many, too long."""
    if not documents:
        raise InvalidRequest("The batch must hold at least one document.", field="documents")
    settings = runtime.settings
    if len(documents) > settings.max_batch_documents:
        raise LimitExceeded(
            f"A batch may hold at most {settings.max_batch_documents} documents.",
            limit="batch_documents",
        )
    for raw in documents:
        text = raw.get("text") if isinstance(raw, dict) else None
        if isinstance(text, str) and len(text.encode("utf-8", "surrogatepass")) > (
            settings.max_document_text_bytes
        ):
            raise LimitExceeded(
                f"A document's text may hold at most {settings.max_document_text_bytes} bytes.",
                limit="document_text_bytes",
            )


@dataclass(frozen=True)
class CollectionLayout:
    """What a batch is prepared against: a write that finds another layout prepares again."""

    collection_id: int
    attributes: dict[str, Any]
    chunking: dict[str, int]
    pending: dict[str, int] | None
    generation: int

    @classmethod
    def of(cls, row: CollectionRow) -> CollectionLayout:
        return cls(
            collection_id=row.id,
            attributes=dict(row.attributes),
            chunking=dict(row.chunking),
            pending=row.settings.get("pending_chunking"),
            generation=row.chunk_generation,
        )


@dataclass(frozen=True)
class PreparedBatch:
    """A validated batch with the chunks and vectors of every document it would change."""

    layout: CollectionLayout
    documents: tuple[PreparedDocument, ...]
    built: Mapping[str, MaterialisedDocument]
    rebuilt: Mapping[str, MaterialisedDocument]
    vectors: Vectors


class _StalePreparation(Exception):
    """Another write changed the collection's layout, or a document the batch took as
    unchanged, between the batch's preparation and its write."""


# A batch raced by writes that keep changing what it depends on is prepared at most this often.
MAX_PREPARATIONS = 5
_Materials = dict[tuple[str, str, str], MaterialisedDocument]


# Called inside a batch's write transaction with its results and vectors, so whatever it
# records (a job's progress) commits or rolls back with the batch.
WrittenHook = Callable[[Session, list[dict[str, Any]], "Vectors"], None]


def upsert_documents(
    runtime: Runtime,
    caller: Caller,
    collection: str,
    documents: Sequence[Any],
    *,
    embedder: Embedder | None = None,
    on_written: WrittenHook | None = None,
) -> list[dict[str, Any]]:
    """Validate the whole batch, then write every changed document in one transaction.

    Parsing, chunking and embedding happen first, outside any lock. The write transaction then
    takes the collection's write lock before it reads the documents it replaces and writes only
    what the batch was prepared against; when another write got in between and changed that,
    the batch is prepared again (the chunks and vectors already made are kept). ``embedder``
    stands in for the runtime's (a job's embedder reports its progress).
    """
    caller.require(Role.WRITER)
    check_batch_limits(runtime, documents)
    model = embedder or runtime.embedder
    materials: _Materials = {}
    for _ in range(MAX_PREPARATIONS):
        batch = _prepare_batch(runtime, model, caller, collection, documents, materials)
        try:
            results, revision, vectors = runtime.retries.run(
                partial(_write_batch, runtime, caller, collection, batch, on_written)
            )
        except _StalePreparation:
            continue
        changed = {r["id"] for r in results if r["status"] != "unchanged"}
        runtime.metrics.observe_written(
            [r["status"] for r in results],
            sum(r["chunks"] for r in results if r["id"] in changed),
        )
        if revision is not None:
            runtime.indexes.after_write(
                collection,
                revision,
                {doc_id: (batch.built[doc_id], vectors) for doc_id in sorted(changed)},
            )
        return results
    raise Busy(BUSY_MESSAGE)


def _prepare_batch(
    runtime: Runtime,
    embedder: Embedder,
    caller: Caller,
    collection: str,
    documents: Sequence[Any],
    materials: _Materials,
) -> PreparedBatch:
    """Validate against the collection as it is now, then chunk and embed what would change."""
    with runtime.transaction() as session:
        # A write checks its store before it reads: a replaced store has other collections.
        runtime.store.check(session)
        row = load_collection(session, caller, collection)
        layout = CollectionLayout.of(row)
        prepared, problems = _validated(documents, attribute_schema(row))
        existing = repository.documents_by_external_id(
            session, row.id, [d.external_id for d in prepared]
        )
        hashes = {doc_id: (d.content_hash, tuple(d.access)) for doc_id, d in existing.items()}
    _reject(documents, problems + _not_writable(caller, prepared, hashes))
    changed = [d for d in prepared if hashes.get(d.external_id, ("",))[0] != d.content_hash]

    def built_with(chunking: Mapping[str, int]) -> dict[str, MaterialisedDocument]:
        key = json.dumps(chunking, sort_keys=True)
        made = {}
        for doc in changed:
            cached = (doc.external_id, doc.content_hash, key)
            if cached not in materials:
                materials[cached] = materialise(embedder, doc, chunking)
            made[doc.external_id] = materials[cached]
        return made

    built = built_with(layout.chunking)
    rebuilt = built_with(layout.pending) if layout.pending else {}
    drafts = [c for m in (*built.values(), *rebuilt.values()) for c in m.chunks]
    with runtime.transaction() as session:
        vectors = embed_drafts(embedder, session, drafts)
    if vectors.fresh:
        runtime.metrics.observe_embedding("documents", len(vectors.fresh), vectors.model_seconds)
    return PreparedBatch(layout, tuple(prepared), built, rebuilt, vectors)


def check_documents(
    runtime: Runtime, caller: Caller, collection: str, documents: Sequence[Any]
) -> None:
    """Refuse the whole list when any document is invalid, before any of it is written: a job
    writes its documents in batches, but a request is accepted or refused whole."""
    with runtime.transaction() as session:
        # A write checks its store before it reads: a replaced store has other collections.
        runtime.store.check(session)
        row = load_collection(session, caller, collection)
        prepared, problems = _validated(documents, attribute_schema(row))
        existing = repository.documents_by_external_id(
            session, row.id, [d.external_id for d in prepared]
        )
        stored = {doc_id: (d.content_hash, tuple(d.access)) for doc_id, d in existing.items()}
    _reject(documents, problems + _not_writable(caller, prepared, stored))


def _validated(
    documents: Sequence[Any], schema: Schema
) -> tuple[list[PreparedDocument], list[dict[str, Any]]]:
    problems: list[dict[str, Any]] = []
    prepared: list[PreparedDocument] = []
    seen: set[str] = set()
    for index, raw in enumerate(documents):
        raw_id = raw.get("id") if isinstance(raw, dict) else None
        try:
            doc = prepare_document(raw, index, schema)
        except DocumentProblem as problem:
            problems.append(_problem(raw_id, index, problem.reason, problem.message))
            continue
        if doc.external_id in seen:
            problems.append(
                _problem(
                    doc.external_id, index, "duplicate_id", "The id appears twice in the batch."
                )
            )
            continue
        seen.add(doc.external_id)
        prepared.append(doc)
    return prepared, problems


def _not_writable(
    caller: Caller,
    prepared: Sequence[PreparedDocument],
    stored: Mapping[str, tuple[str, tuple[str, ...]]],
) -> list[dict[str, Any]]:
    """A problem for each document that exists hidden from the caller (``stored``: id ->
    (content hash, access))."""
    return [
        _problem(
            doc.external_id,
            doc.index,
            "not_writable",
            "The document exists and this key may not change it.",
        )
        for doc in prepared
        if doc.external_id in stored and not caller.may_see(list(stored[doc.external_id][1]))
    ]


def _reject(documents: Sequence[Any], problems: list[dict[str, Any]]) -> None:
    if problems:
        problems.sort(key=lambda p: p["index"])
        raise InvalidDocuments(
            f"{len(problems)} of {len(documents)} documents are invalid; nothing was written.",
            documents=problems,
        )


def _write_batch(
    runtime: Runtime,
    caller: Caller,
    collection: str,
    batch: PreparedBatch,
    on_written: WrittenHook | None,
) -> tuple[list[dict[str, Any]], int | None, dict[str, np.ndarray]]:
    """One attempt at the write: (results, the new revision or None when nothing changed, the
    vectors as stored)."""
    with runtime.write_transaction() as session:
        row = lock_collection(session, caller, collection)
        if CollectionLayout.of(row) != batch.layout:
            raise _StalePreparation
        current = repository.documents_by_external_id(
            session, row.id, [d.external_id for d in batch.documents]
        )
        stored = {doc_id: (d.content_hash, tuple(d.access)) for doc_id, d in current.items()}
        _reject(batch.documents, _not_writable(caller, batch.documents, stored))
        changed = [
            d for d in batch.documents if stored.get(d.external_id, ("",))[0] != d.content_hash
        ]
        if any(d.external_id not in batch.built for d in changed):
            raise _StalePreparation
        changed_ids = {d.external_id for d in changed}
        vectors = batch.vectors.stored(session, runtime.embedder.name) if changed else {}
        unchanged_chunks = repository.chunk_counts(
            session,
            [
                current[d.external_id].id
                for d in batch.documents
                if d.external_id not in changed_ids
            ],
            row.chunk_generation,
        )
        now = repository.utcnow()
        schema = attribute_schema(row)
        results: list[dict[str, Any]] = []
        for doc in batch.documents:
            if doc.external_id not in changed_ids:
                chunks = unchanged_chunks.get(current[doc.external_id].id, 0)
                results.append({"id": doc.external_id, "status": "unchanged", "chunks": chunks})
                continue
            material = batch.built[doc.external_id]
            document_row = current.get(doc.external_id)
            status = "updated" if document_row is not None else "created"
            if document_row is None:
                document_row = DocumentRow(
                    collection_id=row.id, external_id=doc.external_id, created_at=now
                )
                session.add(document_row)
            _fill_document(document_row, material, now)
            session.flush()
            repository.replace_document_children(
                session,
                document_row,
                attribute_rows=attribute_value_rows(schema, doc.attributes),
                groups=doc.access,
            )
            repository.replace_chunks(
                session, document_row.id, row.chunk_generation, chunk_rows(material)
            )
            if doc.external_id in batch.rebuilt:
                repository.replace_chunks(
                    session,
                    document_row.id,
                    row.chunk_generation + 1,
                    chunk_rows(batch.rebuilt[doc.external_id]),
                )
            results.append(
                {"id": doc.external_id, "status": status, "chunks": len(material.chunks)}
            )
        if on_written is not None:
            on_written(session, results, batch.vectors)
        if not changed:
            return results, None, vectors
        revision = repository.bump_revision(
            session, row, [(d.external_id, "upsert") for d in changed]
        )
    return results, revision, vectors


def _problem(raw_id: Any, index: int, reason: str, message: str) -> dict[str, Any]:
    return {
        "id": raw_id if isinstance(raw_id, str) else None,
        "index": index,
        "reason": reason,
        "message": message,
    }


def _fill_document(row: DocumentRow, material: MaterialisedDocument, now: Any) -> None:
    doc = material.prepared
    row.title = doc.title
    row.media_type = doc.media_type
    row.source_url = doc.source_url
    row.content_hash = doc.content_hash
    row.source_text = doc.source_text
    row.text = material.text
    row.sections = material.sections
    row.attributes = doc.attributes_json
    row.access = list(doc.access)
    row.updated_at = now


def document_view(session: Session, row: DocumentRow, collection: CollectionRow) -> dict[str, Any]:
    chunks = repository.chunks_of(session, row.id, collection.chunk_generation)
    return {
        "id": row.external_id,
        "title": row.title,
        "media_type": row.media_type,
        "source_url": row.source_url,
        "content_hash": row.content_hash,
        "attributes": row.attributes,
        "access": row.access,
        "created_at": row.created_at,
        "updated_at": row.updated_at,
        "text": row.text,
        "chunks": [
            {
                "chunk_id": chunk_id(row.external_id, c.ordinal),
                "ordinal": c.ordinal,
                "text": c.text,
                "char_start": c.char_start,
                "char_end": c.char_end,
                "tokens": c.tokens,
                "section": c.section,
            }
            for c in chunks
        ],
    }


def _visible_document(
    session: Session, caller: Caller, collection: CollectionRow, document_id: str
) -> DocumentRow:
    found = repository.documents_by_external_id(session, collection.id, [document_id]).get(
        document_id
    )
    if found is None or not caller.may_see(found.access):
        raise DocumentNotFound(f"Document {document_id!r} does not exist.")
    return found


def get_document(
    runtime: Runtime, caller: Caller, collection: str, document_id: str
) -> dict[str, Any]:
    caller.require(Role.READER)
    with runtime.transaction() as session:
        row = load_collection(session, caller, collection)
        return document_view(session, _visible_document(session, caller, row, document_id), row)


def delete_document(runtime: Runtime, caller: Caller, collection: str, document_id: str) -> None:
    caller.require(Role.WRITER)

    def attempt() -> int:
        with runtime.write_transaction() as session:
            row = lock_collection(session, caller, collection)
            document = _visible_document(session, caller, row, document_id)
            repository.delete_documents(session, [document.id])
            return repository.bump_revision(session, row, [(document_id, "delete")])

    revision = runtime.retries.run(attempt)
    runtime.indexes.after_write(collection, revision, {document_id: None})


def _filter_condition(row: CollectionRow, filter_value: str | dict[str, Any] | None) -> Any:
    if filter_value is None or filter_value == "":
        return None
    schema = attribute_schema(row)
    return compile_filter(check_filter(parse_filter(filter_value), schema), schema)


def list_documents(
    runtime: Runtime,
    caller: Caller,
    collection: str,
    *,
    filter_value: str | dict[str, Any] | None,
    after: str | None,
    limit: int,
) -> dict[str, Any]:
    """A page of document summaries in id order; ``next_after`` continues the listing."""
    caller.require(Role.READER)
    with runtime.transaction() as session:
        row = load_collection(session, caller, collection)
        condition = _filter_condition(row, filter_value)
        rows = repository.list_documents(
            session,
            row.id,
            groups=caller.visible_groups,
            condition=condition,
            after=after,
            limit=limit + 1,
        )
        total = repository.count_matching_documents(
            session, row.id, groups=caller.visible_groups, condition=condition
        )
    page = rows[:limit]
    return {
        "documents": [
            {
                "id": d.external_id,
                "title": d.title,
                "media_type": d.media_type,
                "source_url": d.source_url,
                "attributes": d.attributes,
                "access": d.access,
                "updated_at": d.updated_at,
            }
            for d in page
        ],
        "total": total,
        "next_after": page[-1].external_id if len(rows) > limit else None,
    }


def _require_filter(caller: Caller, filter_value: str | dict[str, Any] | None) -> None:
    caller.require(Role.WRITER)
    if filter_value is None or (isinstance(filter_value, str) and not filter_value.strip()):
        raise InvalidRequest(
            "Deleting by filter needs a non-empty filter; delete the collection to remove all.",
            field="filter",
        )


def check_delete_filter(
    runtime: Runtime, caller: Caller, collection: str, filter_value: str | dict[str, Any] | None
) -> None:
    """Refuse a delete whose filter is empty or does not fit the collection, before any job."""
    _require_filter(caller, filter_value)
    with runtime.transaction() as session:
        _filter_condition(load_collection(session, caller, collection), filter_value)


def delete_by_filter(
    runtime: Runtime,
    caller: Caller,
    collection: str,
    filter_value: str | dict[str, Any] | None,
    *,
    on_deleted: Callable[[Session, list[str]], None] | None = None,
) -> int:
    """Remove every visible document the filter matches; an empty filter is refused.

    ``on_deleted(session, ids)`` runs inside the delete's transaction (a job records its
    results there, so they are never counted without the delete, nor the delete without them).
    """
    _require_filter(caller, filter_value)

    def attempt() -> tuple[list[str], int | None]:
        with runtime.write_transaction() as session:
            row = lock_collection(session, caller, collection)
            matches = repository.matching_document_ids(
                session,
                row.id,
                groups=caller.visible_groups,
                condition=_filter_condition(row, filter_value),
            )
            deleted = [ext for _, ext in matches]
            if on_deleted is not None:
                on_deleted(session, deleted)
            if not matches:
                return [], None
            repository.delete_documents(session, [pk for pk, _ in matches])
            return deleted, repository.bump_revision(session, row, [(e, "delete") for e in deleted])

    deleted, revision = runtime.retries.run(attempt)
    if revision is not None:
        runtime.indexes.after_write(collection, revision, dict.fromkeys(deleted))
    return len(deleted)
