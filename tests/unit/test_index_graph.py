"""The graph index and the semantic plan: masks hold, plans are chosen as weighed, fallbacks
happen, updates and compaction keep results inside the mask.

The exact ranking (``exact_semantic_ranking``, the matrix product of every candidate) is the
reference every graph result is held to.
"""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from service.index import graph as graph_module
from service.index.collection_index import ChunkRecord, CollectionIndex
from service.index.graph import GraphHits, GraphSettings, VectorGraph, VectorIndexSettings
from service.retrieval import semantic_plan as plan_module
from service.retrieval.ranking import (
    begin_semantic_ranking,
    exact_semantic_ranking,
    finish_semantic_ranking,
)
from service.retrieval.semantic_plan import semantic_plan

DIMENSION = 16
SMALL_GRAPH = GraphSettings(links=8, build_breadth=32, search_breadth=32, max_search_breadth=4096)


def records(count: int, seed: int, first: int = 0, generation: int = 0) -> list[ChunkRecord]:
    rng = np.random.default_rng(seed)
    centres = rng.standard_normal((8, DIMENSION))
    vectors = centres[rng.integers(0, 8, count)] + 0.3 * rng.standard_normal((count, DIMENSION))
    result = []
    for offset, vector in enumerate(vectors.astype(np.float32)):
        row = first + offset
        result.append(
            ChunkRecord(
                chunk_id=f"d{row:05d}#0000",
                document_id=f"d{row:05d}",
                ordinal=0,
                title="t",
                section="",
                text=f"g{generation}",
                char_start=0,
                char_end=2,
                tokens=1,
                lexical_tokens=["w"],
                vector=vector,
            )
        )
    return result


def graph_index(count: int, seed: int, mode: str = "graph") -> CollectionIndex:
    index = CollectionIndex.build(records(count, seed), metric="cosine", dimension=DIMENSION)
    settings = VectorIndexSettings(index=mode, graph=SMALL_GRAPH)  # type: ignore[arg-type]
    assert index.build_graph(settings, compact=False)
    return index


def rank(index: CollectionIndex, query: np.ndarray, mask: np.ndarray, depth: int):  # type: ignore[no-untyped-def]
    snapshot = index.snapshot()
    candidates = int(np.count_nonzero(mask))
    scan = begin_semantic_ranking(snapshot, query, mask, candidates, depth)
    return finish_semantic_ranking(snapshot, scan, mask, depth)


def test_the_graph_reads_the_matrix_rows_instead_of_a_copy() -> None:
    index = graph_index(500, 1)
    snapshot = index.snapshot()
    assert snapshot.graph is not None
    assert snapshot.graph.views_rows
    assert snapshot.graph.rows == 500
    # Searching through the viewed rows finds a row's own vector first.
    mask = np.ones(500, dtype=bool)
    hits = snapshot.graph.search(snapshot.vectors.rows[42], mask, 5, 64)
    assert hits.rows[0] == 42
    assert hits.work > 0


def test_a_graph_search_returns_only_rows_in_its_mask() -> None:
    index = graph_index(800, 2)
    snapshot = index.snapshot()
    assert snapshot.graph is not None
    mask = np.zeros(800, dtype=bool)
    mask[::7] = True
    hits = snapshot.graph.search(snapshot.vectors.rows[3], mask, 50, 512)
    assert len(hits.rows) == 50
    assert mask[hits.rows].all()


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    size=st.integers(20, 1500),
    density=st.sampled_from([1.0, 0.5, 0.1, 0.01, 0.001]),
    mode=st.sampled_from(["graph", "auto", "exact"]),
    depth=st.integers(1, 120),
    appended=st.integers(0, 60),
    deleted=st.integers(0, 30),
    seed=st.integers(0, 2**16),
)
def test_no_plan_returns_a_row_outside_the_mask(
    size: int, density: float, mode: str, depth: int, appended: int, deleted: int, seed: int
) -> None:
    index = CollectionIndex.build(records(size, seed), metric="cosine", dimension=DIMENSION)
    if mode != "exact":
        settings = VectorIndexSettings(index=mode, graph=SMALL_GRAPH)  # type: ignore[arg-type]
        index.build_graph(settings, compact=False)
    rng = np.random.default_rng(seed)
    if appended:
        index.replace_documents(
            {r.document_id: [r] for r in records(appended, seed + 1, first=size, generation=1)}
        )
    gone = rng.choice(size, min(deleted, size), replace=False)
    index.replace_documents({f"d{row:05d}": [] for row in gone.tolist()})
    snapshot = index.snapshot()
    mask = snapshot.live & (rng.random(snapshot.n_rows) < density)
    query = rng.standard_normal(DIMENSION).astype(np.float32)
    ranking, trace = rank(index, query, mask, depth)
    candidates = int(np.count_nonzero(mask))
    assert mask[ranking.rows].all()
    assert len(ranking.rows) == min(depth, candidates)
    exact = exact_semantic_ranking(snapshot, query, mask, depth)
    if trace.method != "graph":
        assert ranking.rows.tolist() == exact.rows.tolist()
    # Whatever the plan, a returned row's score is the exact one, to the bit.
    exact_scores = dict(
        zip(*snapshot.vectors.score(snapshot.vectors.prepare_query(query), mask), strict=True)
    )
    assert all(
        exact_scores[row] == score for row, score in zip(ranking.rows, ranking.scores, strict=True)
    )


