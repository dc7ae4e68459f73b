"""Running labeled queries through one or more systems and aggregating the measures.

The search is behind ``EvaluationBackend`` so the store-direct and HTTP paths share everything
that decides the numbers: which queries count, which judgments survive a filter, the measures,
the intervals and the comparisons.
"""

from __future__ import annotations

import itertools
import math
import sys
from collections.abc import Collection, Mapping, Sequence
from dataclasses import dataclass
from typing import NamedTuple, Protocol

from tqdm import tqdm

from service.evaluation.filter_agreement import (
    FilterAgreement,
    FilterComparison,
    compare_filters,
    summarise,
)
from service.evaluation.inputs import FilterSpec, LabeledQuery
from service.evaluation.measures import measure_names, query_measures, relevant_count
from service.evaluation.significance import bootstrap_interval, paired_randomization_test
from service.retrieval.ranking_settings import FEEDBACK_SOURCES, FUSION_METHODS

MODES = ("lexical", "semantic", "hybrid")

SETTING_MODES: Mapping[str, tuple[str, ...]] = {
    "k1": ("lexical", "hybrid"),
    "b": ("lexical", "hybrid"),
    "rrf_k": ("hybrid",),
    "lexical_feedback_chunks": ("hybrid",),
    "lexical_feedback_terms": ("hybrid",),
    "lexical_feedback_query_weight": ("hybrid",),
    "lexical_feedback_max_share": ("hybrid",),
    "semantic_feedback_chunks": ("hybrid",),
    "semantic_feedback_weight": ("hybrid",),
    "feedback_source": ("hybrid",),
    "fusion": ("hybrid",),
    "semantic_weight": ("hybrid",),
    "second_chunk_weight": ("hybrid",),
}
"""Per-query settings that ``--set`` may vary, and the modes whose ranking they change (the
collection's own settings of the same names; field weights change the index and are not here)."""

CHOICE_SETTINGS: Mapping[str, tuple[str, ...]] = {
    "fusion": FUSION_METHODS,
    "feedback_source": FEEDBACK_SOURCES,
}
UNIT_SETTINGS = (
    "b",
    "lexical_feedback_query_weight",
    "lexical_feedback_max_share",
    "semantic_weight",
    "second_chunk_weight",
)
"""Settings whose values lie between 0 and 1."""

SettingValue = int | float | str

FILTER_SOURCES = ("labelled", "inferred", "none")
"""Which filter a system's queries carry: their own (and the global one), the one inferred from
the question (and the global one), or the global one alone."""

InferRequest = Mapping[str, object]
"""The object form of a request's ``infer_filter``: ``{"mode", "now", "using"}``."""


class EvaluationBackend(Protocol):
    """The search a collection offers, seen by document."""

    def rank_documents(
        self,
        text: str,
        *,
        mode: str,
        filter: FilterSpec,
        depth: int,
        settings: Mapping[str, object],
        infer: InferRequest | None = None,
    ) -> list[tuple[str, float]]:
        """Distinct document ids with the score of their best chunk, best first, at most depth.

        ``infer`` asks the search to infer a filter from the text as well (``infer_filter``).
        """
        ...

    def documents_failing_filter(self, filter: FilterSpec, doc_ids: Collection[str]) -> set[str]:
        """Those of ``doc_ids`` that the filter excludes (missing documents included)."""
        ...

    def documents_passing(self, filter: FilterSpec) -> set[str]:
        """Every document the filter selects (all of them when it is None)."""
        ...

    def inferred_filter(
        self, text: str, *, infer: InferRequest, filter: FilterSpec
    ) -> dict[str, object] | None:
        """The ``inferred_filter`` a search with ``filter`` reports for the text, or None."""
        ...

    def describe_settings(self, settings: Mapping[str, object]) -> dict[str, object]:
        """Every setting in effect for a system: k1, b, rrf_k, chunking, embedder, ..."""
        ...


class System(NamedTuple):
    label: str
    mode: str
    settings: Mapping[str, object]
    filters: str = "labelled"
    """One of ``FILTER_SOURCES``."""


class Interval(NamedTuple):
    mean: float
    low: float
    high: float


@dataclass(frozen=True, slots=True)
class SystemResult:
    system: System
    settings_used: dict[str, object]
    rankings: dict[str, list[tuple[str, float]]]
    """Per evaluated query, the backend's documents and scores, best first."""
    per_query: dict[str, dict[str, float]]
    summary: dict[str, Interval]


