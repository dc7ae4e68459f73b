"""A collection's index built from the store as its rows stream in, on each backend: the rows
fetched a few at a time by one statement and written a few documents at a time make the same
index as every row read and written at once."""

from __future__ import annotations

import numpy as np
import pytest

from service.index.collection_index import CollectionIndex
from service.retrieval.ranking import exact_semantic_ranking, lexical_ranking
from service.store import repository
from service.usecases import collections, documents
from service.usecases.callers import LOCAL_ADMIN
from service.usecases.indexes import StoreIndexSource
from service.usecases.runtime import Runtime

WORDS = ["valve", "gasket", "pump", "seal", "hose", "clamp", "filter", "bearing"]


def test_an_index_streamed_from_the_store_equals_one_built_from_every_row_at_once(
    runtime: Runtime, monkeypatch: pytest.MonkeyPatch
) -> None:
    collections.put_collection(
        runtime, LOCAL_ADMIN, "parts", collections.CollectionSpec(description="Pump parts")
    )
    notes = [
        {
            "id": f"part-{n}",
            "title": f"Part note {n}",
            "text": " ".join(WORDS[(n + k) % len(WORDS)] for k in range(6 + n % 5)) * 40,
        }
        for n in range(12)
    ]
    documents.upsert_documents(runtime, LOCAL_ADMIN, "parts", notes)
    source = StoreIndexSource(runtime.transactions)
    with source.load("parts") as loaded:
        records = list(loaded.records)
        whole = CollectionIndex.build(
            records, metric=loaded.metric, dimension=runtime.embedder.dimensions
        )
    assert len({record.document_id for record in records}) == 12
    assert len(records) > 12

    monkeypatch.setattr(repository, "INDEX_ROWS_PER_FETCH", 3)
    with source.load("parts") as loaded:
        streamed = CollectionIndex.build(
            loaded.records,
            metric=loaded.metric,
            dimension=runtime.embedder.dimensions,
            rows_per_write=5,
        )
    one, other = whole.snapshot(), streamed.snapshot()
    assert other.lexical.segment_count > 1
    assert list(other.chunk_ids) == list(one.chunk_ids)
    assert np.array_equal(other.vectors.rows, one.vectors.rows)
    mask = np.ones(one.n_rows, dtype=bool)
    lexical = [lexical_ranking(s, ["pump", "seal"], mask, 10) for s in (one, other)]
    assert lexical[1].rows.tolist() == lexical[0].rows.tolist()
    np.testing.assert_allclose(lexical[1].scores, lexical[0].scores, rtol=1e-6)
    query = one.vectors.rows[3]
    semantic = [exact_semantic_ranking(s, query, mask, 10) for s in (one, other)]
    assert semantic[1].rows.tolist() == semantic[0].rows.tolist()
