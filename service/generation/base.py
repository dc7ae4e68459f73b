"""The generator interface and the marker rules every generator's answer obeys.

The contract requires that every ``[n]`` in an answer has a citation and every citation is
used. Generators settle their text with ``settle_markers`` and ``GeneratedAnswer`` refuses to
exist otherwise, so the caller can build citations from ``markers_used`` alone. Settling also
puts each marker where a reader expects it: `` [n]`` after the sentence's final punctuation,
never inside a word or a bracket.
"""

from __future__ import annotations

import re
from collections.abc import Callable, Collection, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any, Protocol

import numpy as np
import numpy.typing as npt

from service.generation.reading import Entity, EntityFinder
from service.generation.spans import PassageWindow
from service.packing.packer import Passage

INSUFFICIENT_EVIDENCE = "insufficient_evidence"

# One bracket holding one or more comma-separated numbers: "[3]", "[1, 2]", "[1,2,5]".
_MARKER_GROUP = re.compile(r"\[\s*(\d+(?:\s*,\s*\d+)*)\s*\]")
_SPACE_BEFORE_PUNCTUATION = re.compile(r"[ \t]+([.,;:!?)])")
_REPEATED_SPACES = re.compile(r"[ \t]{2,}")
# A marker group with the spaces that set it off from the text before it.
_QUOTED_MARKER = re.compile(r"[ \t]*\[\s*\d+(?:\s*,\s*\d+)*\s*\]")
# A plain marker with the spaces that set it off from the text before it.
_PLAIN_MARKER = re.compile(r"[ \t]*\[(\d+)\]")
# What may end a sentence: its marks, then closing quotes or brackets.
_SENTENCE_MARKS = frozenset(".!?…")
_CLOSING_QUOTES = frozenset("\"'”’»")
_BRACKETS = {"(": ")", "[": "]"}
# Punctuation a marker may stand before: it continues the sentence.
_CONTINUING = frozenset(",;:")


@dataclass(frozen=True)
class ConsideredSpan:
    """A span of a passage the generator weighed: its text, its score, and whether the answer
    uses it."""

    marker: int
    text: str
    score: float
    chosen: bool


@dataclass(frozen=True)
class ChunkVector:
    """A stored chunk vector and the document span the chunk covers."""

    start: int
    end: int
    vector: npt.NDArray[np.float32]


@dataclass(frozen=True)
class AnswerSupport:
    """What the answering use case knows beside the question and the passages.

    ``query_vector`` is the question's vector retrieval already computed (None: embed it);
    ``analyzer_tokens`` and ``term_weight`` are the collection's analyzer and each analysed
    term's idf in the index, ``known_term`` whether any chunk holds a term; ``find_entities``
    names the things a text mentions by the collection's own names; ``filter_entities`` are
    those the request's filter pins down;
    ``windows`` holds each passage (by marker) with the document text around it and
    ``document_entities`` the entities each passage's document names in its title and
    attributes; ``chunk_vectors`` holds the stored vectors of each passage's chunks.
    """

    query_vector: npt.NDArray[np.float32] | None = None
    analyzer_tokens: Callable[[str], list[str]] | None = None
    term_weight: Callable[[str], float] | None = None
    known_term: Callable[[str], bool] | None = None
    find_entities: EntityFinder | None = None
    filter_entities: frozenset[Entity] = frozenset()
    windows: Mapping[int, PassageWindow] = field(default_factory=dict)
    document_entities: Mapping[int, frozenset[Entity]] = field(default_factory=dict)
    chunk_vectors: Mapping[int, tuple[ChunkVector, ...]] = field(default_factory=dict)


@dataclass(frozen=True)
class SpanScore:
    """One candidate span as the trace shows it: each part of its score, its total, whether it
    could be an answer at all and, when not, why (``notes``)."""

    marker: int
    kind: str
    text: str
    start: int
    end: int
    semantic: float
    lexical: float
    type_cue: float
    penalty: float
    total: float
    eligible: bool
    notes: tuple[str, ...] = ()

    def as_trace(self) -> dict[str, Any]:
        return {
            "marker": self.marker,
            "kind": self.kind,
            "text": self.text,
            "semantic": round(self.semantic, 4),
            "lexical": round(self.lexical, 4),
            "type_cue": round(self.type_cue, 4),
            "penalty": round(self.penalty, 4),
            "total": round(self.total, 4),
            "eligible": self.eligible,
            "notes": list(self.notes),
        }


@dataclass(frozen=True)
class GeneratedAnswer:
    """A generator's result: an answer, or ``answer=None`` with the ``reason`` it declined.

    ``evidence_score`` is the generator's own measure of support (see each generator);
    ``notes`` are short plain remarks for the trace; ``milliseconds`` is the generation time.
    A generator that scores spans also reports them (``considered``, best first), the
    ``threshold`` it held them to, the ``decision`` in words, and the spans it quoted
    (``quoted``), whose document offsets tell which section each citation is in.
    """

    answer: str | None
    reason: str | None
    markers_used: tuple[int, ...]
    evidence_score: float
    notes: tuple[str, ...]
    milliseconds: float
    considered: tuple[SpanScore, ...] = ()
    threshold: float | None = None
    decision: str = ""
    quoted: tuple[SpanScore, ...] = ()

    def __post_init__(self) -> None:
        if self.answer is None:
            if self.reason is None or self.markers_used:
                raise ValueError("a declined answer needs a reason and uses no markers")
        elif markers_in(self.answer) != self.markers_used:
            raise ValueError("markers_used must list exactly the markers in the answer")