@dataclass(frozen=True, slots=True)
class Comparison:
    first: str
    second: str
    measure: str
    mean_difference: float
    """Mean over queries of first minus second."""
    p_value: float


@dataclass(frozen=True, slots=True)
class EvaluationResult:
    k: int
    depth: int
    global_filter: FilterSpec
    measures: list[str]
    queries: dict[str, LabeledQuery]
    """The evaluated queries, in file order."""
    judgments: dict[str, dict[str, int]]
    """Per evaluated query, the judgments that survived its filter."""
    systems: list[SystemResult]
    comparisons: list[Comparison]
    queries_read: int
    skipped_without_relevant: list[str]
    """Queries with no positive judgment at all."""
    skipped_after_filter: list[str]
    """Queries whose every positive judgment failed the filter."""
    dropped_judgments: dict[str, int]
    """Per query with a filter, the judged documents (any grade) that failed it, when any."""
    dropped_relevant: int
    """How many of the dropped judgments had a positive grade."""
    infer_filter: InferRequest | None = None
    filter_agreement: FilterAgreement | None = None
    """Inferred against labelled filters, when filters were inferred."""


def systems_from_options(
    modes: Sequence[str],
    set_options: Mapping[str, Sequence[str]],
    filter_sources: Sequence[str] = ("labelled",),
) -> list[System]:
    """One system per mode, times every combination of the ``--set`` values that apply to it,
    times each of ``filter_sources``.

    ``rrf_k`` only changes hybrid rankings, so ``--modes lexical,hybrid --set rrf_k=10,60``
    gives one lexical row and two hybrid rows; a setting that applies to none of the modes is an
    error rather than a silent no-op.
    """
    chosen = list(dict.fromkeys(mode.strip() for mode in modes if mode.strip()))
    if not chosen:
        raise ValueError("give at least one mode")
    unknown_modes = [mode for mode in chosen if mode not in MODES]
    if unknown_modes:
        raise ValueError(f"unknown mode {unknown_modes[0]!r}; choose from {', '.join(MODES)}")
    values_by_name = parse_settings(set_options)
    for name in values_by_name:
        if not any(mode in SETTING_MODES[name] for mode in chosen):
            raise ValueError(
                f"setting {name!r} only changes {' and '.join(SETTING_MODES[name])} rankings, "
                "and no such mode was chosen"
            )
    systems: list[System] = []
    for mode in chosen:
        applicable = [name for name in values_by_name if mode in SETTING_MODES[name]]
        combinations = itertools.product(*(values_by_name[name] for name in applicable))
        for combination in combinations:
            settings = dict(zip(applicable, combination, strict=True))
            label = " ".join([mode, *(f"{name}={value}" for name, value in settings.items())])
            for source in filter_sources:
                named = label if source == "labelled" else f"{label} filter={source}"
                systems.append(System(named, mode, settings, source))
    return systems


