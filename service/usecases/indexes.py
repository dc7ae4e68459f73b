"""One in-memory index per collection, built from the store and kept current.

Writes through this process are applied directly; writes made elsewhere (the CLI, another
replica) are found through the collection's revision and change log, checked at most every
``poll_seconds`` before a query. No query reads chunks or the collection row from the
database: the collection's facts are kept beside its index and refreshed by the same check.

The registry reads the store through an ``IndexSource`` (``StoreIndexSource`` in a running
process), so what it does with what it reads can be tested without a store.
"""

from __future__ import annotations

import itertools
import logging
import threading
import time
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field, replace
from typing import Any, Protocol, cast

import numpy as np

from service.attributes import AttributeValue, Schema, normalize_value, parse_schema
from service.errors import CollectionNotFound
from service.filters.inference.hints import AttributeHints, stored_hints
from service.index.analyzer import Analyzer
from service.index.collection_index import ChunkRecord, CollectionIndex, IndexSnapshot
from service.index.document_text import gaps_between
from service.index.graph import GraphSettings, VectorIndexSettings
from service.index.lexical import LexicalScoring
from service.index.records import chunk_record
from service.index.vectors import Metric
from service.index.view import CollectionFacts, IndexView
from service.store import repository
from service.store.tables import ChunkRow, DocumentRow
from service.store.transactions import Transactions
from service.usecases.drafts import MaterialisedDocument
from service.usecases.retrieval_settings import analyzer_for, lexical_scoring, ranking_settings

log = logging.getLogger("excerpta.index")


def vector_settings(stored: Mapping[str, Any]) -> VectorIndexSettings:
    """A collection's stored ``vectors`` settings (checked when they were put)."""
    return VectorIndexSettings(
        index=stored.get("index", "auto"), graph=GraphSettings(**stored.get("graph", {}))
    )


@dataclass(frozen=True)
class LoadedCollection:
    """A collection as the store holds it, analysed and ready to index."""

    facts: CollectionFacts
    generation: int
    revision: int
    scoring: LexicalScoring
    metric: Metric
    analyzer: Analyzer
    records: list[ChunkRecord]
    vectors: VectorIndexSettings = field(default_factory=VectorIndexSettings)


@dataclass(frozen=True)
class CollectionUpdate:
    """What the store says of a collection an index holds at some revision.

    ``reset``: the index must be built afresh (a schema, scoring or chunking change); otherwise
    ``documents`` gives every changed document's rows now (an empty list: it is gone) and
    ``revision`` the revision they bring the index to.
    """

    cite_attributes: tuple[str, ...]
    answer_caution: str | None
    revision: int
    inference_hints: Mapping[str, AttributeHints] = field(default_factory=dict)
    reset: bool = False
    documents: dict[str, list[ChunkRecord]] = field(default_factory=dict)


class IndexSource(Protocol):
    """Where the registry reads collections from: the store (``StoreIndexSource``)."""

    def load(self, name: str) -> LoadedCollection:
        """The named collection whole; raises ``CollectionNotFound``."""
        ...

    def update(
        self,
        collection_id: int,
        *,
        revision: int,
        generation: int,
        analyzer: Analyzer,
        schema: Schema,
    ) -> CollectionUpdate | None:
        """What changed since ``revision``, or None when the collection is gone."""
        ...


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
    vectors: VectorIndexSettings


