"""``excerpta bench --graph-hybrid``: hybrid and semantic queries over the collection's own
vector index, against the same queries ranked by exact search.

The collection is the in-process bench's (``service.bench.synthetic``: Zipf text, ten chunks a
document, the attributes of its selectivity filters) with clustered vectors in place of the
uniform ones (``service.bench.vector_index``: rows around the bundled model's embeddings of the
corpus's paragraphs, which the graph must find its way through as it would through real
embeddings); the queries are its query terms with clustered query vectors. The index gets the
vector index of the given settings (the default: ``auto``, a graph from
``AUTO_GRAPH_FROM_ROWS`` live rows on), built as the registry's background round builds it:
on faiss's own threads (the server limits BLAS threads only); the queries run on one.

Every query goes through the service's retrieval entry (``retrieve``) with the default ranking
steps (RM3 and Rocchio feedback, reciprocal rank fusion), under each selectivity filter of the
in-process bench (``position < ceil(s * N)``: a random share ``s`` of the rows), in hybrid and
in semantic mode. The reference is the same query on the same snapshot without its graph,
which the planner then ranks exactly (gather or scan), feedback included. Recall@k is the share
of the reference's first k rows (of the fused ranking in hybrid mode) among the first k rows
found; every row of every ranking a query returns is checked against the candidate mask. Then a
tenth of the documents is written again with new vectors, without a rebuild (their old rows
deleted, walked through by the graph but never returned; the new ones its exactly scored tail),
and the same is measured.
"""

from __future__ import annotations

import gc
import os
import time
from collections import Counter
from collections.abc import Callable, Sequence
from dataclasses import asdict, replace
from functools import partial
from typing import Any

import faiss
import numpy as np
from threadpoolctl import threadpool_limits

from service.bench.inprocess import build_index, checked_filter, service_query
from service.bench.synthetic import (
    CHUNKS_PER_DOCUMENT,
    SELECTIVITIES_PER_MILLE,
    QuerySet,
    SyntheticCollection,
    make_collection,
    make_queries,
    selected_rows,
    selectivity_label,
)
from service.bench.timing import resident_bytes, time_each
from service.bench.vector_index import (
    clustered_vectors,
    outside_mask,
    recall_at,
    replaced_documents,
)
from service.filters.syntax import Node
from service.index.collection_index import ChunkRecord, CollectionIndex, IndexSnapshot
from service.index.graph import VectorIndexSettings
from service.retrieval.query import Mode, RetrievalQuery, RetrievalResult, candidate_mask, retrieve
from service.usecases.retrieval_settings import DEFAULT_RETRIEVAL, ranking_settings

MODES: tuple[tuple[Mode, str], ...] = (("hybrid", "fused"), ("semantic", "semantic"))


def selectivity_filters(size: int) -> list[tuple[int, str, Node]]:
    """(per mille, text, checked filter) of each selectivity: a random share of the rows."""
    found = []
    for per_mille in SELECTIVITIES_PER_MILLE:
        text = f"position < {selected_rows(size, per_mille)}"
        found.append((per_mille, text, checked_filter(text)))
    return found


def _first_plan(result: RetrievalResult) -> tuple[str, str | None]:
    """The first semantic ranking's method and fallback."""
    stage = next(stage for stage in result.stages if stage.name == "semantic")
    assert stage.plan is not None
    return stage.plan.method, stage.plan.fallback


def measure(
    snapshot: IndexSnapshot,
    queries: QuerySet,
    filters: Sequence[tuple[int, str, Node]],
    *,
    top_k: int,
    depth: int,
) -> list[dict[str, Any]]:
    """Each filter's figures, hybrid and semantic, over the query set on one snapshot; the
    hybrid's time with plain fusion too, for how much the ranking steps add."""
    reference = replace(snapshot, graph=None)
    steps = ranking_settings(DEFAULT_RETRIEVAL)
    pairs = list(zip(queries.token_lists, list(queries.vectors), strict=True))
    rows = []
    for per_mille, text, node in filters:
        mask, _ = candidate_mask(snapshot, node, None)
        entry: dict[str, Any] = {
            "filter": text,
            "selectivity": selectivity_label(per_mille),
            "candidates": int(np.count_nonzero(mask)),
        }
        for mode, ranking_name in MODES:
            built = [
                service_query(t, v, top_k=top_k, depth=depth, ranking=steps, mode=mode, filter=node)
                for t, v in pairs
            ]
            entry[mode] = _compare(snapshot, reference, built, mask, ranking_name)
        plain = [service_query(t, v, top_k=top_k, depth=depth, filter=node) for t, v in pairs]
        entry["hybrid"]["plain_fusion"] = time_each(plain, partial(retrieve, snapshot))[0].as_dict()
        rows.append(entry)
    return rows


def _compare(
    snapshot: IndexSnapshot,
    reference: IndexSnapshot,
    queries: Sequence[RetrievalQuery],
    mask: np.ndarray,
    ranking_name: str,
) -> dict[str, Any]:
    """The queries timed on the snapshot and on the reference, and their rankings compared."""
    timed, found = time_each(queries, partial(retrieve, snapshot))
    exact_timed, exact = time_each(queries, partial(retrieve, reference))
    recalls = {
        at: [
            recall_at(f.rankings[ranking_name].rows, e.rankings[ranking_name].rows, at)
            for f, e in zip(found, exact, strict=True)
        ]
        for at in (10, 100)
    }
    plans = [_first_plan(result) for result in found]
    return {
        "planned": timed.as_dict(),
        "stage_medians_ms": _stage_medians(found),
        "exact": exact_timed.as_dict(),
        "plans": dict(sorted(Counter(method for method, _ in plans).items())),
        "fallbacks": sum(1 for _, fallback in plans if fallback is not None),
        "recall_at_10": float(np.mean(recalls[10])),
        "worst_recall_at_10": float(np.min(recalls[10])),
        "recall_at_100": float(np.mean(recalls[100])),
        "outside_mask": sum(
            outside_mask(ranking.rows, mask)
            for result in found
            for ranking in result.rankings.values()
        ),
    }


