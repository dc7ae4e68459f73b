"""The one retrieval entry: a snapshot and a checked query in, ranked hits and stage notes out.

Everything a query needs arrives in ``RetrievalQuery``, checked once by the caller (the use
case), so nothing here reads the store, the settings or the request. The candidate mask (live
AND access AND filter) is built here, once; every ranking then works inside it.
"""

from __future__ import annotations

import time
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field, replace
from typing import Literal

import numpy as np

from service.filters.evaluate import evaluate
from service.filters.syntax import Node
from service.index.collection_index import IndexSnapshot
from service.index.lexical import LexicalScoring
from service.retrieval.ranking import (
    PlanTrace,
    Ranking,
    begin_semantic_ranking,
    finish_semantic_ranking,
    fuse_rrf,
    fuse_scores,
    lexical_ranking,
    ranked_rows,
    with_document_support,
)
from service.retrieval.ranking_settings import (
    PLAIN_FUSION,
    FeedbackSource,
    LexicalFeedback,
    RankingSettings,
)
from service.retrieval.refinement import rm3_expansion, rocchio_vector

Mode = Literal["hybrid", "lexical", "semantic"]
MODES: tuple[Mode, ...] = ("hybrid", "lexical", "semantic")


@dataclass(frozen=True, kw_only=True, eq=False)
class RetrievalQuery:
    """A query as the core takes it.

    ``tokens`` are the analysed query terms (used by the lexical ranking), ``vector`` the query
    vector (used by the semantic one), ``filter`` the checked filter tree with any time window
    already joined in, ``groups`` the caller's access groups (None sees every row). Each ranking
    is cut at ``depth``; ``keep`` fused hits are returned (``top_k`` for a search, the whole
    ranking for packing). ``ranking`` holds the hybrid mode's steps beyond plain fusion
    (feedback, fusion method and weights, document support); the other modes ignore it.
    """

    mode: Mode
    tokens: tuple[str, ...]
    vector: np.ndarray | None
    filter: Node | None
    groups: frozenset[str] | None
    top_k: int
    depth: int
    rrf_k: int
    keep: int
    scoring: LexicalScoring
    ranking: RankingSettings = PLAIN_FUSION
    trace_top: int = 20

    def __post_init__(self) -> None:
        if not 1 <= self.top_k <= self.depth:
            raise ValueError("a query needs 1 <= top_k <= depth")
        if self.keep < 1 or self.rrf_k < 0:
            raise ValueError("a query needs keep >= 1 and rrf_k >= 0")
        if self.mode != "lexical" and self.vector is None:
            raise ValueError(f"a {self.mode} query needs a query vector")


@dataclass(frozen=True)
class Hit:
    """A returned chunk; ``ranks`` maps each ranking the mode uses to the chunk's rank there
    (None when it is absent or beyond depth)."""

    row: int
    chunk_id: str
    score: float
    ranks: Mapping[str, int | None]


@dataclass(frozen=True)
class TraceEntry:
    chunk_id: str
    score: float
    rank: int
    ranks: Mapping[str, int | None] | None = None


@dataclass(frozen=True)
class StageTrace:
    name: str
    milliseconds: float
    counts: Mapping[str, int]
    top: tuple[TraceEntry, ...] = ()
    plan: PlanTrace | None = None
    notes: Mapping[str, object] = field(default_factory=dict)


@dataclass(frozen=True)
class RetrievalResult:
    """``candidates`` passed the mask; ``visible_rows`` are the live rows the caller may see;
    ``rankings`` are the mode's rankings by name (``lexical``, ``semantic``, and ``fused`` in
    hybrid mode), each cut at depth, for explaining where a chunk stood."""

    hits: tuple[Hit, ...]
    candidates: int
    visible_rows: int
    stages: tuple[StageTrace, ...]
    rankings: Mapping[str, Ranking]


def candidate_mask(
    snapshot: IndexSnapshot, filter: Node | None, groups: frozenset[str] | None
) -> tuple[np.ndarray, int]:
    """Live AND visible to ``groups`` AND matching ``filter``, and how many rows are visible.

    A row without groups is visible to everyone; otherwise the caller must share one group.
    """
    mask = snapshot.live.copy()
    if groups is None:
        visible = snapshot.live_rows
    else:
        mask &= snapshot.access.visible(groups)
        visible = int(np.count_nonzero(mask))
    if filter is not None:
        if snapshot.columns is None:
            # A checked filter names attributes, so the collection declares some; an index
            # without columns has no row yet.
            return np.zeros_like(mask), visible
        mask &= evaluate(filter, snapshot.columns)
    return mask, visible


