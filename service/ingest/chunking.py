"""Cut normalised text into chunks bounded by the embedding model's own token count.

The text of each section is split into atoms (words, or token-sized pieces of a word too long for
one chunk). Each chunk is a run of whole atoms, so it never starts or ends with whitespace and the
chunks together cover every non-whitespace character. A chunk ends at the strongest boundary
inside its token window (paragraph, then line, then sentence, then word, then token), as long as
that leaves the chunk at least a quarter full; otherwise a heading or a short line would become a
chunk of its own. Token counts come from one tokenizer call over the whole document; because a
substring can tokenize differently at its edges, every chunk is recounted and shrunk until its own
count is within the bound.
"""

from __future__ import annotations

import bisect
import itertools
import re
from dataclasses import dataclass
from enum import IntEnum
from typing import Protocol

from service.ingest.parsing import ParsedText, Section

SECTION_SEPARATOR = " > "

_WORD = re.compile(r"\S+")
_SENTENCE_TERMINATORS = frozenset(".!?…。！？")
_CLOSERS = frozenset("\"'”’»)]")


class TokenCounter(Protocol):
    """The embedding model's tokenizer as chunking needs it; no special tokens are ever added."""

    def count(self, text: str) -> int: ...

    def offsets(self, text: str) -> list[tuple[int, int]]:
        """The ``[start, end)`` character span of each token of ``text``."""
        ...


@dataclass(frozen=True, slots=True)
class ChunkSpan:
    """One chunk: ``text == parsed.text[char_start:char_end]`` and ``tokens`` counts ``text``."""

    ordinal: int
    char_start: int
    char_end: int
    text: str
    tokens: int
    section: str


class _Break(IntEnum):
    """How strongly the gap before an atom separates it from the previous one."""

    TOKEN = 0
    WORD = 1
    SENTENCE = 2
    LINE = 3
    PARAGRAPH = 4


def chunk_document(
    parsed: ParsedText, counter: TokenCounter, *, max_tokens: int, overlap_tokens: int
) -> list[ChunkSpan]:
    """Chunks of ``parsed`` in text order, none crossing into a section with a new heading."""
    if max_tokens < 1:
        raise ValueError("max_tokens must be at least 1")
    if overlap_tokens < 0:
        raise ValueError("overlap_tokens must not be negative")
    text = parsed.text
    token_starts = sorted(start for start, _ in counter.offsets(text))
    chunks: list[ChunkSpan] = []
    for section in _chunkable_sections(parsed):
        atoms = _atoms(text, section, token_starts, max_tokens)
        cutter = _SectionCutter(text, atoms, counter, max_tokens, overlap_tokens)
        label = SECTION_SEPARATOR.join(section.path)
        for start, end, tokens in cutter.cuts():
            chunks.append(ChunkSpan(len(chunks), start, end, text[start:end], tokens, label))
    return chunks


def _chunkable_sections(parsed: ParsedText) -> list[Section]:
    """Sections tiling the whole text, each heading-only section joined to its first subsection.

    A section holding nothing but its heading line, followed directly by a subsection, would
    otherwise become a chunk of one or two words; the subsection's path already names it.
    Gaps between the given sections (there are none in parser output) get the empty path.
    """
    text = parsed.text
    tiled: list[Section] = []
    position = 0
    for section in sorted(parsed.sections, key=lambda s: s.start):
        start = max(section.start, position)
        if start > position:
            tiled.append(Section(position, start, ()))
        if section.end > start:
            tiled.append(Section(start, section.end, section.path))
            position = section.end
    if position < len(text):
        tiled.append(Section(position, len(text), ()))

    joined: list[Section] = []
    pending_start: int | None = None
    for index, section in enumerate(tiled):
        start = section.start if pending_start is None else pending_start
        following = tiled[index + 1] if index + 1 < len(tiled) else None
        if (
            following is not None
            and section.path
            and following.start == section.end
            and len(following.path) > len(section.path)
            and following.path[: len(section.path)] == section.path
            and "\n" not in text[section.start : section.end].strip()
        ):
            pending_start = start
            continue
        joined.append(Section(start, section.end, section.path))
        pending_start = None
    return joined


@dataclass(slots=True)
class _Atoms:
    """Parallel lists: character span, estimated token count, and the break before each atom."""

    starts: list[int]
    ends: list[int]
    tokens: list[int]
    breaks: list[_Break]

    def split(self, index: int, at: int, first_tokens: int, rest_tokens: int) -> None:
        self.starts.insert(index + 1, at)
        self.ends.insert(index, at)
        self.tokens[index : index + 1] = [first_tokens, rest_tokens]
        self.breaks.insert(index + 1, _Break.TOKEN)


def _atoms(text: str, section: Section, token_starts: list[int], max_tokens: int) -> _Atoms:
    atoms = _Atoms([], [], [], [])
    previous_end = section.start
    first_token = bisect.bisect_left(token_starts, section.start)
    for match in _WORD.finditer(text, section.start, section.end):
        start, end = match.span()
        # Tokens are assigned by where they start, so a token that begins in the gap before a
        # word (tokenizers that fold the space into the token) counts towards that word.
        past_word = bisect.bisect_left(token_starts, end, first_token)
        word_tokens = past_word - first_token
        atoms.breaks.append(_break_before(text, previous_end, start, atoms))
        if word_tokens > max_tokens:
            inner = sorted({s for s in token_starts[first_token:past_word] if start < s < end})
            cuts = [start, *inner, end]
            counted_from = first_token
            for piece_start, piece_end in itertools.pairwise(cuts):
                counted_to = bisect.bisect_left(token_starts, piece_end, counted_from)
                atoms.starts.append(piece_start)
                atoms.ends.append(piece_end)
                atoms.tokens.append(counted_to - counted_from)
                counted_from = counted_to
            atoms.breaks.extend([_Break.TOKEN] * len(inner))
        else:
            atoms.starts.append(start)
            atoms.ends.append(end)
            atoms.tokens.append(word_tokens)
        previous_end = end
        first_token = past_word
    return atoms


