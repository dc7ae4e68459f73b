"""One in-memory index per collection, built from the store and kept current.

Writes through this process are applied directly; writes made elsewhere (the CLI, another
replica) are found through the collection's revision and change log, checked at most every
``poll_seconds`` before a query. No query reads chunks or the collection row from the
database: the collection's facts are kept beside its index and refreshed by the same check.

The registry reads the store through an ``IndexSource`` (``StoreIndexSource`` in a running
process), so what it does with what it reads can be tested without a store.

With a ``SavedIndexes`` (a running process has one, under ``EXCERPTA_INDEX_DIR``) an index is
first looked for on disk (``service.index.saved``): one whose manifest, identity and checksums
hold is read back and caught up from the change log by the same step that catches up any index
(``_apply``); one that is missing, corrupt or foreign is built from the store, and the
background thread saves each index after it was built, compacted or given a new graph, and
every ``every_seconds`` while writes move it on. ``start_background`` also loads every
collection at start (``_warm``); until that is done ``not_ready`` says why, for ``/readyz``.
"""

from __future__ import annotations

import contextlib
import datetime as dt
import hashlib
import itertools
import json
import logging
import sys
import threading
import time
from collections import Counter
from collections.abc import Iterable, Iterator, Mapping
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
from service.index.saved import IndexDirectory, SavedIdentity, SavedIndexInfo, SavedIndexRejected
from service.index.vectors import Metric
from service.index.view import CollectionFacts, IndexView
from service.store import repository
from service.store.tables import ChunkRow, CollectionRow, DocumentRow
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
class CollectionHeader:
    """What the store says of a collection apart from its chunks."""

    facts: CollectionFacts
    generation: int
    revision: int
    scoring: LexicalScoring
    metric: Metric
    analyzer: Analyzer
    vectors: VectorIndexSettings = field(default_factory=VectorIndexSettings)


@dataclass(frozen=True)
class LoadedCollection:
    """A collection as the store holds it, analysed and ready to index; ``records`` come by
    document, read from the store as they are consumed."""

    facts: CollectionFacts
    generation: int
    revision: int
    scoring: LexicalScoring
    metric: Metric
    analyzer: Analyzer
    records: Iterable[ChunkRecord]
    vectors: VectorIndexSettings = field(default_factory=VectorIndexSettings)

    @property
    def header(self) -> CollectionHeader:
        return CollectionHeader(
            facts=self.facts,
            generation=self.generation,
            revision=self.revision,
            scoring=self.scoring,
            metric=self.metric,
            analyzer=self.analyzer,
            vectors=self.vectors,
        )


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

    def load(self, name: str) -> contextlib.AbstractContextManager[LoadedCollection]:
        """The named collection, its records read as they are consumed, inside the context;
        raises ``CollectionNotFound``."""
        ...

    def describe(self, name: str) -> CollectionHeader:
        """The named collection without its chunks; raises ``CollectionNotFound``."""
        ...

    def names(self) -> list[str]:
        """Every collection's name."""
        ...

    def update(
        self,
        collection_id: int,
        *,
        created_at: dt.datetime,
        revision: int,
        generation: int,
        analyzer: Analyzer,
        schema: Schema,
    ) -> CollectionUpdate | None:
        """What changed since ``revision``, or None when the collection is gone (another
        made since under its name and id is not it: its ``created_at`` differs)."""
        ...


@dataclass(frozen=True)
class SavedIndexes:
    """Where this process saves its indexes, and what they must match to be read back."""

    directory: IndexDirectory
    store_id: str
    embedder: str
    every_seconds: float


@dataclass(frozen=True)
class SavedIndexState:
    """A collection's saved index as ``saved_state`` finds it: ``info`` when there is one
    whose manifest can be read, ``usable`` and the ``reason`` when it is not."""

    collection: str
    store_revision: int
    info: SavedIndexInfo | None
    usable: bool
    reason: str | None