class Generator(Protocol):
    """Turns a question and packed passages into a cited answer or a reasoned refusal.

    ``token_margin`` is the factor the packer multiplies its token count by, so a generator
    whose tokenizer differs from the collection's is never handed more than it can take.
    """

    name: str
    token_margin: float

    def generate(
        self,
        question: str,
        passages: Sequence[Passage],
        support: AnswerSupport | None = None,
    ) -> GeneratedAnswer: ...


@dataclass(frozen=True)
class SettledText:
    text: str
    markers_used: tuple[int, ...]
    removed_markers: tuple[int, ...]


def markers_in(text: str) -> tuple[int, ...]:
    """Distinct markers in order of first appearance, groups like ``[1, 2]`` included."""
    found: dict[int, None] = {}
    for match in _MARKER_GROUP.finditer(text):
        for number in match.group(1).split(","):
            found.setdefault(int(number), None)
    return tuple(found)


def clean_markers(text: str, valid_markers: Collection[int]) -> tuple[str, tuple[int, ...]]:
    """Drop markers that match no passage; rewrite groups as ``[1][2]`` so each is plain.

    Returns the cleaned text and the removed marker numbers (distinct, in order of first
    appearance). Space left before punctuation by a removal is closed up.
    """
    valid = set(valid_markers)
    removed: dict[int, None] = {}

    def rewrite(match: re.Match[str]) -> str:
        kept: list[int] = []
        for number in (int(part) for part in match.group(1).split(",")):
            if number in valid:
                if number not in kept:
                    kept.append(number)
            else:
                removed.setdefault(number, None)
        return "".join(f"[{number}]" for number in kept)

    cleaned = _MARKER_GROUP.sub(rewrite, text)
    if removed:
        cleaned = _SPACE_BEFORE_PUNCTUATION.sub(r"\1", cleaned)
        cleaned = _REPEATED_SPACES.sub(" ", cleaned)
    return cleaned.strip(), tuple(removed)


def place_markers(text: str) -> str:
    """Move each plain marker ``[n]`` to where it reads as a citation of what precedes it.

    A marker inside a word goes to the word's end, one inside a bracket after the bracket's
    close, and one before the sentence's final punctuation (and closing quotes) after it; each
    is then written as a space and ``[n]``, followed by a space unless punctuation that
    continues the sentence follows.
    """
    pieces: list[str] = []
    anchors: list[tuple[int, int]] = []
    length = cursor = 0
    for match in _PLAIN_MARKER.finditer(text):
        piece = text[cursor : match.start()]
        pieces.append(piece)
        length += len(piece)
        anchors.append((length, int(match.group(1))))
        cursor = match.end()
    if not anchors:
        return text
    pieces.append(text[cursor:])
    plain = "".join(pieces)
    placed = sorted(
        (
            (_marker_place(plain, position), order, marker)
            for order, (position, marker) in enumerate(anchors)
        ),
    )
    out: list[str] = []
    cursor = 0
    for index, (position, _, marker) in enumerate(placed):
        if position > cursor or not out:
            out.append(plain[cursor:position].rstrip(" \t"))
            cursor = position
        out.append(f" [{marker}]")
        last_here = index + 1 == len(placed) or placed[index + 1][0] != position
        if last_here and position < len(plain):
            following = plain[position]
            if not following.isspace() and following not in _CONTINUING:
                out.append(" ")
    out.append(plain[cursor:])
    return _REPEATED_SPACES.sub(" ", "".join(out)).strip()


def _marker_place(plain: str, position: int) -> int:
    """Where a marker found at ``position`` of the marker-free ``plain`` text belongs."""
    while position > 0 and plain[position - 1].isspace():
        position -= 1
    while 0 < position < len(plain) and plain[position - 1].isalnum() and plain[position].isalnum():
        position += 1
    open_brackets: list[str] = []
    for character in plain[:position]:
        if character in _BRACKETS:
            open_brackets.append(_BRACKETS[character])
        elif open_brackets and character == open_brackets[-1]:
            open_brackets.pop()
    if open_brackets:
        for index in range(position, len(plain)):
            if plain[index] in _BRACKETS:
                open_brackets.append(_BRACKETS[plain[index]])
            elif plain[index] == open_brackets[-1]:
                open_brackets.pop()
                if not open_brackets:
                    position = index + 1
                    break
    while position < len(plain) and plain[position] in _SENTENCE_MARKS:
        position += 1
        while position < len(plain) and plain[position] in _CLOSING_QUOTES:
            position += 1
    return position


def settle_markers(text: str, valid_markers: Collection[int]) -> SettledText:
    """Clean ``text``, place its markers, and report the markers it then uses: exactly those
    to cite."""
    cleaned, removed = clean_markers(text, valid_markers)
    placed = place_markers(cleaned)
    return SettledText(text=placed, markers_used=markers_in(placed), removed_markers=removed)


def cited_sentences(answer: str) -> dict[int, tuple[str, ...]]:
    """For each marker, the text it cites: what precedes it back to the previous marker (a run
    of markers such as ``[1] [2]`` cites one text), in the order the answer cites them."""
    cited: dict[int, list[str]] = {}
    latest = ""
    cursor = 0
    for match in _MARKER_GROUP.finditer(answer):
        between = answer[cursor : match.start()].strip()
        if between:
            latest = between
        cursor = match.end()
        for number in match.group(1).split(","):
            cited.setdefault(int(number), []).append(latest)
    return {marker: tuple(texts) for marker, texts in cited.items()}


def strip_marker_like(text: str) -> str:
    """Remove bracketed numbers quoted from a source, which would read as our own markers,
    with the spaces before them; the rest of the text stays as quoted."""
    return _QUOTED_MARKER.sub("", text).strip()
