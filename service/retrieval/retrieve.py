"""One retrieval over a snapshot: rankings of the candidates, fusion, and what traces show."""

from __future__ import annotations

import time
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from typing import Literal

import numpy as np

from service.errors import InvalidRequest
from service.index.collection_index import IndexSnapshot
from service.index.lexical import DEFAULT_EPSILON, Bm25Variant
from service.retrieval.ranking import (
    Ranking,
    SemanticScan,
    begin_semantic_ranking,
    check_candidate_mask,
    finish_semantic_ranking,
    fuse_rrf,
    lexical_ranking,
)

Mode = Literal["hybrid", "lexical", "semantic"]
MODES: tuple[Mode, ...] = ("hybrid", "lexical", "semantic")


@dataclass(frozen=True)
class Hit:
    """A returned chunk. ``ranks`` maps each ranking the mode uses to the chunk's rank there
    (``None`` when it is absent or beyond depth)."""

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
    top: tuple[TraceEntry, ...]


@dataclass(frozen=True)
class RetrievalResult:
    hits: tuple[Hit, ...]
    candidates: int
    stages: tuple[StageTrace, ...]


def retrieve(
    snapshot: IndexSnapshot,
    *,
    query_tokens: Sequence[str],
    query_vector: np.ndarray | Sequence[float] | None,
    candidate_mask: np.ndarray,
    mode: Mode,
    top_k: int,
    depth: int,
    rrf_k: float,
    k1: float,
    b: float,
    bm25_variant: Bm25Variant,
    epsilon: float = DEFAULT_EPSILON,
    trace_top: int = 10,
    semantic_scan: SemanticScan | None = None,
) -> RetrievalResult:
    """Rank the candidates as ``mode`` asks and return the best ``top_k``.

    ``candidate_mask`` is filter AND time window AND access over the snapshot's rows (tombstoned
    rows are dropped here in any case). ``depth`` below ``top_k`` is raised to ``top_k``.

    The semantic ranking begins first: where it scans every row, the scan runs on a scan thread
    beside the lexical ranking, so the two stages' times overlap in hybrid mode. A caller that
    has the candidates and the query vector earlier passes ``begin_semantic_ranking``'s result
    as ``semantic_scan``, and the scan runs beside its own work too.
    """
    if mode not in MODES:
        raise InvalidRequest(f"mode must be one of {', '.join(MODES)}", field="mode")
    if top_k < 1:
        raise InvalidRequest("top_k must be at least 1", field="top_k")
    depth = max(depth, top_k)
    mask = check_candidate_mask(snapshot, candidate_mask)
    candidates = int(np.count_nonzero(mask))
    stages: list[StageTrace] = []
    rankings: dict[str, Ranking] = {}

    if mode == "lexical":
        semantic_scan = None
    elif semantic_scan is None:
        if query_vector is None:
            raise InvalidRequest("semantic ranking needs a query vector", field="query_vector")
        semantic_scan = begin_semantic_ranking(snapshot, query_vector, candidates)
    if mode in ("lexical", "hybrid"):
        started = time.perf_counter()
        lexical = lexical_ranking(
            snapshot, query_tokens, mask, depth, k1=k1, b=b, variant=bm25_variant, epsilon=epsilon
        )
        rankings["lexical"] = lexical
        stages.append(_stage(snapshot, lexical, started, candidates, trace_top))
    if semantic_scan is not None:
        semantic = finish_semantic_ranking(snapshot, semantic_scan, mask, depth)
        rankings["semantic"] = semantic
        stages.append(_stage(snapshot, semantic, semantic_scan.started, candidates, trace_top))

    if mode == "hybrid":
        started = time.perf_counter()
        final = fuse_rrf([rankings["lexical"], rankings["semantic"]], rrf_k, depth)
    else:
        final = rankings[mode]
    rank_maps = {name: ranking.rank_of() for name, ranking in rankings.items()}

    def ranks_of(row: int) -> dict[str, int | None]:
        return {name: ranks.get(row) for name, ranks in rank_maps.items()}

    hits = tuple(
        Hit(row, snapshot.chunk_ids[row], score, ranks_of(row))
        for row, score in zip(
            final.rows[:top_k].tolist(), final.scores[:top_k].tolist(), strict=True
        )
    )
    if mode == "hybrid":
        top = _entries(snapshot, final, trace_top, ranks_of)
        milliseconds = (time.perf_counter() - started) * 1000
        counts = {"fused": len(final), "returned": len(hits)}
        stages.append(StageTrace("fusion", milliseconds, counts, top))
    return RetrievalResult(hits, candidates, tuple(stages))


def _stage(
    snapshot: IndexSnapshot, ranking: Ranking, started: float, candidates: int, trace_top: int
) -> StageTrace:
    milliseconds = (time.perf_counter() - started) * 1000
    top = _entries(snapshot, ranking, trace_top, None)
    counts = {"candidates": candidates, "matched": ranking.matched, "ranked": len(ranking)}
    return StageTrace(ranking.name, milliseconds, counts, top)


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
