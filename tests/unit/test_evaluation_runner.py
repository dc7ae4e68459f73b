from __future__ import annotations

from collections.abc import Collection, Mapping

import pytest

from service.evaluation.inputs import FilterSpec, LabeledQuery
from service.evaluation.measures import query_measures
from service.evaluation.runner import (
    System,
    combine_filters,
    evaluate,
    systems_from_options,
)

YEARS = {"d1": 1950, "d2": 1961, "d3": 1962, "d4": 1955, "d5": 1965, "d6": 1970}
RECENT = "year >= 1960"
ORDERS = {
    "lexical": ["d1", "d2", "d3", "d4", "d5", "d6"],
    "semantic": ["d6", "d5", "d2", "d1", "d4", "d3"],
    "hybrid": ["d2", "d1", "d6", "d3", "d5", "d4"],
}


def passes(doc_id: str, query_filter: FilterSpec) -> bool:
    """The fake's filters: the CQL2 text ``year >= 1960``, alone or ANDed with itself."""
    if query_filter is None:
        return True
    assert query_filter in (RECENT, f"({RECENT}) AND ({RECENT})"), query_filter
    return YEARS[doc_id] >= 1960


class FakeBackend:
    """Fixed rankings per mode; hybrid reverses its order when rrf_k is small; scores tie."""

    def __init__(self) -> None:
        self.calls: list[tuple[str, str, FilterSpec, int, dict[str, object]]] = []

    def rank_documents(
        self,
        text: str,
        *,
        mode: str,
        filter: FilterSpec,
        depth: int,
        settings: Mapping[str, object],
    ) -> list[tuple[str, float]]:
        self.calls.append((text, mode, filter, depth, dict(settings)))
        order = list(ORDERS[mode])
        if mode == "hybrid" and settings.get("rrf_k", 60) == 10:
            order.reverse()
        kept = [doc_id for doc_id in order if passes(doc_id, filter)][:depth]
        return [(doc_id, 1.0 if rank < 2 else 1.0 / rank) for rank, doc_id in enumerate(kept)]

    def documents_failing_filter(self, filter: FilterSpec, doc_ids: Collection[str]) -> set[str]:
        return {doc_id for doc_id in doc_ids if doc_id not in YEARS or not passes(doc_id, filter)}

    def describe_settings(self, settings: Mapping[str, object]) -> dict[str, object]:
        return {"k1": 1.2, "b": 0.75, "rrf_k": 60, **settings, "embedder": "fake"}


QUERIES = [
    LabeledQuery("q1", "wing lift"),
    LabeledQuery("q2", "no judgments at all"),
    LabeledQuery("q3", "judged but nothing relevant"),
    LabeledQuery("q4", "only an old relevant document", RECENT),
    LabeledQuery("q5", "old and new relevant documents", RECENT),
]
QRELS = {
    "q1": {"d1": 2, "d5": 1, "d4": 0},
    "q3": {"d2": 0},
    "q4": {"d1": 3, "d2": 0},
    "q5": {"d1": 3, "d4": 0, "d3": 2, "unknown-doc": 1},
}


def test_each_mode_is_one_system_and_each_set_value_one_hybrid_system() -> None:
    systems = systems_from_options(["lexical", "semantic", "hybrid"], {"rrf_k": ["10", "60"]})
    assert systems == [
        System("lexical", "lexical", {}),
        System("semantic", "semantic", {}),
        System("hybrid rrf_k=10", "hybrid", {"rrf_k": 10}),
        System("hybrid rrf_k=60", "hybrid", {"rrf_k": 60}),
    ]


def test_set_options_combine_for_the_modes_they_apply_to() -> None:
    systems = systems_from_options(["lexical", "hybrid"], {"k1": ["0.9", "1.2"], "rrf_k": ["30"]})
    assert [system.label for system in systems] == [
        "lexical k1=0.9",
        "lexical k1=1.2",
        "hybrid k1=0.9 rrf_k=30",
        "hybrid k1=1.2 rrf_k=30",
    ]
    assert systems[2].settings == {"k1": 0.9, "rrf_k": 30}


def test_repeated_modes_are_one_system() -> None:
    assert systems_from_options(["hybrid", " hybrid", ""], {}) == [System("hybrid", "hybrid", {})]


@pytest.mark.parametrize(
    ("modes", "set_options", "problem"),
    [
        ([], {}, "at least one mode"),
        (["fuzzy"], {}, "unknown mode 'fuzzy'"),
        (["hybrid"], {"depth": ["10"]}, "unknown setting 'depth'"),
        (["lexical", "semantic"], {"rrf_k": ["10"]}, "only changes hybrid"),
        (["hybrid"], {"rrf_k": ["ten"]}, "not a number"),
        (["hybrid"], {"b": ["1.5"]}, "between 0 and 1"),
        (["hybrid"], {"rrf_k": ["-1"]}, "at least 0"),
        (["hybrid"], {"rrf_k": ["10", "10.0"]}, "repeats"),
        (["hybrid"], {"rrf_k": []}, "no values"),
    ],
)
def test_unusable_options_are_refused_with_a_reason(
    modes: list[str], set_options: dict[str, list[str]], problem: str
) -> None:
    with pytest.raises(ValueError, match=problem):
        systems_from_options(modes, set_options)


def test_filters_are_combined_in_the_form_they_share() -> None:
    assert combine_filters(None, "a = 1") == "a = 1"
    assert combine_filters("a = 1", None) == "a = 1"
    assert combine_filters("a = 1", "b = 2") == "(a = 1) AND (b = 2)"
    left = {"op": "=", "args": [{"property": "a"}, 1]}
    right = {"op": "=", "args": [{"property": "b"}, 2]}
    assert combine_filters(left, right) == {"op": "and", "args": [left, right]}
    with pytest.raises(ValueError, match="cannot combine"):
        combine_filters("a = 1", right)


