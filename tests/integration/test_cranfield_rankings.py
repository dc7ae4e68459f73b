"""Cranfield rankings over HTTP against rankings this test computes itself.

References:
- lexical: BM25 written out here in float64, the ``smoothed`` form the contract fixes
  (idf = ln(1 + (N - df + 0.5) / (df + 0.5)), k1 = 1.2, b = 0.75), over the collection's
  analyzer tokens of each chunk's indexed text (title, section path, chunk), each query token
  counted once per occurrence;
- semantic: cosine, in float64, between the query as sentence-transformers encodes it here and
  each chunk's stored embedding (that stored embeddings are what sentence-transformers gives for
  the chunk's embedded text is checked in test_semantic_scores_against_sentence_transformers);
- hybrid: reciprocal rank fusion (k = 60) of those two rankings among the candidates, each cut
  at depth, ties by chunk_id, as the contract defines it.
Filtering must never change a score, only which chunks compete.

The service scores in float32, the references in float64, so two chunks whose reference scores
differ by less than float32 rounding (``NEAR_TIE``, relative) may come out in either order: the
order between them is an accident of rounding, not of the method. Within such a group of near
ties, and only there, the comparison takes the service's order (``ReferenceRanking.settled``);
the scores must still agree and the group must hold the same chunks.
"""

from __future__ import annotations

import json
import math
from collections import Counter
from collections.abc import Callable, Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pytest

from service.index.analyzer import Analyzer
from tests.api_helpers import Api
from tests.integration.conftest import CRANFIELD_COLLECTION, RANKING_LIMIT, StoredChunk

pytestmark = [pytest.mark.model, pytest.mark.cranfield]

QUERY_IDS = ("1", "9", "29", "57", "100", "141", "190", "225")
K1, B, RRF_K, DEPTH = 1.2, 0.75, 60, 100
NEAR_TIE = 1e-6

Attributes = dict[str, Any]
FILTERS: dict[str, Callable[[Attributes], bool]] = {
    "year BETWEEN 1960 AND 1965": lambda a: a.get("year") is not None and 1960 <= a["year"] <= 1965,
    "NOT (year BETWEEN 1960 AND 1965)": lambda a: (
        a.get("year") is not None and not 1960 <= a["year"] <= 1965
    ),
    "year IS NULL": lambda a: a.get("year") is None,
    "source LIKE 'j. ae. scs.%' AND year >= 1958": lambda a: (
        (a.get("source") or "").startswith("j. ae. scs.")
        and a.get("year") is not None
        and a["year"] >= 1958
    ),
    "authors IN ('lighthill,m.j.', 'biot,m.a.', 'kempner,j.')": lambda a: (
        a.get("authors") in {"lighthill,m.j.", "biot,m.a.", "kempner,j."}
    ),
}
"""Each filter and the same selection written in Python (a missing attribute never matches)."""


@dataclass(frozen=True)
class ReferenceRanking:
    chunk_ids: list[str]
    scores: list[float]

    def restricted(self, allowed: set[str]) -> ReferenceRanking:
        kept = [(c, s) for c, s in zip(self.chunk_ids, self.scores, strict=True) if c in allowed]
        return ReferenceRanking([c for c, _ in kept], [s for _, s in kept])

    def settled(self, service_order: list[str]) -> ReferenceRanking:
        """This ranking with each run of near-tied scores put in the service's order."""
        position = {chunk_id: index for index, chunk_id in enumerate(service_order)}
        pairs = list(zip(self.chunk_ids, self.scores, strict=True))
        settled: list[tuple[str, float]] = []
        start = 0
        while start < len(pairs):
            end = start + 1
            while end < len(pairs) and pairs[end - 1][1] - pairs[end][1] <= NEAR_TIE * max(
                1.0, abs(pairs[end][1])
            ):
                end += 1
            group = pairs[start:end]
            settled.extend(sorted(group, key=lambda p: position.get(p[0], len(position))))
            start = end
        return ReferenceRanking([c for c, _ in settled], [s for _, s in settled])


