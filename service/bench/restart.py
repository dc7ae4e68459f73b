"""``excerpta bench --restart``: how long a start takes to be ready, from a saved index and
without one.

A scratch SQLite store gets a synthetic collection like ``service.bench.synthetic``'s (texts of
96 to 144 terms drawn from a Zipf vocabulary, random unit vectors, ten chunks a document, no
attributes), written through the store layer slice by slice so that a million chunks never sit
in the bench's memory at once, with a graph as its vector index. Then three starts, each a
fresh index registry over the store, as a server's is:

- ``rebuilt``: nothing saved, so the index is built from the store (every chunk and vector read,
  every text analysed); the registry is ready then. Its background round then builds the graph
  and saves the index, timed apart (``graph_and_save_seconds``).
- ``loaded``: the saved index read back: the manifest, the identity and every file's checksum
  checked, the arrays read (the vectors mapped from their file), the graph's links read.
- ``caught_up``: the same after 1% of the documents were written anew in the store: the saved
  index read back, then brought up to date from the change log.

Each start's index is checked against the first (the same live rows, the same ranking of a
query); the figures say how warm the page cache was (the files were just written).
"""

from __future__ import annotations

import hashlib
import os
import tempfile
import time
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any

import numpy as np
from sqlalchemy import insert
from sqlalchemy.orm import Session

from service.bench.http import COLLECTION, plain_document_row
from service.bench.synthetic import (
    BENCH_RETRIEVAL,
    CHUNK_TOKENS_MAX,
    CHUNK_TOKENS_MIN,
    CHUNKS_PER_DOCUMENT,
    VOCABULARY_SIZE,
    ZIPF_EXPONENT,
    document_id_of,
    term,
    unit_vectors,
    zipf_probabilities,
)
from service.config import Settings
from service.index.graph import VectorIndexSettings
from service.index.saved import IndexDirectory
from service.retrieval.ranking import exact_semantic_ranking
from service.store import repository
from service.store.tables import ChunkRow, CollectionRow, DocumentRow, EmbeddingRow
from service.usecases.callers import LOCAL_ADMIN
from service.usecases.collections import CollectionSpec, put_collection
from service.usecases.indexes import IndexRegistry, SavedIndexes, StoreIndexSource
from service.usecases.runtime import Runtime, embedder_on_first_use

REWRITTEN_SHARE = 0.01
# Rows generated and written at a time (a whole number of documents).
SLICE_ROWS = 20_000


def _slices(
    size: int, dimension: int, seed: int
) -> Iterator[tuple[int, list[str], list[int], np.ndarray]]:
    """The collection's rows a slice at a time: (first row, texts, token counts, vectors),
    each slice drawn from its own seeded generator."""
    vocabulary = np.array([term(i) for i in range(VOCABULARY_SIZE)], dtype=object)
    cdf = np.cumsum(zipf_probabilities(VOCABULARY_SIZE, ZIPF_EXPONENT))
    cdf[-1] = 1.0
    for first in range(0, size, SLICE_ROWS):
        count = min(SLICE_ROWS, size - first)
        rng = np.random.default_rng([seed, first])
        lengths = rng.integers(CHUNK_TOKENS_MIN, CHUNK_TOKENS_MAX + 1, count)
        ids = np.searchsorted(cdf, rng.random(int(lengths.sum())), side="right")
        ends = np.cumsum(lengths)
        texts = [" ".join(vocabulary[ids[e - n : e]]) for e, n in zip(ends, lengths, strict=True)]
        yield first, texts, lengths.tolist(), unit_vectors(rng, count, dimension)


def _write_store(runtime: Runtime, size: int, dimension: int, seed: int, vectors: Any) -> None:
    """The collection made by the service, then its rows written straight into the store."""
    spec = CollectionSpec(
        description="Synthetic restart bench collection",
        retrieval=BENCH_RETRIEVAL,
        vectors=vectors,
    )
    put_collection(runtime, LOCAL_ADMIN, COLLECTION, spec)
    with runtime.write_transaction() as session:
        row = repository.collection_by_name(session, COLLECTION)
        assert row is not None
        now = repository.utcnow()
        for first, texts, lengths, vectors_of_slice in _slices(size, dimension, seed):
            _write_slice(session, row, first, texts, lengths, vectors_of_slice, now)
        repository.bump_revision(session, row, [(None, "reset")])


