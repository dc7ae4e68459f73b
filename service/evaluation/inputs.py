"""Labeled queries and relevance judgments in the trade's plain file formats.

Queries come as TSV (``qid<TAB>text``) or JSON Lines (``{"id", "text", "filter"?, "now"?,
"qrels"?}``), chosen by the file's extension; judgments as TREC qrels (``qid iteration docid
grade``), or inline in the JSON Lines as ``"qrels": {docid: grade}``. ``now`` is the moment a
question was asked, against which inferred filters resolve "the last six months". Every problem
is reported with the file and line, because these files are written by hand and a silent skip
would change the numbers.
"""

from __future__ import annotations

import datetime as dt
import json
from dataclasses import dataclass
from pathlib import Path
from typing import Any

FilterSpec = str | dict[str, Any] | None
"""A CQL2 filter as written: text, a CQL2 JSON object, or none."""


class LabelFileError(ValueError):
    """A queries or qrels file that cannot be read as its format says."""

    def __init__(self, path: Path, line_number: int | None, problem: str) -> None:
        where = f"{path}:{line_number}" if line_number is not None else str(path)
        super().__init__(f"{where}: {problem}")
        self.path = path
        self.line_number = line_number
        self.problem = problem


@dataclass(frozen=True, slots=True)
class LabeledQuery:
    qid: str
    text: str
    filter: FilterSpec = None
    now: str | None = None
    qrels: dict[str, int] | None = None


def read_queries(path: str | Path) -> list[LabeledQuery]:
    """Queries in file order; ``.tsv`` or ``.jsonl`` decides the format."""
    path = Path(path)
    suffix = path.suffix.lower()
    if suffix == ".tsv":
        parse = _parse_tsv_query
    elif suffix == ".jsonl":
        parse = _parse_jsonl_query
    else:
        raise LabelFileError(
            path, None, f"unknown queries format {suffix or '(none)'!r}; use .tsv or .jsonl"
        )
    queries: list[LabeledQuery] = []
    line_of_qid: dict[str, int] = {}
    for line_number, line in content_lines(path):
        query = parse(path, line_number, line)
        if query.qid in line_of_qid:
            raise LabelFileError(
                path,
                line_number,
                f"query id {query.qid!r} already given on line {line_of_qid[query.qid]}",
            )
        line_of_qid[query.qid] = line_number
        queries.append(query)
    return queries


def read_qrels(path: str | Path) -> dict[str, dict[str, int]]:
    """Judgments as ``{qid: {docid: grade}}``; the iteration column is ignored, as trec_eval does.

    A document judged twice for one query with different grades is an error: which grade
    trec_eval would keep is an accident of file order.
    """
    path = Path(path)
    qrels: dict[str, dict[str, int]] = {}
    for line_number, line in content_lines(path):
        fields = line.split()
        if len(fields) != 4:
            raise LabelFileError(
                path,
                line_number,
                f"expected 4 fields 'qid iteration docid grade', found {len(fields)}",
            )
        qid, _iteration, docid, grade_text = fields
        try:
            grade = int(grade_text)
        except ValueError:
            raise LabelFileError(
                path, line_number, f"grade {grade_text!r} is not an integer"
            ) from None
        judged = qrels.setdefault(qid, {})
        if judged.get(docid, grade) != grade:
            raise LabelFileError(
                path,
                line_number,
                f"document {docid!r} judged again for query {qid!r} with another grade",
            )
        judged[docid] = grade
    return qrels


def inline_qrels(queries: list[LabeledQuery]) -> dict[str, dict[str, int]]:
    """The judgments the queries carry themselves; a query without any has none."""
    return {query.qid: dict(query.qrels) for query in queries if query.qrels is not None}


def content_lines(path: Path) -> list[tuple[int, str]]:
    """The file's non-blank lines with their numbers; an unreadable file is a label error."""
    try:
        text = path.read_text(encoding="utf-8-sig")
    except OSError as error:
        raise LabelFileError(path, None, f"cannot be read ({error.strerror or error})") from error
    except UnicodeDecodeError as error:
        raise LabelFileError(path, None, "is not UTF-8 text") from error
    return [
        (number, line.rstrip("\r\n"))
        for number, line in enumerate(text.splitlines(), start=1)
        if line.strip()
    ]


def _parse_tsv_query(path: Path, line_number: int, line: str) -> LabeledQuery:
    qid, tab, text = line.partition("\t")
    if not tab:
        raise LabelFileError(path, line_number, "expected 'qid<TAB>text', found no tab")
    qid, text = qid.strip(), text.strip()
    if not qid:
        raise LabelFileError(path, line_number, "the query id is empty")
    if not text:
        raise LabelFileError(path, line_number, f"query {qid!r} has no text")
    return LabeledQuery(qid, text)


def _parse_jsonl_query(path: Path, line_number: int, line: str) -> LabeledQuery:
    try:
        record = json.loads(line)
    except json.JSONDecodeError as error:
        raise LabelFileError(path, line_number, f"not JSON ({error.msg})") from None
    if not isinstance(record, dict):
        raise LabelFileError(path, line_number, "expected a JSON object")
    raw_id = record.get("id")
    # A number is accepted as an id because many collections number their queries.
    if isinstance(raw_id, bool) or not isinstance(raw_id, str | int) or not str(raw_id).strip():
        raise LabelFileError(path, line_number, "'id' must be a non-empty string or an integer")
    qid = str(raw_id).strip()
    text = record.get("text")
    if not isinstance(text, str) or not text.strip():
        raise LabelFileError(path, line_number, f"query {qid!r}: 'text' must be a non-empty string")
    query_filter = record.get("filter")
    if isinstance(query_filter, str) and not query_filter.strip():
        query_filter = None
    if query_filter is not None and not isinstance(query_filter, str | dict):
        raise LabelFileError(
            path,
            line_number,
            f"query {qid!r}: 'filter' must be CQL2 text, a CQL2 JSON object or null",
        )
    now = record.get("now")
    if now is not None and not _is_instant(now):
        raise LabelFileError(
            path,
            line_number,
            f"query {qid!r}: 'now' must be an ISO 8601 instant with an offset, such as"
            " 2025-03-15T12:00:00Z",
        )
    qrels = record.get("qrels")
    if qrels is not None and not (
        isinstance(qrels, dict)
        and all(
            isinstance(doc, str) and isinstance(grade, int) and not isinstance(grade, bool)
            for doc, grade in qrels.items()
        )
    ):
        raise LabelFileError(
            path, line_number, f"query {qid!r}: 'qrels' must map document ids to integer grades"
        )
    return LabeledQuery(qid, text.strip(), query_filter, now, qrels)


def _is_instant(value: object) -> bool:
    if not isinstance(value, str):
        return False
    try:
        moment = dt.datetime.fromisoformat(value.replace("Z", "+00:00"))
    except ValueError:
        return False
    return moment.tzinfo is not None