class References:
    """Float64 BM25 and cosine over every stored chunk, ranked with ties by chunk_id."""

    def __init__(
        self, chunks: list[StoredChunk], vectors: np.ndarray, model: Any, analyzer: Analyzer
    ) -> None:
        self.chunk_ids = [c.chunk_id for c in chunks]
        self.analyzer = analyzer
        self.model = model
        self.counts = [
            Counter(analyzer.tokens("\n".join(p for p in (c.title, c.section, c.text) if p)))
            for c in chunks
        ]
        self.lengths = np.array([sum(c.values()) for c in self.counts], dtype=np.float64)
        self.document_frequency: Counter[str] = Counter()
        for counts in self.counts:
            self.document_frequency.update(counts.keys())
        self.vectors = vectors.astype(np.float64)

    def _ranked(self, scores: np.ndarray, present: np.ndarray) -> ReferenceRanking:
        rows = np.flatnonzero(present)
        # chunk_ids are in ascending order, so a stable sort on -score breaks ties by chunk_id.
        order = rows[np.argsort(-scores[rows], kind="stable")]
        return ReferenceRanking([self.chunk_ids[i] for i in order], scores[order].tolist())

    def lexical(self, query: str) -> ReferenceRanking:
        total = len(self.counts)
        average_length = float(self.lengths.mean())
        scores = np.zeros(total, dtype=np.float64)
        present = np.zeros(total, dtype=bool)
        for term in self.analyzer.tokens(query):
            df = self.document_frequency.get(term, 0)
            if df == 0:
                continue
            idf = math.log(1.0 + (total - df + 0.5) / (df + 0.5))
            for row, counts in enumerate(self.counts):
                tf = counts.get(term, 0)
                if tf:
                    norm = K1 * (1.0 - B + B * self.lengths[row] / average_length)
                    scores[row] += idf * tf * (K1 + 1.0) / (tf + norm)
                    present[row] = True
        return self._ranked(scores, present)

    def semantic(self, query: str) -> ReferenceRanking:
        encoded = self.model.encode([query], convert_to_numpy=True, normalize_embeddings=False)
        query_vector = np.asarray(encoded[0], dtype=np.float64)
        norms = np.linalg.norm(self.vectors, axis=1) * np.linalg.norm(query_vector)
        scores = (self.vectors @ query_vector) / norms
        return self._ranked(scores, np.ones(len(scores), dtype=bool))


def fused(lexical: ReferenceRanking, semantic: ReferenceRanking) -> list[dict[str, Any]]:
    lexical_ranks = {c: r for r, c in enumerate(lexical.chunk_ids[:DEPTH], start=1)}
    semantic_ranks = {c: r for r, c in enumerate(semantic.chunk_ids[:DEPTH], start=1)}
    entries = []
    for chunk_id in set(lexical_ranks) | set(semantic_ranks):
        ranks = {"lexical": lexical_ranks.get(chunk_id), "semantic": semantic_ranks.get(chunk_id)}
        score = sum(1.0 / (RRF_K + r) for r in ranks.values() if r is not None)
        entries.append({"chunk_id": chunk_id, "score": score, "ranks": ranks})
    return sorted(entries, key=lambda e: (-e["score"], e["chunk_id"]))


@pytest.fixture(scope="module")
def queries(cranfield_dir: Path) -> dict[str, str]:
    lines = (cranfield_dir / "queries.tsv").read_text(encoding="utf-8").splitlines()
    by_id = dict(line.split("\t", 1) for line in lines if line.strip())
    return {qid: by_id[qid] for qid in QUERY_IDS}


@pytest.fixture(scope="module")
def attributes_by_document(cranfield_dir: Path) -> dict[str, Attributes]:
    with (cranfield_dir / "documents.jsonl").open(encoding="utf-8") as lines:
        records = [json.loads(line) for line in lines]
    return {r["id"]: r.get("attributes") or {} for r in records}


@pytest.fixture(scope="module")
def references(
    cranfield_chunks: list[StoredChunk], cranfield_vectors: np.ndarray, reference_model: Any
) -> References:
    return References(cranfield_chunks, cranfield_vectors, reference_model, Analyzer.english())


def search(api: Api, query: str, mode: str, filter_text: str | None, top_k: int) -> dict[str, Any]:
    body: dict[str, Any] = {"query": query, "mode": mode, "top_k": top_k, "depth": DEPTH}
    if mode != "hybrid":
        body["depth"] = top_k
    if filter_text is not None:
        body["filter"] = filter_text
    response = api.post(f"/v1/collections/{CRANFIELD_COLLECTION}/search", json=body)
    assert response.status_code == 200, response.text
    result: dict[str, Any] = response.json()
    return result


@pytest.fixture(scope="module")
def full_rankings(cranfield_api: Api, queries: dict[str, str]) -> dict[tuple[str, str], list[Any]]:
    """Every ranked chunk, unfiltered, per (query id, mode)."""
    return {
        (qid, mode): search(cranfield_api, text, mode, None, RANKING_LIMIT)["hits"]
        for qid, text in queries.items()
        for mode in ("lexical", "semantic")
    }


def allowed_chunks(
    chunks: list[StoredChunk], attributes: dict[str, Attributes], filter_text: str | None
) -> set[str]:
    if filter_text is None:
        return {c.chunk_id for c in chunks}
    selects = FILTERS[filter_text]
    return {c.chunk_id for c in chunks if selects(attributes[c.document_id])}


