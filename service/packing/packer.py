"""Fit the best-ranked chunks into a token budget as numbered, citable passages.

The packer is greedy: chunks are taken by descending score (ties by chunk id) and each one is
either dropped as a near-duplicate of what the context already holds, merged into a passage of
its own document that it touches, started as a new passage, or skipped because the result would
not fit. Every decision is made on the fully rendered context, recounted with the collection's
tokenizer, because a tokenizer may merge tokens across a separator and per-part sums would then
drift from the count the caller reports.
"""

from __future__ import annotations

import math
import re
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from typing import Literal

import numpy as np
import numpy.typing as npt

Outcome = Literal["included", "merged", "budget", "duplicate"]

HEADER_SEPARATOR = " — "
PASSAGE_SEPARATOR = "\n\n"
_WHITESPACE = re.compile(r"\s+")


@dataclass(frozen=True)
class PackCandidate:
    """One ranked chunk offered to the packer; ``vector`` is unit-normalised when present."""

    chunk_id: str
    document_id: str
    title: str
    section: str | None
    text: str
    ordinal: int
    char_start: int
    char_end: int
    score: float
    vector: npt.NDArray[np.float32] | None = field(default=None, compare=False)


@dataclass(frozen=True)
class Passage:
    """A span of one document in the context; ``tokens`` counts its header line and text."""

    marker: int
    document_id: str
    title: str
    section: str | None
    chunk_ids: tuple[str, ...]
    text: str
    tokens: int
    char_start: int
    char_end: int


@dataclass(frozen=True)
class PackOutcome:
    """What happened to one considered chunk; ``marker`` is set for included and merged ones."""

    chunk_id: str
    outcome: Outcome
    marker: int | None
    score: float


@dataclass(frozen=True)
class PackedContext:
    context: str
    passages: tuple[Passage, ...]
    tokens_used: int
    token_budget: int
    considered: tuple[PackOutcome, ...]


@dataclass(frozen=True)
class _Draft:
    """A passage while packing; chunks are kept in document order."""

    chunks: tuple[PackCandidate, ...]
    text: str

    @property
    def document_id(self) -> str:
        return self.chunks[0].document_id

    @property
    def char_start(self) -> int:
        return min(chunk.char_start for chunk in self.chunks)

    @property
    def char_end(self) -> int:
        return max(chunk.char_end for chunk in self.chunks)

    def touches(self, chunk: PackCandidate) -> bool:
        """Adjacent ordinals or overlapping (or abutting) character spans of the same document."""
        if chunk.document_id != self.document_id:
            return False
        ordinals = {c.ordinal for c in self.chunks}
        if chunk.ordinal - 1 in ordinals or chunk.ordinal + 1 in ordinals:
            return True
        return chunk.char_start <= self.char_end and chunk.char_end >= self.char_start


def normalize_for_duplicates(text: str) -> str:
    """Casefolded with whitespace collapsed, so reflowed copies of one text compare equal."""
    return _WHITESPACE.sub(" ", text).strip().casefold()


def header_line(marker: int, title: str, section: str | None) -> str:
    """``[n] Title — section``; line breaks in either part are flattened to keep one line."""
    title_line = _WHITESPACE.sub(" ", title).strip()
    section_line = _WHITESPACE.sub(" ", section).strip() if section else ""
    if section_line:
        return f"[{marker}] {title_line}{HEADER_SEPARATOR}{section_line}"
    return f"[{marker}] {title_line}"


def render_passage(marker: int, title: str, section: str | None, text: str) -> str:
    return f"{header_line(marker, title, section)}\n{text}"


def join_by_offsets(chunks: Sequence[PackCandidate]) -> str:
    """Join chunk texts of one document without repeating the characters they share.

    Used only when the document's text is not available; a gap between chunks (text the
    chunker left out, usually whitespace) becomes a single line break.
    """
    ordered = sorted(chunks, key=lambda c: (c.char_start, c.char_end))
    pieces: list[str] = []
    covered_until: int | None = None
    for chunk in ordered:
        if covered_until is None:
            pieces.append(chunk.text)
            covered_until = chunk.char_end
            continue
        if chunk.char_end <= covered_until:
            continue
        if chunk.char_start > covered_until:
            pieces.append("\n")
            pieces.append(chunk.text)
        else:
            pieces.append(chunk.text[covered_until - chunk.char_start :])
        covered_until = chunk.char_end
    return "".join(pieces)


