"""``excerpta eval``, ``search`` and ``ask`` end to end on the stores they are given."""

from __future__ import annotations

import json
from collections.abc import Callable
from pathlib import Path
from typing import Any

import pytest

from service.evaluation.inputs import read_qrels, read_queries
from tests.integration.conftest import CRANFIELD_COLLECTION, DEMO_COLLECTION, DEMO_CORPUS, CliRun

pytestmark = [pytest.mark.model]


@pytest.mark.cranfield
def test_eval_set_gives_a_row_per_value_and_a_filter_drops_failing_judgments(
    run_cli: Callable[[list[str]], CliRun],
    cranfield_ingest: CliRun,
    cranfield_data_dir: Path,
    cranfield_dir: Path,
    cranfield_corpus: dict[str, dict[str, Any]],
    tmp_path: Path,
) -> None:
    out = tmp_path / "report"
    result = run_cli(
        [
            "eval",
            CRANFIELD_COLLECTION,
            "--data-dir",
            str(cranfield_data_dir),
            "--queries",
            str(cranfield_dir / "queries.tsv"),
            "--qrels",
            str(cranfield_dir / "qrels.txt"),
            "--modes",
            "lexical,hybrid",
            "--set",
            "rrf_k=10,60",
            "--filter",
            "year >= 1960",
            "--out",
            str(out),
            "--no-progress",
        ]
    )
    assert result.code == 0, result.stderr[-2000:]
    metrics = json.loads((out / "metrics.json").read_text(encoding="utf-8"))
    labels = [system["label"] for system in metrics["systems"]]
    assert labels == ["lexical", "hybrid rrf_k=10", "hybrid rrf_k=60"]
    run_files = {system["label"]: system["run_file"] for system in metrics["systems"]}
    assert len(set(run_files.values())) == 3
    assert all((out / Path(name).name).is_file() for name in run_files.values())

    # The judgments a document failing the filter loses, recomputed from the corpus file:
    # a null year is unknown, so it fails `year >= 1960` too.
    passing = {
        doc_id
        for doc_id, doc in cranfield_corpus.items()
        if doc.get("year") is not None and doc["year"] >= 1960
    }
    qrels = read_qrels(cranfield_dir / "qrels.txt")
    queries = {q.qid for q in read_queries(cranfield_dir / "queries.tsv")}
    expected_dropped = {
        qid: sum(1 for doc in judged if doc not in passing)
        for qid, judged in qrels.items()
        if qid in queries
    }
    expected_dropped = {qid: n for qid, n in expected_dropped.items() if n}
    assert metrics["dropped_judgments"] == expected_dropped
    report = (out / "report.md").read_text(encoding="utf-8")
    total = sum(expected_dropped.values())
    assert f"Judgments dropped because their document fails the query's filter: {total}" in report


def test_search_command_prints_a_table_and_json_with_the_routes_body(
    run_cli: Callable[[list[str]], CliRun], demo: Any
) -> None:
    data_dir = str(demo.runtime.settings.data_dir)
    query = "What tyre pressure should I run on my Ridgeline?"
    table = run_cli(
        ["search", DEMO_COLLECTION, query, "--filter", "model_year = 2022", "--data-dir", data_dir]
    )
    assert table.code == 0, table.stderr[-2000:]
    header = table.stdout.splitlines()[1]
    for column in ("rank", "score", "lex", "sem", "document", "section"):
        assert column in header
    assert "ridgeline-2022-manual" in table.stdout

    as_json = run_cli(
        [
            "search",
            DEMO_COLLECTION,
            query,
            "--filter",
            "model_year = 2022",
            "--json",
            "--data-dir",
            data_dir,
        ]
    )
    body = json.loads(as_json.stdout)
    assert set(body) == {"hits", "candidates", "trace_id", "inferred_filter"}
    assert body["inferred_filter"] is None
    assert body["hits"][0]["document_id"] == "ridgeline-2022-manual"
    assert all(hit["attributes"]["model_year"] == 2022 for hit in body["hits"])