def _write_slice(
    session: Session,
    row: CollectionRow,
    first: int,
    texts: list[str],
    lengths: list[int],
    vectors: np.ndarray,
    now: Any,
) -> None:
    documents, chunks, embeddings = [], [], []
    for start in range(0, len(texts), CHUNKS_PER_DOCUMENT):
        number = (first + start) // CHUNKS_PER_DOCUMENT
        parts = texts[start : start + CHUNKS_PER_DOCUMENT]
        text = " ".join(parts)
        documents.append(
            plain_document_row(
                number + 1,
                collection_id=row.id,
                external_id=document_id_of(number),
                title=f"Document {number}",
                text=text,
                now=now,
            )
        )
        offset = 0
        for ordinal, part in enumerate(parts):
            position = start + ordinal
            digest = hashlib.sha256(f"restart:{first + position}".encode()).hexdigest()
            chunks.append(
                {
                    "document_id": number + 1,
                    "generation": row.chunk_generation,
                    "ordinal": ordinal,
                    "text": part,
                    "char_start": offset,
                    "char_end": offset + len(part),
                    "tokens": lengths[position],
                    "section": "",
                    "embedded_text_hash": digest,
                }
            )
            embeddings.append(
                {
                    "embedder": row.embedder,
                    "text_hash": digest,
                    "dimensions": vectors.shape[1],
                    "vector": vectors[position].tobytes(),
                }
            )
            offset += len(part) + 1
    session.execute(insert(DocumentRow), documents)
    session.execute(insert(ChunkRow), chunks)
    session.execute(insert(EmbeddingRow), embeddings)


def _registry(runtime: Runtime, folder: Path) -> IndexRegistry:
    store_id = runtime.store.store_id
    if store_id is None:
        raise RuntimeError("the scratch store has no identity")
    return IndexRegistry(
        StoreIndexSource(runtime.transactions),
        dimensions=runtime.embedder.dimensions,
        poll_seconds=3600.0,
        compact_after=runtime.settings.compact_after_deleted_rows,
        saved=SavedIndexes(
            directory=IndexDirectory(folder),
            store_id=store_id,
            embedder=runtime.embedder.name,
            every_seconds=runtime.settings.index_save_seconds,
        ),
    )


def _ready(registry: IndexRegistry) -> float:
    started = time.perf_counter()
    registry.view(COLLECTION)
    return time.perf_counter() - started


def _ranking(registry: IndexRegistry, query: np.ndarray) -> list[str]:
    snapshot = registry.view(COLLECTION).snapshot
    rows = exact_semantic_ranking(snapshot, query, snapshot.live.copy(), 10).rows
    return [snapshot.chunk_ids[int(row)] for row in rows]


def _rewrite(runtime: Runtime, documents: int, share: float, seed: int) -> int:
    """Write ``share`` of the documents anew in the store (their chunks keep their vectors,
    their titles change), as another process would, logging each in the change log."""
    rng = np.random.default_rng(seed)
    count = max(1, round(share * documents))
    chosen = sorted(rng.choice(documents, count, replace=False).tolist())
    with runtime.write_transaction() as session:
        row = repository.collection_by_name(session, COLLECTION)
        assert row is not None
        found = repository.documents_by_external_id(
            session, row.id, [document_id_of(n) for n in chosen]
        )
        for document in found.values():
            document.title = f"{document.title} (revised)"
        repository.bump_revision(session, row, [(d, "upsert") for d in sorted(found)])
    return len(found)