def retrieve(snapshot: IndexSnapshot, query: RetrievalQuery) -> RetrievalResult:
    """Rank the candidates as ``query.mode`` asks and return the best ``query.keep``.

    Where the semantic ranking scans every row, the scan begins on a scan thread as soon as the
    mask is known and runs beside the lexical ranking, so in hybrid mode the two stages' times
    overlap.
    """
    started = time.perf_counter()
    mask, visible = candidate_mask(snapshot, query.filter, query.groups)
    candidates = int(np.count_nonzero(mask))
    # ``chunks`` counts every live chunk, hidden ones too, for the funnel an admin reads; the
    # trace is read back without it by anyone else (``service.usecases.traces``).
    counts = {"candidates": candidates, "rows": visible, "chunks": snapshot.live_rows}
    stages = [StageTrace("filter", _since(started), counts)]
    scan = None
    if query.vector is not None and query.mode != "lexical":
        scan = begin_semantic_ranking(snapshot, query.vector, mask, candidates, query.depth)
    rankings: dict[str, Ranking] = {}
    steps = query.ranking if query.mode == "hybrid" else PLAIN_FUSION
    from_fusion = steps.feedback_source == "fused" and (
        steps.lexical_feedback is not None or steps.semantic_feedback is not None
    )
    if query.mode != "semantic":
        started = time.perf_counter()
        lexical = lexical_ranking(
            snapshot,
            query.tokens,
            mask,
            query.depth,
            query.scoring,
        )
        rankings["lexical"] = lexical
        stages.append(_stage(snapshot, lexical, started, candidates, query.trace_top))
        if steps.lexical_feedback is not None and not from_fusion:
            rankings["lexical"], stage = _lexical_feedback(
                snapshot,
                query,
                mask,
                lexical,
                steps.lexical_feedback,
                source="own",
                candidates=candidates,
            )
            stages.append(stage)
    if scan is not None:
        semantic, plan = finish_semantic_ranking(snapshot, scan, mask, query.depth)
        rankings["semantic"] = semantic
        stage = _stage(snapshot, semantic, scan.started, candidates, query.trace_top)
        stages.append(replace(stage, plan=plan))
        feedback_set = semantic
        if from_fusion:
            started = time.perf_counter()
            feedback_set, notes = _fuse(rankings, query, steps)
            stage = _stage(
                snapshot,
                feedback_set,
                started,
                candidates,
                query.trace_top,
                name="feedback_fusion",
                notes=notes,
            )
            stages.append(stage)
        rescan = None
        if steps.semantic_feedback is not None:
            rocchio_started = time.perf_counter()
            feedback = steps.semantic_feedback
            refined = rocchio_vector(snapshot, scan.query, feedback_set.rows, feedback)
            # Planned like the first ranking (gather, scan or graph), with the count known; its
            # work runs beside the lexical feedback below, over the first ranking's gathered
            # rows where it gathers.
            rescan = begin_semantic_ranking(
                snapshot, refined, mask, candidates, query.depth, same_candidates_as=scan
            )
        if from_fusion and steps.lexical_feedback is not None:
            rankings["lexical"], stage = _lexical_feedback(
                snapshot,
                query,
                mask,
                feedback_set,
                steps.lexical_feedback,
                source="fused",
                candidates=candidates,
            )
            stages.append(stage)
        if rescan is not None and steps.semantic_feedback is not None:
            rankings["semantic"], refined_plan = finish_semantic_ranking(
                snapshot, rescan, mask, query.depth
            )
            notes = {
                "chunks": min(steps.semantic_feedback.chunks, len(feedback_set)),
                "weight": steps.semantic_feedback.weight,
                "source": "fused" if from_fusion else "own",
            }
            stage = _stage(
                snapshot,
                rankings["semantic"],
                rocchio_started,
                candidates,
                query.trace_top,
                name="semantic_feedback",
                notes=notes,
            )
            stages.append(replace(stage, plan=refined_plan))

    started = time.perf_counter()
    fusion_notes: dict[str, object] = {}
    if query.mode == "hybrid":
        final, fusion_notes = _fuse(rankings, query, steps)
        if steps.second_chunk_weight > 0:
            documents = [snapshot.document_ids[row] for row in final.rows.tolist()]
            final, raised = with_document_support(final, documents, steps.second_chunk_weight)
            fusion_notes["second_chunk_weight"] = steps.second_chunk_weight
            fusion_notes["documents_supported"] = raised
    else:
        final = rankings[query.mode]
    rank_maps = {name: ranking.rank_of() for name, ranking in rankings.items()}

    def ranks_of(row: int) -> dict[str, int | None]:
        return {name: ranks.get(row) for name, ranks in rank_maps.items()}

    keep = query.keep
    if query.mode == "hybrid":
        rankings["fused"] = final
    hits = tuple(
        Hit(row, snapshot.chunk_ids[row], score, ranks_of(row))
        for row, score in zip(final.rows[:keep].tolist(), final.scores[:keep].tolist(), strict=True)
    )
    if query.mode == "hybrid":
        top = _entries(snapshot, final, query.trace_top, ranks_of)
        counts = {"fused": len(final), "returned": len(hits)}
        stages.append(StageTrace("fusion", _since(started), counts, top, notes=fusion_notes))
    return RetrievalResult(hits, candidates, visible, tuple(stages), rankings)


