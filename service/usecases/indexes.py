"""One in-memory index per collection, built from the store and kept current.

Writes through this process are applied directly; writes made elsewhere (the CLI, another
replica) are found through the collection's revision and change log, checked at most every
``index_poll_ms`` before a query. No query reads chunks or the collection row from the
database: the collection's facts are kept beside its index and refreshed by the same check.
"""

from __future__ import annotations

import logging
import threading
import time
from collections.abc import Mapping
from dataclasses import dataclass, replace
from typing import TYPE_CHECKING, Any, cast

import numpy as np

from service.attributes import AttributeValue, Schema, normalize_value, parse_schema
from service.errors import CollectionNotFound
from service.filters.evaluate import evaluate
from service.filters.syntax import Node
from service.index.analyzer import Analyzer, english_stopwords
from service.index.collection_index import (
    ChunkRecord,
    CollectionIndex,
    IndexedChunk,
    IndexSnapshot,
)
from service.index.lexical import Bm25Variant
from service.index.vectors import Metric
from service.retrieval.access import access_mask
from service.store import repository
from service.store.tables import ChunkRow, DocumentRow
from service.usecases.chunk_ids import chunk_id

if TYPE_CHECKING:
    from service.usecases.documents import ChunkDraft, MaterialisedDocument
    from service.usecases.runtime import Runtime

log = logging.getLogger("excerpta.index")


def analyzer_for(retrieval: Mapping[str, Any]) -> Analyzer:
    return Analyzer(
        english_stopwords() if retrieval.get("stopwords", True) else None,
        "english" if retrieval.get("stemming", True) else None,
    )


@dataclass(frozen=True)
class CollectionFacts:
    """What a query needs of its collection besides the index, kept beside the index so that
    a query reads nothing from the store."""

    collection_id: int
    schema: Schema
    cite_attributes: tuple[str, ...]
    answer_caution: str | None


@dataclass
class _Entry:
    facts: CollectionFacts
    generation: int
    retrieval: dict[str, Any]
    analyzer: Analyzer
    index: CollectionIndex
    revision: int
    checked_at: float
    lock: threading.Lock


@dataclass(frozen=True)
class IndexView:
    """What one query reads: a consistent snapshot and the collection's scoring settings."""

    facts: CollectionFacts
    snapshot: IndexSnapshot
    analyzer: Analyzer
    k1: float
    b: float
    bm25_variant: Bm25Variant

    @property
    def live_rows(self) -> int:
        return int(self.snapshot.live_rows)

    def candidates(
        self, node: Node | None, groups: frozenset[str] | None
    ) -> tuple[np.ndarray, int]:
        """The candidate mask (live AND access AND filter) and how many rows the caller sees."""
        mask = self.snapshot.live.copy()
        if groups is None:
            visible = self.live_rows
        else:
            mask &= access_mask(self.snapshot, groups)
            visible = int(np.count_nonzero(mask))
        if node is not None:
            columns = self.snapshot.columns
            if columns is None:
                # A checked filter names attributes, so this collection has some; an index
                # without columns can only mean no row has been indexed yet.
                return np.zeros_like(mask), visible
            mask &= evaluate(node, columns)
        return mask, visible

    def row(self, row: int) -> IndexedChunk:
        return self.snapshot.record(row)

    def vector(self, row: int) -> np.ndarray:
        return self.snapshot.vector(row)

    def describe_entry(self, entry: Any) -> dict[str, Any]:
        return {
            "chunk_id": entry.chunk_id,
            "score": float(entry.score),
            "rank": int(entry.rank),
            "ranks": None if entry.ranks is None else dict(entry.ranks),
        }


