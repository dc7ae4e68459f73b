"""Tuning a collection's ranking settings on its own labelled queries (``excerpta tune``).

Every candidate runs through the search use case itself (``StoreBackend``), so the numbers are
those ``excerpta eval`` gives; the settings are applied only when asked and only when the
cross-validated gain is significant.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass

from service.evaluation.inputs import LabeledQuery
from service.evaluation.runner import System, evaluate
from service.evaluation.tuning import Candidate, TuningResult, cross_validate
from service.usecases.callers import LOCAL_ADMIN
from service.usecases.collections import CollectionSpec, get_collection, put_collection
from service.usecases.evaluate import StoreBackend
from service.usecases.runtime import Runtime

TUNED_MEASURE = "nDCG@10"


@dataclass(frozen=True)
class TuningOutcome:
    result: TuningResult
    settings_before: dict[str, object]
    applied: bool


def tune_collection(
    runtime: Runtime,
    collection: str,
    queries: Sequence[LabeledQuery],
    qrels: Mapping[str, Mapping[str, int]],
    candidates: Sequence[Candidate],
    *,
    folds: int,
    apply: bool,
    progress: bool = True,
) -> TuningOutcome:
    """Measure every candidate in hybrid mode, cross-validate, and apply the best over every
    query when ``apply`` is set and the held-out gain is significant."""
    before = dict(get_collection(runtime, LOCAL_ADMIN, collection)["retrieval"])
    backend = StoreBackend(runtime, collection)
    measured = evaluate(
        backend,
        queries,
        qrels,
        systems=[System(c.label, "hybrid", dict(c.settings)) for c in candidates],
        k=10,
        depth=100,
        progress=progress,
    )
    per_query = {
        system.system.label: {
            qid: values[TUNED_MEASURE] for qid, values in system.per_query.items()
        }
        for system in measured.systems
    }
    result = cross_validate(candidates, per_query, folds=folds, measure=TUNED_MEASURE)
    applied = apply and result.significant and bool(result.chosen.settings)
    if applied:
        put_collection(
            runtime, LOCAL_ADMIN, collection, CollectionSpec(retrieval=dict(result.chosen.settings))
        )
    return TuningOutcome(result, before, applied)
