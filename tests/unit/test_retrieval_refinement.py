"""The hybrid steps beyond plain fusion, each checked against its published formula computed
here by hand: RM3 (Lavrenko and Croft 2001; Abdul-Jaleel et al. 2004), Rocchio (1971), weighted
reciprocal rank fusion (Cormack, Clarke and Büttcher 2009), min-max and z-score score fusion
(Fox and Shaw 1994; Bruch, Gai and Ingber 2023) and BM25F by field repetition (Robertson,
Zaragoza and Taylor 2004)."""

from __future__ import annotations

import math
from collections import Counter
from dataclasses import replace

import numpy as np
import pytest

from service.index.analyzer import Analyzer
from service.index.collection_index import ChunkRecord, CollectionIndex
from service.index.lexical import LexicalIndex, LexicalScoring
from service.index.vectors import GatheredRows, VectorMatrix
from service.retrieval.query import RetrievalQuery, RetrievalResult, retrieve
from service.retrieval.ranking import (
    Ranking,
    exact_semantic_ranking,
    fuse_rrf,
    fuse_scores,
    with_document_support,
)
from service.retrieval.ranking_settings import (
    FeedbackSource,
    LexicalFeedback,
    RankingSettings,
    SemanticFeedback,
)
from service.retrieval.refinement import rm3_expansion, rocchio_vector

DIMENSION = 4


def ranking(rows: list[int], scores: list[float], keys: list[int] | None = None) -> Ranking:
    keys = keys if keys is not None else rows
    return Ranking(
        "x", np.array(rows), np.array(scores, dtype=np.float64), np.array(keys), len(rows)
    )


def record(chunk_id: str, words: list[str], vector: list[float]) -> ChunkRecord:
    document_id, ordinal = chunk_id.split("#")
    return ChunkRecord(
        chunk_id=chunk_id,
        document_id=document_id,
        ordinal=int(ordinal),
        title="",
        section="",
        text=" ".join(words),
        char_start=0,
        char_end=0,
        tokens=len(words),
        lexical_tokens=words,
        vector=np.asarray(vector, dtype=np.float32),
    )


def test_weighted_fusion_at_even_weights_is_plain_reciprocal_rank_fusion_to_the_bit() -> None:
    lexical = ranking([10, 30, 40], [3.0, 2.0, 1.0], [4, 2, 1])
    semantic = ranking([20, 40, 30], [0.9, 0.8, 0.7], [3, 1, 2])
    plain = fuse_rrf([lexical, semantic], rrf_k=60, depth=3)
    weighted = fuse_rrf([lexical, semantic], rrf_k=60, depth=3, weights=[1.0, 1.0])
    assert plain.rows.tolist() == weighted.rows.tolist()
    assert plain.scores.tolist() == weighted.scores.tolist()


def test_weighted_fusion_multiplies_each_rankings_reciprocal_ranks() -> None:
    lexical = ranking([1, 2], [2.0, 1.0])
    semantic = ranking([2, 3], [0.9, 0.1])
    fused = fuse_rrf([lexical, semantic], rrf_k=10, depth=2, weights=[0.5, 1.5])
    expected = {1: 0.5 / 11, 2: 0.5 / 12 + 1.5 / 11, 3: 1.5 / 12}
    assert dict(zip(fused.rows.tolist(), fused.scores.tolist(), strict=True)) == pytest.approx(
        expected
    )
    assert fused.rows.tolist() == [2, 3, 1]


def test_min_max_fusion_is_the_convex_combination_of_normalised_scores() -> None:
    lexical = ranking([1, 2, 3], [10.0, 6.0, 2.0])
    semantic = ranking([3, 4], [0.8, 0.4])
    fused = fuse_scores([lexical, semantic], depth=3, weights=[0.6, 0.4], method="min_max")
    # Normalised: lexical 1 -> 1, 2 -> 0.5, 3 -> 0; semantic 3 -> 1, 4 -> 0; absent rows get 0.
    expected = {1: 0.6, 2: 0.3, 3: 0.4, 4: 0.0}
    assert dict(zip(fused.rows.tolist(), fused.scores.tolist(), strict=True)) == pytest.approx(
        expected
    )


