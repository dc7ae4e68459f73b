"""Hand-computed cases; the agreement with trec_eval itself is in tests/comparison."""

from __future__ import annotations

import math

import pytest

from service.evaluation.measures import (
    average_precision_at,
    measure_names,
    ndcg_at,
    precision_at,
    query_measures,
    recall_at,
    reciprocal_rank_at,
)

JUDGMENTS = {"a": 3, "b": 0, "c": 1, "d": 2, "e": -1}
RANKING = ["x", "a", "b", "c", "e"]


def test_ndcg_uses_the_grade_as_gain_and_every_judged_document_for_the_ideal() -> None:
    dcg = 3 / math.log2(3) + 1 / math.log2(5)
    ideal = 3 / math.log2(2) + 2 / math.log2(3) + 1 / math.log2(4)
    assert ndcg_at(RANKING, JUDGMENTS, 5) == pytest.approx(dcg / ideal, abs=1e-12)


def test_precision_divides_by_k_even_when_fewer_documents_were_retrieved() -> None:
    assert precision_at(RANKING, JUDGMENTS, 10) == pytest.approx(2 / 10)


def test_recall_counts_relevant_documents_the_run_missed() -> None:
    assert recall_at(RANKING, JUDGMENTS, 3) == pytest.approx(1 / 3)
    assert recall_at(RANKING, JUDGMENTS, 100) == pytest.approx(2 / 3)


def test_reciprocal_rank_is_zero_when_the_first_relevant_lies_beyond_k() -> None:
    assert reciprocal_rank_at(RANKING, JUDGMENTS, 2) == pytest.approx(1 / 2)
    assert reciprocal_rank_at(RANKING, JUDGMENTS, 1) == 0.0


def test_average_precision_divides_by_all_relevant_documents() -> None:
    assert average_precision_at(RANKING, JUDGMENTS, 5) == pytest.approx((1 / 2 + 2 / 4) / 3)
    assert average_precision_at(RANKING, JUDGMENTS, 3) == pytest.approx((1 / 2) / 3)


def test_a_query_without_relevant_documents_scores_zero_everywhere() -> None:
    measures = query_measures(["a", "b"], {"a": 0, "b": -1}, k=2, depth=5)
    assert set(measures.values()) == {0.0}


def test_measure_names_merge_recall_at_k_and_at_depth_when_they_coincide() -> None:
    assert measure_names(10, 100) == [
        "nDCG@10",
        "Recall@10",
        "Recall@100",
        "MRR@10",
        "MAP@100",
        "P@10",
    ]
    assert measure_names(10, 10) == ["nDCG@10", "Recall@10", "MRR@10", "MAP@10", "P@10"]
    assert list(query_measures(RANKING, JUDGMENTS, k=10, depth=10)) == measure_names(10, 10)


def test_a_cutoff_below_one_is_refused() -> None:
    with pytest.raises(ValueError, match="at least 1"):
        ndcg_at(RANKING, JUDGMENTS, 0)
