"""Rankings of the candidate rows, lexical and semantic, and their fusion.

Every ranking orders rows by score, highest first, and breaks ties by chunk_id ascending in
code-point order (the snapshot's integer ``sort_keys``), so equal scores always come out in the
same order. Scores come from statistics over the whole collection's live rows; the candidate
mask only decides which rows compete, so filtering never changes a row's score.
"""

from __future__ import annotations

import time
from collections.abc import Callable, Sequence
from concurrent.futures import Future
from dataclasses import dataclass, replace

import numpy as np

from service.index.collection_index import IndexSnapshot
from service.index.graph import GraphHits
from service.index.lexical import LexicalScoring
from service.index.vectors import GatheredRows, on_scan_thread
from service.retrieval.semantic_plan import PlanMethod, SemanticPlan, semantic_plan

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


def ranked_rows(
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
    return ranked_rows("lexical", snapshot, rows, match.scores[rows], depth)


@dataclass(frozen=True)
class PlanTrace:
    """What a semantic ranking planned and did: ``fallback`` names why a graph search was set
    aside (``short``: fewer rows than it should find; ``over_bound``: more work than its
    bound), and ``method`` what ranked in the end."""

    planned: PlanMethod
    method: PlanMethod
    estimated_work: int
    actual_work: int
    breadth: int
    fallback: str | None


@dataclass(frozen=True, eq=False)
class ScoredGather:
    """The candidates' rows gathered and their scores for one query."""

    gathered: GatheredRows
    scores: np.ndarray


@dataclass(frozen=True, eq=False)
class SemanticScan:
    """A semantic ranking's prepared query, its plan and that plan's work under way on a scan
    thread: a scan of every row, a graph search, or the candidates' rows gathered and scored."""

    query: np.ndarray
    plan: SemanticPlan
    full_scan: Future[np.ndarray] | None
    started: float
    graph_search: Future[GraphHits] | None = None
    gathered: Future[ScoredGather] | None = None


def begin_semantic_ranking(
    snapshot: IndexSnapshot,
    query_vector: np.ndarray | Sequence[float],
    candidate_mask: np.ndarray,
    candidates: int,
    depth: int,
    *,
    same_candidates_as: SemanticScan | None = None,
) -> SemanticScan:
    """Check and prepare the query and plan it; its work begins on a scan thread, so in hybrid
    mode it runs beside the lexical ranking.

    ``same_candidates_as`` is an earlier scan over the same mask: where both gather, its rows
    are scored again rather than copied out again.
    """
    started = time.perf_counter()
    vectors = snapshot.vectors
    query = vectors.prepare_query(np.asarray(query_vector))
    plan = semantic_plan(snapshot, candidate_mask, candidates, depth)
    full_scan = vectors.begin_full_scan(query) if plan.method == "scan" else None
    graph_search = None
    gathered = None
    graph = snapshot.graph
    if plan.method == "graph" and graph is not None:
        covered = candidate_mask[: graph.rows]
        graph_search = on_scan_thread(lambda: graph.search(query, covered, depth, plan.breadth))
    elif plan.method == "gather":
        earlier = None if same_candidates_as is None else same_candidates_as.gathered

        def gather_and_score() -> ScoredGather:
            # Scored here, beside the caller's lexical work; fresh rows while still cached.
            rows = vectors.gather(candidate_mask) if earlier is None else earlier.result().gathered
            return ScoredGather(rows, vectors.score_gathered(query, rows)[1])

        gathered = on_scan_thread(gather_and_score)
    return SemanticScan(query, plan, full_scan, started, graph_search, gathered)


def semantic_ranking(
    snapshot: IndexSnapshot,
    query_vector: np.ndarray | Sequence[float],
    candidate_mask: np.ndarray,
    depth: int,
) -> Ranking:
    """Similarity ranking of the candidates as planned, cut at ``depth``."""
    candidates = int(np.count_nonzero(candidate_mask))
    scan = begin_semantic_ranking(snapshot, query_vector, candidate_mask, candidates, depth)
    return finish_semantic_ranking(snapshot, scan, candidate_mask, depth)[0]


def exact_semantic_ranking(
    snapshot: IndexSnapshot,
    query_vector: np.ndarray | Sequence[float],
    candidate_mask: np.ndarray,
    depth: int,
) -> Ranking:
    """Exact similarity ranking of all candidates, cut at ``depth`` (the graph's reference)."""
    query = snapshot.vectors.prepare_query(np.asarray(query_vector))
    rows, scores = snapshot.vectors.score(query, candidate_mask)
    return ranked_rows("semantic", snapshot, rows, scores, depth)


def finish_semantic_ranking(
    snapshot: IndexSnapshot, scan: SemanticScan, candidate_mask: np.ndarray, depth: int
) -> tuple[Ranking, PlanTrace]:
    plan = scan.plan
    candidates = int(np.count_nonzero(candidate_mask)) if plan.method == "graph" else 0
    if scan.graph_search is not None and snapshot.graph is not None:
        covered = snapshot.graph.rows
        hits = scan.graph_search.result()
        wanted = min(depth, candidates - plan.tail_candidates)
        fallback = None
        if hits.work > plan.work_bound:
            fallback = "over_bound"
        elif len(hits.rows) < wanted:
            fallback = "short"
        if fallback is None:
            vectors = snapshot.vectors
            chosen = np.zeros_like(candidate_mask)
            chosen[hits.rows] = True
            found_rows, found_scores = vectors.score(scan.query, chosen)
            tail_rows, tail_scores = vectors.score_from(
                scan.query, covered, candidate_mask[covered:]
            )
            rows = np.concatenate([found_rows, tail_rows])
            scores = np.concatenate([found_scores, tail_scores])
            ranking = ranked_rows("semantic", snapshot, rows, scores, depth)
            ranking = replace(ranking, matched=candidates)
            tail_scanned = vectors.scans_from(covered, plan.tail_candidates)
            tail_work = vectors.n_rows - covered if tail_scanned else plan.tail_candidates
            work = hits.work + tail_work
            trace = PlanTrace("graph", "graph", plan.estimated_work, work, plan.breadth, None)
            return ranking, trace
        rows, scores = snapshot.vectors.score(scan.query, candidate_mask)
        exact: PlanMethod = "scan" if snapshot.vectors.scans_every_row(candidates) else "gather"
        trace = PlanTrace(
            "graph",
            exact,
            plan.estimated_work,
            hits.work + (snapshot.vectors.n_rows if exact == "scan" else len(rows)),
            plan.breadth,
            fallback,
        )
        return ranked_rows("semantic", snapshot, rows, scores, depth), trace
    if scan.gathered is not None:
        scored = scan.gathered.result()
        rows, scores = scored.gathered.rows, scored.scores
    else:
        rows, scores = snapshot.vectors.score(scan.query, candidate_mask, scan.full_scan)
    method: PlanMethod = "scan" if plan.method == "scan" else "gather"
    work = snapshot.vectors.n_rows if method == "scan" else len(rows)
    trace = PlanTrace(method, method, plan.estimated_work, work, 0, None)
    return ranked_rows("semantic", snapshot, rows, scores, depth), trace


def fuse_rrf(
    rankings: Sequence[Ranking],
    rrf_k: float,
    depth: int,
    weights: Sequence[float] | None = None,
) -> Ranking:
    """Reciprocal rank fusion (Cormack, Clarke and Büttcher, SIGIR 2009), optionally weighted.

    Each ranking is cut at ``depth``; a row scores the sum over rankings of
    ``weight / (rrf_k + rank)`` with ranks from 1 (every weight 1 unless given), a ranking that
    lacks the row adding nothing. Contributions are added ranking by ranking, in the order
    given, so two rows with the same ranks in swapped rankings get bit-identical sums and fall
    to the chunk_id tie-break.
    """
    if rrf_k < 0:
        raise ValueError("rrf_k must not be negative")
    return _fuse(
        rankings,
        depth,
        weights,
        lambda ranking, cut: 1.0 / (rrf_k + np.arange(1, cut + 1, dtype=np.float64)),
        absent=lambda ranking, cut: 0.0,
    )


def fuse_scores(
    rankings: Sequence[Ranking],
    depth: int,
    weights: Sequence[float],
    method: str,
) -> Ranking:
    """Convex combination of normalised scores (Fox and Shaw, TREC-2 1994, CombSUM; Bruch,
    Gai and Ingber, ACM TOIS 2023, for min-max and z-score in hybrid retrieval).

    Each ranking's scores, cut at ``depth``, are normalised over that cut: ``min_max`` maps
    them to [0, 1], ``z_score`` to their standard scores. A row a ranking lacks gets that
    ranking's lowest normalised score, since it ranked below every row the ranking kept.
    """
    if method not in ("min_max", "z_score"):
        raise ValueError(f"unknown score normalisation {method!r}")
    normalise = _min_max if method == "min_max" else _z_score

    def lowest(ranking: Ranking, cut: int) -> float:
        values = normalise(ranking.scores[:cut])
        return float(values.min()) if len(values) else 0.0

    return _fuse(
        rankings,
        depth,
        weights,
        lambda ranking, cut: normalise(ranking.scores[:cut]),
        absent=lowest,
    )


def _min_max(scores: np.ndarray) -> np.ndarray:
    values = np.asarray(scores, dtype=np.float64)
    if len(values) == 0:
        return values
    low, high = values.min(), values.max()
    return (values - low) / (high - low) if high > low else np.ones_like(values)


def _z_score(scores: np.ndarray) -> np.ndarray:
    values = np.asarray(scores, dtype=np.float64)
    if len(values) == 0:
        return values
    spread = values.std()
    return (values - values.mean()) / spread if spread > 0 else np.zeros_like(values)


def _fuse(
    rankings: Sequence[Ranking],
    depth: int,
    weights: Sequence[float] | None,
    contribution: Callable[[Ranking, int], np.ndarray],
    absent: Callable[[Ranking, int], float],
) -> Ranking:
    """Sum over rankings of ``weight * contribution`` per row, ``weight * absent`` where a
    ranking lacks the row; ties by chunk_id."""
    if weights is None:
        weights = [1.0] * len(rankings)
    if len(weights) != len(rankings) or any(not w >= 0 for w in weights):
        raise ValueError("fusion needs one weight of at least 0 per ranking")
    cut = [(r.rows[:depth], r.sort_keys[:depth]) for r in rankings]
    if not cut or sum(len(rows) for rows, _ in cut) == 0:
        empty = np.zeros(0, dtype=np.int64)
        return Ranking("fused", empty, np.zeros(0), empty, matched=0)
    all_rows = np.concatenate([rows for rows, _ in cut])
    all_keys = np.concatenate([keys for _, keys in cut])
    unique_rows, first, inverse = np.unique(all_rows, return_index=True, return_inverse=True)
    scores = np.zeros(len(unique_rows), dtype=np.float64)
    start = 0
    for ranking, (rows, _), weight in zip(rankings, cut, weights, strict=True):
        floor = absent(ranking, len(rows))
        scores += weight * floor
        part = weight * (contribution(ranking, len(rows)) - floor)
        np.add.at(scores, inverse[start : start + len(rows)], part)
        start += len(rows)
    keys = all_keys[first]
    order = np.lexsort((keys, -scores))
    return Ranking("fused", unique_rows[order], scores[order], keys[order], len(unique_rows))


def with_document_support(
    ranking: Ranking, document_ids: Sequence[str], weight: float
) -> tuple[Ranking, int]:
    """The ranking with each document's best chunk raised by ``weight`` times the positive
    score of the document's second best chunk in it; how many chunks were raised.

    ``document_ids[i]`` is the document of ``ranking.rows[i]``. Ranks and ties are decided
    again afterwards, by score and then chunk_id.
    """
    if weight <= 0 or len(ranking) < 2:
        return ranking, 0
    _, codes = np.unique(np.asarray(document_ids, dtype=object), return_inverse=True)
    order = np.arange(len(codes))
    _, best = np.unique(codes, return_index=True)
    rest = np.ones(len(codes), dtype=bool)
    rest[best] = False
    rest_positions = order[rest]
    rest_codes, second = np.unique(codes[rest], return_index=True)
    second_score = np.zeros(int(codes.max()) + 1, dtype=np.float64)
    second_score[rest_codes] = np.maximum(ranking.scores[rest_positions[second]], 0.0)
    bonus = np.zeros(len(codes), dtype=np.float64)
    bonus[best] = weight * second_score[codes[best]]
    scores = ranking.scores + bonus
    resorted = np.lexsort((ranking.sort_keys, -scores))
    raised = int(np.count_nonzero(bonus > 0))
    return (
        Ranking(
            ranking.name,
            ranking.rows[resorted],
            scores[resorted],
            ranking.sort_keys[resorted],
            ranking.matched,
        ),
        raised,
    )
