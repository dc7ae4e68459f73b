"""``excerpta bench --with-model``: the real embedder's query time and the ingest pipeline's rate.

Ingestion runs the real use case (``upsert_documents`` as the local admin) over a scratch SQLite
store; the raw rate encodes exactly the texts the pipeline embedded, in one call, after the
model is warm. Pipeline overhead is ``1 - ours / raw``: the share of the model's own rate that
parsing, chunking, hashing, the store and the index cost on top of it.
"""

from __future__ import annotations

import tempfile
import time
from pathlib import Path
from typing import Any

from service.bench.synthetic import QuerySet, make_collection
from service.bench.timing import time_each
from service.config import Settings
from service.usecases.callers import LOCAL_ADMIN
from service.usecases.collections import CollectionSpec, put_collection
from service.usecases.documents import prepare_document, upsert_documents
from service.usecases.drafts import materialise
from service.usecases.runtime import Runtime

COLLECTION = "bench"
BATCH_DOCUMENTS = 64


def run_model(*, queries: QuerySet, documents: int, seed: int) -> dict[str, Any]:
    from service.embedding.minilm import MiniLmEmbedder

    started = time.perf_counter()
    embedder = MiniLmEmbedder()
    load_seconds = time.perf_counter() - started
    query_embedding, _ = time_each(queries.texts, embedder.embed_query)

    texts = [record.text for record in make_collection(max(documents, 10), 8, seed).records]
    batch = [
        {"id": f"doc{number:06d}", "title": f"Document {number}", "text": text}
        for number, text in enumerate(texts[:documents])
    ]
    with tempfile.TemporaryDirectory(prefix="excerpta-bench-model-") as scratch:
        data_dir = Path(scratch)
        settings = Settings(
            data_dir=data_dir, database_url=f"sqlite:///{(data_dir / 'excerpta.db').as_posix()}"
        )
        runtime = Runtime(settings, embedder)
        try:
            _, view = put_collection(runtime, LOCAL_ADMIN, COLLECTION, CollectionSpec())
            chunking = {name: int(value) for name, value in view["chunking"].items()}
            started = time.perf_counter()
            chunks = 0
            for first in range(0, len(batch), BATCH_DOCUMENTS):
                results = upsert_documents(
                    runtime, LOCAL_ADMIN, COLLECTION, batch[first : first + BATCH_DOCUMENTS]
                )
                chunks += sum(int(result["chunks"]) for result in results)
            seconds = time.perf_counter() - started
            embedded = [
                chunk.embedded_text
                for index, raw in enumerate(batch)
                for chunk in materialise(
                    embedder, prepare_document(raw, index, {}), chunking
                ).chunks
            ]
        finally:
            runtime.close()
    started = time.perf_counter()
    embedder.embed_documents(embedded)
    raw_seconds = time.perf_counter() - started
    ours = chunks / seconds
    raw = len(embedded) / raw_seconds
    return {
        "embedder": embedder.name,
        "load_seconds": load_seconds,
        "query_embedding": query_embedding.as_dict(),
        "ingest": {
            "documents": len(batch),
            "chunks": chunks,
            "seconds": seconds,
            "chunks_per_second": ours,
            "raw_texts": len(embedded),
            "raw_seconds": raw_seconds,
            "raw_chunks_per_second": raw,
            "pipeline_overhead": 1.0 - ours / raw,
        },
    }
