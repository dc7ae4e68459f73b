"""Rankings of the candidate rows, lexical and semantic, and their fusion.

Every ranking orders rows by score, highest first, and breaks ties by chunk_id ascending in
code-point order (the snapshot's integer ``sort_keys``), so equal scores always come out in the
same order. Scores come from statistics over the whole collection's live rows; the candidate
mask only decides which rows compete, so filtering never changes a row's score.
"""

from __future__ import annotations

import time
from collections.abc import Sequence
from concurrent.futures import Future
from dataclasses import dataclass

import numpy as np

from service.index.collection_index import IndexSnapshot
from service.index.lexical import LexicalScoring

DEFAULT_SCORING = LexicalScoring()


@dataclass(frozen=True, eq=False)
class Ranking:
    """Rows in rank order (rank = position + 1) with their scores and tie-break keys.

    ``matched`` is how many candidates the ranking could place before it was cut at depth
    (for lexical: the candidates containing a query term).
    """

    name: str
    rows: np.ndarray
    scores: np.ndarray
    sort_keys: np.ndarray
    matched: int

    def __len__(self) -> int:
        return len(self.rows)

    def rank_of(self) -> dict[int, int]:
        """``row -> rank`` for the rows of this ranking."""
        return {row: rank for rank, row in enumerate(self.rows.tolist(), start=1)}


def top_positions(scores: np.ndarray, keys_of: np.ndarray, depth: int) -> np.ndarray:
    """Positions of the ``depth`` best scores, ties by ascending ``keys_of[position]``.

    Every score equal to the last one kept takes part in the tie-break, so the cut at depth is
    decided by chunk_id too.
    """
    count = len(scores)
    if depth <= 0 or count == 0:
        return np.zeros(0, dtype=np.int64)
    if count > depth:
        threshold = np.partition(scores, count - depth)[count - depth]
        chosen = np.flatnonzero(scores >= threshold)
    else:
        chosen = np.arange(count)
    order = np.lexsort((keys_of[chosen], -scores[chosen]))[:depth]
    return chosen[order]


def _ranking(
    name: str, snapshot: IndexSnapshot, rows: np.ndarray, scores: np.ndarray, depth: int
) -> Ranking:
    matched = len(rows)
    if matched > depth:
        # Keys are gathered only for rows that can still make the cut.
        threshold = np.partition(scores, len(scores) - depth)[len(scores) - depth]
        contenders = np.flatnonzero(scores >= threshold)
        rows, scores = rows[contenders], scores[contenders]
    keys = snapshot.sort_keys[rows]
    top = top_positions(scores, keys, depth)
    return Ranking(name, rows[top], scores[top].astype(np.float64), keys[top], matched)


def lexical_ranking(
    snapshot: IndexSnapshot,
    query_tokens: Sequence[str],
    candidate_mask: np.ndarray,
    depth: int,
    scoring: LexicalScoring = DEFAULT_SCORING,
) -> Ranking:
    """BM25 ranking of the candidates containing at least one query term, cut at ``depth``."""
    match = snapshot.lexical.match(
        query_tokens,
        k1=scoring.k1,
        b=scoring.b,
        variant=scoring.variant,
        epsilon=scoring.epsilon,
    )
    rows = np.flatnonzero(match.present & candidate_mask)
    return _ranking("lexical", snapshot, rows, match.scores[rows], depth)


@dataclass(frozen=True, eq=False)
class SemanticScan:
    """A semantic ranking's prepared query and, where it scans every row, that scan under way."""

    query: np.ndarray
    full_scan: Future[np.ndarray] | None
    started: float


def begin_semantic_ranking(
    snapshot: IndexSnapshot, query_vector: np.ndarray | Sequence[float], candidates: int
) -> SemanticScan:
    """Check and prepare the query; if every row will be scanned, begin that on a scan thread."""
    started = time.perf_counter()
    vectors = snapshot.vectors
    query = vectors.prepare_query(np.asarray(query_vector))
    full_scan = vectors.begin_full_scan(query) if vectors.scans_every_row(candidates) else None
    return SemanticScan(query, full_scan, started)


def semantic_ranking(
    snapshot: IndexSnapshot,
    query_vector: np.ndarray | Sequence[float],
    candidate_mask: np.ndarray,
    depth: int,
) -> Ranking:
    """Exact similarity ranking of all candidates, cut at ``depth``."""
    query = snapshot.vectors.prepare_query(np.asarray(query_vector))
    scan = SemanticScan(query, None, time.perf_counter())
    return finish_semantic_ranking(snapshot, scan, candidate_mask, depth)


def finish_semantic_ranking(
    snapshot: IndexSnapshot, scan: SemanticScan, candidate_mask: np.ndarray, depth: int
) -> Ranking:
    rows, scores = snapshot.vectors.score(scan.query, candidate_mask, scan.full_scan)
    return _ranking("semantic", snapshot, rows, scores, depth)


def fuse_rrf(rankings: Sequence[Ranking], rrf_k: float, depth: int) -> Ranking:
    """Reciprocal rank fusion (Cormack, Clarke and Büttcher, SIGIR 2009).

    Each ranking is cut at ``depth``; a row scores the sum over rankings of
    ``1 / (rrf_k + rank)`` with ranks from 1, a ranking that lacks the row adding nothing.
    Contributions are added ranking by ranking, in the order given, so two rows with the same
    ranks in swapped rankings get bit-identical sums and fall to the chunk_id tie-break.
    """
    if rrf_k < 0:
        raise ValueError("rrf_k must not be negative")
    cut = [(r.rows[:depth], r.sort_keys[:depth]) for r in rankings]
    if not cut or sum(len(rows) for rows, _ in cut) == 0:
        empty = np.zeros(0, dtype=np.int64)
        return Ranking("fused", empty, np.zeros(0), empty, matched=0)
    all_rows = np.concatenate([rows for rows, _ in cut])
    all_keys = np.concatenate([keys for _, keys in cut])
    unique_rows, first, inverse = np.unique(all_rows, return_index=True, return_inverse=True)
    scores = np.zeros(len(unique_rows), dtype=np.float64)
    start = 0
    for rows, _ in cut:
        ranks = np.arange(1, len(rows) + 1, dtype=np.float64)
        np.add.at(scores, inverse[start : start + len(rows)], 1.0 / (rrf_k + ranks))
        start += len(rows)
    keys = all_keys[first]
    order = np.lexsort((keys, -scores))
    return Ranking("fused", unique_rows[order], scores[order], keys[order], len(unique_rows))
