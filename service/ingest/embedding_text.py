"""The text a chunk is embedded as: its document title and section path, then the chunk."""

from __future__ import annotations

from service.ingest.chunking import TokenCounter


def embedding_input(
    title: str, section: str, chunk_text: str, counter: TokenCounter, window: int
) -> str:
    """``title\\nsection\\nchunk`` (empty parts left out), at most ``window`` tokens if possible.

    ``window`` counts tokens as ``counter`` does, without special tokens. Title and section only
    give context, so when the whole does not fit they are cut (at token boundaries) and the chunk
    never is; a chunk that alone exceeds the window is returned as it is.
    """
    whole = _join(title, section, chunk_text)
    excess = counter.count(whole) - window
    if excess <= 0:
        return whole
    title_tokens, section_tokens = counter.count(title), counter.count(section)
    budget = title_tokens + section_tokens - excess
    while budget > 0:
        title_share, section_share = _shares(title_tokens, section_tokens, budget)
        shortened = _join(
            _prefix(title, title_share, counter),
            _prefix(section, section_share, counter),
            chunk_text,
        )
        over = counter.count(shortened) - window
        if over <= 0:
            return shortened
        # Cut pieces can tokenize into more tokens than their share; try again with less.
        budget -= over
    return chunk_text


def _join(*parts: str) -> str:
    return "\n".join(part for part in parts if part)


def _shares(title_tokens: int, section_tokens: int, budget: int) -> tuple[int, int]:
    """Split the budget evenly, giving what one part does not need to the other."""
    title_share = min(title_tokens, max(budget // 2, budget - section_tokens))
    return title_share, min(section_tokens, budget - title_share)


def _prefix(text: str, tokens: int, counter: TokenCounter) -> str:
    """The longest cut of ``text`` at a token boundary that counts at most ``tokens`` tokens."""
    if counter.count(text) <= tokens:
        return text
    ends = [end for _, end in counter.offsets(text)]
    low, high = 0, min(tokens, len(ends))
    while low < high:
        middle = (low + high + 1) // 2
        if counter.count(text[: ends[middle - 1]]) <= tokens:
            low = middle
        else:
            high = middle - 1
    return text[: ends[low - 1]].rstrip() if low else ""
