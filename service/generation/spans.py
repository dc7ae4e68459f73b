"""Candidate answers cut the way documents write facts down.

A fact sits in a sentence, a list item, a table row (which only reads as a fact together with
its header: "E-21 | Motor overheating" says nothing without "Code | Meaning"), a key-value line
("Seatpost clamp: Torque 5 Nm") or a short paragraph under a heading. Chunking cuts documents
by tokens, so a passage may begin or end inside a sentence; candidates are therefore cut from
the passage's text widened by the document's own text around it, and a candidate is kept when
it overlaps the passage, so none is a fragment.
"""

from __future__ import annotations

import re
from collections.abc import Iterator, Sequence
from dataclasses import dataclass
from typing import Literal

from service.packing.packer import Passage

SpanKind = Literal["sentence", "item", "row", "line", "paragraph"]

TABLE_CELL_SEPARATOR = " | "
# A paragraph of two or three sentences and at most this many words is a candidate of its own
# beside its sentences: some facts are told over two sentences ("... is dealer only. It takes").
SHORT_PARAGRAPH_WORDS = 60
SHORT_PARAGRAPH_SENTENCES = 3
HEADING_MAX_WORDS = 8

# A sentence ends at ., ! or ? (optionally followed by closing quotes or brackets) when
# whitespace and then a letter, a digit or an opening quote follow. Lower-case text (old
# abstracts) starts its sentences in lower case, so the next letter's case is not required.
_SENTENCE_END = re.compile(r"(?<=[.!?])[\"'”’)\]]*\s+(?=[\"'“‘(\[]?\w)")
_ABBREVIATION = re.compile(
    r"(?:\b(?i:e\.g|i\.e|etc|vs|approx|fig|figs|eq|eqs|ref|refs|no|dr|mr|mrs|ms|st|cf|incl|al)"
    r"|\b\w)\.$"
)
_MARKDOWN_HEADING = re.compile(r"^\s{0,3}#{1,6}\s")
_LIST_BULLET = re.compile(r"^\s*(?:[-*+•]|\d+[.)])\s+")
_KEY_VALUE = re.compile(r"^[^:]{1,60}:\s+\S")
_WORD = re.compile(r"\w")


@dataclass(frozen=True)
class PassageWindow:
    """A packed passage and the document's text just before and after it (empty at the
    document's edges or when the text there is unknown)."""

    passage: Passage
    before: str = ""
    after: str = ""


@dataclass(frozen=True)
class Span:
    """One candidate answer: its text as an answer would quote it, where it lies in its
    document (``start``/``end`` are document offsets), and the heading it sits under."""

    marker: int
    kind: SpanKind
    text: str
    start: int
    end: int
    heading: str


@dataclass(frozen=True)
class _Line:
    start: int
    text: str


def passage_spans(
    window: PassageWindow, headings: Sequence[str] = (), *, heading: str = ""
) -> list[Span]:
    """Candidates of one passage, in text order, each overlapping the passage's own text.

    ``headings`` are the passage's section path and title: a one-line block naming one of them
    is a heading even when it is long or carries a digit. ``heading`` is the one in force where
    the window starts (the passage's section), until the window shows another.
    """
    passage = window.passage
    text = window.before + passage.text + window.after
    offset = passage.char_start - len(window.before)
    low, high = len(window.before), len(window.before) + len(passage.text)
    known = {_key(h) for h in headings}
    spans: list[Span] = []
    for block in _blocks(text):
        first = block[0].text
        if (
            _MARKDOWN_HEADING.match(first)
            or _key(first) in known
            or (_is_heading(first, known) and (len(block) == 1 or _is_line(block[1].text)))
        ):
            heading = _MARKDOWN_HEADING.sub("", first).strip()
            block = block[1:]
            if not block:
                continue
        for kind, start, end, quoted in _block_candidates(block):
            if end <= low or start >= high or not _WORD.search(quoted):
                continue
            spans.append(Span(passage.marker, kind, quoted, offset + start, offset + end, heading))
    return spans


def _blocks(text: str) -> Iterator[list[_Line]]:
    """Runs of non-blank lines, each line with its offset in ``text``."""
    block: list[_Line] = []
    position = 0
    for raw in text.split("\n"):
        if raw.strip():
            block.append(_Line(position, raw))
        elif block:
            yield block
            block = []
        position += len(raw) + 1
    if block:
        yield block


