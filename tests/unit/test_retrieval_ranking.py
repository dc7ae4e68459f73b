import numpy as np
import pytest

from service.index.collection_index import ChunkRecord, CollectionIndex
from service.index.lexical import LexicalScoring
from service.retrieval.query import RetrievalQuery, retrieve
from service.retrieval.ranking import Ranking, fuse_rrf, lexical_ranking, semantic_ranking

DIMENSION = 6


def record(
    chunk_id: str, words: list[str], vector: np.ndarray, access: tuple[str, ...] = ()
) -> ChunkRecord:
    document_id = chunk_id.split("#")[0]
    return ChunkRecord(
        chunk_id=chunk_id,
        document_id=document_id,
        ordinal=int(chunk_id.split("#")[1]),
        title="",
        section="",
        text=" ".join(words),
        char_start=0,
        char_end=0,
        tokens=len(words),
        lexical_tokens=words,
        vector=vector.astype(np.float32),
        access=access,
    )


def random_index(
    rows: int = 400, seed: int = 0, groups: np.ndarray | None = None
) -> CollectionIndex:
    """Random rows; where ``groups`` is given, a row is in group "in" exactly where it is true."""
    rng = np.random.default_rng(seed)
    vocabulary = [f"t{i}" for i in range(30)]
    records = [
        record(
            f"d{rng.integers(0, 10**6):06d}#{i:04d}",
            list(rng.choice(vocabulary, size=rng.integers(1, 10))),
            rng.standard_normal(DIMENSION),
            () if groups is None else ("in",) if groups[i] else ("out",),
        )
        for i in range(rows)
    ]
    return CollectionIndex.build(records, metric="cosine", dimension=DIMENSION)


def ranking(rows: list[int], keys: list[int]) -> Ranking:
    return Ranking("x", np.array(rows), np.zeros(len(rows)), np.array(keys), len(rows))


def test_fusion_sums_reciprocal_ranks_and_breaks_ties_by_chunk_id() -> None:
    # rows 10 and 20 hold ranks (1, absent) and (absent, 1); rows 30 and 40 hold (2, 3), (3, 2).
    lexical = ranking([10, 30, 40], [4, 2, 1])
    semantic = ranking([20, 40, 30], [3, 1, 2])
    fused = fuse_rrf([lexical, semantic], rrf_k=60, depth=3)
    assert fused.rows.tolist() == [40, 30, 20, 10]
    assert fused.scores[0] == fused.scores[1] == 1 / 62 + 1 / 63
    assert fused.scores[2] == fused.scores[3] == 1 / 61


def test_fusion_ignores_entries_beyond_depth() -> None:
    fused = fuse_rrf([ranking([1, 2, 3], [0, 1, 2]), ranking([3], [2])], rrf_k=0, depth=2)
    # Row 3 is third in the first ranking (beyond depth 2) and first in the second.
    assert fused.rows.tolist() == [1, 3, 2]
    assert fused.scores.tolist() == [1.0, 1.0, 0.5]


def test_equal_scores_are_ranked_by_chunk_id_in_code_point_order() -> None:
    same = np.ones(DIMENSION)
    ids = ["b#0000", "B#0000", "a#0001", "a#0000", "é#0000", "Z#0000"]
    index = CollectionIndex.build(
        [record(cid, ["same"], same) for cid in ids], metric="cosine", dimension=DIMENSION
    )
    snapshot = index.snapshot()
    everyone = np.ones(len(ids), dtype=bool)
    for result in (
        lexical_ranking(snapshot, ["same"], everyone, 4),
        semantic_ranking(snapshot, same, everyone, 4),
    ):
        assert [snapshot.chunk_ids[r] for r in result.rows] == sorted(ids)[:4]


