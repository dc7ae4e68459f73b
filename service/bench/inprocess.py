"""One collection size in process: build, time every stage and every reference, compare.

Every stage runs the index's own functions on one snapshot with the fixed query set; the
references run in the same process, on the same token lists and vectors, with the same BLAS
thread pool. Lexical and semantic stages are timed at ``top_k`` (the depth the references
return); the hybrid query runs at the service's default depth, and its comparison uses the
lexical and semantic stages timed at that depth too.

The packing stages pack each query's hybrid ranking, retrieved by the service's retrieval entry
at the stage's depth, as the context route does: candidates read from the snapshot with their
stored token counts (``pack_candidates``, timed as its own stage), the bundled model's
WordPiece tokenizer, merged spans rebuilt from the snapshot, and the BLAS threads the server
gives a query.
"""

from __future__ import annotations

import gc
import os
import time
from collections.abc import Callable, Sequence
from dataclasses import asdict
from functools import partial
from typing import Any

import numpy as np
from threadpoolctl import threadpool_limits

from service.bench.inference import time_inference
from service.bench.references import (
    Bm25sLucene,
    NumpyFullScan,
    RankBm25Okapi,
    TopK,
    agreement,
)
from service.bench.synthetic import (
    SCHEMA,
    SELECTIVITIES_PER_MILLE,
    THREE_CLAUSE_FILTER,
    QuerySet,
    SyntheticCollection,
    make_collection,
    model_token_counter,
    selected_rows,
    selectivity_filters,
    selectivity_label,
)
from service.bench.timing import Summary, resident_bytes, time_each
from service.bench.verdicts import PACKING_TARGETS, packing_key, reading_key
from service.config import Settings
from service.filters.check import check_filter
from service.filters.evaluate import evaluate
from service.filters.parse import parse_filter
from service.filters.syntax import Node
from service.index.collection_index import CollectionIndex, IndexSnapshot
from service.index.lexical import DEFAULT_B, DEFAULT_K1, LexicalScoring
from service.packing.packer import PackCandidate, PackedContext, pack_context
from service.retrieval.query import Hit, Mode, RetrievalQuery, RetrievalResult, retrieve
from service.retrieval.ranking import (
    Ranking,
    fuse_rrf,
    fuse_scores,
    lexical_ranking,
    ranked_rows,
    semantic_ranking,
    with_document_support,
)
from service.retrieval.ranking_settings import (
    PLAIN_FUSION,
    LexicalFeedback,
    RankingSettings,
    SemanticFeedback,
)
from service.retrieval.refinement import rm3_expansion, rocchio_vector
from service.usecases.answering import pack_candidates
from service.usecases.retrieval_settings import DEFAULT_RETRIEVAL, ranking_settings

RRF_K = 60
SERVICE_BLAS_THREADS = Settings().blas_threads or None
RANK_BM25_MAX_CHUNKS = 100_000
OKAPI = LexicalScoring(variant="okapi")

Progress = Callable[[str], None]


def semantic_key(per_mille: int) -> str:
    return f"semantic {selectivity_label(per_mille)}"


def _mask(snapshot: IndexSnapshot, node: Node) -> np.ndarray:
    assert snapshot.columns is not None
    return evaluate(node, snapshot.columns) & snapshot.live


def checked_filter(text: str) -> Node:
    """A filter on the synthetic schema, parsed and checked as a request's is."""
    return check_filter(parse_filter(text), SCHEMA)


def _top(ranking: Ranking) -> TopK:
    return TopK(ranking.rows, ranking.scores)


def pack(
    snapshot: IndexSnapshot, candidates: Sequence[PackCandidate], token_budget: int
) -> PackedContext:
    """Pack candidates read from the snapshot, as the context route does."""
    return pack_context(
        candidates,
        token_budget=token_budget,
        count_tokens=model_token_counter().count,
        document_span=snapshot.document_span,
    )


def service_query(
    tokens: Sequence[str],
    vector: np.ndarray,
    *,
    top_k: int,
    depth: int,
    keep: int | None = None,
    ranking: RankingSettings = PLAIN_FUSION,
    mode: Mode = "hybrid",
    filter: Node | None = None,
) -> RetrievalQuery:
    """A query as the search route hands it to ``retrieve`` (``keep=depth`` asks for the whole
    fused ranking, as the context route does), with plain fusion unless ``ranking`` names
    further steps."""
    return RetrievalQuery(
        mode=mode,
        tokens=tuple(tokens),
        vector=vector,
        filter=filter,
        groups=None,
        top_k=top_k,
        depth=depth,
        rrf_k=RRF_K,
        keep=top_k if keep is None else keep,
        scoring=LexicalScoring(),
        ranking=ranking,
    )


