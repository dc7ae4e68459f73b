from __future__ import annotations

import itertools
import json
from pathlib import Path

import pytest
from test_evaluation_runner import QRELS, QUERIES, RECENT, FakeBackend

from service.evaluation.report import strictly_decreasing, write_report
from service.evaluation.runner import EvaluationResult, evaluate, systems_from_options


@pytest.fixture(scope="module")
def result() -> EvaluationResult:
    systems = systems_from_options(["lexical", "semantic", "hybrid"], {"rrf_k": ["10", "60"]})
    return evaluate(
        FakeBackend(),
        QUERIES,
        QRELS,
        systems=systems,
        k=2,
        depth=4,
        global_filter=RECENT,
        progress=False,
    )


def read_run(path: Path) -> dict[str, list[tuple[str, int, float, str]]]:
    runs: dict[str, list[tuple[str, int, float, str]]] = {}
    for line in path.read_text(encoding="utf-8").splitlines():
        qid, q0, doc_id, rank, score, tag = line.split(" ")
        assert q0 == "Q0"
        runs.setdefault(qid, []).append((doc_id, int(rank), float(score), tag))
    return runs


def test_tied_scores_are_nudged_to_the_next_double_below() -> None:
    scores, nudged = strictly_decreasing([2.0, 1.0, 1.0, 1.0, 0.5, 0.7])
    assert nudged == 3
    assert all(later < earlier for earlier, later in itertools.pairwise(scores))
    assert scores[0:2] == [2.0, 1.0]
    assert 1.0 - scores[3] < 1e-15
    assert scores[4] == 0.5


def test_every_run_file_keeps_the_backend_order_with_strictly_decreasing_scores(
    result: EvaluationResult, tmp_path: Path
) -> None:
    files = write_report(result, tmp_path)
    assert files.nudged_scores > 0
    assert len(files.runs) == 4
    for system_result in result.systems:
        label = system_result.system.label
        runs = read_run(files.runs[label])
        assert list(runs) == list(system_result.rankings)
        for qid, lines in runs.items():
            assert [doc for doc, *_ in lines] == [doc for doc, _ in system_result.rankings[qid]]
            assert [rank for _, rank, _, _ in lines] == list(range(1, len(lines) + 1))
            scores = [score for _, _, score, _ in lines]
            assert all(b < a for a, b in itertools.pairwise(scores))
            assert {tag for *_, tag in lines} == {label.replace(" ", "_")}


def test_metrics_json_holds_every_number_per_query_and_aggregated(
    result: EvaluationResult, tmp_path: Path
) -> None:
    files = write_report(result, tmp_path)
    metrics = json.loads(files.metrics.read_text(encoding="utf-8"))
    assert metrics["counts"] == {
        "queries_read": 5,
        "queries_evaluated": 2,
        "skipped_without_relevant": 2,
        "skipped_after_filter": 1,
        "dropped_judgments": 6,
        "dropped_relevant_judgments": 4,
    }
    assert [system["label"] for system in metrics["systems"]] == [
        "lexical",
        "semantic",
        "hybrid rrf_k=10",
        "hybrid rrf_k=60",
    ]
    hybrid = metrics["systems"][2]
    assert hybrid["settings_used"]["rrf_k"] == 10
    assert hybrid["per_query"] == result.systems[2].per_query
    assert hybrid["summary"]["nDCG@2"] == result.systems[2].summary["nDCG@2"]._asdict()
    assert len(metrics["comparisons"]) == 6 * len(result.measures)


def test_the_report_shows_rows_comparisons_settings_counts_and_worst_queries(
    result: EvaluationResult, tmp_path: Path
) -> None:
    files = write_report(result, tmp_path, title="Fake collection")
    report = files.report.read_text(encoding="utf-8")
    assert report.startswith("# Fake collection\n")
    for label in ("lexical", "semantic", "hybrid rrf_k=10", "hybrid rrf_k=60"):
        assert f"| {label} | " in report
    assert "| hybrid rrf_k=10 | hybrid rrf_k=60 | " in report
    assert "Skipped, no positive judgment: 2 (q2, q3)" in report
    assert "every positive judgment failed the filter: 1 (q4)" in report
    assert "fails the query's filter: 6 (of which relevant: 4) over 3 queries" in report
    assert "embedder=fake" in report and "rrf_k=10" in report
    assert "numpy.nextafter" in report
    assert "### q1: wing lift" in report and "| 1 | `d2` |" in report
    assert "![" in report and "report.png" in report


def test_the_picture_is_a_png_with_and_without_a_pair(
    result: EvaluationResult, tmp_path: Path
) -> None:
    files = write_report(result, tmp_path / "pair")
    assert files.picture.read_bytes().startswith(b"\x89PNG\r\n\x1a\n")
    single = evaluate(
        FakeBackend(),
        QUERIES,
        QRELS,
        systems=systems_from_options(["lexical"], {}),
        k=2,
        depth=4,
        progress=False,
    )
    files = write_report(single, tmp_path / "single")
    assert files.picture.read_bytes().startswith(b"\x89PNG\r\n\x1a\n")
    assert "## Comparisons" not in files.report.read_text(encoding="utf-8")
