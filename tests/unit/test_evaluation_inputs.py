from __future__ import annotations

from pathlib import Path

import pytest

from service.evaluation.inputs import (
    LabeledQuery,
    LabelFileError,
    inline_qrels,
    read_qrels,
    read_queries,
)


def write(tmp_path: Path, name: str, text: str) -> Path:
    path = tmp_path / name
    path.write_text(text, encoding="utf-8")
    return path


def test_tsv_queries_are_read_in_file_order_with_blank_lines_ignored(tmp_path: Path) -> None:
    path = write(tmp_path, "queries.tsv", "2\tframe warranty\n\n1\tbrake pads\twith tab\n")
    assert read_queries(path) == [
        LabeledQuery("2", "frame warranty"),
        LabeledQuery("1", "brake pads\twith tab"),
    ]


def test_jsonl_queries_carry_text_filters_json_filters_and_none(tmp_path: Path) -> None:
    path = write(
        tmp_path,
        "questions.JSONL",
        '{"id": "a", "text": "how long", "filter": "model_year >= 2022"}\n'
        '{"id": 7, "text": "which pads", "filter": {"op": "=", "args": [{"property": "m"}, "x"]},'
        ' "answer": "ignored"}\n'
        '{"id": "c", "text": "no filter", "filter": null}\n'
        '{"id": "d", "text": "blank filter", "filter": "  "}\n',
    )
    assert read_queries(path) == [
        LabeledQuery("a", "how long", "model_year >= 2022"),
        LabeledQuery("7", "which pads", {"op": "=", "args": [{"property": "m"}, "x"]}),
        LabeledQuery("c", "no filter", None),
        LabeledQuery("d", "blank filter", None),
    ]


def test_jsonl_queries_may_carry_their_moment_and_their_judgments(tmp_path: Path) -> None:
    path = write(
        tmp_path,
        "q.jsonl",
        '{"id": "a", "text": "recalls this year", "now": "2025-03-15T12:00:00Z",'
        ' "qrels": {"sb-1": 2, "sb-2": 0}}\n'
        '{"id": "b", "text": "no judgments here"}\n',
    )
    queries = read_queries(path)
    assert queries[0] == LabeledQuery(
        "a", "recalls this year", None, "2025-03-15T12:00:00Z", {"sb-1": 2, "sb-2": 0}
    )
    assert inline_qrels(queries) == {"a": {"sb-1": 2, "sb-2": 0}}


def test_the_demo_filter_questions_are_read_with_their_judgments() -> None:
    path = Path(__file__).resolve().parents[2] / "corpus_example" / "filter_questions.jsonl"
    queries = read_queries(path)
    assert len(queries) >= 60
    assert all(query.qrels for query in queries)


@pytest.mark.parametrize(
    ("name", "text", "problem"),
    [
        ("q.tsv", "1 no tab here\n", "no tab"),
        ("q.tsv", "\tonly text\n", "id is empty"),
        ("q.tsv", "1\t   \n", "no text"),
        ("q.tsv", "1\tfirst\n1\tagain\n", "already given on line 2"),
        ("q.jsonl", "{not json}\n", "not JSON"),
        ("q.jsonl", "[1, 2]\n", "JSON object"),
        ("q.jsonl", '{"text": "no id"}\n', "'id'"),
        ("q.jsonl", '{"id": true, "text": "boolean id"}\n', "'id'"),
        ("q.jsonl", '{"id": "1", "text": ""}\n', "'text'"),
        ("q.jsonl", '{"id": "1", "text": "t", "filter": 3}\n', "'filter'"),
        ("q.jsonl", '{"id": "1", "text": "t", "now": "2025-03-15T12:00"}\n', "'now'"),
        ("q.jsonl", '{"id": "1", "text": "t", "qrels": {"d": "2"}}\n', "'qrels'"),
        ("q.jsonl", '{"id": "1", "text": "t", "qrels": ["d"]}\n', "'qrels'"),
    ],
)
def test_a_bad_queries_line_is_reported_with_file_and_line(
    tmp_path: Path, name: str, text: str, problem: str
) -> None:
    path = write(tmp_path, name, "\n" + text)
    with pytest.raises(LabelFileError, match=problem) as caught:
        read_queries(path)
    assert caught.value.line_number == text.count("\n") + 1
    assert str(caught.value).startswith(f"{path}:")
    assert isinstance(caught.value, ValueError)


def test_an_unknown_queries_extension_is_refused(tmp_path: Path) -> None:
    with pytest.raises(LabelFileError, match=r"\.tsv or \.jsonl"):
        read_queries(write(tmp_path, "queries.csv", "1,text\n"))


def test_a_missing_file_is_reported_without_a_traceback_of_os_errors(tmp_path: Path) -> None:
    with pytest.raises(LabelFileError, match="cannot be read"):
        read_qrels(tmp_path / "absent.txt")


def test_qrels_are_graded_per_query_and_ignore_the_iteration_column(tmp_path: Path) -> None:
    path = write(tmp_path, "qrels.txt", "1 0 d1 3\n1 Q0 d2 0\n\n2 0 d1 -1\n1 0 d1 3\n")
    assert read_qrels(path) == {"1": {"d1": 3, "d2": 0}, "2": {"d1": -1}}


@pytest.mark.parametrize(
    ("text", "problem"),
    [
        ("1 0 d1\n", "expected 4 fields"),
        ("1 0 d1 high\n", "not an integer"),
        ("1 0 d1 2\n1 0 d1 1\n", "judged again"),
    ],
)
def test_a_bad_qrels_line_is_reported_with_its_line(
    tmp_path: Path, text: str, problem: str
) -> None:
    with pytest.raises(LabelFileError, match=problem) as caught:
        read_qrels(write(tmp_path, "qrels.txt", text))
    assert caught.value.line_number == text.count("\n")