@pytest.mark.parametrize("mode", ["lexical", "semantic"])
@pytest.mark.parametrize("filter_text", list(FILTERS))
def test_a_filtered_ranking_is_the_full_ranking_restricted_to_the_filter(
    filter_text: str,
    mode: str,
    cranfield_api: Api,
    queries: dict[str, str],
    full_rankings: dict[tuple[str, str], list[Any]],
    cranfield_chunks: list[StoredChunk],
    attributes_by_document: dict[str, Attributes],
) -> None:
    allowed = allowed_chunks(cranfield_chunks, attributes_by_document, filter_text)
    assert allowed, "each filter selects some chunks"
    for qid, text in queries.items():
        result = search(cranfield_api, text, mode, filter_text, RANKING_LIMIT)
        hits = result["hits"]
        assert result["candidates"] == len(allowed)
        expected = [h for h in full_rankings[qid, mode] if h["chunk_id"] in allowed]
        assert [h["chunk_id"] for h in hits] == [h["chunk_id"] for h in expected], qid
        assert [h["score"] for h in hits] == [h["score"] for h in expected], qid
        assert all(FILTERS[filter_text](h["attributes"]) for h in hits)


def test_the_full_lexical_ranking_equals_float64_bm25(
    queries: dict[str, str],
    full_rankings: dict[tuple[str, str], list[Any]],
    references: References,
) -> None:
    for qid, text in queries.items():
        hits = full_rankings[qid, "lexical"]
        service_order = [h["chunk_id"] for h in hits]
        reference = references.lexical(text).settled(service_order)
        assert service_order == reference.chunk_ids, qid
        assert [h["score"] for h in hits] == pytest.approx(reference.scores, rel=1e-5), qid


def test_the_full_semantic_ranking_equals_cosine_with_the_model_run_here(
    queries: dict[str, str],
    full_rankings: dict[tuple[str, str], list[Any]],
    references: References,
    cranfield_chunks: list[StoredChunk],
) -> None:
    for qid, text in queries.items():
        hits = full_rankings[qid, "semantic"]
        service_order = [h["chunk_id"] for h in hits]
        reference = references.semantic(text).settled(service_order)
        assert len(hits) == len(cranfield_chunks)
        assert service_order == reference.chunk_ids, qid
        # A cosine near zero has no relative precision in float32; there 1e-7 absolute holds.
        assert [h["score"] for h in hits] == pytest.approx(reference.scores, rel=1e-5, abs=1e-7), (
            qid
        )


@pytest.fixture(scope="module")
def plain_fusion(cranfield_api: Api) -> Iterator[Api]:
    """The shared collection with the hybrid's further steps off for this module, so that its
    hybrid is the contract's plain fusion these references compute; the default's steps are
    measured in test_cranfield_quality."""
    path = f"/v1/collections/{CRANFIELD_COLLECTION}"
    before = cranfield_api.get(path).json()["retrieval"]
    plain = {"lexical_feedback_chunks": 0, "semantic_feedback_chunks": 0}
    assert cranfield_api.put(path, json={"retrieval": plain}).status_code == 200
    yield cranfield_api
    assert cranfield_api.put(path, json={"retrieval": before}).status_code == 200


@pytest.mark.parametrize("filter_text", [None, *FILTERS])
def test_hybrid_hits_equal_reciprocal_rank_fusion_of_the_reference_rankings(
    filter_text: str | None,
    plain_fusion: Api,
    queries: dict[str, str],
    references: References,
    full_rankings: dict[tuple[str, str], list[Any]],
    cranfield_chunks: list[StoredChunk],
    attributes_by_document: dict[str, Attributes],
) -> None:
    allowed = allowed_chunks(cranfield_chunks, attributes_by_document, filter_text)
    for qid, text in queries.items():
        lexical, semantic = (
            ranking.restricted(allowed).settled(
                [h["chunk_id"] for h in full_rankings[qid, mode] if h["chunk_id"] in allowed]
            )
            for mode, ranking in (
                ("lexical", references.lexical(text)),
                ("semantic", references.semantic(text)),
            )
        )
        expected = fused(lexical, semantic)[:DEPTH]
        hits = search(plain_fusion, text, "hybrid", filter_text, DEPTH)["hits"]
        assert [h["chunk_id"] for h in hits] == [e["chunk_id"] for e in expected], qid
        assert [h["ranks"] for h in hits] == [e["ranks"] for e in expected], qid
        assert [h["score"] for h in hits] == pytest.approx(
            [e["score"] for e in expected], rel=1e-12
        )
        if filter_text is not None:
            assert all(FILTERS[filter_text](h["attributes"]) for h in hits)