def evaluate(
    backend: EvaluationBackend,
    queries: Sequence[LabeledQuery],
    qrels: Mapping[str, Mapping[str, int]],
    *,
    systems: Sequence[System],
    k: int = 10,
    depth: int = 100,
    global_filter: FilterSpec = None,
    progress: bool = True,
    infer_filter: InferRequest | None = None,
) -> EvaluationResult:
    """Measures of every system on every query that has a positive judgment left.

    A judged document that fails the query's filter (the global one and its own) could never be
    retrieved, so it is dropped from that query's judgments rather than counted as a miss; a
    query left without any relevant document is skipped and counted. Every system is measured
    against those same judgments, whatever filter its queries carry.

    With ``infer_filter`` (the object form of the request field), each evaluated query's filter
    is also inferred from its text, with the global filter as the request's own filter and the
    query's ``now`` (when it has one), and compared with its labelled filter by the documents
    both select; systems whose ``filters`` is ``inferred`` search with it applied.
    """
    if not 1 <= k <= depth:
        raise ValueError(f"need 1 <= k <= depth, got k={k} and depth={depth}")
    if not systems:
        raise ValueError("give at least one system")
    labels = [system.label for system in systems]
    if len(set(labels)) != len(labels):
        raise ValueError("system labels must be distinct")
    names = measure_names(k, depth)

    evaluated: dict[str, LabeledQuery] = {}
    effective_judgments: dict[str, dict[str, int]] = {}
    skipped_without_relevant: list[str] = []
    skipped_after_filter: list[str] = []
    dropped_judgments: dict[str, int] = {}
    dropped_relevant = 0
    rankings: list[dict[str, list[tuple[str, float]]]] = [{} for _ in systems]
    per_query: list[dict[str, dict[str, float]]] = [{} for _ in systems]
    if any(system.filters == "inferred" for system in systems) and infer_filter is None:
        raise ValueError("systems with inferred filters need infer_filter")
    agreement = _AgreementCounter(backend, global_filter) if infer_filter is not None else None

    for query in tqdm(
        queries, desc="evaluating", unit="query", file=sys.stderr, disable=not progress
    ):
        judgments = dict(qrels.get(query.qid, {}))
        if relevant_count(judgments) == 0:
            skipped_without_relevant.append(query.qid)
            continue
        query_filter = combine_filters(global_filter, query.filter)
        if query_filter is not None:
            failing = backend.documents_failing_filter(query_filter, set(judgments))
            if failing:
                dropped_judgments[query.qid] = len(failing)
                dropped_relevant += sum(1 for doc_id in failing if judgments[doc_id] > 0)
                judgments = {doc: grade for doc, grade in judgments.items() if doc not in failing}
            if relevant_count(judgments) == 0:
                skipped_after_filter.append(query.qid)
                continue
        evaluated[query.qid] = query
        effective_judgments[query.qid] = judgments
        asked = _asked(infer_filter, query)
        if agreement is not None and asked is not None:
            agreement.compare(query, asked, judgments)
        for index, system in enumerate(systems):
            ranked = backend.rank_documents(
                query.text,
                mode=system.mode,
                filter=query_filter if system.filters == "labelled" else global_filter,
                depth=depth,
                settings=system.settings,
                **({"infer": asked} if system.filters == "inferred" else {}),
            )
            ranked = _checked_ranking(ranked, system.label, query.qid, depth)
            rankings[index][query.qid] = ranked
            per_query[index][query.qid] = query_measures(
                [doc_id for doc_id, _ in ranked], judgments, k=k, depth=depth
            )

    if not evaluated:
        raise ValueError("no query has a positive judgment to evaluate against")
    results = [
        SystemResult(
            system=system,
            settings_used=backend.describe_settings(system.settings),
            rankings=rankings[index],
            per_query=per_query[index],
            summary={
                name: Interval(*bootstrap_interval([m[name] for m in per_query[index].values()]))
                for name in names
            },
        )
        for index, system in enumerate(systems)
    ]
    return EvaluationResult(
        k=k,
        depth=depth,
        global_filter=global_filter,
        measures=names,
        queries=evaluated,
        judgments=effective_judgments,
        systems=results,
        comparisons=_compare_pairs(results, names),
        queries_read=len(queries),
        skipped_without_relevant=skipped_without_relevant,
        skipped_after_filter=skipped_after_filter,
        dropped_judgments=dropped_judgments,
        dropped_relevant=dropped_relevant,
        infer_filter=infer_filter,
        filter_agreement=None if agreement is None else summarise(agreement.per_query),
    )


def _asked(infer_filter: InferRequest | None, query: LabeledQuery) -> InferRequest | None:
    """The request's ``infer_filter`` for one query: anchored at the query's own ``now``."""
    if infer_filter is None:
        return None
    if query.now is None:
        return infer_filter
    return {**infer_filter, "now": query.now}


class _AgreementCounter:
    """Compares each query's inferred filter with its labelled one, by document sets."""

    def __init__(self, backend: EvaluationBackend, global_filter: FilterSpec) -> None:
        self.backend = backend
        self.global_filter = global_filter
        self.per_query: dict[str, FilterComparison] = {}
        self._passing: dict[str, set[str]] = {}

    def compare(
        self, query: LabeledQuery, asked: InferRequest, judgments: Mapping[str, int]
    ) -> None:
        inferred = self.backend.inferred_filter(
            query.text, infer={**asked, "mode": "suggest"}, filter=self.global_filter
        )
        # In the encoding of the global filter, so that the two can be combined.
        as_json = isinstance(self.global_filter, dict)
        inferred_spec: FilterSpec = None
        if inferred is not None:
            found = inferred["cql2_json" if as_json else "cql2_text"]
            if not isinstance(found, str | dict):
                raise ValueError(f"query {query.qid!r}: the inferred filter has no CQL2 form")
            inferred_spec = found
        labelled = combine_filters(self.global_filter, query.filter)
        self.per_query[query.qid] = compare_filters(
            query.filter,
            inferred_spec,
            self.passing(labelled),
            self.passing(combine_filters(self.global_filter, inferred_spec)),
            judgments,
        )

    def passing(self, filter: FilterSpec) -> set[str]:
        key = repr(filter)
        if key not in self._passing:
            self._passing[key] = self.backend.documents_passing(filter)
        return self._passing[key]