class IndexRegistry:
    def __init__(self, runtime: Runtime) -> None:
        self._runtime = runtime
        self._entries: dict[str, _Entry] = {}
        self._lock = threading.Lock()
        self._stopping = threading.Event()
        self._compactor: threading.Thread | None = None

    # queries ------------------------------------------------------------------------------

    def view(self, name: str) -> IndexView:
        entry = self._entry(name)
        poll = self._runtime.settings.index_poll_ms / 1000.0
        if time.monotonic() - entry.checked_at >= poll:
            with entry.lock:
                if time.monotonic() - entry.checked_at >= poll:
                    self._catch_up(name, entry)
        entry = self._entry(name)
        retrieval = entry.retrieval
        return IndexView(
            facts=entry.facts,
            snapshot=entry.index.snapshot(),
            analyzer=entry.analyzer,
            k1=float(retrieval["k1"]),
            b=float(retrieval["b"]),
            bm25_variant=cast(Bm25Variant, retrieval["bm25"]),
        )

    def _entry(self, name: str) -> _Entry:
        with self._lock:
            entry = self._entries.get(name)
            if entry is not None:
                return entry
        loaded = self._load(name)
        with self._lock:
            return self._entries.setdefault(name, loaded)

    def expire(self, name: str) -> None:
        """Have the next query re-read the collection: this process has just changed it."""
        with self._lock:
            entry = self._entries.get(name)
        if entry is not None:
            entry.checked_at = float("-inf")

    # building and catching up --------------------------------------------------------------

    def _load(self, name: str) -> _Entry:
        with self._runtime.transaction() as session:
            row = repository.collection_by_name(session, name)
            if row is None:
                raise CollectionNotFound(f"Collection {name!r} does not exist.")
            schema = parse_schema(row.attributes)
            retrieval = dict(row.settings.get("retrieval", {}))
            analyzer = analyzer_for(retrieval)
            rows = repository.index_rows(session, row.id, row.chunk_generation, None)
            records = [self._record(analyzer, schema, d, c, v) for d, c, v in rows]
            index = CollectionIndex.build(
                records,
                schema=schema,
                metric=cast(Metric, retrieval.get("metric", "cosine")),
                dimension=self._runtime.embedder.dimensions,
                revision=row.revision,
                bm25_k1=float(retrieval.get("k1", 1.2)),
                bm25_b=float(retrieval.get("b", 0.75)),
            )
            return _Entry(
                facts=CollectionFacts(
                    collection_id=row.id,
                    schema=schema,
                    cite_attributes=tuple(row.cite_attributes),
                    answer_caution=row.answer_caution,
                ),
                generation=row.chunk_generation,
                retrieval=retrieval,
                analyzer=analyzer,
                index=index,
                revision=row.revision,
                checked_at=time.monotonic(),
                lock=threading.Lock(),
            )

    def _catch_up(self, name: str, entry: _Entry) -> None:
        collection_id = entry.facts.collection_id
        with self._runtime.transaction() as session:
            state = repository.collection_state(session, collection_id)
            if state is None:
                # Deleted, perhaps made again under the same name: the next lookup loads afresh.
                self.forget(name)
                return
            entry.facts = replace(
                entry.facts,
                cite_attributes=tuple(state.cite_attributes),
                answer_caution=state.answer_caution,
            )
            entry.checked_at = time.monotonic()
            if state.revision == entry.revision:
                return
            changes = repository.changes_since(session, collection_id, entry.revision)
            if any(change.operation == "reset" for change in changes):
                reset = True
            else:
                reset = False
                document_ids = sorted({c.document_id for c in changes if c.document_id})
                found = repository.documents_by_external_id(session, collection_id, document_ids)
                rows = repository.index_rows(
                    session, collection_id, entry.generation, [d.id for d in found.values()]
                )
                grouped: dict[str, list[ChunkRecord]] = {doc: [] for doc in document_ids}
                for document, chunk, vector in rows:
                    grouped[document.external_id].append(
                        self._record(entry.analyzer, entry.facts.schema, document, chunk, vector)
                    )
        if reset:
            replacement = self._load(name)
            with self._lock:
                self._entries[name] = replacement
            return
        entry.revision = max([entry.revision, *(c.revision for c in changes)])
        entry.index.replace_documents(grouped, revision=entry.revision)

    def after_write(
        self,
        name: str,
        revision: int,
        changed: Mapping[str, tuple[MaterialisedDocument, Mapping[str, np.ndarray]] | None],
    ) -> None:
        """Apply this process's own write at once; fall back to the log if others wrote too."""
        with self._lock:
            entry = self._entries.get(name)
        if entry is None:
            return
        with entry.lock:
            if entry.revision != revision - 1:
                self._catch_up(name, entry)
                return
            grouped = {
                document_id: (
                    [] if item is None else self._records_from_material(entry, item[0], item[1])
                )
                for document_id, item in changed.items()
            }
            entry.index.replace_documents(grouped, revision=revision)
            entry.revision = revision

    def forget(self, name: str) -> None:
        with self._lock:
            self._entries.pop(name, None)

    # records --------------------------------------------------------------------------------

    def _record(
        self,
        analyzer: Analyzer,
        schema: Schema,
        document: DocumentRow,
        chunk: ChunkRow,
        vector: bytes,
    ) -> ChunkRecord:
        return _chunk_record(
            analyzer,
            document_id=document.external_id,
            title=document.title,
            attributes=_attributes_from_json(schema, document.attributes),
            access=tuple(document.access),
            chunk=chunk,
            vector=np.frombuffer(vector, dtype=np.float32),
        )

    def _records_from_material(
        self, entry: _Entry, material: MaterialisedDocument, vectors: Mapping[str, np.ndarray]
    ) -> list[ChunkRecord]:
        doc = material.prepared
        return [
            _chunk_record(
                entry.analyzer,
                document_id=doc.external_id,
                title=doc.title,
                attributes=dict(doc.attributes),
                access=doc.access,
                chunk=c,
                vector=np.asarray(vectors[c.embedded_text_hash], dtype=np.float32),
            )
            for c in material.chunks
        ]

    # background compaction ------------------------------------------------------------------

    def start_background(self) -> None:
        if self._compactor is None:
            self._compactor = threading.Thread(
                target=self._compact_loop, name="excerpta-compactor", daemon=True
            )
            self._compactor.start()

    def _compact_loop(self) -> None:
        threshold = self._runtime.settings.compact_after_deleted_rows
        while not self._stopping.wait(2.0):
            with self._lock:
                entries = list(self._entries.values())
            for entry in entries:
                if entry.index.tombstoned_rows() >= threshold:
                    with entry.lock:
                        entry.index.compact()

    def stop(self) -> None:
        self._stopping.set()
        if self._compactor is not None:
            self._compactor.join(timeout=5)


