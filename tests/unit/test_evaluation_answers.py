"""Scoring answers against labelled questions: the measures and the question file."""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from service.evaluation.answers import (
    CitedPlace,
    ObservedAnswer,
    evaluate_answers,
    read_answer_questions,
    write_answer_report,
)
from service.evaluation.inputs import FilterSpec, LabelFileError

QUESTIONS = [
    {"id": "a1", "text": "torque?", "expect": ["18 Nm"], "document": "m22", "section": "Torque"},
    {"id": "a2", "text": "pressure?", "expect": ["1.6 bar"], "document": ["m22", "m23"]},
    {"id": "a3", "text": "pads?", "expect": ["TW-S4"], "document": "m24"},
    {"id": "u1", "text": "price?", "filter": "model = 'X'", "expect": None},
    {"id": "u2", "text": "colour?", "expect": None},
]
ANSWERS = {
    "torque?": ObservedAnswer(
        "Main pivot bolt: 18  nm [1].", None, (CitedPlace("m22", "Manual > Torque values"),)
    ),
    "pressure?": ObservedAnswer("Start at 1.6 bar [1].", None, (CitedPlace("m23", ""),)),
    "pads?": ObservedAnswer(None, "insufficient_evidence", ()),
    "price?": ObservedAnswer(None, "insufficient_evidence", ()),
    "colour?": ObservedAnswer("Red [1].", None, (CitedPlace("m22", ""),)),
}


class Scripted:
    def __init__(self) -> None:
        self.filters: list[FilterSpec] = []

    def answer(self, text: str, *, filter: FilterSpec) -> ObservedAnswer:
        self.filters.append(filter)
        return ANSWERS[text]

    def describe(self) -> dict[str, object]:
        return {"generator": "scripted"}


def write(tmp_path: Path, records: list[dict[str, object]]) -> Path:
    path = tmp_path / "answers.jsonl"
    path.write_text("".join(json.dumps(r) + "\n" for r in records), encoding="utf-8")
    return path


def test_the_measures_count_right_answers_and_declines_in_both_directions(tmp_path: Path) -> None:
    backend = Scripted()
    result = evaluate_answers(
        backend,
        read_answer_questions(write(tmp_path, QUESTIONS)),
        global_filter="a = 1",
        progress=False,
    )
    summary = {name: None if i is None else i.mean for name, i in result.summary.items()}
    # a1 and a2 right (case and spaces folded; any listed document), a3 declined wrongly.
    assert summary["answer_accuracy"] == pytest.approx(2 / 3)
    # Declined: a3 (answerable) and u1 (not): precision 1/2; of u1 and u2 one declined.
    assert summary["decline_precision"] == pytest.approx(0.5)
    assert summary["decline_recall"] == pytest.approx(0.5)
    assert summary["section_accuracy"] == 1.0
    assert backend.filters[3] == "(a = 1) AND (model = 'X')"
    report, metrics = write_answer_report(result, tmp_path / "out", title="Answers")
    text = report.read_text(encoding="utf-8")
    assert "| scripted | 0.6667 [" in text
    assert "a3: pads?" in text and "u2: colour?" in text
    assert json.loads(metrics.read_text())["per_question"]["a1"]["correct"] is True


@pytest.mark.parametrize(
    ("record", "problem"),
    [
        ({"id": "x", "text": "t"}, "'expect' is required"),
        ({"id": "x", "text": "t", "expect": ["a"]}, "needs 'document'"),
        ({"id": "x", "text": "t", "expect": []}, "non-empty list of strings"),
        ({"id": "x", "text": "t", "expect": None, "document": "d"}, "names no document"),
        ({"id": "", "text": "t", "expect": None}, "'id' must be"),
    ],
)
def test_a_bad_question_is_reported_with_its_line(
    tmp_path: Path, record: dict[str, object], problem: str
) -> None:
    path = write(tmp_path, [QUESTIONS[0], record])
    with pytest.raises(LabelFileError, match=f":2: .*{problem}"):
        read_answer_questions(path)
