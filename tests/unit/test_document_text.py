"""A merged passage's text, rebuilt from one snapshot's chunks, equals the document's own text.

The chunks come from the real parser and chunker (with the test-only word counter), so the
spans, overlaps and gaps are the ones ingestion makes; the reference is a plain slice of the
parsed text.
"""

from __future__ import annotations

import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st

from service.index.collection_index import ChunkRecord, CollectionIndex
from service.index.document_text import gaps_between, rebuild_span
from service.ingest.chunking import chunk_document
from service.ingest.parsing import parse_document
from tests.hashing_embedder import WhitespaceTokenCounter

WORDS = st.sampled_from(["brake", "pad", "lever", "torque", "7 Nm", "check.", "tyre,", "Part"])
PARAGRAPH = st.lists(WORDS, min_size=1, max_size=30).map(" ".join)
SEPARATOR = st.sampled_from(["\n\n", "\n", " ", "\n\n\n", "\n\n# Heading two\n\n", "\n## Sub\n"])


@st.composite
def documents(draw: st.DrawFn) -> str:
    paragraphs = draw(st.lists(PARAGRAPH, min_size=1, max_size=8))
    text = paragraphs[0]
    for paragraph in paragraphs[1:]:
        text += draw(SEPARATOR) + paragraph
    return ("# Title\n\n" if draw(st.booleans()) else "") + text


def test_gaps_are_the_text_between_chunks_and_empty_where_chunks_overlap() -> None:
    text = "alpha beta\n\ngamma delta"
    spans = [(0, 10), (5, 10), (12, 23)]
    assert gaps_between(text, spans) == ["", "\n\n", ""]
    pieces = [
        (s, e, text[s:e], g) for (s, e), g in zip(spans, gaps_between(text, spans), strict=True)
    ]
    assert rebuild_span(pieces, 0, 23) == text
    assert rebuild_span(pieces, 7, 14) == text[7:14]
    assert rebuild_span(pieces[2:], 0, 23) is None


@settings(max_examples=60, deadline=None, derandomize=True)
@given(
    text=documents(),
    max_tokens=st.integers(4, 24),
    overlap=st.integers(0, 3),
    data=st.data(),
)
def test_any_span_the_chunks_cover_is_rebuilt_exactly_from_a_snapshot(
    text: str, max_tokens: int, overlap: int, data: st.DataObject
) -> None:
    parsed = parse_document(text, "text/markdown")
    spans = chunk_document(
        parsed, WhitespaceTokenCounter(), max_tokens=max_tokens, overlap_tokens=overlap
    )
    gaps = gaps_between(parsed.text, [(s.char_start, s.char_end) for s in spans])
    records = [
        ChunkRecord(
            chunk_id=f"doc#{s.ordinal:04d}",
            document_id="doc",
            ordinal=s.ordinal,
            title="Doc",
            section=s.section,
            text=s.text,
            char_start=s.char_start,
            char_end=s.char_end,
            tokens=s.tokens,
            lexical_tokens=s.text.split(),
            vector=np.ones(4, np.float32),
            source_url="https://docs.example.invalid/doc",
            gap_after=gap,
        )
        for s, gap in zip(spans, gaps, strict=True)
    ]
    snapshot = CollectionIndex.build(records, metric="cosine", dimension=4).snapshot()
    first = data.draw(st.integers(0, len(spans) - 1))
    last = data.draw(st.integers(first, len(spans) - 1))
    start, end = spans[first].char_start, spans[last].char_end
    assert snapshot.document_span("doc", start, end) == parsed.text[start:end]
    inner_start = data.draw(st.integers(start, end))
    inner_end = data.draw(st.integers(inner_start, end))
    assert (
        snapshot.document_span("doc", inner_start, inner_end) == parsed.text[inner_start:inner_end]
    )
    assert snapshot.source_url("doc") == "https://docs.example.invalid/doc"
    assert snapshot.document_span("other", start, end) is None
