"""The in-memory index of one collection: row metadata, BM25 postings, vectors, attributes.

Lock discipline: every state is an immutable ``IndexSnapshot``. Readers call
``CollectionIndex.snapshot()`` once per query and use only that object, taking no lock. A
writer holds the index's write lock (writers run one at a time), builds the next snapshot from
the current one and publishes it with a single reference assignment, so a query sees either the
whole write or none of it: a document being replaced shows exactly its old chunks or exactly
its new ones. Building the next snapshot never changes what an earlier one can read: per-row
arrays and lists only grow past the newest snapshot's row count (see ``buffers``), and
everything a write changes in place (the live mask, document frequencies, sort keys, the
document-to-rows map) is copied first. Deleted and replaced chunks are tombstoned (their rows
stay, masked out of every statistic and ranking) until ``compact`` rebuilds without them.
"""

from __future__ import annotations

import operator
import threading
from bisect import bisect_right
from collections.abc import Iterable, Iterator, Mapping, Sequence
from dataclasses import dataclass, field, replace
from typing import Any, SupportsIndex, TypeVar, overload

import numpy as np

from service.attributes import AttributeValue, Schema
from service.filters.columns import AttributeColumns
from service.index.buffers import write_rows
from service.index.document_text import rebuild_span
from service.index.graph import VectorGraph, VectorIndexSettings
from service.index.lexical import DEFAULT_B, DEFAULT_K1, LexicalIndex
from service.index.vectors import Metric, VectorMatrix

T = TypeVar("T")
# Rows ``CollectionIndex.build`` writes at a time: each write re-weighs every posting, and its
# records are all that is held beside the index.
BUILD_ROWS_PER_WRITE = 100_000


@dataclass(frozen=True)
class ChunkRecord:
    """One chunk as the index takes it: text already analysed, vector already embedded."""

    chunk_id: str
    document_id: str
    ordinal: int
    title: str
    section: str
    text: str
    char_start: int
    char_end: int
    tokens: int
    lexical_tokens: list[str]
    vector: np.ndarray
    attributes: dict[str, AttributeValue] = field(default_factory=dict)
    access: tuple[str, ...] = ()
    source_url: str | None = None
    # The document's text between this chunk's end and the next chunk's start (see
    # ``document_text``); empty when they overlap or touch.
    gap_after: str = ""


@dataclass(frozen=True)
class IndexedDocument:
    """What the index keeps once per document: its live rows in ordinal order, its source."""

    rows: np.ndarray
    source_url: str | None


@dataclass(frozen=True)
class IndexedChunk:
    """What the index keeps of a chunk's record (its tokens and vector live in the arrays)."""

    row: int
    chunk_id: str
    document_id: str
    ordinal: int
    title: str
    section: str
    text: str
    char_start: int
    char_end: int
    tokens: int
    attributes: dict[str, AttributeValue]
    access: tuple[str, ...]


class RowPrefix(Sequence[T]):
    """The first ``length`` items of a list that later snapshots may extend."""

    __slots__ = ("_items", "_length")

    def __init__(self, items: list[T], length: int) -> None:
        self._items = items
        self._length = length

    def __len__(self) -> int:
        return self._length

    @overload
    def __getitem__(self, index: SupportsIndex) -> T: ...
    @overload
    def __getitem__(self, index: slice) -> list[T]: ...
    def __getitem__(self, index: SupportsIndex | slice) -> T | list[T]:
        if isinstance(index, slice):
            return self._items[: self._length][index]
        position = operator.index(index)
        if not -self._length <= position < self._length:
            raise IndexError(position)
        return self._items[position % self._length]

    def __iter__(self) -> Iterator[T]:
        for position in range(self._length):
            yield self._items[position]

    def take(self, rows: Sequence[int]) -> list[T]:
        """The items at ``rows`` (each within the prefix), without a call per item."""
        if rows and (min(rows) < 0 or max(rows) >= self._length):
            raise IndexError("a row lies outside the prefix")
        items = self._items
        return [items[row] for row in rows]