@dataclass(frozen=True)
class _SavedShape:
    """What a saved index reflects: a save is due when the index no longer has this shape."""

    revision: int
    layout: int
    graph: tuple[int, GraphSettings] | None


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
    metric: Metric
    # The shape last saved (or read back) and when; None until this index is saved.
    saved: _SavedShape | None = None
    saved_at: float = float("-inf")


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
        saved: SavedIndexes | None = None,
    ) -> None:
        self._source = source
        self._saved = saved
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
        # One load per collection at a time: a query waits for the load already running.
        self._gates: dict[str, threading.Lock] = {}
        self._warmer: threading.Thread | None = None
        self._warm_left: int | None = None
        self._rebuilding: dict[str, str] = {}
        self._starts: Counter[tuple[str, str]] = Counter()
        self._saves: Counter[str] = Counter()

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
            gate = self._gates.setdefault(name, threading.Lock())
        with gate:
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
        """The collection's saved index caught up, if there is a usable one; else built."""
        saved = self._saved
        if saved is None:
            return self._build(name)
        header = self._source.describe(name)
        started = time.perf_counter()
        try:
            found = saved.directory.load(
                name,
                self._identity(
                    saved, header.facts, header.generation, header.metric, header.analyzer
                ),
                schema=header.facts.schema,
                vectors=header.vectors,
                bm25_k1=header.scoring.k1,
                bm25_b=header.scoring.b,
            )
        except SavedIndexRejected as rejected:
            return self._rebuild(name, rejected.kind, rejected.reason)
        index = found.index
        entry = _Entry(
            facts=header.facts,
            generation=header.generation,
            scoring=header.scoring,
            analyzer=header.analyzer,
            index=index,
            revision=found.info.revision,
            checked_at=time.monotonic(),
            lock=threading.Lock(),
            vectors=header.vectors,
            metric=header.metric,
            saved=_shape(index),
            saved_at=time.monotonic(),
        )
        update = self._changes_since(entry)
        if update is None:
            raise CollectionNotFound(f"Collection {name!r} does not exist.")
        if update.reset:
            return self._rebuild(name, "outdated", "the collection was rebuilt since it was saved.")
        self._apply(entry, update)
        outcome = "loaded" if entry.revision == found.info.revision else "caught_up"
        self._count_start(outcome, "")
        log.info(
            "index of collection %r: saved index read at revision %d (%d rows)%s in %.2f s",
            name,
            found.info.revision,
            found.info.rows,
            ""
            if outcome == "loaded"
            else f", caught up to revision {entry.revision} ({len(update.documents)} documents)",
            time.perf_counter() - started,
        )
        return entry

    def _rebuild(self, name: str, kind: str, reason: str) -> _Entry:
        """Build from the store in place of a saved index that cannot be used."""
        with self._lock:
            self._rebuilding[name] = reason
        started = time.perf_counter()
        try:
            entry = self._build(name)
        finally:
            with self._lock:
                self._rebuilding.pop(name, None)
        self._count_start("rebuilt", kind)
        log.info(
            "index of collection %r: built from the store (%d rows) in %.2f s, because %s",
            name,
            entry.index.snapshot().n_rows,
            time.perf_counter() - started,
            reason,
        )
        return entry

    def _build(self, name: str) -> _Entry:
        with self._source.load(name) as loaded:
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
            metric=loaded.metric,
        )

    def _identity(
        self,
        saved: SavedIndexes,
        facts: CollectionFacts,
        generation: int,
        metric: Metric,
        analyzer: Analyzer,
    ) -> SavedIdentity:
        return SavedIdentity(
            store_id=saved.store_id,
            collection_id=facts.collection_id,
            collection_created=facts.created_at.isoformat(),
            generation=generation,
            embedder=saved.embedder,
            dimension=self._dimensions,
            metric=metric,
            rows_made_by=_rows_made_by(facts.schema, analyzer),
        )

    def _changes_since(self, entry: _Entry) -> CollectionUpdate | None:
        """What the store changed since the entry's revision; None when the collection is gone."""
        return self._source.update(
            entry.facts.collection_id,
            created_at=entry.facts.created_at,
            revision=entry.revision,
            generation=entry.generation,
            analyzer=entry.analyzer,
            schema=entry.facts.schema,
        )

    def _count_start(self, outcome: str, kind: str) -> None:
        with self._lock:
            self._starts[(outcome, kind)] += 1

    def _catch_up(self, name: str, entry: _Entry) -> None:
        update = self._changes_since(entry)
        if update is None:
            # Deleted, perhaps made again under the same name: the next lookup loads afresh.
            self.forget(name)
            return
        if update.reset:
            replacement = self._build(name)
            with self._lock:
                self._entries[name] = replacement
            return
        self._apply(entry, update)

    @staticmethod
    def _apply(entry: _Entry, update: CollectionUpdate) -> None:
        """Bring ``entry`` to what the store reported: every changed document's rows now."""
        entry.facts = replace(
            entry.facts,
            cite_attributes=update.cite_attributes,
            answer_caution=update.answer_caution,
            inference_hints=update.inference_hints,
        )
        entry.checked_at = time.monotonic()
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
        """Drop a deleted collection's index, and its saved copy, which no later collection of
        the name may read back."""
        with self._lock:
            self._entries.pop(name, None)
        if self._saved is not None:
            self._saved.directory.remove(name)

    # background compaction ------------------------------------------------------------------

    def start_background(self) -> None:
        """Load every collection (``_warm``) and then keep the indexes compacted, their graphs
        fresh and their saved copies current, on threads of their own."""
        if self._warmer is None:
            self._warm_left = None
            self._warmer = threading.Thread(
                target=self._warm, name="excerpta-index-warm", daemon=True
            )
            self._warmer.start()
        if self._compactor is None:
            self._compactor = threading.Thread(
                target=self._compact_loop, name="excerpta-compactor", daemon=True
            )
            self._compactor.start()

    def _warm(self) -> None:
        """Every collection's index, read back or built, before the process calls itself ready."""
        try:
            names = self._source.names()
            self._warm_left = len(names)
            for name in names:
                if self._stopping.is_set():
                    return
                with contextlib.suppress(CollectionNotFound):
                    self._entry(name)
                self._warm_left -= 1
        except Exception:
            # Queries still load what they need on first use; readiness must not hang on this.
            log.exception("loading the indexes at start failed")
        self._warm_left = 0

    def not_ready(self) -> str | None:
        """Why queries cannot yet be answered from memory at once, in one sentence; None once
        every collection's index is loaded (``start_background``) or when none is loading."""
        with self._lock:
            rebuilding = dict(self._rebuilding)
        if rebuilding:
            name, reason = sorted(rebuilding.items())[0]
            return (
                f"The index of collection {name!r} is being built from the store because {reason}"
            )
        if self._warmer is not None and self._warm_left != 0:
            left = "" if self._warm_left is None else f" ({self._warm_left} to go)"
            return f"The collections' indexes are being loaded{left}."
        return None

    def start_counts(self) -> dict[tuple[str, str], int]:
        """Indexes made ready since the start, by (outcome, reason kind): ``loaded`` and
        ``caught_up`` from a saved index, ``rebuilt`` from the store in place of one."""
        with self._lock:
            return dict(self._starts)

    def save_counts(self) -> dict[str, int]:
        """Saves of indexes since the start, by outcome: ``saved`` or ``failed``."""
        with self._lock:
            return dict(self._saves)

    def _compact_loop(self) -> None:
        while not self._stopping.wait(self._compact_every_seconds):
            self.maintain()

    def maintain(self) -> None:
        """Compact each index past its tombstone threshold, build stale graphs, and save
        each index whose saved copy is due (``_save_if_due``).

        Where a graph is wanted, compaction and the new graph go together
        (``CollectionIndex.build_graph``): queries keep the old graph and rows until both are
        published. A build that no longer fits when done (the rows were renumbered or deleted
        meanwhile) is dropped and tried again on the next round.
        """
        with self._maintaining:
            with self._lock:
                entries = list(self._entries.items())
            for name, entry in entries:
                if self._stopping.is_set():
                    return
                self._maintain(entry)
                self._save_if_due(name, entry)

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

    def _save_if_due(self, name: str, entry: _Entry) -> None:
        """Save an index never saved, or renumbered or given a new graph since it was, at
        once; one that only took writes since, every ``every_seconds``."""
        saved = self._saved
        if saved is None:
            return
        snapshot = entry.index.snapshot()
        shape = _shape(entry.index)
        last = entry.saved
        if last == shape:
            return
        if (
            last is not None
            and replace(last, revision=shape.revision) == shape
            and time.monotonic() - entry.saved_at < saved.every_seconds
        ):
            return
        identity = self._identity(
            saved, entry.facts, entry.generation, entry.metric, entry.analyzer
        )
        started = time.perf_counter()
        try:
            info = saved.directory.save(name, snapshot, identity)
        except OSError as exc:
            # Tried again after every_seconds; the index in memory is unharmed.
            entry.saved_at = time.monotonic()
            with self._lock:
                self._saves["failed"] += 1
            log.warning("index of collection %r: saving it failed: %s", name, exc)
            return
        entry.saved, entry.saved_at = shape, time.monotonic()
        with self._lock:
            self._saves["saved"] += 1
            forgotten = name not in self._entries
        if forgotten:
            # Deleted while it was being saved: ``forget`` may have removed the folder first.
            saved.directory.remove(name)
            return
        log.info(
            "index of collection %r: saved at revision %d (%d rows, %.1f MiB) in %.2f s",
            name,
            info.revision,
            info.rows,
            info.bytes / 2**20,
            time.perf_counter() - started,
        )

    def saved_states(self, *, verify: bool) -> list[SavedIndexState]:
        """``saved_state`` of every collection in the store, by name."""
        states = []
        for name in self._source.names():
            with contextlib.suppress(CollectionNotFound):
                states.append(self.saved_state(name, verify=verify))
        return states

    def saved_state(self, name: str, *, verify: bool) -> SavedIndexState:
        """What this process's saved index of ``name`` is and whether the next start would
        read it back (``verify`` also checks every file's checksum); for ``index-status``."""
        header = self._source.describe(name)
        saved = self._saved
        if saved is None:
            return SavedIndexState(name, header.revision, None, False, "no index directory is set.")
        try:
            info = saved.directory.describe(name)
        except SavedIndexRejected as rejected:
            return SavedIndexState(name, header.revision, None, False, rejected.reason)
        identity = self._identity(
            saved, header.facts, header.generation, header.metric, header.analyzer
        )
        try:
            saved.directory.check(name, identity, files=verify)
        except SavedIndexRejected as rejected:
            return SavedIndexState(name, header.revision, info, False, rejected.reason)
        return SavedIndexState(name, header.revision, info, True, None)

    def stop(self) -> None:
        self._stopping.set()
        if self._compactor is not None:
            self._compactor.join(timeout=5)
        if self._warmer is not None:
            self._warmer.join(timeout=5)