def test_z_score_fusion_gives_an_absent_row_the_rankings_lowest_standard_score() -> None:
    lexical = ranking([1, 2, 3], [3.0, 2.0, 1.0])
    semantic = ranking([4, 1], [0.9, 0.5])
    fused = fuse_scores([lexical, semantic], depth=3, weights=[1.0, 1.0], method="z_score")
    z_lexical = {1: math.sqrt(1.5), 2: 0.0, 3: -math.sqrt(1.5)}
    z_semantic = {4: 1.0, 1: -1.0}
    expected = {
        row: z_lexical.get(row, -math.sqrt(1.5)) + z_semantic.get(row, -1.0) for row in (1, 2, 3, 4)
    }
    assert dict(zip(fused.rows.tolist(), fused.scores.tolist(), strict=True)) == pytest.approx(
        expected
    )


def test_a_documents_second_chunk_lifts_its_best_chunk_only() -> None:
    # Rows 0 and 1 are chunks of document a, row 2 is document b's only chunk; a's best chunk
    # ties with b's and loses the tie on chunk_id, until a's second chunk supports it.
    fused = ranking([2, 0, 1], [0.5, 0.5, 0.3], [0, 1, 2])
    supported, raised = with_document_support(fused, ["b", "a", "a"], 0.5)
    assert raised == 1
    assert supported.rows.tolist() == [0, 2, 1]
    assert supported.scores.tolist() == pytest.approx([0.65, 0.5, 0.3])
    unchanged, none = with_document_support(fused, ["b", "a", "a"], 0.0)
    assert none == 0 and unchanged.rows.tolist() == [2, 0, 1]


def test_the_relevance_model_weighs_each_feedback_rows_term_shares() -> None:
    index = LexicalIndex.build([["a", "b", "b"], ["b", "c"], ["d"]])
    term_ids, weights = index.relevance_model(np.array([0, 1]), np.array([0.75, 0.25]))
    by_term = dict(zip(index.term_names(term_ids.tolist()), weights.tolist(), strict=True))
    expected = {"a": 0.75 / 3, "b": 0.75 * 2 / 3 + 0.25 / 2, "c": 0.25 / 2}
    assert by_term == pytest.approx(expected)


def test_the_relevance_model_survives_tombstones_and_compaction() -> None:
    index = LexicalIndex.build([["x"], ["a", "b", "b"], ["b", "c"]]).tombstone(np.array([0]))
    compacted, remap = index.compact()
    before = index.relevance_model(np.array([1, 2]), np.array([0.5, 0.5]))
    after = compacted.relevance_model(remap[[1, 2]], np.array([0.5, 0.5]))
    assert before[0].tolist() == after[0].tolist()
    assert before[1].tolist() == pytest.approx(after[1].tolist())


def test_rm3_interpolates_the_query_with_the_feedback_terms_by_hand() -> None:
    records = [
        record("d1#0000", ["wing", "flutter", "flutter"], [1, 0, 0, 0]),
        record("d2#0000", ["wing", "lift"], [0, 1, 0, 0]),
        record("d3#0000", ["boundary", "layer"], [0, 0, 1, 0]),
    ]
    snapshot = CollectionIndex.build(records, metric="cosine", dimension=DIMENSION).snapshot()
    rows = np.array([0, 1])
    scores = np.array([3.0, 1.0])
    feedback = LexicalFeedback(chunks=2, terms=2, query_weight=0.4)
    expansion = rm3_expansion(snapshot, ("wing",), rows, scores, feedback)
    names = snapshot.lexical.term_names(expansion.term_ids.tolist())
    got = dict(zip(names, expansion.weights.tolist(), strict=True))
    # P(d): 0.75 and 0.25. P(t|R): flutter 0.75*2/3 = 0.5, wing 0.75/3 + 0.25/2 = 0.375,
    # lift 0.125; the best two renormalised: flutter 0.5/0.875, wing 0.375/0.875.
    expected = {
        "wing": 0.4 * 1.0 + 0.6 * 0.375 / 0.875,
        "flutter": 0.6 * 0.5 / 0.875,
    }
    assert got == pytest.approx(expected)
    assert expansion.feedback_rows == 2