def hybrid_query(
    snapshot: IndexSnapshot,
    tokens: list[str],
    vector: np.ndarray,
    *,
    top_k: int,
    depth: int,
    keep: int | None = None,
    ranking: RankingSettings = PLAIN_FUSION,
) -> RetrievalResult:
    """The whole in-process hybrid query over every live row, as the search route runs it."""
    query = service_query(tokens, vector, top_k=top_k, depth=depth, keep=keep, ranking=ranking)
    return retrieve(snapshot, query)


def _time_hybrid_steps(
    snapshot: IndexSnapshot,
    tokens: list[list[str]],
    vectors: list[np.ndarray],
    pairs: list[tuple[Ranking, Ranking]],
    fused: list[Ranking],
    depth: int,
    stages: dict[str, Summary],
) -> None:
    """Each hybrid step beyond plain fusion alone, on the rankings at depth: the default's
    parameters where the default takes the step, the classes' own defaults otherwise."""
    steps = ranking_settings(DEFAULT_RETRIEVAL)
    lexical_feedback = steps.lexical_feedback or LexicalFeedback()
    semantic_feedback = steps.semantic_feedback or SemanticFeedback()
    live = snapshot.live
    count = len(pairs)

    def rm3(i: int) -> Ranking:
        first = pairs[i][0]
        expansion = rm3_expansion(
            snapshot, tuple(tokens[i]), first.rows, first.scores, lexical_feedback
        )
        match = snapshot.lexical.match_weighted(expansion.term_ids, expansion.weights)
        rows = np.flatnonzero(match.present & live)
        return ranked_rows("lexical", snapshot, rows, match.scores[rows], depth)

    def rocchio(i: int) -> Ranking:
        query = snapshot.vectors.prepare_query(vectors[i])
        refined = rocchio_vector(snapshot, query, pairs[i][1].rows, semantic_feedback)
        return semantic_ranking(snapshot, refined, live, depth)

    stages["lexical feedback"], _ = time_each(range(count), rm3)
    stages["semantic feedback"], _ = time_each(range(count), rocchio)
    weights = steps.fusion_weights()
    stages["fusion weighted"], _ = time_each(
        pairs, lambda pair: fuse_rrf(list(pair), RRF_K, depth, weights)
    )
    stages["fusion min-max"], _ = time_each(
        pairs, lambda pair: fuse_scores(list(pair), depth, weights, "min_max")
    )
    stages["document support"], _ = time_each(
        fused,
        lambda ranking: with_document_support(
            ranking,
            [snapshot.document_ids[row] for row in ranking.rows.tolist()],
            steps.second_chunk_weight or 0.1,
        ),
    )


def _memory(snapshot: IndexSnapshot, size: int, dimension: int, rss_delta: int) -> dict[str, Any]:
    raw = size * dimension * 4
    postings = snapshot.lexical.nbytes
    return {
        "rss_delta_bytes": rss_delta,
        "raw_vector_bytes": raw,
        "postings_bytes": postings,
        "vector_matrix_bytes": snapshot.vectors.nbytes,
        "ratio": rss_delta / (raw + postings),
    }


def build_index(
    collection: SyntheticCollection, dimension: int
) -> tuple[CollectionIndex, float, int]:
    """The collection's index, the seconds its build took, and the process's resident bytes
    just before it (after a collection, so the growth is the index's)."""
    gc.collect()
    before = resident_bytes()
    started = time.perf_counter()
    index = CollectionIndex.build(
        collection.records, metric="cosine", dimension=dimension, schema=SCHEMA
    )
    return index, time.perf_counter() - started, before