def _break_before(text: str, gap_start: int, gap_end: int, atoms: _Atoms) -> _Break:
    if not atoms.starts:
        return _Break.PARAGRAPH
    newlines = text.count("\n", gap_start, gap_end)
    if newlines >= 2:
        return _Break.PARAGRAPH
    if newlines == 1:
        return _Break.LINE
    # A sentence ends in a terminator, perhaps followed by closing quotes or brackets.
    position = gap_start - 1
    word_start = atoms.starts[-1]
    while position > word_start and text[position] in _CLOSERS:
        position -= 1
    if text[position] in _SENTENCE_TERMINATORS:
        return _Break.SENTENCE
    return _Break.WORD


class _SectionCutter:
    """Greedy cutting of one section's atoms into chunks overlapping by about the overlap."""

    def __init__(
        self,
        text: str,
        atoms: _Atoms,
        counter: TokenCounter,
        max_tokens: int,
        overlap_tokens: int,
    ) -> None:
        self._text = text
        self._atoms = atoms
        self._counter = counter
        self._max = max_tokens
        self._overlap = overlap_tokens
        self._min_fill = max(1, max_tokens // 4)

    def cuts(self) -> list[tuple[int, int, int]]:
        """``(char_start, char_end, tokens)`` of each chunk, in order."""
        atoms = self._atoms
        result: list[tuple[int, int, int]] = []
        first, covered = 0, 0
        while covered < len(atoms.starts):
            first, end, tokens = self._next_chunk(first, covered)
            result.append((atoms.starts[first], atoms.ends[end - 1], tokens))
            if end == len(atoms.starts):
                break
            first, covered = self._overlap_start(first, end), end
        return result

    def _next_chunk(self, first: int, covered: int) -> tuple[int, int, int]:
        """The chunk starting at atom ``first`` that reaches past atom ``covered - 1``.

        Returns the (possibly later) first atom, the end atom and the recounted tokens.
        """
        atoms = self._atoms
        limit = self._max
        while True:
            window_end = self._window_end(first, limit)
            if window_end <= covered:
                if first < covered:
                    # The overlap leaves no room for new text: give up some of it.
                    first += 1
                    limit = self._max
                    continue
                tokens = self._count(first, first + 1)
                if tokens <= self._max:
                    return first, first + 1, tokens
                self._split_atom(first)
                limit = self._max
                continue
            end = self._best_end(first, window_end, covered)
            tokens = self._count(first, end)
            if tokens <= self._max:
                return first, end, tokens
            estimated = sum(atoms.tokens[first:end])
            limit = min(estimated - 1, estimated - (tokens - self._max))

    def _window_end(self, first: int, limit: int) -> int:
        tokens = self._atoms.tokens
        end, total = first, 0
        while end < len(tokens) and total + tokens[end] <= limit:
            total += tokens[end]
            end += 1
        return end

    def _best_end(self, first: int, window_end: int, covered: int) -> int:
        atoms = self._atoms
        if window_end == len(atoms.starts):
            return window_end
        best_key: tuple[bool, int, int] | None = None
        fill = sum(atoms.tokens[first:covered])
        for end in range(max(first, covered) + 1, window_end + 1):
            fill += atoms.tokens[end - 1]
            key = (fill >= self._min_fill, int(atoms.breaks[end]), end)
            if best_key is None or key > best_key:
                best_key = key
        assert best_key is not None
        return best_key[2]

    def _overlap_start(self, first: int, end: int) -> int:
        """The first atom of the next chunk, always after ``first``.

        The overlap holds at most as many trailing tokens as allowed and starts where a reader
        would: at the strongest boundary that still keeps half the allowed overlap, else at the
        word boundary furthest back; inside a long word only when no word boundary is in reach.
        """
        atoms = self._atoms
        room = min(self._overlap, self._max - atoms.tokens[end])
        if room <= 0:
            return end
        best_key: tuple[bool, int, int] | None = None
        best_start = end
        total = 0
        for index in range(end - 1, first, -1):
            total += atoms.tokens[index]
            if total > room:
                break
            strength = atoms.breaks[index]
            keeps_half = 2 * total >= room
            key = (strength > _Break.TOKEN, int(strength) if keeps_half else 0, total)
            if best_key is None or key > best_key:
                best_key, best_start = key, index
        return best_start

    def _count(self, first: int, end: int) -> int:
        atoms = self._atoms
        return self._counter.count(self._text[atoms.starts[first] : atoms.ends[end - 1]])

    def _split_atom(self, index: int) -> None:
        """Cut an atom whose own count exceeds the bound at the longest prefix that fits."""
        atoms = self._atoms
        start, end = atoms.starts[index], atoms.ends[index]
        piece = self._text[start:end]
        low, high = 1, len(piece) - 1
        if high < low or self._counter.count(piece[:1]) > self._max:
            raise ValueError(f"cannot fit {piece[:1]!r} into {self._max} tokens")
        while low < high:
            middle = (low + high + 1) // 2
            if self._counter.count(piece[:middle]) <= self._max:
                low = middle
            else:
                high = middle - 1
        atoms.split(
            index,
            start + low,
            self._counter.count(piece[:low]),
            self._counter.count(piece[low:]),
        )