def test_queries_without_relevant_judgments_are_skipped_and_counted() -> None:
    result = evaluate(
        FakeBackend(),
        QUERIES,
        QRELS,
        systems=[System("lexical", "lexical", {})],
        k=2,
        depth=4,
        progress=False,
    )
    assert list(result.queries) == ["q1", "q5"]
    assert result.queries_read == 5
    assert result.skipped_without_relevant == ["q2", "q3"]
    assert result.skipped_after_filter == ["q4"]


def test_judgments_failing_the_query_filter_are_dropped_and_counted() -> None:
    result = evaluate(
        FakeBackend(),
        QUERIES,
        QRELS,
        systems=[System("lexical", "lexical", {})],
        k=2,
        depth=4,
        progress=False,
    )
    assert result.dropped_judgments == {"q4": 1, "q5": 3}
    assert result.dropped_relevant == 3
    assert result.judgments["q5"] == {"d3": 2}
    assert result.judgments["q1"] == QRELS["q1"]


def test_a_global_filter_applies_to_every_query_with_its_own_filter() -> None:
    backend = FakeBackend()
    result = evaluate(
        backend,
        QUERIES,
        QRELS,
        systems=[System("lexical", "lexical", {})],
        k=2,
        depth=4,
        global_filter=RECENT,
        progress=False,
    )
    assert result.skipped_after_filter == ["q4"]
    assert result.dropped_judgments == {"q1": 2, "q4": 1, "q5": 3}
    assert list(result.queries) == ["q1", "q5"]
    filters = {call[0]: call[2] for call in backend.calls}
    assert filters == {"wing lift": RECENT, QUERIES[4].text: f"({RECENT}) AND ({RECENT})"}


def test_measures_are_those_of_the_backend_ranking_against_the_kept_judgments() -> None:
    backend = FakeBackend()
    systems = systems_from_options(["lexical", "hybrid"], {"rrf_k": ["10", "60"]})
    result = evaluate(backend, QUERIES, QRELS, systems=systems, k=2, depth=4, progress=False)
    assert [s.system.label for s in result.systems] == [
        "lexical",
        "hybrid rrf_k=10",
        "hybrid rrf_k=60",
    ]
    for system_result in result.systems:
        for qid, ranked in system_result.rankings.items():
            expected = query_measures(
                [doc for doc, _ in ranked], result.judgments[qid], k=2, depth=4
            )
            assert system_result.per_query[qid] == expected
        assert system_result.settings_used["embedder"] == "fake"
    assert result.systems[1].settings_used["rrf_k"] == 10
    assert {call[4].get("rrf_k") for call in backend.calls if call[1] == "hybrid"} == {10, 60}
    assert {call[3] for call in backend.calls} == {4}


def test_summaries_are_means_and_every_pair_is_compared_on_every_measure() -> None:
    systems = systems_from_options(["lexical", "semantic", "hybrid"], {})
    result = evaluate(FakeBackend(), QUERIES, QRELS, systems=systems, k=2, depth=4, progress=False)
    lexical, semantic = result.systems[0], result.systems[1]
    for name in result.measures:
        values = [lexical.per_query[qid][name] for qid in result.queries]
        assert lexical.summary[name].mean == pytest.approx(sum(values) / len(values))
        assert lexical.summary[name].low <= lexical.summary[name].mean
    assert len(result.comparisons) == 3 * len(result.measures)
    first = result.comparisons[0]
    assert (first.first, first.second, first.measure) == ("lexical", "semantic", "nDCG@2")
    differences = [
        lexical.per_query[qid]["nDCG@2"] - semantic.per_query[qid]["nDCG@2"]
        for qid in result.queries
    ]
    assert first.mean_difference == pytest.approx(sum(differences) / len(differences))
    assert 0.0 < first.p_value <= 1.0


def test_a_backend_that_ranks_a_document_twice_is_refused() -> None:
    class Repeating(FakeBackend):
        def rank_documents(self, text: str, **options: object) -> list[tuple[str, float]]:
            return [("d1", 2.0), ("d1", 1.0)]

    with pytest.raises(ValueError, match="twice"):
        evaluate(
            Repeating(),
            QUERIES,
            QRELS,
            systems=[System("lexical", "lexical", {})],
            progress=False,
        )


def test_nothing_to_evaluate_is_an_error_not_an_empty_report() -> None:
    with pytest.raises(ValueError, match="no query"):
        evaluate(
            FakeBackend(),
            QUERIES[1:3],
            QRELS,
            systems=[System("lexical", "lexical", {})],
            progress=False,
        )


def test_k_above_depth_is_refused() -> None:
    with pytest.raises(ValueError, match="k <= depth"):
        evaluate(FakeBackend(), QUERIES, QRELS, systems=[], k=20, depth=10, progress=False)


def test_the_progress_bar_goes_to_stderr_and_can_be_turned_off(
    capsys: pytest.CaptureFixture[str],
) -> None:
    systems = [System("lexical", "lexical", {})]
    evaluate(FakeBackend(), QUERIES, QRELS, systems=systems, k=2, depth=4, progress=True)
    captured = capsys.readouterr()
    assert "evaluating" in captured.err
    assert captured.out == ""
    evaluate(FakeBackend(), QUERIES, QRELS, systems=systems, k=2, depth=4, progress=False)
    assert capsys.readouterr().err == ""