def run_size(
    size: int,
    *,
    dimension: int,
    queries: QuerySet,
    seed: int,
    top_k: int,
    depth: int,
    progress: Progress,
) -> dict[str, Any]:
    """Every figure for one collection size (see ``service.bench.report`` for their meaning)."""
    load_before = os.getloadavg()[0]
    started = time.perf_counter()
    collection = make_collection(size, dimension, seed)
    generated = time.perf_counter() - started
    progress(f"{size:,} chunks: generated in {generated:.1f} s; building the index")

    index, build_seconds, before = build_index(collection, dimension)
    gc.collect()
    snapshot = index.snapshot()
    memory = _memory(snapshot, size, dimension, resident_bytes() - before)
    progress(f"{size:,} chunks: index built in {build_seconds:.1f} s; timing stages")

    stages: dict[str, Summary] = {}
    references: dict[str, Summary] = {}
    notes: dict[str, Any] = {}
    count = len(queries)
    tokens = queries.token_lists
    vectors = list(queries.vectors)
    live = snapshot.live.copy()

    stages["filter parse+check"], _ = time_each(
        range(count), lambda _: checked_filter(THREE_CLAUSE_FILTER)
    )
    three_clauses = checked_filter(THREE_CLAUSE_FILTER)
    stages["filter mask"], masks = time_each(range(count), lambda _: _mask(snapshot, three_clauses))
    notes["filter"] = {"text": THREE_CLAUSE_FILTER, "selected": int(masks[0].sum())}
    by_type: dict[str, Any] = {}
    for selectivity_filter in selectivity_filters(size, 100):
        node = checked_filter(selectivity_filter.text)
        summary, type_masks = time_each(range(count), partial(_mask_of, snapshot, node))
        expected = selected_rows(size, selectivity_filter.per_mille)
        _require_count(selectivity_filter.text, int(type_masks[0].sum()), expected)
        by_type[selectivity_filter.attribute_type] = {
            "filter": selectivity_filter.text,
            "selectivity": selectivity_label(selectivity_filter.per_mille),
            "selected": expected,
            **summary.as_dict(),
        }
    notes["filter_mask_by_type"] = by_type
    stages["filter inference"], notes["filter_inference"] = time_inference(snapshot, count)

    stages["lexical"], lexical = time_each(
        tokens, lambda t: lexical_ranking(snapshot, t, live, top_k)
    )
    stages["lexical okapi"], lexical_okapi = time_each(
        tokens, lambda t: lexical_ranking(snapshot, t, live, top_k, OKAPI)
    )
    stages["lexical depth"], lexical_deep = time_each(
        tokens, lambda t: lexical_ranking(snapshot, t, live, depth)
    )
    semantic_all: list[Ranking] = []
    for per_mille in SELECTIVITIES_PER_MILLE:
        node = checked_filter(f"position < {selected_rows(size, per_mille)}")
        mask = _mask(snapshot, node)
        _require_count("semantic mask", int(mask.sum()), selected_rows(size, per_mille))
        stages[semantic_key(per_mille)], found = time_each(
            vectors, partial(_semantic, snapshot, mask, top_k)
        )
        if per_mille == 1000:
            semantic_all = found
    stages["semantic depth"], semantic_deep = time_each(
        vectors, lambda v: semantic_ranking(snapshot, v, live, depth)
    )
    pairs = list(zip(lexical_deep, semantic_deep, strict=True))
    stages["fusion"], fused = time_each(pairs, lambda pair: fuse_rrf(list(pair), RRF_K, depth))
    _time_hybrid_steps(snapshot, tokens, vectors, pairs, fused, depth, stages)
    for candidates, budget, _ in PACKING_TARGETS:
        key = packing_key(candidates, budget)
        found = [
            hybrid_query(snapshot, t, v, top_k=candidates, depth=candidates, keep=candidates).hits
            for t, v in zip(tokens, vectors, strict=True)
        ]
        # Reading the candidates' columns from the snapshot is timed apart from the packer.
        stages[reading_key(candidates)], offered = time_each(
            found, partial(pack_candidates, snapshot)
        )
        with threadpool_limits(limits=SERVICE_BLAS_THREADS):
            stages[key], packed = time_each(offered, partial(pack, snapshot, token_budget=budget))
        notes[key] = _packing_notes(found, packed, budget)
    stages["hybrid"], _ = time_each(
        range(count),
        lambda i: hybrid_query(snapshot, tokens[i], vectors[i], top_k=top_k, depth=depth),
    )
    default_steps = ranking_settings(DEFAULT_RETRIEVAL)
    stages["hybrid default steps"], _ = time_each(
        range(count),
        lambda i: hybrid_query(
            snapshot, tokens[i], vectors[i], top_k=top_k, depth=depth, ranking=default_steps
        ),
    )
    notes["hybrid default steps"] = asdict(default_steps)
    progress(f"{size:,} chunks: stages timed; timing the references")

    rankings: dict[str, Any] = {}
    _time_full_scan(collection.vectors, vectors, semantic_all, top_k, references, rankings)
    measured = (references, rankings, notes)
    token_lists = collection.token_lists
    _time_lexical_reference(
        "bm25s",
        lambda: Bm25sLucene(token_lists, k1=DEFAULT_K1, b=DEFAULT_B),
        tokens,
        lexical,
        top_k,
        measured,
        comparison="lexical smoothed vs bm25s",
        # bm25s leaves the constant (k1 + 1) factor out of its term weight.
        scale=1.0 / (DEFAULT_K1 + 1.0),
    )
    if size <= RANK_BM25_MAX_CHUNKS:
        _time_lexical_reference(
            "rank_bm25",
            lambda: RankBm25Okapi(token_lists, k1=DEFAULT_K1, b=DEFAULT_B),
            tokens,
            lexical_okapi,
            top_k,
            measured,
            comparison="lexical okapi vs rank_bm25",
            scale=1.0,
        )
    gc.collect()

    return {
        "chunks": size,
        "dimensions": dimension,
        "queries": count,
        "top_k": top_k,
        "depth": depth,
        "load_average_1min": load_before,
        "load_average_1min_after": os.getloadavg()[0],
        "generate_seconds": generated,
        "build_seconds": build_seconds,
        "memory": memory,
        "stages": {name: summary.as_dict() for name, summary in stages.items()},
        "references": {name: summary.as_dict() for name, summary in references.items()},
        "rankings": rankings,
        "notes": notes,
    }


