"""Fit the best-ranked chunks into a token budget as numbered, citable passages.

The packer is greedy: chunks are taken by descending score (ties by chunk id) and each one is
either dropped as a near-duplicate of what the context already holds, merged into a passage of
its own document that it touches, started as a new passage, or skipped because the result would
not fit.

The context is passages joined by a blank line, each a header line ``[n] label`` joined to its
text by a line break. The collection's tokenizer (BERT's WordPiece: a normalizer that works one
character at a time, then a split at whitespace and punctuation before the word pieces) never
joins characters across a space, tab or line break and counts those as nothing, so text cut
where one side is such a character counts as the sum of its parts. The packer relies on that:
it counts each marker ``[n]`` and each header label once, a chunk's text once (not at all when
the caller passes its stored count), and on a merge only the text the merge adds; it never
renders or counts the whole context while deciding. ``count_tokens`` must have this property;
the property tests hold ``tokens_used`` to the real tokenizer's count of the context.
"""

from __future__ import annotations

import math
import re
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from typing import Literal, NamedTuple

import numpy as np
import numpy.typing as npt

Outcome = Literal["included", "merged", "budget", "duplicate"]

HEADER_SEPARATOR = " — "
PASSAGE_SEPARATOR = "\n\n"
_MARKER_JOINT = " "
_HEADER_JOINT = "\n"
_WHITESPACE = re.compile(r"\s+")
# Characters the tokenizer splits words at and counts as nothing; other characters Python calls
# whitespace may be deleted by its normalizer instead (U+000B, U+001C, U+0085), joining words.
_SPLITS = frozenset(" \t\n\r")


class PackCandidate(NamedTuple):
    """One ranked chunk offered to the packer; ``vector`` is unit-normalised when present.

    ``tokens`` is ``count_tokens(text)`` when the caller already has it (the index stores it
    for every chunk); the packer counts the text itself when it is None. A named tuple, like
    ``PackOutcome``: one is made for every ranked chunk a context or answer considers.
    """

    chunk_id: str
    document_id: str
    title: str
    section: str | None
    text: str
    ordinal: int
    char_start: int
    char_end: int
    score: float
    vector: npt.NDArray[np.float32] | None = None
    tokens: int | None = None


@dataclass(frozen=True)
class SectionEntry:
    """Where a passage enters a section: the document offset of its first chunk there."""

    char_start: int
    path: str


@dataclass(frozen=True)
class Passage:
    """A span of one document in the context; ``tokens`` counts its header line and text.

    ``section`` is the heading path in force where the passage starts; ``sections`` lists every
    section the passage reaches, in document order, the first of them ``section``'s (empty for
    a passage built without its chunks' sections, which then reads as ``section`` alone).
    """

    marker: int
    document_id: str
    title: str
    section: str | None
    chunk_ids: tuple[str, ...]
    text: str
    tokens: int
    char_start: int
    char_end: int
    sections: tuple[SectionEntry, ...] = ()

    @property
    def section_paths(self) -> tuple[str, ...]:
        if not self.sections:
            return (self.section or "",)
        return tuple(entry.path for entry in self.sections)


class PackOutcome(NamedTuple):
    """What happened to one considered chunk; ``marker`` is set for included and merged ones,
    ``duplicate_of`` names the packed chunk a duplicate copies (same text, or the most similar
    vector at or above the duplicate cosine).

    A named tuple rather than a frozen dataclass: one is made for every candidate, and a frozen
    dataclass costs several times as much to make.
    """

    chunk_id: str
    outcome: Outcome
    marker: int | None
    score: float
    duplicate_of: str | None = None


@dataclass(frozen=True)
class PackedContext:
    context: str
    passages: tuple[Passage, ...]
    tokens_used: int
    token_budget: int
    considered: tuple[PackOutcome, ...]