def pack_context(
    candidates: Sequence[PackCandidate],
    *,
    token_budget: int,
    count_tokens: Callable[[str], int],
    token_margin: float = 1.0,
    duplicate_cosine: float = 0.97,
    document_span: Callable[[str, int, int], str | None],
) -> PackedContext:
    """Pack ``candidates`` so that ``ceil(count_tokens(context) * token_margin) <= token_budget``.

    The duplicate test runs first, against every chunk already in the context, so no text is
    repeated even where a chunk would also have merged. A merged passage's text is the
    document's text over the union of its chunks' spans (``document_span``), or the chunk texts
    joined by offsets when that returns None. A chunk that bridges two passages of its document
    joins them into the earlier one. A passage's section is that of its first chunk in document
    order. Markers follow the order of passages in the context.
    """
    if token_budget < 0:
        raise ValueError("token_budget must not be negative")
    if token_margin <= 0:
        raise ValueError("token_margin must be positive")

    def fits(tokens: int) -> bool:
        return math.ceil(tokens * token_margin) <= token_budget

    drafts: list[_Draft] = []
    decisions: list[tuple[PackCandidate, Outcome]] = []
    seen_texts: set[str] = set()
    seen_vectors: list[npt.NDArray[np.float32]] = []

    def is_duplicate(chunk: PackCandidate) -> bool:
        if normalize_for_duplicates(chunk.text) in seen_texts:
            return True
        if chunk.vector is None or not seen_vectors:
            return False
        similarities = np.stack(seen_vectors) @ chunk.vector.astype(np.float32)
        return bool(np.max(similarities) >= duplicate_cosine)

    def merged_text(chunks: tuple[PackCandidate, ...]) -> str:
        start = min(c.char_start for c in chunks)
        end = max(c.char_end for c in chunks)
        span = document_span(chunks[0].document_id, start, end)
        return span if span is not None else join_by_offsets(chunks)

    tokens_used = count_tokens("")
    if not fits(tokens_used):
        raise ValueError(f"count_tokens('') is {tokens_used}: the counter must not pad")
    ordered = sorted(candidates, key=lambda c: (-c.score, c.chunk_id))
    for chunk in ordered:
        if is_duplicate(chunk):
            decisions.append((chunk, "duplicate"))
            continue
        touched = [index for index, draft in enumerate(drafts) if draft.touches(chunk)]
        if touched:
            absorbed = [c for index in touched for c in drafts[index].chunks]
            chunks = tuple(sorted([*absorbed, chunk], key=lambda c: (c.char_start, c.ordinal)))
            merged = _Draft(chunks=chunks, text=merged_text(chunks))
            trial = [draft for index, draft in enumerate(drafts) if index not in touched[1:]]
            trial[touched[0]] = merged
            outcome: Outcome = "merged"
        else:
            trial = [*drafts, _Draft(chunks=(chunk,), text=chunk.text)]
            outcome = "included"
        trial_tokens = count_tokens(_render(trial))
        if not fits(trial_tokens):
            decisions.append((chunk, "budget"))
            continue
        drafts = trial
        tokens_used = trial_tokens
        decisions.append((chunk, outcome))
        seen_texts.add(normalize_for_duplicates(chunk.text))
        if chunk.vector is not None:
            seen_vectors.append(chunk.vector.astype(np.float32))

    context = _render(drafts)
    passages = tuple(
        Passage(
            marker=marker,
            document_id=draft.document_id,
            title=draft.chunks[0].title,
            section=draft.chunks[0].section,
            chunk_ids=tuple(c.chunk_id for c in draft.chunks),
            text=draft.text,
            tokens=count_tokens(
                render_passage(marker, draft.chunks[0].title, draft.chunks[0].section, draft.text)
            ),
            char_start=draft.char_start,
            char_end=draft.char_end,
        )
        for marker, draft in enumerate(drafts, start=1)
    )
    return PackedContext(
        context=context,
        passages=passages,
        tokens_used=tokens_used,
        token_budget=token_budget,
        considered=_outcomes(decisions, passages),
    )


def _render(drafts: Sequence[_Draft]) -> str:
    return PASSAGE_SEPARATOR.join(
        render_passage(marker, draft.chunks[0].title, draft.chunks[0].section, draft.text)
        for marker, draft in enumerate(drafts, start=1)
    )


def _outcomes(
    decisions: Sequence[tuple[PackCandidate, Outcome]], passages: Sequence[Passage]
) -> tuple[PackOutcome, ...]:
    """Final outcomes: a passage's first-packed chunk is ``included``, the rest ``merged``.

    A passage that was folded into an earlier one when a later chunk bridged them is reported
    as merged, so each marker has exactly one included chunk.
    """
    marker_of = {chunk_id: p.marker for p in passages for chunk_id in p.chunk_ids}
    leads: set[int] = set()
    outcomes: list[PackOutcome] = []
    for chunk, decided in decisions:
        marker = marker_of.get(chunk.chunk_id) if decided in ("included", "merged") else None
        outcome: Outcome = decided
        if marker is not None:
            outcome = "merged" if marker in leads else "included"
            leads.add(marker)
        outcomes.append(PackOutcome(chunk.chunk_id, outcome, marker, chunk.score))
    return tuple(outcomes)
