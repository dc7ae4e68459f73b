"""The generator interface and the marker rules every generator's answer obeys.

The contract requires that every ``[n]`` in an answer has a citation and every citation is
used. Generators settle their text with ``settle_markers`` and ``GeneratedAnswer`` refuses to
exist otherwise, so the caller can build citations from ``markers_used`` alone.
"""

from __future__ import annotations

import re
from collections.abc import Collection, Sequence
from dataclasses import dataclass
from typing import Protocol

from service.packing.packer import Passage

INSUFFICIENT_EVIDENCE = "insufficient_evidence"

# One bracket holding one or more comma-separated numbers: "[3]", "[1, 2]", "[1,2,5]".
_MARKER_GROUP = re.compile(r"\[\s*(\d+(?:\s*,\s*\d+)*)\s*\]")
_SPACE_BEFORE_PUNCTUATION = re.compile(r"[ \t]+([.,;:!?)])")
_REPEATED_SPACES = re.compile(r"[ \t]{2,}")


@dataclass(frozen=True)
class ConsideredSpan:
    """A span of a passage the generator weighed: its text, its score, and whether the answer
    uses it."""

    marker: int
    text: str
    score: float
    chosen: bool


@dataclass(frozen=True)
class GeneratedAnswer:
    """A generator's result: an answer, or ``answer=None`` with the ``reason`` it declined.

    ``evidence_score`` is the generator's own measure of support (see each generator);
    ``notes`` are short plain remarks for the trace; ``milliseconds`` is the generation time.
    ``considered`` lists the spans it weighed, or is None for a generator that cannot say
    (a chat model is handed whole passages).
    """

    answer: str | None
    reason: str | None
    markers_used: tuple[int, ...]
    evidence_score: float
    notes: tuple[str, ...]
    milliseconds: float
    considered: tuple[ConsideredSpan, ...] | None = None

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

    def generate(self, question: str, passages: Sequence[Passage]) -> GeneratedAnswer: ...


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


def settle_markers(text: str, valid_markers: Collection[int]) -> SettledText:
    """Clean ``text`` and report the markers it then uses: exactly those to cite."""
    cleaned, removed = clean_markers(text, valid_markers)
    return SettledText(text=cleaned, markers_used=markers_in(cleaned), removed_markers=removed)


def strip_marker_like(text: str) -> str:
    """Remove bracketed numbers quoted from a source, which would read as our own markers."""
    without = _MARKER_GROUP.sub("", text)
    without = _SPACE_BEFORE_PUNCTUATION.sub(r"\1", without)
    return _REPEATED_SPACES.sub(" ", without).strip()