@dataclass(frozen=True, eq=False)
class _Draft:
    """A passage while packing: its chunks in document order, its text, the tokens of its
    header label and of its text; ``slot`` is its place among the passages."""

    chunks: tuple[PackCandidate, ...]
    text: str
    label_tokens: int
    text_tokens: int
    slot: int
    char_start: int
    char_end: int
    ordinals: frozenset[int]

    @classmethod
    def of(
        cls,
        chunks: tuple[PackCandidate, ...],
        text: str,
        tokens: tuple[int, int],
        slot: int,
    ) -> _Draft:
        return cls(
            chunks=chunks,
            text=text,
            label_tokens=tokens[0],
            text_tokens=tokens[1],
            slot=slot,
            char_start=min(c.char_start for c in chunks),
            char_end=max(c.char_end for c in chunks),
            ordinals=frozenset(c.ordinal for c in chunks),
        )

    @property
    def body(self) -> int:
        return self.label_tokens + self.text_tokens

    def touches(self, chunk: PackCandidate) -> bool:
        """Adjacent ordinals or overlapping (or abutting) character spans; the caller has
        already matched the document."""
        return (
            chunk.ordinal - 1 in self.ordinals
            or chunk.ordinal + 1 in self.ordinals
            or (chunk.char_start <= self.char_end and chunk.char_end >= self.char_start)
        )


def normalize_for_duplicates(text: str) -> str:
    """Casefolded with whitespace collapsed, so reflowed copies of one text compare equal."""
    return " ".join(text.split()).casefold()


def header_label(title: str, section: str | None) -> str:
    """``Title — section``; line breaks in either part are flattened to keep one line."""
    title_line = _WHITESPACE.sub(" ", title).strip()
    section_line = _WHITESPACE.sub(" ", section).strip() if section else ""
    if section_line:
        return f"{title_line}{HEADER_SEPARATOR}{section_line}"
    return title_line


def header_line(marker: int, title: str, section: str | None) -> str:
    return f"[{marker}]{_MARKER_JOINT}{header_label(title, section)}"


def render_passage(marker: int, title: str, section: str | None, text: str) -> str:
    return f"{header_line(marker, title, section)}{_HEADER_JOINT}{text}"


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


class _PartCounts:
    """Token counts of the context's parts, each counted once per packing."""

    def __init__(self, count_tokens: Callable[[str], int]) -> None:
        self.count = count_tokens
        self.joints = count_tokens(_MARKER_JOINT) + count_tokens(_HEADER_JOINT)
        self.separator = count_tokens(PASSAGE_SEPARATOR)
        self._marker_totals = [0]
        self._labels: dict[tuple[str, str | None], int] = {}

    def markers(self, passages: int) -> int:
        """Tokens of the markers ``[1]`` to ``[passages]`` together."""
        totals = self._marker_totals
        while len(totals) <= passages:
            totals.append(totals[-1] + self.count(f"[{len(totals)}]"))
        return totals[passages]

    def label(self, chunk: PackCandidate) -> int:
        key = (chunk.title, chunk.section)
        tokens = self._labels.get(key)
        if tokens is None:
            tokens = self._labels[key] = self.count(header_label(chunk.title, chunk.section))
        return tokens

    def text(self, chunk: PackCandidate) -> int:
        return chunk.tokens if chunk.tokens is not None else self.count(chunk.text)

    def merged(self, text: str, start: int, touched: Sequence[_Draft]) -> int:
        """Tokens of a merged passage's ``text``, which begins at ``start`` in its document.

        Where the touched passages' texts lie at their own offsets in ``text``, each cut
        between them and the new text around them has splitting whitespace on one side, and
        they do not overlap, only the new text is counted; otherwise all of it is.
        """
        pieces: list[tuple[int, int]] = []
        known = 0
        cursor = 0
        for draft in sorted(touched, key=lambda d: d.char_start):
            offset = draft.char_start - start
            if (
                offset < cursor
                or offset + len(draft.text) > len(text)
                or text[offset : offset + len(draft.text)] != draft.text
            ):
                return self.count(text)
            pieces.append((cursor, offset))
            cursor = offset + len(draft.text)
            known += draft.text_tokens
        pieces.append((cursor, len(text)))
        cuts = {cut for piece in pieces for cut in piece} - {0, len(text)}
        if any(text[cut - 1] not in _SPLITS and text[cut] not in _SPLITS for cut in cuts):
            return self.count(text)
        return known + sum(self.count(text[a:b]) for a, b in pieces if b > a)

    def context(self, passages: int, bodies: int) -> int:
        """Tokens of a context of ``passages`` passages whose labels and texts hold ``bodies``."""
        if passages == 0:
            return 0
        return (
            self.markers(passages)
            + passages * self.joints
            + bodies
            + (passages - 1) * self.separator
        )

    def passage(self, marker: int, body: int) -> int:
        return self.markers(marker) - self.markers(marker - 1) + self.joints + body