def _stage_medians(results: Sequence[RetrievalResult]) -> dict[str, float]:
    """Each stage's median time as the queries' traces recorded it (the semantic stage runs
    beside the lexical ones, so the times overlap)."""
    times: dict[str, list[float]] = {}
    for result in results:
        for stage in result.stages:
            times.setdefault(stage.name, []).append(stage.milliseconds)
    return {name: float(np.median(values)) for name, values in times.items()}


def _replace_a_tenth(
    index: CollectionIndex, collection: SyntheticCollection, centres: np.ndarray, seed: int
) -> int:
    """Write a tenth of the documents again with new clustered vectors; how many rows."""
    rng = np.random.default_rng(seed + 2)
    documents = collection.size // CHUNKS_PER_DOCUMENT
    chosen, vectors, _ = replaced_documents(centres, documents, CHUNKS_PER_DOCUMENT, rng)
    batch: dict[str, list[ChunkRecord]] = {}
    for number, document in enumerate(chosen.tolist()):
        first = document * CHUNKS_PER_DOCUMENT
        records = collection.records[first : first + CHUNKS_PER_DOCUMENT]
        new = vectors[number * CHUNKS_PER_DOCUMENT :]
        batch[records[0].document_id] = [
            replace(record, vector=new[i]) for i, record in enumerate(records)
        ]
    index.replace_documents(batch)
    return sum(len(records) for records in batch.values())


def _memory(snapshot: IndexSnapshot, size: int, dimension: int, growth: int) -> dict[str, Any]:
    graph = snapshot.graph
    raw = size * dimension * 4
    postings = snapshot.lexical.nbytes
    held = snapshot.vectors.nbytes + (0 if graph is None else graph.nbytes) + postings
    return {
        "raw_vector_bytes": raw,
        "postings_bytes": postings,
        "vector_matrix_bytes": snapshot.vectors.nbytes,
        "graph_bytes": 0 if graph is None else graph.nbytes,
        "graph_views_vectors": None if graph is None else graph.views_rows,
        "arrays_ratio": held / (raw + postings),
        "rss_growth_bytes": growth,
        "ratio": growth / (raw + postings),
    }


def run_graph_hybrid(
    size: int,
    *,
    dimension: int,
    queries: int,
    top_k: int,
    depth: int,
    seed: int,
    settings: VectorIndexSettings,
    centres: np.ndarray,
    progress: Callable[[str], None],
) -> dict[str, Any]:
    if centres.shape[1] != dimension:
        raise ValueError(f"--graph-hybrid needs --dims {centres.shape[1]} (the model's)")
    load_before = os.getloadavg()[0]
    started = time.perf_counter()
    data = clustered_vectors(centres, size, queries, seed)
    collection = make_collection(size, dimension, seed, vectors=data.rows)
    query_set = QuerySet(make_queries(queries, dimension, seed).token_lists, data.queries)
    progress(f"{size:,} chunks: generated in {time.perf_counter() - started:.1f} s; indexing")

    index, build_seconds, before = build_index(collection, dimension)
    graph_seconds = None
    graph_threads = None
    if settings.wants_graph(index.snapshot().live_rows):
        progress(f"{size:,} chunks: index built in {build_seconds:.1f} s; building the graph")
        with threadpool_limits(limits=os.cpu_count(), user_api="openmp"):
            graph_threads = faiss.omp_get_max_threads()
            started = time.perf_counter()
            if not index.build_graph(settings, compact=False):
                raise RuntimeError("the graph was not published")
            graph_seconds = time.perf_counter() - started
    gc.collect()
    snapshot = index.snapshot()
    memory = _memory(snapshot, size, dimension, resident_bytes() - before)
    graph_rows = 0 if snapshot.graph is None else snapshot.graph.rows
    progress(f"{size:,} chunks: graph over {graph_rows:,} rows; measuring")
    filters = selectivity_filters(size)
    fresh = measure(snapshot, query_set, filters, top_k=top_k, depth=depth)

    replaced_rows = _replace_a_tenth(index, collection, centres, seed)
    progress(f"{size:,} chunks: {replaced_rows:,} rows written again; measuring with the tail")
    snapshot = index.snapshot()
    replaced = measure(snapshot, query_set, filters, top_k=top_k, depth=depth)
    return {
        "chunks": size,
        "dimensions": dimension,
        "queries": queries,
        "top_k": top_k,
        "depth": depth,
        "settings": {"index": settings.index, **asdict(settings.graph)},
        "ranking_steps": asdict(ranking_settings(DEFAULT_RETRIEVAL)),
        "load_average_1min": load_before,
        "load_average_1min_after": os.getloadavg()[0],
        "build_seconds": build_seconds,
        "graph_build_seconds": graph_seconds,
        "graph_build_threads": graph_threads,
        "graph_rows": graph_rows,
        "memory": memory,
        "fresh": fresh,
        "replaced_rows": replaced_rows,
        "tail_rows": snapshot.n_rows - graph_rows,
        "replaced": replaced,
    }
