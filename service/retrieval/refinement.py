"""The steps a hybrid query may take beyond plain fusion, and their settings.

Each step is a collection setting a user can switch off, and each is a stage of the trace:

- lexical feedback: RM3 (Lavrenko and Croft, "Relevance-Based Language Models", SIGIR 2001;
  Abdul-Jaleel et al., "UMass at TREC 2004", the interpolation with the original query). The
  first lexical ranking's top chunks give a relevance model ``P(t | R) = sum_d P(t | d) P(d)``
  with ``P(d)`` the chunk's share of the top BM25 scores and ``P(t | d) = tf / len``; its best
  terms, interpolated with the original query's, are ranked again by BM25 with those weights.
  An expansion term found in more than ``max_share`` of the live chunks may be skipped: such a
  term says little about relevance and has the longest posting list (leaving out the most
  common candidate terms is common practice in choosing expansion terms).
- semantic feedback: Rocchio ("Relevance feedback in information retrieval", 1971) on the query
  vector: ``q' = q + weight * mean(top chunk vectors)``, ranked again.
- feedback source: both feedback steps take their chunks either from their own first ranking,
  as each method was published, or from the fusion of the two first rankings, so that each
  method learns from the chunks the other ranking found as well. The fused scores are ranks, not
  likelihoods, so there RM3 gives each feedback chunk the same ``P(d)``.
- fusion: reciprocal rank fusion with a weight per ranking (Cormack, Clarke and Büttcher 2009),
  or a convex combination of each ranking's normalised scores, min-max or z-score (Fox and Shaw,
  "Combination of Multiple Searches", TREC-2 1994; Bruch, Gai and Ingber, "An Analysis of
  Fusion Functions for Hybrid Retrieval", ACM TOIS 2023).
- document support: a chunk that is its document's best in the fused ranking gains
  ``weight`` times the score of the document's second best, so a document with two matching
  chunks edges ahead of one with a single equal chunk.

Field weights of title and section against the text (BM25F, Robertson, Zaragoza and Taylor,
"Simple BM25 extension to multiple weighted fields", CIKM 2004) act when a chunk is indexed,
not here: see ``Analyzer.indexed_tokens``.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from service.index.collection_index import IndexSnapshot
from service.retrieval.ranking_settings import LexicalFeedback, SemanticFeedback


@dataclass(frozen=True)
class Expansion:
    """An RM3 query: distinct term ids, their weights, and the feedback chunks used."""

    term_ids: np.ndarray
    weights: np.ndarray
    feedback_rows: int


def rm3_expansion(
    snapshot: IndexSnapshot,
    tokens: tuple[str, ...],
    first_rows: np.ndarray,
    first_scores: np.ndarray,
    feedback: LexicalFeedback,
) -> Expansion:
    """The interpolated query ``w * P(t | Q) + (1 - w) * P(t | R)`` (see the module docstring).

    ``first_rows`` and ``first_scores`` are the first lexical ranking, best first.
    """
    lexical = snapshot.lexical
    query_ids, counts = lexical.term_ids_of(tokens)
    rows = first_rows[: feedback.chunks]
    scores = np.asarray(first_scores[: feedback.chunks], dtype=np.float64)
    if len(query_ids) == 0 or len(rows) == 0 or scores.sum() <= 0:
        return Expansion(query_ids, counts, 0)
    model_ids, model = lexical.relevance_model(rows, scores / scores.sum())
    kept = lexical.in_at_most(model_ids, feedback.max_share)
    model_ids, model = model_ids[kept], model[kept]
    if len(model_ids) == 0:
        return Expansion(query_ids, counts, len(rows))
    best = np.lexsort((model_ids, -model))[: feedback.terms]
    model_ids, model = model_ids[best], model[best] / model[best].sum()
    ids = np.concatenate([query_ids, model_ids])
    weights = np.concatenate(
        [feedback.query_weight * counts / counts.sum(), (1.0 - feedback.query_weight) * model]
    )
    unique, inverse = np.unique(ids, return_inverse=True)
    merged = np.zeros(len(unique), dtype=np.float64)
    np.add.at(merged, inverse, weights)
    return Expansion(unique, merged, len(rows))


def rocchio_vector(
    snapshot: IndexSnapshot, query: np.ndarray, first_rows: np.ndarray, feedback: SemanticFeedback
) -> np.ndarray:
    """``q + weight * mean(vectors of the top chunks)`` (the prepared query ``q``; the vector
    index normalises the result again where the metric is cosine)."""
    rows = first_rows[: feedback.chunks]
    if len(rows) == 0:
        return query
    centroid = np.asarray(snapshot.vectors.rows[rows], dtype=np.float64).mean(axis=0)
    return (np.asarray(query, dtype=np.float64) + feedback.weight * centroid).astype(np.float32)
