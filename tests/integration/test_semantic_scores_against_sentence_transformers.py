"""Semantic scores over HTTP equal cosine similarities computed here with sentence-transformers.

Reference: sentence-transformers' ``SentenceTransformer.encode`` on the bundled
all-MiniLM-L6-v2 weights, called directly (no normalisation asked of it), with the cosine taken
here in float64. The text a chunk is embedded as is its title, section path and text joined by
line breaks (empty parts left out); only where that exceeds the model's window does the service
shorten title and section, and the test then uses the service's shortened form.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pytest

from service.ingest.embedding_text import embedding_input
from tests.api_helpers import Api
from tests.integration.conftest import CRANFIELD_COLLECTION, DEMO_COLLECTION, StoredChunk

pytestmark = pytest.mark.model

TOP_K = 10
CRANFIELD_QUERIES = (
    "what similarity laws must be obeyed when constructing aeroelastic models of heated high "
    "speed aircraft.",
    "how can the effect of the boundary-layer on wing pressure be calculated.",
    "papers on shock-sound wave interaction.",
)
DEMO_QUERIES = (
    "What tyre pressure should I run on my Ridgeline?",
    "How do I bleed hydraulic disc brakes?",
    "Which bulletins are safety recalls for the battery?",
)


def embedded_text(hit: dict[str, Any], model: Any, minilm: Any) -> str:
    whole = "\n".join(part for part in (hit["title"], hit["section"], hit["text"]) if part)
    window = minilm.window - minilm.special_tokens
    if len(model.tokenizer.encode(whole, add_special_tokens=False)) <= window:
        return whole
    return embedding_input(hit["title"], hit["section"], hit["text"], minilm.tokens, window)


def cosine(matrix: np.ndarray, vector: np.ndarray) -> np.ndarray:
    matrix, vector = matrix.astype(np.float64), vector.astype(np.float64)
    result: np.ndarray = (matrix @ vector) / (
        np.linalg.norm(matrix, axis=1) * np.linalg.norm(vector)
    )
    return result


def semantic_hits(api: Api, collection: str, query: str) -> list[dict[str, Any]]:
    response = api.post(
        f"/v1/collections/{collection}/search",
        json={"query": query, "mode": "semantic", "top_k": TOP_K},
    )
    assert response.status_code == 200, response.text
    hits: list[dict[str, Any]] = response.json()["hits"]
    assert len(hits) == TOP_K
    return hits


def assert_scores_match_the_reference(
    hits: list[dict[str, Any]], query: str, model: Any, minilm: Any
) -> np.ndarray:
    texts = [embedded_text(hit, model, minilm) for hit in hits]
    chunk_vectors = model.encode(texts, convert_to_numpy=True, normalize_embeddings=False)
    query_vector = model.encode([query], convert_to_numpy=True, normalize_embeddings=False)[0]
    expected = cosine(chunk_vectors, query_vector)
    assert [hit["score"] for hit in hits] == pytest.approx(expected.tolist(), rel=1e-5)
    return np.asarray(chunk_vectors)


@pytest.mark.parametrize("query", DEMO_QUERIES)
def test_demo_semantic_scores_equal_sentence_transformers_cosines(
    query: str, demo_api: Api, reference_model: Any, minilm: Any
) -> None:
    hits = semantic_hits(demo_api, DEMO_COLLECTION, query)
    assert any(hit["section"] for hit in hits), "the section path is part of the embedded text"
    assert_scores_match_the_reference(hits, query, reference_model, minilm)


@pytest.mark.cranfield
@pytest.mark.parametrize("query", CRANFIELD_QUERIES)
def test_cranfield_semantic_scores_and_stored_vectors_equal_sentence_transformers(
    query: str,
    cranfield_api: Api,
    reference_model: Any,
    minilm: Any,
    cranfield_chunks: list[StoredChunk],
    cranfield_vectors: np.ndarray,
) -> None:
    hits = semantic_hits(cranfield_api, CRANFIELD_COLLECTION, query)
    fresh = assert_scores_match_the_reference(hits, query, reference_model, minilm)
    row_of = {chunk.chunk_id: row for row, chunk in enumerate(cranfield_chunks)}
    stored = cranfield_vectors[[row_of[hit["chunk_id"]] for hit in hits]]
    for stored_vector, fresh_vector in zip(stored, fresh, strict=True):
        assert float(cosine(stored_vector[None, :], fresh_vector)[0]) == pytest.approx(
            1.0, abs=1e-6
        )
