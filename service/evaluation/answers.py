"""Answers scored against labelled questions: right, rightly declined, cited in the right place.

A question file is JSON Lines, one question a line: ``{"id", "text", "filter"?, "expect",
"document"?, "section"?}``. ``expect`` is a list of short strings, any one of which a right
answer contains, or null for a question the collection cannot answer; an answerable question
names the ``document`` (an id, or a list of ids any of which will do) its answer must cite, and
may name the ``section`` (a heading) that citation must carry.

A wrong answer is worse than none, so declining is measured in both directions: decline
precision is the share of declined questions that were unanswerable, decline recall the share
of unanswerable questions that were declined.
"""

from __future__ import annotations

import json
import sys
import unicodedata
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Protocol

from tqdm import tqdm

from service.evaluation.inputs import FilterSpec, LabelFileError, content_lines
from service.evaluation.runner import Interval, combine_filters
from service.evaluation.significance import bootstrap_interval

ANSWER_MEASURES = ("answer_accuracy", "decline_precision", "decline_recall", "section_accuracy")


@dataclass(frozen=True, slots=True)
class AnswerQuestion:
    qid: str
    text: str
    filter: FilterSpec
    expect: tuple[str, ...] | None
    """None: the collection cannot answer the question."""
    documents: tuple[str, ...]
    section: str | None

    @property
    def answerable(self) -> bool:
        return self.expect is not None


@dataclass(frozen=True, slots=True)
class CitedPlace:
    document_id: str
    section: str


@dataclass(frozen=True, slots=True)
class ObservedAnswer:
    """What the service answered: ``answer`` is None when it declined, with ``reason``."""

    answer: str | None
    reason: str | None
    citations: tuple[CitedPlace, ...]


class AnswerBackend(Protocol):
    def answer(self, text: str, *, filter: FilterSpec) -> ObservedAnswer:
        """The service's answer to the question under the filter."""
        ...

    def describe(self) -> dict[str, object]:
        """The settings the answers were made with (generator, token budget, collection)."""
        ...


@dataclass(frozen=True, slots=True)
class AnswerJudgement:
    question: AnswerQuestion
    observed: ObservedAnswer
    string_found: bool
    document_cited: bool
    section_right: bool | None
    """None when the question names no section or its document was not cited."""

    @property
    def declined(self) -> bool:
        return self.observed.answer is None

    @property
    def correct(self) -> bool:
        """Answerable, answered, an expected string present and an expected document cited."""
        return (
            self.question.answerable
            and not self.declined
            and self.string_found
            and self.document_cited
        )


@dataclass(frozen=True, slots=True)
class AnswerEvaluation:
    judgements: tuple[AnswerJudgement, ...]
    summary: dict[str, Interval | None]
    """Per measure, its mean and bootstrap interval; None when no question counts for it."""
    counts: dict[str, int]
    settings: dict[str, object]


def read_answer_questions(path: str | Path) -> list[AnswerQuestion]:
    """Questions in file order; every problem is reported with the file and line."""
    path = Path(path)
    if path.suffix.lower() != ".jsonl":
        raise LabelFileError(path, None, "answer questions must be a .jsonl file")
    questions: list[AnswerQuestion] = []
    seen: dict[str, int] = {}
    for number, line in content_lines(path):
        question = _parse_question(path, number, line)
        if question.qid in seen:
            raise LabelFileError(
                path,
                number,
                f"question id {question.qid!r} already given on line {seen[question.qid]}",
            )
        seen[question.qid] = number
        questions.append(question)
    if not questions:
        raise LabelFileError(path, None, "holds no questions")
    return questions