def _key(text: str) -> str:
    return " ".join(text.split()).casefold()


def _is_heading(line: str, known: set[str]) -> bool:
    if _MARKDOWN_HEADING.match(line) or _key(line) in known:
        return True
    words = line.split()
    return (
        len(words) <= HEADING_MAX_WORDS
        and not _LIST_BULLET.match(line)
        and TABLE_CELL_SEPARATOR not in line
        and not re.search(r"[.!?:;]\W*$|\d", line)
    )


def _is_line(text: str) -> bool:
    """A line that stands alone in its block: a list item, a table row or a key-value line."""
    return bool(_LIST_BULLET.match(text) or TABLE_CELL_SEPARATOR in text or _KEY_VALUE.match(text))


def _block_candidates(block: list[_Line]) -> Iterator[tuple[SpanKind, int, int, str]]:
    """(kind, start, end, quoted text) of a block; offsets into the window's text."""
    if len(block) >= 2 and all(TABLE_CELL_SEPARATOR in line.text for line in block):
        yield from _table_rows(block)
        return
    if len(block) >= 2 and all(
        _LIST_BULLET.match(line.text) or _KEY_VALUE.match(line.text) for line in block
    ):
        for line in block:
            bullet = _LIST_BULLET.match(line.text)
            kind: SpanKind = "item" if bullet else "line"
            skip = bullet.end() if bullet else len(line.text) - len(line.text.lstrip())
            yield (
                kind,
                line.start + skip,
                line.start + len(line.text.rstrip()),
                _flat(line.text[skip:]),
            )
        return
    # Prose, possibly with list items inside it: an item starts a unit of its own.
    units: list[list[_Line]] = []
    for line in block:
        if _LIST_BULLET.match(line.text) or not units:
            units.append([line])
        else:
            units[-1].append(line)
    for unit in units:
        bullet = _LIST_BULLET.match(unit[0].text)
        start = unit[0].start + (bullet.end() if bullet else 0)
        end = unit[-1].start + len(unit[-1].text)
        if bullet:
            yield "item", start, end, _flat(_joined(unit, start, end))
            continue
        prose = _joined(unit, start, end)
        sentences = list(_sentences(prose))
        for first, last in sentences:
            yield "sentence", start + first, start + last, _flat(prose[first:last])
        words = len(prose.split())
        if 2 <= len(sentences) <= SHORT_PARAGRAPH_SENTENCES and words <= SHORT_PARAGRAPH_WORDS:
            first, last = sentences[0][0], sentences[-1][1]
            yield "paragraph", start + first, start + last, _flat(prose[first:last])


def _joined(unit: list[_Line], start: int, end: int) -> str:
    """The unit's text from ``start`` to ``end`` with its line breaks as spaces (same length)."""
    base = unit[0].start
    # Lines of a block are consecutive in the window, so offsets map one to one.
    text = "\n".join(line.text for line in unit)
    return text[start - base : end - base].replace("\n", " ")


def _sentences(prose: str) -> Iterator[tuple[int, int]]:
    start = len(prose) - len(prose.lstrip())
    for boundary in _SENTENCE_END.finditer(prose):
        candidate = prose[start : boundary.start()]
        if _ABBREVIATION.search(candidate.rstrip("\"'”’)]")):
            continue
        if candidate.strip():
            yield start, start + len(candidate.rstrip())
        start = boundary.end()
    tail = prose[start:]
    if tail.strip():
        yield start, start + len(tail.rstrip())


def _table_rows(block: list[_Line]) -> Iterator[tuple[SpanKind, int, int, str]]:
    header = [cell.strip() for cell in block[0].text.split("|")]
    header = [cell for cell in header if cell]
    for line in block[1:]:
        cells = [cell.strip() for cell in line.text.split("|")]
        cells = [cell for cell in cells if cell]
        if not cells:
            continue
        if len(cells) == len(header):
            quoted = "; ".join(f"{name}: {cell}" for name, cell in zip(header, cells, strict=True))
        else:
            quoted = TABLE_CELL_SEPARATOR.join(cells)
        yield "row", line.start, line.start + len(line.text.rstrip()), quoted


def _flat(text: str) -> str:
    return " ".join(text.split())