def _chunk_record(
    analyzer: Analyzer,
    *,
    document_id: str,
    title: str,
    attributes: dict[str, AttributeValue],
    access: tuple[str, ...],
    chunk: ChunkRow | ChunkDraft,
    vector: np.ndarray,
) -> ChunkRecord:
    """One index row, from a stored chunk or one just written; both carry the same fields."""
    return ChunkRecord(
        chunk_id=chunk_id(document_id, chunk.ordinal),
        document_id=document_id,
        ordinal=chunk.ordinal,
        title=title,
        section=chunk.section,
        text=chunk.text,
        char_start=chunk.char_start,
        char_end=chunk.char_end,
        tokens=chunk.tokens,
        lexical_tokens=analyzer.tokens(_indexed_text(title, chunk.section, chunk.text)),
        vector=vector,
        attributes=attributes,
        access=access,
    )


def _indexed_text(title: str, section: str, text: str) -> str:
    """What both retrievers index for a chunk: its title, its section path and its text."""
    return "\n".join(part for part in (title, section, text) if part)


def _attributes_from_json(schema: Schema, stored: Mapping[str, Any]) -> dict[str, AttributeValue]:
    return {
        name: normalize_value(name, schema[name], value)
        for name, value in stored.items()
        if name in schema and value is not None
    }
