"""The evaluation measures against pytrec_eval, per query, to 1e-9.

Reference: pytrec_eval (PyPI package ``pytrec-eval-terrier``, source
github.com/terrierteam/pytrec_eval), Python bindings of trec_eval (github.com/usnistgov/trec_eval),
the trade's reference implementation of these measures. trec_eval re-sorts each query's
documents by score, so every run handed to it here has strictly decreasing scores and the order
it evaluates is ours.

Correspondence (trec_eval measure names; common practice in reporting):
nDCG@k ~ ``ndcg_cut_k``; P@k ~ ``P_k``; Recall@k ~ ``recall_k``; MRR@k ~ ``recip_rank`` on the
run cut at k; MAP@depth ~ ``map`` on the run cut at depth, which is also ``map_cut_depth`` on the
whole run (both divide by every relevant judged document, retrieved or not).
"""

from __future__ import annotations

import random

import pytrec_eval
from hypothesis import given, settings
from hypothesis import strategies as st

from service.evaluation.measures import (
    average_precision_at,
    ndcg_at,
    precision_at,
    recall_at,
    reciprocal_rank_at,
)

TOLERANCE = 1e-9


@st.composite
def judged_runs(draw: st.DrawFn) -> tuple[dict[str, int], list[str], int, int]:
    """Graded judgments (some negative, some zero, at least one positive) and a ranking."""
    pool = [f"d{index}" for index in range(draw(st.integers(2, 40)))]
    judged = draw(st.lists(st.sampled_from(pool), min_size=1, unique=True))
    grades = draw(st.lists(st.integers(-1, 4), min_size=len(judged), max_size=len(judged)))
    judgments = dict(zip(judged, grades, strict=True))
    judgments[judged[0]] = draw(st.integers(1, 4))
    ranking = draw(st.permutations(pool))[: draw(st.integers(1, len(pool)))]
    k = draw(st.integers(1, 12))
    depth = draw(st.integers(k, 45))
    return judgments, ranking, k, depth


def trec_eval_measures(
    judgments: dict[str, int], ranking: list[str], measures: set[str]
) -> dict[str, float]:
    run = {"q": {doc_id: float(len(ranking) - rank) for rank, doc_id in enumerate(ranking)}}
    evaluator = pytrec_eval.RelevanceEvaluator({"q": judgments}, measures)
    return dict(evaluator.evaluate(run)["q"])


def assert_close(ours: float, reference: float) -> None:
    assert abs(ours - reference) <= TOLERANCE, (ours, reference)


@settings(max_examples=300, deadline=None)
@given(judged_runs())
def test_every_measure_equals_trec_eval_on_the_same_run(
    case: tuple[dict[str, int], list[str], int, int],
) -> None:
    judgments, ranking, k, depth = case
    whole = trec_eval_measures(
        judgments, ranking, {f"ndcg_cut.{k}", f"P.{k}", f"recall.{k},{depth}", f"map_cut.{depth}"}
    )
    cut_at_k = trec_eval_measures(judgments, ranking[:k], {"recip_rank"})
    cut_at_depth = trec_eval_measures(judgments, ranking[:depth], {"map"})

    assert_close(ndcg_at(ranking, judgments, k), whole[f"ndcg_cut_{k}"])
    assert_close(precision_at(ranking, judgments, k), whole[f"P_{k}"])
    assert_close(recall_at(ranking, judgments, k), whole[f"recall_{k}"])
    assert_close(recall_at(ranking, judgments, depth), whole[f"recall_{depth}"])
    assert_close(reciprocal_rank_at(ranking, judgments, k), cut_at_k["recip_rank"])
    assert_close(average_precision_at(ranking, judgments, depth), cut_at_depth["map"])
    assert_close(average_precision_at(ranking, judgments, depth), whole[f"map_cut_{depth}"])


def test_measures_equal_trec_eval_on_seeded_graded_collections() -> None:
    """Many queries at once, runs of 100 documents, the shape of a real evaluation."""
    rng = random.Random(5)
    k, depth = 10, 100
    pool = [f"doc-{index}" for index in range(300)]
    qrels: dict[str, dict[str, int]] = {}
    run: dict[str, list[str]] = {}
    for query in range(60):
        qid = f"q{query}"
        judged = rng.sample(pool, rng.randint(1, 60))
        qrels[qid] = {doc_id: rng.choice([0, 0, 1, 1, 2, 3, 4]) for doc_id in judged}
        qrels[qid][judged[0]] = rng.randint(1, 4)
        # Runs that favour judged documents, so that the top ranks carry relevant ones.
        favoured = rng.sample(judged, len(judged) // 2)
        rest = rng.sample([doc for doc in pool if doc not in favoured], depth - len(favoured))
        ranking = favoured + rest
        rng.shuffle(ranking)
        run[qid] = ranking
    measures = {f"ndcg_cut.{k}", f"P.{k}", f"recall.{k},{depth}", "map"}
    scored = {
        qid: {doc_id: 1.0 - rank / 1000.0 for rank, doc_id in enumerate(ranking)}
        for qid, ranking in run.items()
    }
    reference = pytrec_eval.RelevanceEvaluator(qrels, measures).evaluate(scored)
    cut = {qid: {doc: scored[qid][doc] for doc in ranking[:k]} for qid, ranking in run.items()}
    reference_rr = pytrec_eval.RelevanceEvaluator(qrels, {"recip_rank"}).evaluate(cut)

    for qid, ranking in run.items():
        judgments = qrels[qid]
        assert_close(ndcg_at(ranking, judgments, k), reference[qid][f"ndcg_cut_{k}"])
        assert_close(precision_at(ranking, judgments, k), reference[qid][f"P_{k}"])
        assert_close(recall_at(ranking, judgments, k), reference[qid][f"recall_{k}"])
        assert_close(recall_at(ranking, judgments, depth), reference[qid][f"recall_{depth}"])
        assert_close(reciprocal_rank_at(ranking, judgments, k), reference_rr[qid]["recip_rank"])
        assert_close(average_precision_at(ranking, judgments, depth), reference[qid]["map"])


def test_trec_eval_reciprocal_rank_ignores_the_cutoff_so_the_run_must_be_cut() -> None:
    """Why MRR@k is compared on the cut run: ``recip_rank`` looks at the whole run."""
    judgments = {"relevant": 1}
    ranking = ["a", "b", "c", "relevant"]
    whole = trec_eval_measures(judgments, ranking, {"recip_rank"})
    assert_close(whole["recip_rank"], 0.25)
    assert reciprocal_rank_at(ranking, judgments, 3) == 0.0
    assert_close(trec_eval_measures(judgments, ranking[:3], {"recip_rank"})["recip_rank"], 0.0)