def test_rm3_skips_expansion_terms_in_more_than_the_share_of_chunks() -> None:
    """The same feedback as above over four chunks: "wing" is in three of them (0.75), so a
    share of 0.5 keeps it as a query term but never as an expansion term."""
    records = [
        record("d1#0000", ["wing", "flutter", "flutter"], [1, 0, 0, 0]),
        record("d2#0000", ["wing", "lift"], [0, 1, 0, 0]),
        record("d3#0000", ["boundary", "layer"], [0, 0, 1, 0]),
        record("d4#0000", ["wing", "tip"], [0, 0, 0, 1]),
    ]
    snapshot = CollectionIndex.build(records, metric="cosine", dimension=DIMENSION).snapshot()
    rows = np.array([0, 1])
    scores = np.array([3.0, 1.0])
    capped = LexicalFeedback(chunks=2, terms=2, query_weight=0.4, max_share=0.5)
    expansion = rm3_expansion(snapshot, ("wing",), rows, scores, capped)
    names = snapshot.lexical.term_names(expansion.term_ids.tolist())
    got = dict(zip(names, expansion.weights.tolist(), strict=True))
    # Without "wing", the best two of P(t|R) are flutter 0.5 and lift 0.125, renormalised.
    expected = {"wing": 0.4 * 1.0, "flutter": 0.6 * 0.5 / 0.625, "lift": 0.6 * 0.125 / 0.625}
    assert got == pytest.approx(expected)
    uncapped = rm3_expansion(snapshot, ("wing",), rows, scores, replace(capped, max_share=1.0))
    assert "lift" not in snapshot.lexical.term_names(uncapped.term_ids.tolist())


def test_rm3_with_every_feedback_term_too_common_keeps_the_original_query() -> None:
    records = [
        record("d1#0000", ["wing", "lift"], [1, 0, 0, 0]),
        record("d2#0000", ["wing", "lift"], [0, 1, 0, 0]),
    ]
    snapshot = CollectionIndex.build(records, metric="cosine", dimension=DIMENSION).snapshot()
    feedback = LexicalFeedback(chunks=2, terms=2, query_weight=0.4, max_share=0.5)
    expansion = rm3_expansion(snapshot, ("wing",), np.array([0, 1]), np.ones(2), feedback)
    assert snapshot.lexical.term_names(expansion.term_ids.tolist()) == ["wing"]
    assert expansion.feedback_rows == 2


def test_rocchio_adds_the_weighted_mean_of_the_top_vectors() -> None:
    records = [
        record("d1#0000", ["a"], [1, 0, 0, 0]),
        record("d2#0000", ["b"], [0, 1, 0, 0]),
        record("d3#0000", ["c"], [0, 0, 1, 0]),
    ]
    snapshot = CollectionIndex.build(records, metric="cosine", dimension=DIMENSION).snapshot()
    query = np.array([0.0, 0.0, 0.0, 1.0], dtype=np.float32)
    refined = rocchio_vector(
        snapshot, query, np.array([0, 1, 2]), SemanticFeedback(chunks=2, weight=0.5)
    )
    assert refined.tolist() == pytest.approx([0.25, 0.25, 0.0, 1.0])


def test_title_weight_gives_bm25f_of_the_title_repeated() -> None:
    """BM25F with one k1 and b: tf and length are the field-weighted sums (Robertson et al.)."""
    analyzer = Analyzer(None, None, title_weight=3)
    tokens = analyzer.indexed_tokens("Wing flutter", "", "flutter of a wing at speed")
    assert Counter(tokens) == Counter(
        {"wing": 4, "flutter": 4, "of": 1, "a": 1, "at": 1, "speed": 1}
    )
    other = analyzer.indexed_tokens("Heat", "", "heat transfer in a wing")
    index = LexicalIndex.build([tokens, other])
    scores = index.match(["wing"], k1=1.2, b=0.75).scores
    lengths = [len(tokens), len(other)]
    average = sum(lengths) / 2
    idf = math.log1p((2 - 2 + 0.5) / (2 + 0.5))
    for row, tf in ((0, 4), (1, 1)):
        norm = 1.2 * (1 - 0.75 + 0.75 * lengths[row] / average)
        assert scores[row] == pytest.approx(idf * tf * 2.2 / (tf + norm), rel=1e-6)


def test_plain_field_weights_index_what_the_joined_text_gives() -> None:
    analyzer = Analyzer.english()
    joined = analyzer.tokens("Ridge manual\nBrakes > Pads\nReplace the pads yearly.")
    assert analyzer.indexed_tokens("Ridge manual", "Brakes > Pads", "Replace the pads yearly.") == (
        joined
    )