def test_the_plan_gathers_few_candidates_scans_many_and_searches_the_graph_in_between(
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    index = graph_index(1000, 3, mode="auto")
    snapshot = index.snapshot()
    few = np.zeros(1000, dtype=bool)
    few[:20] = True
    assert semantic_plan(snapshot, few, 20, 10).method == "gather"
    all_rows = np.ones(1000, dtype=bool)
    # At this size a scan costs less than the graph's expected work.
    assert semantic_plan(snapshot, all_rows, 1000, 10).method == "scan"
    monkeypatch.setattr(plan_module, "GRAPH_DISTANCE_COST", 0.01)
    plan = semantic_plan(snapshot, all_rows, 1000, 10)
    assert plan.method == "graph"
    assert plan.breadth == SMALL_GRAPH.search_breadth
    assert plan.work_bound == plan_module.WORK_BOUND_FACTOR * SMALL_GRAPH.expected_work(32)
    # A filter keeping 1%: gathering its ten rows costs less than a hundredfold breadth.
    one_percent = np.zeros(1000, dtype=bool)
    one_percent[::100] = True
    assert semantic_plan(snapshot, one_percent, 10, 10).method == "gather"


def test_breadth_grows_with_one_over_selectivity_from_at_least_twice_the_depth() -> None:
    graph = GraphSettings(search_breadth=64, max_search_breadth=4096)
    assert graph.breadth_for(10, 1000, 1000) == 64
    assert graph.breadth_for(100, 1000, 1000) == 200
    assert graph.breadth_for(10, 100, 1000) == 640
    assert graph.breadth_for(100, 10, 1000) == 20_000


def test_a_short_graph_result_falls_back_to_the_exact_ranking(
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    index = graph_index(600, 4)
    mask = np.ones(600, dtype=bool)
    query = np.ones(DIMENSION, dtype=np.float32)
    monkeypatch.setattr(
        VectorGraph, "search", lambda self, q, m, count, breadth: GraphHits(np.array([5]), 10)
    )
    ranking, trace = rank(index, query, mask, 20)
    assert (trace.planned, trace.fallback, trace.method) == ("graph", "short", "scan")
    exact = exact_semantic_ranking(index.snapshot(), query, mask, 20)
    assert ranking.rows.tolist() == exact.rows.tolist()


def test_a_graph_search_past_its_work_bound_falls_back_to_the_exact_ranking(
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    index = graph_index(600, 5)
    mask = np.zeros(600, dtype=bool)
    mask[:300] = True
    query = np.ones(DIMENSION, dtype=np.float32)
    real_search = VectorGraph.search

    def costly(self: VectorGraph, q: np.ndarray, m: np.ndarray, count: int, breadth: int):  # type: ignore[no-untyped-def]
        found = real_search(self, q, m, count, breadth)
        return GraphHits(found.rows, 10**9)

    monkeypatch.setattr(VectorGraph, "search", costly)
    ranking, trace = rank(index, query, mask, 20)
    assert (trace.fallback, trace.method) == ("over_bound", "scan")
    assert trace.actual_work > 10**9
    exact = exact_semantic_ranking(index.snapshot(), query, mask, 20)
    assert ranking.rows.tolist() == exact.rows.tolist()


def test_rows_written_after_the_graph_are_scored_exactly_as_its_tail() -> None:
    index = graph_index(500, 6)
    extra = records(40, 7, first=500, generation=1)
    index.replace_documents({r.document_id: [r] for r in extra})
    snapshot = index.snapshot()
    assert snapshot.graph is not None and snapshot.graph.rows == 500
    # The query is a tail row's own vector: it must come first.
    query = snapshot.vectors.rows[520].copy()
    ranking, trace = rank(index, query, snapshot.live.copy(), 10)
    assert trace.method == "graph"
    assert ranking.rows[0] == 520


def test_a_tail_dense_with_candidates_is_weighed_and_scored_as_one_product() -> None:
    index = graph_index(1000, 8)
    extra = records(300, 9, first=1000, generation=1)
    index.replace_documents({r.document_id: [r] for r in extra})
    snapshot = index.snapshot()
    query = snapshot.vectors.rows[1100].copy()
    for tail_candidates, tail_work in ((20, 20), (100, 300)):
        mask = np.zeros(snapshot.n_rows, dtype=bool)
        mask[:1000:2] = True
        mask[1100 : 1100 + tail_candidates] = True
        plan = semantic_plan(snapshot, mask, int(mask.sum()), 10)
        assert plan.method == "graph" and plan.tail_candidates == tail_candidates
        # Few tail candidates are gathered; many, the whole tail is multiplied at once.
        assert plan.estimated_work == SMALL_GRAPH.expected_work(plan.breadth) + tail_work
        ranking, trace = rank(index, query, mask, 10)
        assert trace.method == "graph" and ranking.rows[0] == 1100
        graph_work = trace.actual_work - tail_work
        assert 0 < graph_work <= plan.work_bound


def test_compaction_with_a_new_graph_is_published_whole() -> None:
    index = graph_index(700, 8)
    index.replace_documents({f"d{row:05d}": [] for row in range(0, 700, 3)})
    old = index.snapshot()
    settings = VectorIndexSettings(index="graph", graph=SMALL_GRAPH)
    assert index.build_graph(settings, compact=True)
    new = index.snapshot()
    assert new.n_rows == new.live_rows == old.live_rows
    assert new.graph is not None and new.graph.rows == new.n_rows and new.graph.views_rows
    # The old snapshot keeps its graph and rows; both answer the same query alike.
    query = old.vectors.rows[1].copy()
    before, _ = rank_snapshot(old, query, old.live.copy(), 5)
    after, _ = rank_snapshot(new, query, new.live.copy(), 5)
    assert [old.chunk_ids[r] for r in before.rows] == [new.chunk_ids[r] for r in after.rows]


def rank_snapshot(snapshot, query, mask, depth):  # type: ignore[no-untyped-def]
    candidates = int(np.count_nonzero(mask))
    scan = begin_semantic_ranking(snapshot, query, mask, candidates, depth)
    return finish_semantic_ranking(snapshot, scan, mask, depth)


def test_a_compacting_build_is_dropped_when_a_covered_row_is_deleted_meanwhile(
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    index = graph_index(300, 9)
    index.replace_documents({"d00001": []})
    real_build = VectorGraph.build.__func__  # type: ignore[attr-defined]

    def build_while_deleting(cls, matrix, settings, *, layout):  # type: ignore[no-untyped-def]
        index.replace_documents({"d00002": []})
        return real_build(cls, matrix, settings, layout=layout)

    monkeypatch.setattr(VectorGraph, "build", classmethod(build_while_deleting))
    settings = VectorIndexSettings(index="graph", graph=SMALL_GRAPH)
    assert not index.build_graph(settings, compact=True)
    assert index.tombstoned_rows() == 2


def test_auto_wants_a_graph_only_from_its_size_and_a_stale_graph_is_rebuilt() -> None:
    auto = VectorIndexSettings()
    assert not auto.wants_graph(graph_module.AUTO_GRAPH_FROM_ROWS - 1)
    assert auto.wants_graph(graph_module.AUTO_GRAPH_FROM_ROWS)
    assert not VectorIndexSettings(index="exact").wants_graph(10**9)
    assert VectorIndexSettings(index="graph").wants_graph(1)
    index = graph_index(200, 10)
    graph = index.snapshot().graph
    settings = VectorIndexSettings(index="graph", graph=SMALL_GRAPH)
    assert not settings.graph_is_stale(graph, 200 + graph_module.REBUILD_AFTER_TAIL_ROWS)
    assert settings.graph_is_stale(graph, 201 + graph_module.REBUILD_AFTER_TAIL_ROWS)
    assert VectorIndexSettings(index="graph").graph_is_stale(graph, 200)