class _PackedChunks:
    """What the duplicate test compares a candidate with: the chunks packed before it.

    Texts: two texts can be equal after normalising only if their first and last words are, so
    a candidate's text is normalised in full only when its end words match a packed chunk's.

    Vectors: every candidate is known in advance, in the order it will be considered, so the
    cosines are computed a block of candidates at a time: one matrix product of the block with
    the chunks packed before it, and for each chunk packed inside the block one product with
    the block's later candidates. Each candidate is compared with exactly the chunks packed
    before it, at the cost of a few matrix products instead of one per candidate.
    """

    BLOCK = 64

    def __init__(self, ordered: Sequence[PackCandidate], duplicate_cosine: float) -> None:
        self._threshold = duplicate_cosine
        self._texts: dict[str, str] = {}
        self._ends: set[tuple[str, str]] = set()
        with_vectors = [position for position, c in enumerate(ordered) if c.vector is not None]
        self._row_of = [-1] * len(ordered)
        for row, position in enumerate(with_vectors):
            self._row_of[position] = row
        vectors = [c.vector for c in ordered if c.vector is not None]
        self._matrix = np.zeros((0, 0), dtype=np.float32)
        if vectors:
            self._matrix = np.stack(vectors).astype(np.float32, copy=False)
        self._packed_rows: list[int] = []
        self._packed_ids: list[str] = []
        self._block_start = self._block_end = 0
        self._best: list[float] = []

    def copy_in_context(self, position: int, chunk: PackCandidate) -> str | None:
        """The chunk id of a packed chunk this one copies, or None when it copies none."""
        if _end_words(chunk.text) in self._ends:
            same_text = self._texts.get(normalize_for_duplicates(chunk.text))
            if same_text is not None:
                return same_text
        row = self._row_of[position]
        if row < 0 or not self._packed_rows:
            return None
        if row >= self._block_end:
            end = min(row + self.BLOCK, len(self._matrix))
            packed = self._matrix[self._packed_rows]
            self._best = (self._matrix[row:end] @ packed.T).max(axis=1).tolist()
            self._block_start, self._block_end = row, end
        if self._best[row - self._block_start] < self._threshold:
            return None
        # Which packed chunk it copies is worked out only for a duplicate, which is rare.
        closest = int(np.argmax(self._matrix[self._packed_rows] @ self._matrix[row]))
        return self._packed_ids[closest]

    def add(self, position: int, chunk: PackCandidate) -> None:
        self._texts.setdefault(normalize_for_duplicates(chunk.text), chunk.chunk_id)
        self._ends.add(_end_words(chunk.text))
        row = self._row_of[position]
        if row < 0:
            return
        self._packed_rows.append(row)
        self._packed_ids.append(chunk.chunk_id)
        if row + 1 < self._block_end:
            later = self._matrix[row + 1 : self._block_end] @ self._matrix[row]
            best, offset = self._best, row + 1 - self._block_start
            for index, similarity in enumerate(later.tolist(), start=offset):
                if similarity > best[index]:
                    best[index] = similarity