def _packing_notes(
    found: Sequence[Sequence[Hit]], packed: Sequence[PackedContext], budget: int
) -> dict[str, Any]:
    def median_of(values: list[int]) -> float:
        return float(np.median(values))

    return {
        "token_budget": budget,
        "token_counter": "the bundled model's WordPiece tokenizer",
        "blas_threads": SERVICE_BLAS_THREADS,
        "median_candidates": median_of([len(hits) for hits in found]),
        "median_passages": median_of([len(p.passages) for p in packed]),
        "median_tokens_used": median_of([p.tokens_used for p in packed]),
        "median_merged": median_of(
            [sum(o.outcome == "merged" for o in p.considered) for p in packed]
        ),
    }


def _semantic(snapshot: IndexSnapshot, mask: np.ndarray, depth: int, vector: np.ndarray) -> Ranking:
    return semantic_ranking(snapshot, vector, mask, depth)


def _mask_of(snapshot: IndexSnapshot, node: Node, _: int) -> np.ndarray:
    return _mask(snapshot, node)


def _time_full_scan(
    matrix: np.ndarray,
    vectors: list[np.ndarray],
    ours: list[Ranking],
    top_k: int,
    references: dict[str, Summary],
    rankings: dict[str, Any],
) -> None:
    scan = NumpyFullScan(matrix)
    references["numpy full scan"], scanned = time_each(vectors, lambda v: scan.search(v, top_k))
    rankings["semantic vs numpy full scan"] = agreement(
        [_top(r) for r in ours],
        scanned,
        [scan.scores(v) for v in vectors],
        scale=1.0,
        positive_only=False,
    ).as_dict()


def _time_lexical_reference(
    reference: str,
    build: Callable[[], Any],
    queries: list[list[str]],
    ours: list[Ranking],
    top_k: int,
    measured: tuple[dict[str, Summary], dict[str, Any], dict[str, Any]],
    *,
    comparison: str,
    scale: float,
) -> None:
    """Build a BM25 library's index, time its top-k search and compare its rankings with ours."""
    references, rankings, notes = measured
    started = time.perf_counter()
    model = build()
    notes[f"{reference}_build_seconds"] = time.perf_counter() - started
    references[reference], found = time_each(queries, lambda t: model.search(t, top_k))
    rankings[comparison] = agreement(
        [_top(r) for r in ours],
        found,
        [model.scores(t) for t in queries],
        scale=scale,
        positive_only=True,
    ).as_dict()


def _require_count(what: str, found: int, expected: int) -> None:
    if found != expected:
        raise RuntimeError(f"{what}: selected {found} rows, the data was made for {expected}")