class StoreIndexSource:
    """Reads collections for the registry from the store, one transaction (one snapshot) per
    read."""

    def __init__(self, transactions: Transactions) -> None:
        self._transactions = transactions

    @contextlib.contextmanager
    def load(self, name: str) -> Iterator[LoadedCollection]:
        with self._transactions.read() as session:
            row = repository.collection_by_name(session, name)
            if row is None:
                raise CollectionNotFound(f"Collection {name!r} does not exist.")
            header = _header(row)
            rows = repository.index_rows(session, row.id, row.chunk_generation, None)
            yield LoadedCollection(
                facts=header.facts,
                generation=header.generation,
                revision=header.revision,
                scoring=header.scoring,
                metric=header.metric,
                analyzer=header.analyzer,
                records=_stored_records(header.analyzer, header.facts.schema, rows),
                vectors=header.vectors,
            )

    def describe(self, name: str) -> CollectionHeader:
        with self._transactions.read() as session:
            row = repository.collection_by_name(session, name)
            if row is None:
                raise CollectionNotFound(f"Collection {name!r} does not exist.")
            return _header(row)

    def names(self) -> list[str]:
        with self._transactions.read() as session:
            return [row.name for row in repository.all_collections(session)]

    def update(
        self,
        collection_id: int,
        *,
        created_at: dt.datetime,
        revision: int,
        generation: int,
        analyzer: Analyzer,
        schema: Schema,
    ) -> CollectionUpdate | None:
        with self._transactions.read() as session:
            state = repository.collection_state(session, collection_id)
            if state is None or state.created_at != created_at:
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


