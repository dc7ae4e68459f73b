"""Per-query measures by document, defined as trec_eval defines them.

A ranking is a list of distinct document ids, best first; judgments map document ids to integer
grades. A document is relevant when its grade is above zero (trec_eval's default relevance level
of 1); unjudged documents count as not relevant. Matching trec_eval exactly matters because it is
the reference every published figure is computed with: a measure that differs in a detail (the
ideal ranking, the denominator of P@k) makes numbers incomparable.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence


def measure_names(k: int, depth: int) -> list[str]:
    """The measures in report order; Recall@depth and Recall@k are one name when k == depth."""
    names = [f"nDCG@{k}", f"Recall@{k}", f"Recall@{depth}", f"MRR@{k}", f"MAP@{depth}", f"P@{k}"]
    return list(dict.fromkeys(names))


def query_measures(
    ranking: Sequence[str], judgments: Mapping[str, int], *, k: int, depth: int
) -> dict[str, float]:
    """Every measure of ``measure_names(k, depth)`` for one query."""
    return {
        f"nDCG@{k}": ndcg_at(ranking, judgments, k),
        f"Recall@{k}": recall_at(ranking, judgments, k),
        f"Recall@{depth}": recall_at(ranking, judgments, depth),
        f"MRR@{k}": reciprocal_rank_at(ranking, judgments, k),
        f"MAP@{depth}": average_precision_at(ranking, judgments, depth),
        f"P@{k}": precision_at(ranking, judgments, k),
    }


def relevant_count(judgments: Mapping[str, int]) -> int:
    return sum(1 for grade in judgments.values() if grade > 0)


def ndcg_at(ranking: Sequence[str], judgments: Mapping[str, int], k: int) -> float:
    """nDCG@k of Järvelin and Kekäläinen (2002) as trec_eval's ``ndcg_cut`` computes it.

    Gain is the grade itself (negative grades give no gain), the discount is log2(rank + 1),
    and the ideal ranking orders every positively judged document of the query by grade, so a
    relevant document the run never retrieved still lowers the score.
    """
    _check_cutoff(k)
    gained = (_gain(judgments.get(doc_id, 0)) for doc_id in ranking[:k])
    dcg = sum(gain / math.log2(rank + 1) for rank, gain in enumerate(gained, start=1) if gain)
    ideal_gains = sorted((grade for grade in judgments.values() if grade > 0), reverse=True)[:k]
    ideal_dcg = sum(gain / math.log2(rank + 1) for rank, gain in enumerate(ideal_gains, start=1))
    return dcg / ideal_dcg if ideal_dcg > 0 else 0.0


def recall_at(ranking: Sequence[str], judgments: Mapping[str, int], k: int) -> float:
    """Relevant documents in the first k over all relevant judged documents."""
    _check_cutoff(k)
    total = relevant_count(judgments)
    if total == 0:
        return 0.0
    return sum(1 for doc_id in ranking[:k] if judgments.get(doc_id, 0) > 0) / total


def precision_at(ranking: Sequence[str], judgments: Mapping[str, int], k: int) -> float:
    """Relevant documents in the first k over k, even when fewer than k were retrieved."""
    _check_cutoff(k)
    return sum(1 for doc_id in ranking[:k] if judgments.get(doc_id, 0) > 0) / k


def reciprocal_rank_at(ranking: Sequence[str], judgments: Mapping[str, int], k: int) -> float:
    """1 / rank of the first relevant document within the first k; 0 when there is none."""
    _check_cutoff(k)
    for rank, doc_id in enumerate(ranking[:k], start=1):
        if judgments.get(doc_id, 0) > 0:
            return 1.0 / rank
    return 0.0


def average_precision_at(ranking: Sequence[str], judgments: Mapping[str, int], depth: int) -> float:
    """Average precision of the run cut at ``depth``, over all relevant judged documents.

    The denominator counts relevant documents the run missed, as trec_eval's ``map`` (and
    ``map_cut``) do, so cutting the run can only lower the value.
    """
    _check_cutoff(depth)
    total = relevant_count(judgments)
    if total == 0:
        return 0.0
    found = 0
    precision_sum = 0.0
    for rank, doc_id in enumerate(ranking[:depth], start=1):
        if judgments.get(doc_id, 0) > 0:
            found += 1
            precision_sum += found / rank
    return precision_sum / total


def _gain(grade: int) -> int:
    return grade if grade > 0 else 0


def _check_cutoff(cutoff: int) -> None:
    if cutoff < 1:
        raise ValueError(f"a rank cutoff must be at least 1, got {cutoff}")