@dataclass(frozen=True)
class AccessGroups:
    """Group membership of every row as (row, group code) pairs, for vectorised masks."""

    codes: dict[str, int]
    entry_rows: np.ndarray
    entry_codes: np.ndarray
    entries: int
    public: np.ndarray
    n_rows: int

    @classmethod
    def empty(cls) -> AccessGroups:
        return cls({}, np.zeros(0, np.int32), np.zeros(0, np.int32), 0, np.zeros(0, bool), 0)

    def appended(self, access_lists: Sequence[tuple[str, ...]]) -> AccessGroups:
        codes = self.codes
        rows: list[int] = []
        row_codes: list[int] = []
        for offset, groups in enumerate(access_lists):
            for group in dict.fromkeys(groups):
                rows.append(self.n_rows + offset)
                row_codes.append(codes.setdefault(group, len(codes)))
        public = np.fromiter((not g for g in access_lists), dtype=bool, count=len(access_lists))
        return AccessGroups(
            codes=codes,
            entry_rows=write_rows(self.entry_rows, self.entries, np.array(rows, np.int32)),
            entry_codes=write_rows(self.entry_codes, self.entries, np.array(row_codes, np.int32)),
            entries=self.entries + len(rows),
            public=write_rows(self.public, self.n_rows, public),
            n_rows=self.n_rows + len(access_lists),
        )

    def take(self, remap: np.ndarray, kept: np.ndarray) -> AccessGroups:
        rows = remap[self.entry_rows[: self.entries]]
        keep = rows >= 0
        return AccessGroups(
            codes=self.codes,
            entry_rows=rows[keep].astype(np.int32),
            entry_codes=self.entry_codes[: self.entries][keep],
            entries=int(keep.sum()),
            public=self.public[kept],
            n_rows=len(kept),
        )

    def visible(self, groups: frozenset[str]) -> np.ndarray:
        """Rows with no groups, or sharing at least one of ``groups``."""
        mask = self.public[: self.n_rows].copy()
        wanted_codes = [self.codes[g] for g in groups if g in self.codes]
        if wanted_codes and self.entries:
            wanted = np.zeros(len(self.codes), dtype=bool)
            wanted[wanted_codes] = True
            entry_codes = self.entry_codes[: self.entries]
            mask[self.entry_rows[: self.entries][wanted[entry_codes]]] = True
        return mask