def _parse_question(path: Path, number: int, line: str) -> AnswerQuestion:
    try:
        record = json.loads(line)
    except json.JSONDecodeError as error:
        raise LabelFileError(path, number, f"not JSON ({error.msg})") from None
    if not isinstance(record, dict):
        raise LabelFileError(path, number, "expected a JSON object")
    qid = record.get("id")
    if not isinstance(qid, str) or not qid.strip():
        raise LabelFileError(path, number, "'id' must be a non-empty string")
    text = record.get("text")
    if not isinstance(text, str) or not text.strip():
        raise LabelFileError(path, number, f"question {qid!r}: 'text' must be a non-empty string")
    query_filter = record.get("filter")
    if isinstance(query_filter, str) and not query_filter.strip():
        query_filter = None
    if query_filter is not None and not isinstance(query_filter, str | dict):
        raise LabelFileError(
            path, number, f"question {qid!r}: 'filter' must be CQL2 text, CQL2 JSON or null"
        )
    if "expect" not in record:
        raise LabelFileError(
            path, number, f"question {qid!r}: 'expect' is required (a list of strings, or null)"
        )
    raw_expect = record["expect"]
    expect: tuple[str, ...] | None = None
    documents: tuple[str, ...] = ()
    section = record.get("section")
    if raw_expect is not None:
        if (
            not isinstance(raw_expect, list)
            or not raw_expect
            or not all(isinstance(item, str) and item.strip() for item in raw_expect)
        ):
            raise LabelFileError(
                path, number, f"question {qid!r}: 'expect' must be a non-empty list of strings"
            )
        expect = tuple(item.strip() for item in raw_expect)
        raw_documents = record.get("document")
        if isinstance(raw_documents, str):
            raw_documents = [raw_documents]
        if (
            not isinstance(raw_documents, list)
            or not raw_documents
            or not all(isinstance(item, str) and item for item in raw_documents)
        ):
            raise LabelFileError(
                path,
                number,
                f"question {qid!r}: an answerable question needs 'document', the id (or ids)"
                " its answer must cite",
            )
        documents = tuple(raw_documents)
        if section is not None and (not isinstance(section, str) or not section.strip()):
            raise LabelFileError(path, number, f"question {qid!r}: 'section' must be a string")
    elif record.get("document") is not None or section is not None:
        raise LabelFileError(
            path,
            number,
            f"question {qid!r}: an unanswerable question ('expect': null) names no document"
            " or section",
        )
    return AnswerQuestion(qid.strip(), text.strip(), query_filter, expect, documents, section)


def normalised(text: str) -> str:
    """Case, compatibility forms and runs of whitespace folded away, for string matching."""
    return " ".join(unicodedata.normalize("NFKC", text).casefold().split())


def judge(question: AnswerQuestion, observed: ObservedAnswer) -> AnswerJudgement:
    if observed.answer is None or question.expect is None:
        return AnswerJudgement(question, observed, False, False, None)
    answer = normalised(observed.answer)
    string_found = any(normalised(expected) in answer for expected in question.expect)
    cited = [c for c in observed.citations if c.document_id in question.documents]
    section_right = None
    if question.section is not None and cited:
        wanted = normalised(question.section)
        section_right = any(wanted in normalised(c.section) for c in cited)
    return AnswerJudgement(question, observed, string_found, bool(cited), section_right)


def evaluate_answers(
    backend: AnswerBackend,
    questions: Sequence[AnswerQuestion],
    *,
    global_filter: FilterSpec = None,
    progress: bool = True,
) -> AnswerEvaluation:
    judgements = tuple(
        judge(
            question,
            backend.answer(question.text, filter=combine_filters(global_filter, question.filter)),
        )
        for question in tqdm(
            questions, desc="answering", unit="question", file=sys.stderr, disable=not progress
        )
    )
    answerable = [j for j in judgements if j.question.answerable]
    unanswerable = [j for j in judgements if not j.question.answerable]
    declined = [j for j in judgements if j.declined]
    with_section = [j for j in answerable if j.section_right is not None]
    samples = {
        "answer_accuracy": [float(j.correct) for j in answerable],
        "decline_precision": [float(not j.question.answerable) for j in declined],
        "decline_recall": [float(j.declined) for j in unanswerable],
        "section_accuracy": [float(bool(j.section_right)) for j in with_section],
    }
    summary = {
        name: Interval(*bootstrap_interval(values)) if values else None
        for name, values in samples.items()
    }
    counts = {
        "questions": len(judgements),
        "answerable": len(answerable),
        "unanswerable": len(unanswerable),
        "declined": len(declined),
        "correct": sum(j.correct for j in answerable),
        "with_section_label_and_document_cited": len(with_section),
    }
    return AnswerEvaluation(judgements, summary, counts, backend.describe())