def _end_words(text: str) -> tuple[str, str]:
    """The first and last words of ``normalize_for_duplicates(text)``.

    Each is looked for in the text's first or last 64 characters, and in the whole text only
    when no whitespace ends it there.
    """
    head = text[:64].split(maxsplit=1)
    if len(head) < 2:
        head = text.split(maxsplit=1)
        if not head:
            return ("", "")
    tail = text[-64:].rsplit(maxsplit=1)
    if len(tail) < 2:
        tail = text.rsplit(maxsplit=1)
    return (head[0].casefold(), tail[-1].casefold())


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
    order, and its sections those of all its chunks. Markers follow the order of passages in the
    context.
    """
    if token_budget < 0:
        raise ValueError("token_budget must not be negative")
    if token_margin <= 0:
        raise ValueError("token_margin must be positive")
    empty = count_tokens("")
    if empty != 0:
        raise ValueError(f"count_tokens('') is {empty}: the counter must not pad")

    def fits(tokens: int) -> bool:
        return math.ceil(tokens * token_margin) <= token_budget

    parts = _PartCounts(count_tokens)
    ordered = sorted(candidates, key=lambda c: (-c.score, c.chunk_id))
    packed = _PackedChunks(ordered, duplicate_cosine)
    slots: list[_Draft | None] = []
    by_document: dict[str, list[_Draft]] = {}
    decisions: list[tuple[PackCandidate, Outcome]] = []
    copies: dict[str, str] = {}
    passages = bodies = tokens_used = 0
    # A context's count grows one for one with its bodies' tokens, so the count of the context
    # with one more passage is this floor plus that passage's body; it changes only when a
    # chunk is packed.
    next_passage_floor = parts.context(1, 0)
    for position, chunk in enumerate(ordered):
        copied = packed.copy_in_context(position, chunk)
        if copied is not None:
            decisions.append((chunk, "duplicate"))
            copies[chunk.chunk_id] = copied
            continue
        family = by_document.setdefault(chunk.document_id, [])
        touched = []
        if family:
            touched = sorted((d for d in family if d.touches(chunk)), key=lambda d: d.slot)
        outcome: Outcome
        if touched:
            chunks = tuple(
                sorted(
                    [*(c for d in touched for c in d.chunks), chunk],
                    key=lambda c: (c.char_start, c.ordinal),
                )
            )
            start = min(c.char_start for c in chunks)
            end = max(c.char_end for c in chunks)
            text = document_span(chunk.document_id, start, end)
            if text is None:
                text = join_by_offsets(chunks)
            tokens = (parts.label(chunks[0]), parts.merged(text, start, touched))
            trial_passages = passages - len(touched) + 1
            trial_bodies = bodies - sum(d.body for d in touched) + sum(tokens)
            trial_tokens = parts.context(trial_passages, trial_bodies)
            if not fits(trial_tokens):
                decisions.append((chunk, "budget"))
                continue
            draft = _Draft.of(chunks, text, tokens, touched[0].slot)
            for old in touched:
                slots[old.slot] = None
                family.remove(old)
            slots[draft.slot] = draft
            outcome = "merged"
        else:
            text_tokens = parts.text(chunk)
            trial_passages = passages + 1
            # Without the label the count is a lower bound: most chunks that do not fit are
            # turned away before their header is counted.
            if not fits(next_passage_floor + text_tokens):
                decisions.append((chunk, "budget"))
                continue
            tokens = (parts.label(chunk), text_tokens)
            trial_bodies = bodies + sum(tokens)
            trial_tokens = parts.context(trial_passages, trial_bodies)
            if not fits(trial_tokens):
                decisions.append((chunk, "budget"))
                continue
            draft = _Draft.of((chunk,), chunk.text, tokens, len(slots))
            slots.append(draft)
            outcome = "included"
        family.append(draft)
        passages, bodies, tokens_used = trial_passages, trial_bodies, trial_tokens
        next_passage_floor = parts.context(passages + 1, bodies)
        decisions.append((chunk, outcome))
        packed.add(position, chunk)

    drafts = [draft for draft in slots if draft is not None]
    result = tuple(
        Passage(
            marker=marker,
            document_id=draft.chunks[0].document_id,
            title=draft.chunks[0].title,
            section=draft.chunks[0].section,
            chunk_ids=tuple(c.chunk_id for c in draft.chunks),
            text=draft.text,
            tokens=parts.passage(marker, draft.body),
            char_start=draft.char_start,
            char_end=draft.char_end,
            sections=_section_entries(draft.chunks),
        )
        for marker, draft in enumerate(drafts, start=1)
    )
    context = PASSAGE_SEPARATOR.join(
        render_passage(p.marker, p.title, p.section, p.text) for p in result
    )
    return PackedContext(
        context=context,
        passages=result,
        tokens_used=tokens_used,
        token_budget=token_budget,
        considered=_outcomes(decisions, result, copies),
    )


def _section_entries(chunks: Sequence[PackCandidate]) -> tuple[SectionEntry, ...]:
    """Each run of chunks (in document order) that shares a section, as one entry.

    Chunks never straddle a heading, so where a run begins is where the passage enters it.
    """
    entries: list[SectionEntry] = []
    for chunk in chunks:
        path = chunk.section or ""
        if not entries or entries[-1].path != path:
            entries.append(SectionEntry(chunk.char_start, path))
    return tuple(entries)


def _outcomes(
    decisions: Sequence[tuple[PackCandidate, Outcome]],
    passages: Sequence[Passage],
    copies: Mapping[str, str],
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
        outcomes.append(
            PackOutcome(chunk.chunk_id, outcome, marker, chunk.score, copies.get(chunk.chunk_id))
        )
    return tuple(outcomes)
