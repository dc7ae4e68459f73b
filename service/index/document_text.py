"""A document's text over any span its chunks cover, rebuilt from the chunks of one snapshot.

A merged passage quotes its document over the union of its chunks' spans. Read from the store,
that text would be whatever version is stored now, not necessarily the version the query
ranked. The chunks of one snapshot are all of one version, and together with the characters
between consecutive chunks (kept per chunk: nearly always one of a few whitespace strings, each
held once) they rebuild the document exactly from its first chunk's start to its last chunk's
end.
"""

from __future__ import annotations

import itertools
import sys
from collections.abc import Iterable, Sequence


def gaps_between(text: str, spans: Sequence[tuple[int, int]]) -> list[str]:
    """For each ``(start, end)`` span in text order, the text from its end to the next span's
    start: empty when the two overlap or touch, and after the last span."""
    gaps = []
    for (_, end), (next_start, _) in itertools.pairwise(spans):
        gaps.append(sys.intern(text[end:next_start]) if next_start > end else "")
    if spans:
        gaps.append("")
    return gaps


def rebuild_span(chunks: Iterable[tuple[int, int, str, str]], start: int, end: int) -> str | None:
    """``text[start:end]`` from ``(char_start, char_end, chunk text, gap after)`` in text order,
    or None when the chunks and gaps leave part of the span uncovered."""
    pieces: list[str] = []
    position = start
    for chunk_start, chunk_end, text, gap in chunks:
        if position >= end:
            break
        if chunk_end > position:
            if chunk_start > position:
                return None
            until = min(chunk_end, end)
            pieces.append(text[position - chunk_start : until - chunk_start])
            position = until
        gap_end = chunk_end + len(gap)
        if chunk_end <= position < min(gap_end, end):
            until = min(gap_end, end)
            pieces.append(gap[position - chunk_end : until - chunk_end])
            position = until
    return "".join(pieces) if position >= end else None
