"""Filter agreement: inferred filters against labelled ones, by the documents they select."""

from __future__ import annotations

import json
from collections.abc import Collection, Mapping
from pathlib import Path

import pytest

from service.evaluation.filter_agreement import compare_filters, summarise
from service.evaluation.inputs import FilterSpec, LabeledQuery
from service.evaluation.report import write_report
from service.evaluation.runner import InferRequest, evaluate, systems_from_options

YEARS = {"d1": 2021, "d2": 2022, "d3": 2023, "d4": 2024}


def test_the_same_documents_agree_exactly_with_jaccard_one() -> None:
    compared = compare_filters("a", "b", {"d1", "d2"}, {"d2", "d1"}, {"d1": 2})
    assert compared.exact and compared.jaccard == 1.0 and compared.excluded_relevant == ()


def test_a_wider_inferred_filter_excludes_nothing_but_lowers_jaccard() -> None:
    compared = compare_filters("a", None, {"d1"}, {"d1", "d2", "d3", "d4"}, {"d1": 2})
    assert not compared.exact
    assert compared.jaccard == pytest.approx(0.25)
    assert compared.excluded_relevant == ()


def test_an_inferred_filter_that_drops_a_relevant_document_is_counted() -> None:
    compared = compare_filters("a", "b", {"d1", "d2"}, {"d2"}, {"d1": 1, "d2": 2, "d3": 0})
    assert compared.excluded_relevant == ("d1",)
    assert compared.jaccard == pytest.approx(0.5)


def test_two_empty_selections_are_identical() -> None:
    assert compare_filters("a", "b", set(), set(), {}).jaccard == 1.0


def test_the_summary_shares_are_over_the_questions() -> None:
    summary = summarise(
        {
            "q1": compare_filters("a", "a", {"d1"}, {"d1"}, {"d1": 2}),
            "q2": compare_filters("a", "b", {"d1"}, {"d2"}, {"d1": 2}),
        }
    )
    assert summary.exact_share == 0.5
    assert summary.excluding_share == 0.5
    assert summary.mean_jaccard == 0.5


def passes(doc: str, filter: FilterSpec) -> bool:
    """The fake's filters: ``year = N`` clauses joined by AND (as combine_filters writes them)."""
    if filter is None:
        return True
    assert isinstance(filter, str)
    years = [int(part.strip("() ").split("=")[1]) for part in filter.split(" AND ")]
    return all(YEARS[doc] == year for year in years)


class InferringBackend:
    """Infers ``year = N`` from a four-digit year in the text; ranks documents newest first."""

    def __init__(self) -> None:
        self.ranked: list[tuple[str, FilterSpec, InferRequest | None]] = []
        self.asked: list[InferRequest] = []

    def _inferred(self, text: str) -> str | None:
        years = [word for word in text.split() if word.isdigit()]
        return f"year = {years[0]}" if years else None

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
        self.ranked.append((mode, filter, infer))
        applied = filter
        if infer is not None and self._inferred(text) is not None:
            applied = self._inferred(text)
        order = sorted(YEARS, reverse=True)
        return [(doc, 1.0 / (rank + 1)) for rank, doc in enumerate(order) if passes(doc, applied)]

    def documents_failing_filter(self, filter: FilterSpec, doc_ids: Collection[str]) -> set[str]:
        return {doc for doc in doc_ids if not passes(doc, filter)}

    def documents_passing(self, filter: FilterSpec) -> set[str]:
        return {doc for doc in YEARS if passes(doc, filter)}

    def inferred_filter(
        self, text: str, *, infer: InferRequest, filter: FilterSpec
    ) -> dict[str, object] | None:
        self.asked.append(infer)
        found = self._inferred(text)
        return None if found is None else {"cql2_text": found, "cql2_json": {}}

    def describe_settings(self, settings: Mapping[str, object]) -> dict[str, object]:
        return dict(settings)


QUERIES = [
    LabeledQuery("q1", "manual 2022", "year = 2022", now="2025-03-15T12:00:00Z"),
    LabeledQuery("q2", "manual 2023", "year = 2021"),
    LabeledQuery("q3", "any manual", "year = 2024"),
]
QRELS = {"q1": {"d2": 2}, "q2": {"d1": 2}, "q3": {"d4": 1}}


def test_inferred_filters_are_compared_and_searched_with_beside_labelled_and_none() -> None:
    backend = InferringBackend()
    systems = systems_from_options(["hybrid"], {}, ("labelled", "inferred", "none"))
    assert [s.label for s in systems] == ["hybrid", "hybrid filter=inferred", "hybrid filter=none"]
    result = evaluate(
        backend,
        QUERIES,
        QRELS,
        systems=systems,
        k=2,
        depth=4,
        progress=False,
        infer_filter={"mode": "apply", "using": "deterministic"},
    )
    agreement = result.filter_agreement
    assert agreement is not None
    assert agreement.per_query["q1"].exact
    assert agreement.per_query["q2"].excluded_relevant == ("d1",)
    assert agreement.per_query["q3"].inferred is None
    assert agreement.per_query["q3"].jaccard == pytest.approx(0.25)
    assert agreement.exact_share == pytest.approx(1 / 3)
    assert agreement.excluding_share == pytest.approx(1 / 3)
    # each query asked once for a suggestion, anchored at its own now when it has one
    assert [a["mode"] for a in backend.asked] == ["suggest"] * 3
    assert backend.asked[0]["now"] == "2025-03-15T12:00:00Z"
    assert "now" not in backend.asked[1]
    # the inferred system searches with no hand-written filter and infer applied
    inferred_calls = [(f, i) for _, f, i in backend.ranked if i is not None]
    assert inferred_calls and all(f is None and i["mode"] == "apply" for f, i in inferred_calls)
    by_label = {s.system.label: s for s in result.systems}
    assert by_label["hybrid filter=inferred"].rankings["q1"] == [("d2", 1.0 / 3)]
    assert by_label["hybrid filter=none"].rankings["q1"][0] == ("d4", 1.0)


def test_an_inferred_system_without_an_infer_request_is_an_error() -> None:
    systems = systems_from_options(["hybrid"], {}, ("inferred",))
    with pytest.raises(ValueError, match="infer_filter"):
        evaluate(InferringBackend(), QUERIES, QRELS, systems=systems, progress=False)


def test_the_report_shows_the_agreement_and_each_question_that_differs(tmp_path: Path) -> None:
    result = evaluate(
        InferringBackend(),
        QUERIES,
        QRELS,
        systems=systems_from_options(["hybrid"], {}, ("labelled", "inferred")),
        k=2,
        depth=4,
        progress=False,
        infer_filter={"mode": "apply"},
    )
    files = write_report(result, tmp_path)
    report = files.report.read_text(encoding="utf-8")
    assert "## Filter agreement" in report
    assert "- same documents: 0.333 (1 of 3 questions)" in report
    assert "- a relevant document excluded: 0.333 (1 of 3 questions)" in report
    assert "| q2 | `year = 2021` | `year = 2023` | 1 / 1 | 0.000 | `d1` |" in report
    metrics = json.loads(files.metrics.read_text(encoding="utf-8"))
    assert metrics["filter_agreement"]["exact_share"] == pytest.approx(1 / 3)
    assert metrics["filter_agreement"]["per_query"]["q1"]["exact"] is True