def combine_filters(first: FilterSpec, second: FilterSpec) -> FilterSpec:
    """Both filters at once, in the form they share (CQL2 text or CQL2 JSON)."""
    if first is None:
        return second
    if second is None:
        return first
    if isinstance(first, str) and isinstance(second, str):
        return f"({first}) AND ({second})"
    if isinstance(first, dict) and isinstance(second, dict):
        return {"op": "and", "args": [first, second]}
    raise ValueError(
        "cannot combine a CQL2 text filter with a CQL2 JSON filter; "
        "write the global filter in the same form as the per-query filters"
    )


def _compare_pairs(results: Sequence[SystemResult], names: Sequence[str]) -> list[Comparison]:
    comparisons: list[Comparison] = []
    for first, second in itertools.combinations(results, 2):
        qids = list(first.per_query)
        for name in names:
            a = [first.per_query[qid][name] for qid in qids]
            b = [second.per_query[qid][name] for qid in qids]
            comparisons.append(
                Comparison(
                    first=first.system.label,
                    second=second.system.label,
                    measure=name,
                    mean_difference=math.fsum(x - y for x, y in zip(a, b, strict=True)) / len(a),
                    p_value=paired_randomization_test(a, b),
                )
            )
    return comparisons


def _checked_ranking(
    ranked: Sequence[tuple[str, float]], label: str, qid: str, depth: int
) -> list[tuple[str, float]]:
    """The backend's ranking, refused when it breaks the contract the measures rely on."""
    doc_ids = [doc_id for doc_id, _ in ranked]
    if len(set(doc_ids)) != len(doc_ids):
        raise ValueError(f"{label}: query {qid!r} ranked a document twice")
    if len(doc_ids) > depth:
        raise ValueError(f"{label}: query {qid!r} ranked {len(doc_ids)} documents, over {depth}")
    if not all(math.isfinite(score) for _, score in ranked):
        raise ValueError(f"{label}: query {qid!r} has a score that is not finite")
    return [(doc_id, float(score)) for doc_id, score in ranked]


def _parse_setting_values(name: str, raw_values: Sequence[str]) -> list[SettingValue]:
    """The values ``--set`` (or a tuning grid) gives a setting, checked."""
    if name not in SETTING_MODES:
        raise ValueError(f"unknown setting {name!r}; choose from {', '.join(SETTING_MODES)}")
    values: list[SettingValue] = []
    for raw in raw_values:
        text = raw.strip()
        if name in CHOICE_SETTINGS:
            if text not in CHOICE_SETTINGS[name]:
                choices = ", ".join(CHOICE_SETTINGS[name])
                raise ValueError(f"setting {name}={raw!r} must be one of {choices}")
            values.append(text)
            continue
        try:
            value: int | float = int(text)
        except ValueError:
            try:
                value = float(text)
            except ValueError:
                raise ValueError(f"setting {name}={raw!r} is not a number") from None
        if not math.isfinite(value) or value < 0 or (name in UNIT_SETTINGS and value > 1):
            allowed = "between 0 and 1" if name in UNIT_SETTINGS else "a number of at least 0"
            raise ValueError(f"setting {name}={raw!r} must be {allowed}")
        values.append(value)
    if not values:
        raise ValueError(f"setting {name!r} has no values")
    if len(set(values)) != len(values):
        raise ValueError(f"setting {name!r} repeats a value")
    return values


def parse_settings(set_options: Mapping[str, Sequence[str]]) -> dict[str, list[SettingValue]]:
    """Every named setting's checked values (see ``_parse_setting_values``)."""
    return {name: _parse_setting_values(name, raw) for name, raw in set_options.items()}