def hybrid_query(ranking_settings: RankingSettings, tokens: tuple[str, ...]) -> RetrievalQuery:
    return RetrievalQuery(
        mode="hybrid",
        tokens=tokens,
        vector=np.array([1.0, 0.2, 0.0, 0.0], dtype=np.float32),
        filter=None,
        groups=None,
        top_k=3,
        depth=10,
        rrf_k=60,
        keep=3,
        scoring=LexicalScoring(),
        ranking=ranking_settings,
    )


def test_every_hybrid_step_is_a_stage_of_the_trace_with_its_notes() -> None:
    records = [
        record("d1#0000", ["wing", "flutter", "flutter"], [1, 0, 0, 0]),
        record("d1#0001", ["flutter", "speed"], [0.9, 0.1, 0, 0]),
        record("d2#0000", ["wing", "lift"], [0, 1, 0, 0]),
        record("d3#0000", ["boundary", "layer", "flutter"], [0, 0, 1, 0]),
    ]
    snapshot = CollectionIndex.build(records, metric="cosine", dimension=DIMENSION).snapshot()
    steps = RankingSettings(
        fusion="min_max",
        semantic_weight=0.3,
        lexical_feedback=LexicalFeedback(chunks=2, terms=3, query_weight=0.5),
        semantic_feedback=SemanticFeedback(chunks=2, weight=0.5),
        second_chunk_weight=0.2,
    )
    result = retrieve(snapshot, hybrid_query(steps, ("wing",)))
    names = [stage.name for stage in result.stages]
    assert names == [
        "filter",
        "lexical",
        "lexical_feedback",
        "semantic",
        "semantic_feedback",
        "fusion",
    ]
    feedback = result.stages[2].notes
    assert feedback["chunks"] == 2
    terms = [entry["term"] for entry in feedback["terms"]]  # type: ignore[attr-defined]
    assert terms[0] == "wing"
    assert "flutter" in terms
    # The expanded query reaches the chunk without the query's own term.
    assert "d3#0000" in [entry.chunk_id for entry in result.stages[2].top]
    assert result.stages[4].notes == {"chunks": 2, "weight": 0.5, "source": "own"}
    fusion = result.stages[5].notes
    assert fusion["method"] == "min_max" and fusion["semantic_weight"] == 0.3
    assert fusion["second_chunk_weight"] == 0.2


def test_fused_feedback_takes_both_steps_chunks_from_the_first_fusion() -> None:
    # At depth 2, a leads the lexical ranking only and b the semantic one only; c is second in
    # both, so it leads their fusion (2/62 against 1/61) and is the one feedback chunk.
    records = [
        record("a#0000", ["wing"], [0, 0, 1, 0]),
        record("b#0000", ["flutter", "speed"], [1, 0, 0, 0]),
        record("c#0000", ["wing", "lift", "lift"], [0.6, 0.8, 0, 0]),
    ]
    snapshot = CollectionIndex.build(records, metric="cosine", dimension=DIMENSION).snapshot()
    lexical_feedback = LexicalFeedback(chunks=1, terms=2, query_weight=0.5)
    semantic_feedback = SemanticFeedback(chunks=1, weight=0.5)

    def run(source: FeedbackSource) -> RetrievalResult:
        steps = RankingSettings(
            lexical_feedback=lexical_feedback,
            semantic_feedback=semantic_feedback,
            feedback_source=source,
        )
        query = replace(hybrid_query(steps, ("wing",)), top_k=2, depth=2, keep=2)
        return retrieve(snapshot, query)

    result = run("fused")
    stages = {stage.name: stage for stage in result.stages}
    assert list(stages) == [
        "filter",
        "lexical",
        "semantic",
        "feedback_fusion",
        "lexical_feedback",
        "semantic_feedback",
        "fusion",
    ]
    assert stages["feedback_fusion"].top[0].chunk_id == "c#0000"
    # RM3 from c alone: P(t|R) is wing 1/3, lift 2/3; interpolated at 0.5 with the query.
    notes = stages["lexical_feedback"].notes
    assert notes["source"] == "fused" and notes["chunks"] == 1
    terms = {entry["term"]: entry["weight"] for entry in notes["terms"]}  # type: ignore[attr-defined]
    assert terms == pytest.approx({"wing": 0.5 + 0.5 / 3, "lift": 0.5 * 2 / 3}, abs=1e-6)
    # Rocchio from c: the unit query plus half of c's vector, ranked by cosine.
    query = np.array([1.0, 0.2, 0.0, 0.0]) / math.hypot(1.0, 0.2)
    refined = query + 0.5 * np.array([0.6, 0.8, 0.0, 0.0])
    cosine = {
        row: float(refined @ vector / (np.linalg.norm(refined) * np.linalg.norm(vector)))
        for row, vector in ((1, np.array([1.0, 0, 0, 0])), (2, np.array([0.6, 0.8, 0, 0])))
    }
    semantic = result.rankings["semantic"]
    assert semantic.rows.tolist() == [1, 2]
    assert semantic.scores.tolist() == pytest.approx([cosine[1], cosine[2]], rel=1e-6)
    assert stages["semantic_feedback"].notes == {"chunks": 1, "weight": 0.5, "source": "fused"}

    own = {stage.name: stage for stage in run("own").stages}
    assert "feedback_fusion" not in own
    assert [entry["term"] for entry in own["lexical_feedback"].notes["terms"]] == ["wing"]  # type: ignore[attr-defined]