def write_answer_report(
    result: AnswerEvaluation, out_dir: str | Path, *, title: str
) -> tuple[Path, Path]:
    """report.md and metrics.json, in the layout of the retrieval report."""
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    metrics = out / "metrics.json"
    metrics.write_text(json.dumps(_metrics(result), indent=2, default=str) + "\n", "utf-8")
    report = out / "report.md"
    report.write_text(_markdown(result, title), encoding="utf-8")
    return report, metrics


def _metrics(result: AnswerEvaluation) -> dict[str, Any]:
    return {
        "measures": list(ANSWER_MEASURES),
        "counts": result.counts,
        "settings": result.settings,
        "summary": {
            name: None if interval is None else interval._asdict()
            for name, interval in result.summary.items()
        },
        "per_question": {
            j.question.qid: {
                "answerable": j.question.answerable,
                "declined": j.declined,
                "reason": j.observed.reason,
                "correct": j.correct,
                "string_found": j.string_found,
                "document_cited": j.document_cited,
                "section_right": j.section_right,
                "answer": j.observed.answer,
                "cited": [
                    {"document_id": c.document_id, "section": c.section}
                    for c in j.observed.citations
                ],
            }
            for j in result.judgements
        },
    }


def _markdown(result: AnswerEvaluation, title: str) -> str:
    counts = result.counts
    settings = ", ".join(f"{name}={value}" for name, value in result.settings.items())
    lines = [
        f"# {title}",
        "",
        "## Setup",
        "",
        f"- Questions: {counts['questions']} ({counts['answerable']} answerable,"
        f" {counts['unanswerable']} the collection cannot answer); declined:"
        f" {counts['declined']}.",
        "- answer_accuracy: answerable questions answered with an expected string and an"
        " expected document cited; decline_precision: declined questions that were"
        " unanswerable; decline_recall: unanswerable questions declined; section_accuracy:"
        " of the answers citing an expected document whose question names a section, those"
        " citing it with that section.",
        "- Intervals: 95% percentile bootstrap of the mean over questions (10,000 resamples,"
        " seed 0).",
        f"- Settings: {settings or 'defaults'}.",
        "",
        "## Measures",
        "",
        "| system | " + " | ".join(ANSWER_MEASURES) + " |",
        "|---|" + "---|" * len(ANSWER_MEASURES),
    ]
    cells = []
    for name in ANSWER_MEASURES:
        interval = result.summary[name]
        cells.append(
            "n/a"
            if interval is None
            else f"{interval.mean:.4f} [{interval.low:.4f}, {interval.high:.4f}]"
        )
    label = str(result.settings.get("generator", "answers"))
    lines += [f"| {label} | " + " | ".join(cells) + " |", ""]
    wrong = [
        j
        for j in result.judgements
        if (j.question.answerable and not j.correct)
        or (not j.question.answerable and not j.declined)
        or j.section_right is False
    ]
    lines += ["## Questions answered wrongly", ""]
    if not wrong:
        lines += ["None.", ""]
        return "\n".join(lines)
    lines += ["| question | expected | answer | cited |", "|---|---|---|---|"]
    for j in wrong:
        expected = (
            "decline"
            if j.question.expect is None
            else " / ".join(j.question.expect)
            + f" in {', '.join(j.question.documents)}"
            + (f" ({j.question.section})" if j.question.section else "")
        )
        answer = (
            j.observed.answer
            if j.observed.answer is not None
            else f"declined ({j.observed.reason})"
        )
        cited = ", ".join(f"{c.document_id} ({c.section})" for c in j.observed.citations) or "-"
        lines.append(
            f"| {j.question.qid}: {_cell(j.question.text)} | {_cell(expected)} |"
            f" {_cell(answer)} | {_cell(cited)} |"
        )
    lines.append("")
    return "\n".join(lines)


def _cell(text: str) -> str:
    return " ".join(text.split()).replace("|", "\\|")
