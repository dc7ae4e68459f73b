"""The section a citation names: the one its cited sentence is in, not just the passage's first.

A merged passage can run across a heading, so the sentence an answer cites may lie under a later
heading than the one in force where the passage starts.
"""

from __future__ import annotations

import bisect
import re

from service.packing.packer import Passage

_WORD = re.compile(r"\w+")
# A quote of more words than this is matched by its first ones: enough to place it, and the
# search for the longest shared run grows with the square of the quote's length.
_QUOTE_WORDS = 40
# A shorter shared run is as likely to be a common phrase as the quoted sentence.
_MIN_RUN = 3


def section_of_quote(passage: Passage, quote: str) -> str:
    """The heading path in force where ``quote`` lies in ``passage``'s text.

    Words are compared case-folded, so a quote with its whitespace collapsed, its list bullet
    dropped or bracketed numbers taken out is still found. Where the quote's words do not occur
    in order (a paraphrase, a table row read with its header), the longest run of them that does
    places it; with no run of three words (or of the whole quote, when shorter) in common, the
    citation names the section where the passage starts.
    """
    if len(passage.sections) < 2:
        return passage.section or ""
    offset = _find_words(passage.text, quote)
    if offset is None:
        return passage.section or ""
    return section_at(passage, passage.char_start + offset)


def section_at(passage: Passage, position: int) -> str:
    """The heading path in force at ``position`` (an offset in the passage's document)."""
    if not passage.sections:
        return passage.section or ""
    starts = [entry.char_start for entry in passage.sections]
    index = bisect.bisect_right(starts, position) - 1
    return passage.sections[max(index, 0)].path


def _find_words(text: str, quote: str) -> int | None:
    """Character offset in ``text`` of the longest run of ``quote``'s words found there."""
    matches = list(_WORD.finditer(text))
    words = [match.group(0).casefold() for match in matches]
    wanted = [word.casefold() for word in _WORD.findall(quote)][:_QUOTE_WORDS]
    if not words or not wanted:
        return None
    # Words joined by single spaces, with each word's start in the joined string, so a run of
    # words is found by one substring search.
    joined = " " + " ".join(words) + " "
    word_starts: list[int] = []
    cursor = 1
    for word in words:
        word_starts.append(cursor)
        cursor += len(word) + 1
    shortest = min(_MIN_RUN, len(wanted))
    for length in range(len(wanted), shortest - 1, -1):
        for begin in range(len(wanted) - length + 1):
            found = joined.find(" " + " ".join(wanted[begin : begin + length]) + " ")
            if found >= 0:
                first_word = bisect.bisect_left(word_starts, found + 1)
                return matches[first_word].start()
    return None