def _header(row: CollectionRow) -> CollectionHeader:
    schema = parse_schema(row.attributes)
    retrieval = dict(row.settings.get("retrieval", {}))
    return CollectionHeader(
        facts=CollectionFacts(
            collection_id=row.id,
            created_at=row.created_at,
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
        analyzer=analyzer_for(retrieval),
        vectors=vector_settings(row.settings.get("vectors", {})),
    )


def _shape(index: CollectionIndex) -> _SavedShape:
    snapshot = index.snapshot()
    graph = snapshot.graph
    return _SavedShape(
        revision=snapshot.revision,
        layout=index.layout,
        graph=None if graph is None else (graph.rows, graph.settings),
    )


def _rows_made_by(schema: Schema, analyzer: Analyzer) -> str:
    """A fingerprint of how stored chunks become rows: the schema and the text analysis."""
    described = {
        "schema": {name: type_.value for name, type_ in sorted(schema.items())},
        "stopwords": sorted(analyzer.stopwords),
        "stemming": analyzer.stem_language,
        "title_weight": analyzer.title_weight,
        "section_weight": analyzer.section_weight,
    }
    return hashlib.sha256(json.dumps(described).encode("utf-8")).hexdigest()[:16]


# records ------------------------------------------------------------------------------------


def _stored_records(
    analyzer: Analyzer, schema: Schema, rows: Iterable[tuple[DocumentRow, ChunkRow, bytes]]
) -> Iterator[ChunkRecord]:
    """Index rows from stored chunks, which ``index_rows`` gives by document, in ordinal order,
    made one document at a time as ``rows`` are read.

    The analyzer makes a new string for every token; records are held until their part of the
    index is built, so each token is replaced by one shared copy of its term (at a million
    chunks the copies alone would take gigabytes).
    """
    for _, group in itertools.groupby(rows, key=lambda r: r[0].id):
        chunks = list(group)
        document = chunks[0][0]
        attributes = _attributes_from_json(schema, document.attributes)
        spans = [(chunk.char_start, chunk.char_end) for _, chunk, _ in chunks]
        for (_, chunk, vector), gap in zip(chunks, gaps_between(document.text, spans), strict=True):
            record = chunk_record(
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
            record.lexical_tokens[:] = map(sys.intern, record.lexical_tokens)
            yield record


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