class IndexRegistry:
    """One index per collection, built on first use and kept current.

    ``poll_seconds`` bounds how stale a query's view of writes made elsewhere may be;
    ``compact_after`` tombstoned rows make the background thread (``start_background``)
    rebuild an index without them. The same thread builds each collection's graph where its
    vector settings want one, and builds it anew once stale (``maintain``).
    """

    def __init__(
        self,
        source: IndexSource,
        *,
        dimensions: int,
        poll_seconds: float,
        compact_after: int,
        compact_every_seconds: float = 2.0,
    ) -> None:
        self._source = source
        self._dimensions = dimensions
        self._poll_seconds = poll_seconds
        self._compact_after = compact_after
        self._compact_every_seconds = compact_every_seconds
        self._entries: dict[str, _Entry] = {}
        self._lock = threading.Lock()
        self._stopping = threading.Event()
        self._compactor: threading.Thread | None = None
        # One maintenance round at a time, whether from the thread or a direct call.
        self._maintaining = threading.Lock()

    # queries ------------------------------------------------------------------------------

    def view(self, name: str) -> IndexView:
        entry = self._entry(name)
        poll = self._poll_seconds
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

    def snapshots(self) -> dict[str, IndexSnapshot]:
        """The current snapshot of every collection this process has loaded."""
        with self._lock:
            entries = dict(self._entries)
        return {name: entry.index.snapshot() for name, entry in entries.items()}

    def expire(self, name: str) -> None:
        """Have the next query re-read the collection: this process has just changed it."""
        with self._lock:
            entry = self._entries.get(name)
        if entry is not None:
            entry.checked_at = float("-inf")

    # building and catching up --------------------------------------------------------------

    def _load(self, name: str) -> _Entry:
        loaded = self._source.load(name)
        index = CollectionIndex.build(
            loaded.records,
            schema=loaded.facts.schema,
            metric=loaded.metric,
            dimension=self._dimensions,
            revision=loaded.revision,
            bm25_k1=loaded.scoring.k1,
            bm25_b=loaded.scoring.b,
        )
        return _Entry(
            facts=loaded.facts,
            generation=loaded.generation,
            scoring=loaded.scoring,
            analyzer=loaded.analyzer,
            index=index,
            revision=loaded.revision,
            checked_at=time.monotonic(),
            lock=threading.Lock(),
            vectors=loaded.vectors,
        )

    def _catch_up(self, name: str, entry: _Entry) -> None:
        update = self._source.update(
            entry.facts.collection_id,
            revision=entry.revision,
            generation=entry.generation,
            analyzer=entry.analyzer,
            schema=entry.facts.schema,
        )
        if update is None:
            # Deleted, perhaps made again under the same name: the next lookup loads afresh.
            self.forget(name)
            return
        entry.facts = replace(
            entry.facts,
            cite_attributes=update.cite_attributes,
            answer_caution=update.answer_caution,
            inference_hints=update.inference_hints,
        )
        entry.checked_at = time.monotonic()
        if update.reset:
            replacement = self._load(name)
            with self._lock:
                self._entries[name] = replacement
            return
        if update.revision != entry.revision or update.documents:
            entry.revision = update.revision
            entry.index.replace_documents(update.documents, revision=entry.revision)

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
                    [] if item is None else _records_from_material(entry, item[0], item[1])
                )
                for document_id, item in changed.items()
            }
            entry.index.replace_documents(grouped, revision=revision)
            entry.revision = revision

    def forget(self, name: str) -> None:
        with self._lock:
            self._entries.pop(name, None)

    # background compaction ------------------------------------------------------------------

    def start_background(self) -> None:
        if self._compactor is None:
            self._compactor = threading.Thread(
                target=self._compact_loop, name="excerpta-compactor", daemon=True
            )
            self._compactor.start()

    def _compact_loop(self) -> None:
        while not self._stopping.wait(self._compact_every_seconds):
            self.maintain()

    def maintain(self) -> None:
        """Compact each index past its tombstone threshold and build stale graphs.

        Where a graph is wanted, compaction and the new graph go together
        (``CollectionIndex.build_graph``): queries keep the old graph and rows until both are
        published. A build that no longer fits when done (the rows were renumbered or deleted
        meanwhile) is dropped and tried again on the next round.
        """
        with self._maintaining:
            with self._lock:
                entries = list(self._entries.values())
            for entry in entries:
                if self._stopping.is_set():
                    return
                self._maintain(entry)

    def _maintain(self, entry: _Entry) -> None:
        index = entry.index
        snapshot = index.snapshot()
        compact = index.tombstoned_rows() >= self._compact_after
        if entry.vectors.wants_graph(snapshot.live_rows):
            if compact or entry.vectors.graph_is_stale(snapshot.graph, snapshot.n_rows):
                started = time.perf_counter()
                published = index.build_graph(entry.vectors, compact=compact)
                log.info(
                    "graph for collection %s: %d rows in %.1f s%s",
                    entry.facts.collection_id,
                    index.snapshot().n_rows,
                    time.perf_counter() - started,
                    "" if published else ", dropped (rows changed meanwhile)",
                )
            return
        if snapshot.graph is not None:
            index.drop_graph()
        if compact:
            with entry.lock:
                index.compact()

    def stop(self) -> None:
        self._stopping.set()
        if self._compactor is not None:
            self._compactor.join(timeout=5)