def test_ask_command_prints_a_cited_answer_with_the_caution(
    run_cli: Callable[[list[str]], CliRun], demo: Any
) -> None:
    data_dir = str(demo.runtime.settings.data_dir)
    result = run_cli(
        [
            "ask",
            DEMO_COLLECTION,
            "How much may a rider and cargo weigh on the Haulmark?",
            "--filter",
            "model_year = 2024",
            "--json",
            "--data-dir",
            data_dir,
        ]
    )
    assert result.code == 0, result.stderr[-2000:]
    body = json.loads(result.stdout)
    assert body["answer"] and body["citations"]
    assert body["caution"]
    markers = {c["marker"] for c in body["citations"]}
    assert all(f"[{m}]" in body["answer"] for m in markers)
    assert all(p["sections"][0] == p["section"] for p in body["passages"])
    for citation in body["citations"]:
        passage = next(p for p in body["passages"] if p["marker"] == citation["marker"])
        assert citation["section"] in passage["sections"]


def test_search_and_ask_infer_the_filter_and_show_its_words(
    run_cli: Callable[[list[str]], CliRun], demo: Any
) -> None:
    data_dir = str(demo.runtime.settings.data_dir)
    query = "What tyre pressure should I run on my 2022 Ridgeline?"
    table = run_cli(
        ["search", DEMO_COLLECTION, query, "--infer-filter", "apply", "--data-dir", data_dir]
    )
    assert table.code == 0, table.stderr[-2000:]
    lines = table.stdout.splitlines()
    assert lines[0] == "inferred filter (deterministic): model_year = 2022 AND model = 'Ridgeline'"
    assert lines[1] == "  model_year = 2022  <- '2022' (year)"
    assert lines[2] == "  model = 'Ridgeline'  <- 'Ridgeline' (value in the index)"
    answer = run_cli(
        ["ask", DEMO_COLLECTION, query, "--infer-filter", "apply", "--json", "--data-dir", data_dir]
    )
    assert answer.code == 0, answer.stderr[-2000:]
    body = json.loads(answer.stdout)
    assert body["inferred_filter"]["cql2_text"] == "model_year = 2022 AND model = 'Ridgeline'"
    assert {c["document_id"] for c in body["citations"]} <= {"ridgeline-2022-manual", "sb-2022-03"}


def test_inferred_filters_agree_with_the_labelled_ones_and_rank_as_well_on_the_demo(
    run_cli: Callable[[list[str]], CliRun], demo: Any, tmp_path: Path
) -> None:
    """The demo's labelled filter questions: inferred filters select the labelled documents in
    at least 85% of questions, exclude a relevant document in at most 5%, and hybrid nDCG@10
    with them is within 0.03 of the labelled filters' and at least 0.10 above no filter."""
    out = tmp_path / "report"
    result = run_cli(
        [
            "eval",
            DEMO_COLLECTION,
            "--data-dir",
            str(demo.runtime.settings.data_dir),
            "--queries",
            str(DEMO_CORPUS / "filter_questions.jsonl"),
            "--modes",
            "hybrid",
            "--infer-filter",
            "apply",
            "--out",
            str(out),
            "--no-progress",
        ]
    )
    assert result.code == 0, result.stderr[-2000:]
    metrics = json.loads((out / "metrics.json").read_text(encoding="utf-8"))
    agreement = metrics["filter_agreement"]
    assert len(agreement["per_query"]) == len(read_queries(DEMO_CORPUS / "filter_questions.jsonl"))
    assert agreement["exact_share"] >= 0.85
    assert agreement["excluding_relevant_share"] <= 0.05
    ndcg = {system["label"]: system["summary"]["nDCG@10"]["mean"] for system in metrics["systems"]}
    assert ndcg["hybrid filter=inferred"] >= ndcg["hybrid"] - 0.03
    assert ndcg["hybrid filter=inferred"] >= ndcg["hybrid filter=none"] + 0.10
    assert "inferred filters: same documents" in result.stdout