def _since(started: float) -> float:
    return (time.perf_counter() - started) * 1000.0


def _stage(
    snapshot: IndexSnapshot,
    ranking: Ranking,
    started: float,
    candidates: int,
    trace_top: int,
    *,
    name: str | None = None,
    notes: Mapping[str, object] | None = None,
) -> StageTrace:
    top = _entries(snapshot, ranking, trace_top, None)
    counts = {"candidates": candidates, "matched": ranking.matched, "ranked": len(ranking)}
    return StageTrace(name or ranking.name, _since(started), counts, top, notes=notes or {})


def _lexical_feedback(
    snapshot: IndexSnapshot,
    query: RetrievalQuery,
    mask: np.ndarray,
    first: Ranking,
    feedback: LexicalFeedback,
    *,
    source: FeedbackSource,
    candidates: int,
) -> tuple[Ranking, StageTrace]:
    """The lexical ranking of the RM3 query built from ``first`` and its trace stage: from the
    first lexical ranking, weighted by its scores, or from the first fused one, each chunk
    weighted the same (see ``refinement``)."""
    started = time.perf_counter()
    chunk_weights = first.scores if source == "own" else np.ones(len(first), dtype=np.float64)
    expansion = rm3_expansion(snapshot, query.tokens, first.rows, chunk_weights, feedback)
    scoring = query.scoring
    match = snapshot.lexical.match_weighted(
        expansion.term_ids,
        expansion.weights,
        k1=scoring.k1,
        b=scoring.b,
        variant=scoring.variant,
        epsilon=scoring.epsilon,
    )
    rows = np.flatnonzero(match.present & mask)
    ranking = ranked_rows("lexical", snapshot, rows, match.scores[rows], query.depth)
    order = np.lexsort((expansion.term_ids, -expansion.weights))
    names = snapshot.lexical.term_names(expansion.term_ids[order].tolist())
    weights = expansion.weights[order].tolist()
    notes: dict[str, object] = {
        "chunks": expansion.feedback_rows,
        "query_weight": feedback.query_weight,
        "max_share": feedback.max_share,
        "source": source,
        "terms": [
            {"term": name, "weight": round(weight, 6)}
            for name, weight in zip(names, weights, strict=True)
        ],
    }
    stage = _stage(
        snapshot,
        ranking,
        started,
        candidates,
        query.trace_top,
        name="lexical_feedback",
        notes=notes,
    )
    return ranking, stage


def _fuse(
    rankings: Mapping[str, Ranking], query: RetrievalQuery, steps: RankingSettings
) -> tuple[Ranking, dict[str, object]]:
    pair = [rankings["lexical"], rankings["semantic"]]
    weights = steps.fusion_weights()
    notes: dict[str, object] = {"method": steps.fusion, "semantic_weight": steps.semantic_weight}
    if steps.fusion == "rrf":
        notes["rrf_k"] = query.rrf_k
        plain = weights == (1.0, 1.0)
        return fuse_rrf(pair, query.rrf_k, query.depth, None if plain else weights), notes
    return fuse_scores(pair, query.depth, weights, steps.fusion), notes


def _entries(
    snapshot: IndexSnapshot,
    ranking: Ranking,
    limit: int,
    ranks_of: Callable[[int], dict[str, int | None]] | None,
) -> tuple[TraceEntry, ...]:
    rows = ranking.rows[:limit].tolist()
    scores = ranking.scores[:limit].tolist()
    return tuple(
        TraceEntry(snapshot.chunk_ids[row], score, rank, ranks_of(row) if ranks_of else None)
        for rank, (row, score) in enumerate(zip(rows, scores, strict=True), start=1)
    )
