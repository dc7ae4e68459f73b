"""How far an inferred filter agrees with the one a careful person wrote for the question.

Filters are compared by the documents they select, not by their text, since two filters can be
written differently and select the same documents: the share of questions where both select
exactly the same documents, the share where the inferred one excludes a document judged
relevant (the failure a user pays for), and the mean Jaccard index of the two document sets
(Jaccard 1901; two empty sets count as identical).
"""

from __future__ import annotations

import math
from collections.abc import Collection, Mapping
from dataclasses import dataclass

from service.evaluation.inputs import FilterSpec


@dataclass(frozen=True, slots=True)
class FilterComparison:
    labelled: FilterSpec
    inferred: FilterSpec
    labelled_documents: int
    inferred_documents: int
    exact: bool
    excluded_relevant: tuple[str, ...]
    """Documents judged relevant that the inferred filter excludes, sorted."""
    jaccard: float


@dataclass(frozen=True, slots=True)
class FilterAgreement:
    per_query: dict[str, FilterComparison]
    exact_share: float
    excluding_share: float
    mean_jaccard: float


def compare_filters(
    labelled: FilterSpec,
    inferred: FilterSpec,
    labelled_documents: Collection[str],
    inferred_documents: Collection[str],
    judgments: Mapping[str, int],
) -> FilterComparison:
    chosen, found = set(labelled_documents), set(inferred_documents)
    union = chosen | found
    return FilterComparison(
        labelled=labelled,
        inferred=inferred,
        labelled_documents=len(chosen),
        inferred_documents=len(found),
        exact=chosen == found,
        excluded_relevant=tuple(
            sorted(doc for doc, grade in judgments.items() if grade > 0 and doc not in found)
        ),
        jaccard=len(chosen & found) / len(union) if union else 1.0,
    )


def summarise(per_query: dict[str, FilterComparison]) -> FilterAgreement:
    count = len(per_query)
    if count == 0:
        raise ValueError("no question to compare filters on")
    comparisons = per_query.values()
    return FilterAgreement(
        per_query=per_query,
        exact_share=sum(c.exact for c in comparisons) / count,
        excluding_share=sum(bool(c.excluded_relevant) for c in comparisons) / count,
        mean_jaccard=math.fsum(c.jaccard for c in comparisons) / count,
    )