def run_restart(
    size: int,
    *,
    dimension: int,
    seed: int,
    vectors: VectorIndexSettings,
    progress: Callable[[str], None],
) -> dict[str, Any]:
    with tempfile.TemporaryDirectory(prefix="excerpta-bench-restart-") as scratch:
        data_dir = Path(scratch)
        settings = Settings(data_dir=data_dir)
        runtime = Runtime(settings, embedder_on_first_use(settings))
        if runtime.embedder.dimensions != dimension:
            raise ValueError(f"--restart needs --dims {runtime.embedder.dimensions}")
        try:
            _write_store(
                runtime,
                size,
                dimension,
                seed,
                {"index": vectors.index, "graph": vectors.graph.__dict__},
            )
            progress(
                f"{size:,} chunks written to the scratch store; starting without a saved index"
            )
            folder = settings.resolved_index_dir()
            figures: dict[str, Any] = {"chunks": size, "documents": size // CHUNKS_PER_DOCUMENT}

            first = _registry(runtime, folder)
            figures["rebuilt_ready_seconds"] = _ready(first)
            figures["load_average_rebuilt"] = os.getloadavg()[0]
            progress(
                f"{size:,} chunks: built from the store in "
                f"{figures['rebuilt_ready_seconds']:.1f} s; building the graph and saving"
            )
            started = time.perf_counter()
            first.maintain()
            figures["graph_and_save_seconds"] = time.perf_counter() - started
            info = IndexDirectory(folder).describe(COLLECTION)
            figures["saved_bytes"] = info.bytes
            figures["saved_graph_rows"] = info.graph_rows
            query = np.random.default_rng(seed).standard_normal(dimension).astype(np.float32)
            expected = _ranking(first, query)
            first.stop()
            del first
            progress(f"{size:,} chunks: graph and save {figures['graph_and_save_seconds']:.1f} s")

            loaded = _registry(runtime, folder)
            figures["loaded_ready_seconds"] = _ready(loaded)
            figures["load_average_loaded"] = os.getloadavg()[0]
            if loaded.start_counts() != {("loaded", ""): 1}:
                raise RuntimeError(f"the saved index was not read back: {loaded.start_counts()}")
            if _ranking(loaded, query) != expected:
                raise RuntimeError("the index read back ranks otherwise than the one saved")
            if loaded.view(COLLECTION).snapshot.graph is None:
                raise RuntimeError("the index read back has no graph")
            loaded.stop()
            del loaded
            progress(f"{size:,} chunks: read back in {figures['loaded_ready_seconds']:.1f} s")

            figures["rewritten_documents"] = _rewrite(
                runtime, figures["documents"], REWRITTEN_SHARE, seed
            )
            caught_up = _registry(runtime, folder)
            figures["caught_up_ready_seconds"] = _ready(caught_up)
            if caught_up.start_counts() != {("caught_up", ""): 1}:
                raise RuntimeError(f"the saved index was not caught up: {caught_up.start_counts()}")
            caught_up.stop()
        finally:
            runtime.close()
    return figures


def print_restart(figures: dict[str, Any], emit: Callable[[str], None]) -> None:
    emit("")
    emit(
        f"restart at {figures['chunks']:,} chunks ({figures['documents']:,} documents), "
        f"saved index {figures['saved_bytes'] / 2**20:.0f} MiB with a graph over "
        f"{figures['saved_graph_rows']:,} rows:"
    )
    rows = [
        (
            "ready without a saved index (built from the store)",
            figures["rebuilt_ready_seconds"],
            f"(load average {figures['load_average_rebuilt']:.2f}); then graph and save "
            f"{figures['graph_and_save_seconds']:.1f} s",
        ),
        (
            "ready from the saved index",
            figures["loaded_ready_seconds"],
            f"(load average {figures['load_average_loaded']:.2f}; files in the page cache)",
        ),
        (
            f"ready from it, {figures['rewritten_documents']:,} documents caught up",
            figures["caught_up_ready_seconds"],
            "",
        ),
    ]
    for label, seconds, note in rows:
        emit(f"  {label:<52} {seconds:>8.2f} s  {note}".rstrip())