@dataclass(frozen=True, eq=False)
class IndexSnapshot:
    """One consistent state of a collection's index; never changes once published.

    Rows are addressed by position ``0 .. n_rows - 1``; tombstoned rows are false in ``live``.
    ``sort_keys[row]`` is the row's chunk_id rank in code-point order, so ties are broken by
    comparing integers. ``columns`` is aligned with the rows (``None`` when the collection
    declares no attributes).
    """

    revision: int
    n_rows: int
    chunk_ids: RowPrefix[str]
    document_ids: RowPrefix[str]
    titles: RowPrefix[str]
    sections: RowPrefix[str]
    texts: RowPrefix[str]
    attributes: RowPrefix[dict[str, AttributeValue]]
    access_lists: RowPrefix[tuple[str, ...]]
    gaps: RowPrefix[str]
    ordinals: np.ndarray
    char_starts: np.ndarray
    char_ends: np.ndarray
    token_counts: np.ndarray
    sort_keys: np.ndarray
    lexical: LexicalIndex
    vectors: VectorMatrix
    columns: AttributeColumns | None
    access: AccessGroups
    documents: Mapping[str, IndexedDocument]
    sorted_chunk_ids: list[str] = field(repr=False)
    numeric_buffers: dict[str, np.ndarray] = field(repr=False)
    # Covers rows 0 .. graph.rows - 1; later rows (the tail) are scored exactly.
    graph: VectorGraph | None = None

    @property
    def live(self) -> np.ndarray:
        return self.lexical.live

    @property
    def live_rows(self) -> int:
        return self.lexical.live_rows

    def record(self, row: int) -> IndexedChunk:
        return IndexedChunk(
            row=row,
            chunk_id=self.chunk_ids[row],
            document_id=self.document_ids[row],
            ordinal=int(self.ordinals[row]),
            title=self.titles[row],
            section=self.sections[row],
            text=self.texts[row],
            char_start=int(self.char_starts[row]),
            char_end=int(self.char_ends[row]),
            tokens=int(self.token_counts[row]),
            attributes=self.attributes[row],
            access=self.access_lists[row],
        )

    def vector(self, row: int) -> np.ndarray:
        """The stored vector of a row (normalised when the metric is cosine), read-only."""
        return self.vectors.rows[row]

    @property
    def tombstoned_rows(self) -> int:
        return self.n_rows - self.live_rows

    def rows_of(self, document_id: str) -> np.ndarray:
        """Live rows of a document in ordinal order (empty when it is not indexed)."""
        found = self.documents.get(document_id)
        return np.zeros(0, dtype=np.int64) if found is None else found.rows

    def source_url(self, document_id: str) -> str | None:
        found = self.documents.get(document_id)
        return None if found is None else found.source_url

    def document_span(self, document_id: str, start: int, end: int) -> str | None:
        """The document's text over ``[start, end)`` as of this snapshot, rebuilt from its
        chunks (see ``document_text``); None when its chunks here do not cover the span."""
        rows = self.rows_of(document_id).tolist()
        return rebuild_span(
            (
                (int(self.char_starts[row]), int(self.char_ends[row]), self.texts[row], gap)
                for row in rows
                for gap in (self.gaps[row],)
            ),
            start,
            end,
        )


class _RowLists:
    """The append-only lists behind a snapshot's ``RowPrefix`` fields."""

    names = (
        "chunk_ids",
        "document_ids",
        "titles",
        "sections",
        "texts",
        "attributes",
        "access_lists",
        "gaps",
    )

    def __init__(self, lists: dict[str, list[Any]]) -> None:
        self.lists = lists

    @classmethod
    def of(cls, snapshot: IndexSnapshot) -> _RowLists:
        return cls({name: getattr(snapshot, name)._items for name in cls.names})

    def extend(self, length: int, records: Sequence[ChunkRecord]) -> None:
        values: dict[str, list[Any]] = {
            "chunk_ids": [r.chunk_id for r in records],
            "document_ids": [r.document_id for r in records],
            "titles": [r.title for r in records],
            "sections": [r.section for r in records],
            "texts": [r.text for r in records],
            "attributes": [r.attributes for r in records],
            "access_lists": [tuple(r.access) for r in records],
            "gaps": [r.gap_after for r in records],
        }
        for name, items in self.lists.items():
            # Items past ``length`` were left by a write that failed before publishing.
            del items[length:]
            items.extend(values[name])

    def prefixes(self, length: int) -> dict[str, Any]:
        return {name: RowPrefix(items, length) for name, items in self.lists.items()}


NUMERIC_FIELDS: tuple[tuple[str, str, type], ...] = (
    ("ordinals", "ordinal", np.int32),
    ("char_starts", "char_start", np.int64),
    ("char_ends", "char_end", np.int64),
    ("token_counts", "tokens", np.int32),
)


