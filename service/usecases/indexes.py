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
from service.index.analyzer import Analyzer, english_stopwords
from service.index.collection_index import ChunkRecord, CollectionIndex
from service.index.lexical import DEFAULT_B, DEFAULT_K1, Bm25Variant, LexicalScoring
from service.index.records import chunk_record
from service.index.vectors import Metric
from service.index.view import CollectionFacts, IndexView
from service.store import repository
from service.store.tables import ChunkRow, DocumentRow

if TYPE_CHECKING:
    from service.usecases.documents import MaterialisedDocument
    from service.usecases.runtime import Runtime

log = logging.getLogger("excerpta.index")


def analyzer_for(retrieval: Mapping[str, Any]) -> Analyzer:
    return Analyzer(
        english_stopwords() if retrieval.get("stopwords", True) else None,
        "english" if retrieval.get("stemming", True) else None,
    )


@dataclass
class _Entry:
    facts: CollectionFacts
    generation: int
    scoring: LexicalScoring
    analyzer: Analyzer
    index: CollectionIndex
    revision: int
    checked_at: float
    lock: threading.Lock


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
        return IndexView(
            facts=entry.facts,
            snapshot=entry.index.snapshot(),
            analyzer=entry.analyzer,
            scoring=entry.scoring,
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
            scoring = LexicalScoring(
                k1=float(retrieval.get("k1", DEFAULT_K1)),
                b=float(retrieval.get("b", DEFAULT_B)),
                variant=cast(Bm25Variant, retrieval.get("bm25", "smoothed")),
            )
            rows = repository.index_rows(session, row.id, row.chunk_generation, None)
            records = [self._record(analyzer, schema, d, c, v) for d, c, v in rows]
            index = CollectionIndex.build(
                records,
                schema=schema,
                metric=cast(Metric, retrieval.get("metric", "cosine")),
                dimension=self._runtime.embedder.dimensions,
                revision=row.revision,
                bm25_k1=scoring.k1,
                bm25_b=scoring.b,
            )
            return _Entry(
                facts=CollectionFacts(
                    collection_id=row.id,
                    schema=schema,
                    cite_attributes=tuple(row.cite_attributes),
                    answer_caution=row.answer_caution,
                ),
                generation=row.chunk_generation,
                scoring=scoring,
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
        return chunk_record(
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
            chunk_record(
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


def _attributes_from_json(schema: Schema, stored: Mapping[str, Any]) -> dict[str, AttributeValue]:
    return {
        name: normalize_value(name, schema[name], value)
        for name, value in stored.items()
        if name in schema and value is not None
    }