@pytest.mark.parametrize("fraction", [0.01, 0.1, 0.5, 0.9])
def test_filtered_rankings_equal_the_full_ranking_restricted_to_the_candidates(
    fraction: float,
) -> None:
    index = random_index()
    snapshot = index.snapshot()
    rng = np.random.default_rng(int(fraction * 100))
    mask = rng.random(snapshot.n_rows) < fraction
    everyone = np.ones(snapshot.n_rows, dtype=bool)
    query_vector = rng.standard_normal(DIMENSION)
    pairs = [
        (
            lexical_ranking(snapshot, ["t1", "t2", "t2"], everyone, 10_000),
            lexical_ranking(snapshot, ["t1", "t2", "t2"], mask, 20),
        ),
        (
            semantic_ranking(snapshot, query_vector, everyone, 10_000),
            semantic_ranking(snapshot, query_vector, mask, 20),
        ),
    ]
    for full, filtered in pairs:
        keep = mask[full.rows]
        assert filtered.rows.tolist() == full.rows[keep][:20].tolist()
        assert np.array_equal(filtered.scores, full.scores[keep][:20])


def test_hybrid_retrieval_reports_ranks_within_depth() -> None:
    mask = np.random.default_rng(8).random(200) < 0.6
    index = random_index(rows=200, seed=4, groups=mask)
    snapshot = index.snapshot()
    query_vector = np.arange(DIMENSION, dtype=np.float64)

    def query(mode: str, depth: int) -> RetrievalQuery:
        return RetrievalQuery(
            mode=mode,  # type: ignore[arg-type]
            tokens=("t3", "t4"),
            vector=query_vector,
            filter=None,
            groups=frozenset({"in"}),
            top_k=15,
            depth=max(depth, 15),
            rrf_k=60,
            keep=15,
            scoring=LexicalScoring(k1=1.2, b=0.75, variant="smoothed"),
        )

    result = retrieve(snapshot, query("hybrid", 5))
    lexical = lexical_ranking(snapshot, ["t3", "t4"], mask, 15)
    semantic = semantic_ranking(snapshot, query_vector, mask, 15)
    assert result.candidates == int(mask.sum())
    assert len(result.hits) == 15
    lexical_ranks = lexical.rank_of()
    semantic_ranks = semantic.rank_of()
    expected = fuse_rrf([lexical, semantic], 60, 15)
    assert [h.row for h in result.hits] == expected.rows[:15].tolist()
    # The semantic scan ran on a scan thread; its scores are the same to the last bit.
    assert [h.score for h in result.hits] == expected.scores[:15].tolist()
    for hit in result.hits:
        assert hit.ranks == {
            "lexical": lexical_ranks.get(hit.row),
            "semantic": semantic_ranks.get(hit.row),
        }
        assert mask[hit.row]
    assert [stage.name for stage in result.stages] == ["filter", "lexical", "semantic", "fusion"]
    single = retrieve(snapshot, query("lexical", 100))
    assert [h.ranks for h in single.hits] == [{"lexical": r} for r in range(1, 16)]
    assert [h.score for h in single.hits] == lexical.scores.tolist()


def test_the_core_refuses_a_query_it_was_not_meant_to_see() -> None:
    scoring = LexicalScoring()

    def query(**changes: object) -> RetrievalQuery:
        fields: dict[str, object] = {
            "mode": "hybrid",
            "tokens": ("t1",),
            "vector": np.ones(DIMENSION),
            "filter": None,
            "groups": None,
            "top_k": 5,
            "depth": 10,
            "rrf_k": 60,
            "keep": 5,
            "scoring": scoring,
        }
        return RetrievalQuery(**{**fields, **changes})  # type: ignore[arg-type]

    query()
    for changes in ({"depth": 4}, {"top_k": 0}, {"keep": 0}, {"vector": None}):
        with pytest.raises(ValueError):
            query(**changes)
    query(mode="lexical", vector=None)


def test_a_search_keeps_top_k_and_packing_keeps_the_whole_ranking() -> None:
    snapshot = random_index(rows=300, seed=2).snapshot()
    base = dict(
        tokens=("t1", "t2"),
        vector=np.ones(DIMENSION),
        filter=None,
        groups=None,
        top_k=5,
        depth=40,
        rrf_k=60,
        scoring=LexicalScoring(),
    )
    search = retrieve(snapshot, RetrievalQuery(mode="hybrid", keep=5, **base))  # type: ignore[arg-type]
    packing = retrieve(snapshot, RetrievalQuery(mode="hybrid", keep=40, **base))  # type: ignore[arg-type]
    assert len(search.hits) == 5
    assert len(packing.hits) == 40
    assert packing.hits[:5] == search.hits