class CollectionIndex:
    """The live index of one collection; see the module docstring for the lock discipline.

    ``bm25_k1`` and ``bm25_b`` name the BM25 parameters whose weights each new version
    precomputes before it is published; queries may use others, paying once per version.
    """

    def __init__(
        self,
        *,
        metric: Metric,
        dimension: int,
        schema: Schema | None = None,
        bm25_k1: float = DEFAULT_K1,
        bm25_b: float = DEFAULT_B,
    ) -> None:
        self.schema = schema
        self._bm25 = (bm25_k1, bm25_b)
        self._lock = threading.Lock()
        # Counts renumberings of the rows (compactions); a graph is built for one layout.
        self._layout = 0
        self._snapshot = IndexSnapshot(
            revision=0,
            n_rows=0,
            chunk_ids=RowPrefix([], 0),
            document_ids=RowPrefix([], 0),
            titles=RowPrefix([], 0),
            sections=RowPrefix([], 0),
            texts=RowPrefix([], 0),
            attributes=RowPrefix([], 0),
            access_lists=RowPrefix([], 0),
            gaps=RowPrefix([], 0),
            ordinals=np.zeros(0, np.int32),
            char_starts=np.zeros(0, np.int64),
            char_ends=np.zeros(0, np.int64),
            token_counts=np.zeros(0, np.int32),
            sort_keys=np.zeros(0, np.int64),
            lexical=LexicalIndex.empty(),
            vectors=VectorMatrix.empty(metric=metric, dimension=dimension),
            columns=_build_columns(schema, []),
            access=AccessGroups.empty(),
            documents={},
            sorted_chunk_ids=[],
            numeric_buffers={name: np.zeros(0, dtype) for name, _, dtype in NUMERIC_FIELDS},
        )

    @classmethod
    def build(
        cls,
        records: Iterable[ChunkRecord],
        *,
        metric: Metric,
        dimension: int,
        schema: Schema | None = None,
        revision: int = 0,
        bm25_k1: float = DEFAULT_K1,
        bm25_b: float = DEFAULT_B,
        rows_per_write: int = BUILD_ROWS_PER_WRITE,
    ) -> CollectionIndex:
        """An index of ``records``, whose chunks of one document must come together; they are
        taken about ``rows_per_write`` at a time (whole documents), so a stream of them is
        never held whole beside the index it builds."""
        index = cls(
            metric=metric, dimension=dimension, schema=schema, bm25_k1=bm25_k1, bm25_b=bm25_b
        )
        batch: dict[str, list[ChunkRecord]] = {}
        rows = 0
        seen: set[str] = set()
        current = None
        for record in records:
            document_id = record.document_id
            if document_id != current:
                if document_id in seen:
                    raise ValueError(f"the chunks of document {document_id!r} are not together")
                if rows >= rows_per_write:
                    index.replace_documents(batch, revision=revision)
                    batch, rows = {}, 0
                seen.add(document_id)
                batch[document_id] = []
                current = document_id
            batch[document_id].append(record)
            rows += 1
        index.replace_documents(batch, revision=revision)
        return index

    @classmethod
    def restored(
        cls,
        snapshot: IndexSnapshot,
        *,
        schema: Schema | None,
        bm25_k1: float = DEFAULT_K1,
        bm25_b: float = DEFAULT_B,
    ) -> CollectionIndex:
        """An index whose current state is ``snapshot`` (one read back from files)."""
        index = cls(
            metric=snapshot.vectors.metric,
            dimension=snapshot.vectors.dimension,
            schema=schema,
            bm25_k1=bm25_k1,
            bm25_b=bm25_b,
        )
        snapshot.lexical.warm(k1=bm25_k1, b=bm25_b)
        index._snapshot = snapshot
        return index

    def snapshot(self) -> IndexSnapshot:
        """The current state; hold on to it for the whole query."""
        return self._snapshot

    @property
    def layout(self) -> int:
        """Which numbering of the rows the current state has; a compaction changes it."""
        return self._layout

    @property
    def revision(self) -> int:
        return self._snapshot.revision

    def tombstoned_rows(self) -> int:
        """Rows a compaction would drop; the background compactor's trigger."""
        return self._snapshot.tombstoned_rows

    def replace_documents(
        self,
        records_by_document: Mapping[str, Sequence[ChunkRecord]],
        *,
        revision: int | None = None,
    ) -> IndexSnapshot:
        """Insert or replace all chunks of each named document; an empty sequence deletes it.

        ``revision`` is the store revision the result reflects (unchanged when omitted).
        Returns the published snapshot.
        """
        with self._lock:
            current = self._snapshot
            new_records = _checked_records(records_by_document)
            replaced = [current.rows_of(d) for d in records_by_document]
            old_rows = np.concatenate(replaced) if replaced else np.zeros(0, np.int64)
            published = self._next(current, old_rows, new_records, records_by_document, revision)
            self._snapshot = published
            return published

    def compact(self) -> np.ndarray:
        """Rebuild without tombstoned rows; returns ``old row -> new row`` (-1 when dropped).

        The rows are renumbered, so the graph goes with them (``build_graph`` makes one)."""
        with self._lock:
            return self._compact_locked()

    def graph_tail(self) -> int:
        """Rows the current graph does not cover (all rows when there is none)."""
        snapshot = self._snapshot
        return snapshot.n_rows - (0 if snapshot.graph is None else snapshot.graph.rows)

    def drop_graph(self) -> None:
        with self._lock:
            if self._snapshot.graph is not None:
                self._snapshot = replace(self._snapshot, graph=None)

    def build_graph(self, settings: VectorIndexSettings, *, compact: bool) -> bool:
        """Build a graph over every row (first compacting, if asked) and publish it.

        The graph is built outside the write lock, from the snapshot current at the start, so
        writes and queries go on meanwhile (queries with the old graph). It is published if it
        still fits: no compaction happened since, and, when compacting, no row the graph
        covers was deleted since (rows written since come after it, as its tail). Returns
        whether it was published.
        """
        start = self._snapshot
        layout = self._layout
        kept = np.flatnonzero(start.live) if compact else None
        matrix = start.vectors.take(kept) if kept is not None else start.vectors
        graph = VectorGraph.build(matrix, settings, layout=layout + (1 if compact else 0))
        with self._lock:
            if self._layout != layout:
                return False
            current = self._snapshot
            if compact:
                if not np.array_equal(current.live[: start.n_rows], start.live):
                    return False
                self._compact_locked()
                graph = graph.rebound(self._snapshot.vectors, self._layout)
            self._snapshot = replace(self._snapshot, graph=graph)
            return True

    def _compact_locked(self) -> np.ndarray:
        current = self._snapshot
        lexical, remap = current.lexical.compact()
        kept = np.flatnonzero(remap >= 0)
        kept_keys = current.sort_keys[kept]
        key_order = np.sort(kept_keys)
        numeric: dict[str, Any] = {
            name: getattr(current, name)[kept] for name, _, _ in NUMERIC_FIELDS
        }
        lists = {
            name: [items[row] for row in kept.tolist()]
            for name, items in _RowLists.of(current).lists.items()
        }
        columns = current.columns.take(kept) if current.columns is not None else None
        self._layout += 1
        self._snapshot = IndexSnapshot(
            revision=current.revision,
            n_rows=len(kept),
            **_RowLists(lists).prefixes(len(kept)),
            **numeric,
            sort_keys=np.searchsorted(key_order, kept_keys).astype(np.int64),
            lexical=lexical.warm(k1=self._bm25[0], b=self._bm25[1]),
            vectors=current.vectors.take(kept),
            columns=columns,
            access=current.access.take(remap, kept),
            documents={
                d: IndexedDocument(remap[entry.rows], entry.source_url)
                for d, entry in current.documents.items()
            },
            sorted_chunk_ids=[current.sorted_chunk_ids[k] for k in key_order.tolist()],
            numeric_buffers={name: numeric[name] for name, _, _ in NUMERIC_FIELDS},
        )
        return remap

    def _next(
        self,
        current: IndexSnapshot,
        old_rows: np.ndarray,
        records: list[ChunkRecord],
        records_by_document: Mapping[str, Sequence[ChunkRecord]],
        revision: int | None,
    ) -> IndexSnapshot:
        n_old = current.n_rows
        n_new = n_old + len(records)
        lexical = current.lexical.tombstone(old_rows).append([r.lexical_tokens for r in records])
        vectors = current.vectors
        if records:
            vectors = vectors.append(np.stack([r.vector for r in records]))
        columns = current.columns
        if columns is not None and records:
            added = _build_columns(self.schema, [r.attributes for r in records])
            columns = type(columns).concat([columns, added]) if added is not None else columns
        row_lists = _RowLists.of(current)
        row_lists.extend(n_old, records)
        sort_keys, sorted_ids = _merged_sort_keys(current, [r.chunk_id for r in records])

        documents = dict(current.documents)
        position = n_old
        for document_id, chunks in records_by_document.items():
            documents.pop(document_id, None)
            if chunks:
                rows = np.arange(position, position + len(chunks))
                documents[document_id] = IndexedDocument(rows, chunks[0].source_url)
                position += len(chunks)

        buffers = {
            name: write_rows(
                current.numeric_buffers[name],
                n_old,
                np.array([getattr(r, attribute) for r in records], dtype=dtype),
            )
            for name, attribute, dtype in NUMERIC_FIELDS
        }

        return IndexSnapshot(
            revision=current.revision if revision is None else revision,
            n_rows=n_new,
            **row_lists.prefixes(n_new),
            **_views(buffers, n_new),
            sort_keys=sort_keys,
            lexical=lexical.warm(k1=self._bm25[0], b=self._bm25[1]),
            vectors=vectors,
            columns=columns,
            access=current.access.appended([r.access for r in records]),
            documents=documents,
            sorted_chunk_ids=sorted_ids,
            numeric_buffers=buffers,
            graph=current.graph,
        )