class StoreIndexSource:
    """Reads collections for the registry from the store, one transaction (one snapshot) per
    read."""

    def __init__(self, transactions: Transactions) -> None:
        self._transactions = transactions

    def load(self, name: str) -> LoadedCollection:
        with self._transactions.read() as session:
            row = repository.collection_by_name(session, name)
            if row is None:
                raise CollectionNotFound(f"Collection {name!r} does not exist.")
            schema = parse_schema(row.attributes)
            retrieval = dict(row.settings.get("retrieval", {}))
            analyzer = analyzer_for(retrieval)
            rows = repository.index_rows(session, row.id, row.chunk_generation, None)
            return LoadedCollection(
                facts=CollectionFacts(
                    collection_id=row.id,
                    schema=schema,
                    cite_attributes=tuple(row.cite_attributes),
                    answer_caution=row.answer_caution,
                    inference_hints=stored_hints(schema, row.settings),
                    ranking=ranking_settings(retrieval),
                ),
                generation=row.chunk_generation,
                revision=row.revision,
                scoring=lexical_scoring(retrieval),
                metric=cast(Metric, retrieval.get("metric", "cosine")),
                analyzer=analyzer,
                records=_stored_records(analyzer, schema, rows),
                vectors=vector_settings(row.settings.get("vectors", {})),
            )

    def update(
        self,
        collection_id: int,
        *,
        revision: int,
        generation: int,
        analyzer: Analyzer,
        schema: Schema,
    ) -> CollectionUpdate | None:
        with self._transactions.read() as session:
            state = repository.collection_state(session, collection_id)
            if state is None:
                return None
            unchanged = CollectionUpdate(
                cite_attributes=tuple(state.cite_attributes),
                answer_caution=state.answer_caution,
                revision=revision,
                inference_hints=stored_hints(schema, state.settings),
            )
            if state.revision == revision:
                return unchanged
            changes = repository.changes_since(session, collection_id, revision)
            if any(change.operation == "reset" for change in changes):
                return replace(unchanged, reset=True)
            document_ids = sorted({c.document_id for c in changes if c.document_id})
            rows = repository.index_rows(session, collection_id, generation, document_ids)
            grouped: dict[str, list[ChunkRecord]] = {doc: [] for doc in document_ids}
            for record in _stored_records(analyzer, schema, rows):
                grouped[record.document_id].append(record)
        return replace(
            unchanged,
            revision=max([revision, *(c.revision for c in changes)]),
            documents=grouped,
        )


# records ------------------------------------------------------------------------------------


def _stored_records(
    analyzer: Analyzer, schema: Schema, rows: Sequence[tuple[DocumentRow, ChunkRow, bytes]]
) -> list[ChunkRecord]:
    """Index rows from stored chunks, which ``index_rows`` gives by document, in ordinal order."""
    records: list[ChunkRecord] = []
    for _, group in itertools.groupby(rows, key=lambda r: r[0].id):
        chunks = list(group)
        document = chunks[0][0]
        attributes = _attributes_from_json(schema, document.attributes)
        spans = [(chunk.char_start, chunk.char_end) for _, chunk, _ in chunks]
        for (_, chunk, vector), gap in zip(chunks, gaps_between(document.text, spans), strict=True):
            records.append(
                chunk_record(
                    analyzer,
                    document_id=document.external_id,
                    title=document.title,
                    attributes=attributes,
                    access=tuple(document.access),
                    source_url=document.source_url,
                    chunk=chunk,
                    gap_after=gap,
                    vector=np.frombuffer(vector, dtype=np.float32),
                )
            )
    return records


def _records_from_material(
    entry: _Entry, material: MaterialisedDocument, vectors: Mapping[str, np.ndarray]
) -> list[ChunkRecord]:
    doc = material.prepared
    gaps = gaps_between(material.text, [(c.char_start, c.char_end) for c in material.chunks])
    return [
        chunk_record(
            entry.analyzer,
            document_id=doc.external_id,
            title=doc.title,
            attributes=dict(doc.attributes),
            access=doc.access,
            source_url=doc.source_url,
            chunk=c,
            gap_after=gap,
            vector=np.asarray(vectors[c.embedded_text_hash], dtype=np.float32),
        )
        for c, gap in zip(material.chunks, gaps, strict=True)
    ]


def _attributes_from_json(schema: Schema, stored: Mapping[str, Any]) -> dict[str, AttributeValue]:
    return {
        name: normalize_value(name, schema[name], value)
        for name, value in stored.items()
        if name in schema and value is not None
    }