def test_the_refined_ranking_scores_the_first_rankings_gathered_rows_without_a_second_copy(
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    rng = np.random.default_rng(5)
    vectors = rng.standard_normal((300, DIMENSION))
    # A tenth of the rows visible to the asker: few enough that both rankings gather them.
    records = [
        replace(
            record(f"d{i}#0000", ["wing"] if i % 2 else ["lift"], vectors[i].tolist()),
            access=("crew",) if i % 10 == 0 else ("office",),
        )
        for i in range(300)
    ]
    snapshot = CollectionIndex.build(records, metric="cosine", dimension=DIMENSION).snapshot()
    feedback = SemanticFeedback(chunks=3, weight=0.5)
    query = replace(
        hybrid_query(RankingSettings(semantic_feedback=feedback), ("wing",)),
        groups=frozenset({"crew"}),
    )
    gathers: list[int] = []
    gather = VectorMatrix.gather

    def counting(self: VectorMatrix, mask: np.ndarray) -> GatheredRows:
        gathers.append(int(mask.sum()))
        return gather(self, mask)

    monkeypatch.setattr(VectorMatrix, "gather", counting)
    result = retrieve(snapshot, query)
    stages = {stage.name: stage for stage in result.stages}
    assert stages["semantic"].plan is not None and stages["semantic"].plan.method == "gather"
    assert stages["semantic_feedback"].plan is not None
    assert stages["semantic_feedback"].plan.method == "gather"
    assert gathers == [30]
    # The same ranking as exact search for the refined vector over the visible rows.
    visible = np.array([i % 10 == 0 for i in range(300)])
    first = exact_semantic_ranking(snapshot, query.vector, visible, query.depth)
    prepared = snapshot.vectors.prepare_query(query.vector)
    refined = rocchio_vector(snapshot, prepared, first.rows, feedback)
    want = exact_semantic_ranking(snapshot, refined, visible, query.depth)
    got = result.rankings["semantic"]
    assert got.rows.tolist() == want.rows.tolist()
    assert got.scores.tolist() == want.scores.tolist()


def test_plain_settings_rank_as_plain_fusion_did() -> None:
    records = [
        record(f"d{i}#0000", ["wing"] * (i % 3 + 1) + ["x"] * i, [1, i / 10, 0, 0])
        for i in range(8)
    ]
    snapshot = CollectionIndex.build(records, metric="cosine", dimension=DIMENSION).snapshot()
    result = retrieve(snapshot, hybrid_query(RankingSettings(), ("wing",)))
    lexical, semantic = result.rankings["lexical"], result.rankings["semantic"]
    plain = fuse_rrf([lexical, semantic], 60, 10)
    assert [hit.row for hit in result.hits] == plain.rows[:3].tolist()
    assert [stage.name for stage in result.stages] == ["filter", "lexical", "semantic", "fusion"]
    assert result.stages[-1].notes == {"method": "rrf", "semantic_weight": 0.5, "rrf_k": 60}


def test_settings_out_of_range_are_refused_by_the_core() -> None:
    with pytest.raises(ValueError):
        RankingSettings(semantic_weight=1.5)
    with pytest.raises(ValueError):
        LexicalFeedback(chunks=0)
    with pytest.raises(ValueError):
        SemanticFeedback(weight=-1.0)
    with pytest.raises(ValueError):
        RankingSettings(feedback_source="both")  # type: ignore[arg-type]