def _views(buffers: dict[str, np.ndarray], length: int) -> dict[str, Any]:
    return {name: buffer[:length] for name, buffer in buffers.items()}


def _checked_records(records_by_document: Mapping[str, Sequence[ChunkRecord]]) -> list[ChunkRecord]:
    records: list[ChunkRecord] = []
    seen: set[str] = set()
    for document_id, chunks in records_by_document.items():
        for record in sorted(chunks, key=lambda r: r.ordinal):
            if record.document_id != document_id:
                raise ValueError(f"chunk {record.chunk_id!r} is filed under {document_id!r}")
            if record.chunk_id in seen:
                raise ValueError(f"chunk {record.chunk_id!r} appears twice in one write")
            seen.add(record.chunk_id)
            records.append(record)
    return records


def _merged_sort_keys(current: IndexSnapshot, new_ids: list[str]) -> tuple[np.ndarray, list[str]]:
    """Sort keys after appending ``new_ids``: existing ranks shift past the new ids below them.

    Keys cover tombstoned rows too, so they stay dense ranks of every stored row; a new id equal
    to a tombstoned one sorts after it, which never matters because both are never live.
    """
    old_sorted = current.sorted_chunk_ids
    if not new_ids:
        return current.sort_keys, old_sorted
    order = sorted(range(len(new_ids)), key=new_ids.__getitem__)
    new_sorted = [new_ids[i] for i in order]
    positions = np.array([bisect_right(old_sorted, cid) for cid in new_sorted], dtype=np.int64)
    shift = np.cumsum(np.bincount(positions, minlength=len(old_sorted) + 1))
    old_keys = current.sort_keys + shift[current.sort_keys]
    new_keys = np.empty(len(new_ids), dtype=np.int64)
    new_keys[order] = positions + np.arange(len(new_ids))
    merged = old_sorted + new_sorted
    merged.sort()
    return np.concatenate([old_keys, new_keys]), merged


def _build_columns(
    schema: Schema | None, rows: list[dict[str, AttributeValue]]
) -> AttributeColumns | None:
    if schema is None:
        return None
    return AttributeColumns.build(schema, rows)
