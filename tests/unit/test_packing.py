"""The context packer: budget, markers, merging, duplicates, with a simple token counter."""

from __future__ import annotations

import math
import re

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from service.packing.packer import (
    PackCandidate,
    PackedContext,
    SectionEntry,
    normalize_for_duplicates,
    pack_context,
    render_passage,
)

_TOKEN = re.compile(r"\w+|[^\w\s]")


def count_words(text: str) -> int:
    """Words and punctuation, plus two tokens per blank line so separators are not free."""
    return len(_TOKEN.findall(text)) + 2 * text.count("\n\n")


def chunk(
    document_id: str,
    ordinal: int,
    text: str,
    start: int,
    *,
    score: float,
    title: str = "Manual",
    section: str | None = "Brakes",
    vector: np.ndarray | None = None,
) -> PackCandidate:
    return PackCandidate(
        chunk_id=f"{document_id}#{ordinal:04d}",
        document_id=document_id,
        title=title,
        section=section,
        text=text,
        ordinal=ordinal,
        char_start=start,
        char_end=start + len(text),
        score=score,
        vector=vector,
    )


def no_documents(document_id: str, start: int, end: int) -> str | None:
    return None


def chunks_of(document_id: str, text: str, size: int, step: int) -> list[PackCandidate]:
    """Character windows of ``size`` every ``step`` characters (overlap when step < size)."""
    out = []
    for ordinal, start in enumerate(range(0, len(text), step)):
        piece = text[start : start + size]
        out.append(chunk(document_id, ordinal, piece, start, score=0.0))
    return out


def with_scores(chunks: list[PackCandidate], scores: list[float]) -> list[PackCandidate]:
    return [
        PackCandidate(**{**c._asdict(), "score": s}) for c, s in zip(chunks, scores, strict=True)
    ]


def outcome_of(packed: PackedContext, chunk_id: str) -> str:
    return next(o.outcome for o in packed.considered if o.chunk_id == chunk_id)


def test_adjacent_chunks_of_one_document_become_one_passage_without_repeating_the_overlap():
    document = "Pads wear faster in rain. Replace pads at 1 mm. Bed in new pads slowly."
    first = chunk("m", 0, document[0:47], 0, score=0.9)
    second = chunk("m", 1, document[26:], 26, score=0.8)
    packed = pack_context(
        [first, second],
        token_budget=200,
        count_tokens=count_words,
        document_span=lambda d, s, e: document[s:e],
    )
    assert len(packed.passages) == 1
    passage = packed.passages[0]
    assert passage.text == document
    assert passage.chunk_ids == ("m#0000", "m#0001")
    assert (passage.char_start, passage.char_end) == (0, len(document))
    assert outcome_of(packed, "m#0000") == "included"
    assert outcome_of(packed, "m#0001") == "merged"
    assert packed.context.count("Replace pads at 1 mm.") == 1


def test_merge_without_the_document_text_joins_chunks_by_their_offsets():
    document = "alpha beta gamma delta epsilon zeta"
    earlier = chunk("d", 0, document[0:16], 0, score=0.5)
    later = chunk("d", 1, document[11:35], 11, score=0.9)
    packed = pack_context(
        [earlier, later], token_budget=100, count_tokens=count_words, document_span=no_documents
    )
    assert [p.text for p in packed.passages] == [document]
    assert packed.passages[0].chunk_ids == ("d#0000", "d#0001")


def test_consecutive_chunks_with_a_gap_merge_over_the_documents_text_between_them():
    document = "First part here.\n\nSecond part there."
    first = chunk("d", 0, "First part here.", 0, score=0.9)
    second = chunk("d", 1, "Second part there.", 18, score=0.8)
    packed = pack_context(
        [first, second],
        token_budget=100,
        count_tokens=count_words,
        document_span=lambda d, s, e: document[s:e],
    )
    assert [p.text for p in packed.passages] == [document]


def test_a_merged_passage_spanning_two_sections_names_where_it_starts_and_lists_both():
    document = "Frame\n\nFrames are covered for five years.\n\nTransfer\n\nOriginal owner only."
    frame = chunk("w", 0, document[:41], 0, score=0.9, section="Warranty > Frame")
    transfer = chunk("w", 1, document[43:], 43, score=0.8, section="Warranty > Transfer")
    packed = pack_context(
        [transfer, frame],
        token_budget=100,
        count_tokens=count_words,
        document_span=lambda d, s, e: document[s:e],
    )

    [passage] = packed.passages
    assert passage.text == document
    assert passage.section == "Warranty > Frame"
    assert passage.sections == (
        SectionEntry(0, "Warranty > Frame"),
        SectionEntry(43, "Warranty > Transfer"),
    )
    assert passage.section_paths == ("Warranty > Frame", "Warranty > Transfer")


def test_a_passage_of_one_section_lists_it_once():
    document = "Pads wear faster in rain. Replace pads at 1 mm. Bed in new pads slowly."
    packed = pack_context(
        chunks_of("m", document, 30, 20),
        token_budget=200,
        count_tokens=count_words,
        document_span=lambda d, s, e: document[s:e],
    )

    assert [p.section_paths for p in packed.passages] == [("Brakes",)]


def test_a_chunk_bridging_two_passages_joins_them_under_the_earlier_marker():
    document = "one two three. four five six. seven eight nine."
    parts = [document[0:14], document[15:29], document[30:]]
    starts = [0, 15, 30]
    first = chunk("d", 0, parts[0], starts[0], score=0.9)
    other = chunk("x", 0, "unrelated words entirely", 0, score=0.85, title="Other")
    last = chunk("d", 2, parts[2], starts[2], score=0.8)
    bridge = chunk("d", 1, parts[1], starts[1], score=0.7)
    packed = pack_context(
        [first, other, last, bridge],
        token_budget=500,
        count_tokens=count_words,
        document_span=lambda d, s, e: document[s:e],
    )
    assert [p.document_id for p in packed.passages] == ["d", "x"]
    assert packed.passages[0].text == document
    assert packed.passages[0].chunk_ids == ("d#0000", "d#0001", "d#0002")
    assert [(o.chunk_id, o.outcome, o.marker) for o in packed.considered] == [
        ("d#0000", "included", 1),
        ("x#0000", "included", 2),
        ("d#0002", "merged", 1),
        ("d#0001", "merged", 1),
    ]


def test_same_text_in_another_document_is_dropped_as_a_duplicate():
    original = chunk("a", 0, "Check the  chain\nwear every month.", 0, score=0.9)
    copy = chunk("b", 0, "check the chain wear EVERY month.", 0, score=0.8)
    packed = pack_context(
        [original, copy], token_budget=100, count_tokens=count_words, document_span=no_documents
    )
    assert [p.document_id for p in packed.passages] == ["a"]
    assert outcome_of(packed, "b#0000") == "duplicate"
    assert normalize_for_duplicates(original.text) == normalize_for_duplicates(copy.text)


def test_a_chunk_whose_vector_is_nearly_parallel_to_an_included_one_is_a_duplicate():
    base = np.array([1.0, 0.0, 0.0], dtype=np.float32)
    close = np.array([0.99, 0.1, 0.0], dtype=np.float32)
    close /= np.linalg.norm(close)
    far = np.array([0.0, 1.0, 0.0], dtype=np.float32)
    packed = pack_context(
        [
            chunk("a", 0, "Tyre pressure for road riding.", 0, score=0.9, vector=base),
            chunk("b", 0, "Road tyre pressures explained.", 0, score=0.8, vector=close),
            chunk("c", 0, "Saddle height and setback.", 0, score=0.7, vector=far),
        ],
        token_budget=200,
        count_tokens=count_words,
        duplicate_cosine=0.97,
        document_span=no_documents,
    )
    assert [o.outcome for o in packed.considered] == ["included", "duplicate", "included"]
    assert [p.marker for p in packed.passages] == [1, 2]


def test_a_chunk_that_does_not_fit_is_skipped_and_a_smaller_later_one_still_fits():
    large = chunk("a", 0, " ".join(["word"] * 40), 0, score=0.9)
    small = chunk("b", 0, "short note.", 0, score=0.5)
    packed = pack_context(
        [large, small], token_budget=20, count_tokens=count_words, document_span=no_documents
    )
    assert outcome_of(packed, "a#0000") == "budget"
    assert outcome_of(packed, "b#0000") == "included"
    assert packed.context == "[1] Manual — Brakes\nshort note."
    assert packed.tokens_used == count_words(packed.context) <= 20


def test_the_token_margin_shrinks_what_may_be_packed():
    text = "one two three four five six seven eight nine ten"
    candidate = chunk("a", 0, text, 0, score=1.0)
    block_tokens = count_words(render_passage(1, "Manual", "Brakes", text))
    fits = pack_context(
        [candidate], token_budget=block_tokens, count_tokens=count_words, document_span=no_documents
    )
    too_big = pack_context(
        [candidate],
        token_budget=block_tokens,
        count_tokens=count_words,
        token_margin=1.2,
        document_span=no_documents,
    )
    assert len(fits.passages) == 1
    assert too_big.passages == ()
    assert too_big.context == ""
    assert outcome_of(too_big, "a#0000") == "budget"


def test_passages_are_taken_by_score_and_ties_by_chunk_id():
    packed = pack_context(
        [
            chunk("c", 0, "gamma text", 0, score=0.5),
            chunk("a", 0, "alpha text", 0, score=0.5),
            chunk("b", 0, "beta text", 0, score=0.9),
        ],
        token_budget=100,
        count_tokens=count_words,
        document_span=no_documents,
    )
    assert [p.document_id for p in packed.passages] == ["b", "a", "c"]
    assert [o.chunk_id for o in packed.considered] == ["b#0000", "a#0000", "c#0000"]


def test_a_passage_without_a_section_has_a_title_only_header():
    packed = pack_context(
        [chunk("a", 0, "Body text.", 0, score=1.0, title="Quick\nstart", section=None)],
        token_budget=100,
        count_tokens=count_words,
        document_span=no_documents,
    )
    assert packed.context == "[1] Quick start\nBody text."
    assert packed.passages[0].tokens == count_words(packed.context)


_WORDS = ["brake", "pad", "chain", "wear", "tyre", "Frame", "warranty", "bolt", "torque", "gear"]


@st.composite
def candidate_sets(draw: st.DrawFn) -> tuple[list[PackCandidate], dict[str, str]]:
    """A few documents chunked with overlaps or gaps, some documents copies of others."""
    documents: dict[str, str] = {}
    candidates: list[PackCandidate] = []
    seed = draw(st.integers(0, 2**16))
    rng = np.random.default_rng(seed)
    for index in range(draw(st.integers(1, 4))):
        document_id = f"doc{index}"
        copy_existing = bool(documents) and draw(st.booleans())
        if copy_existing:
            text = documents[draw(st.sampled_from(sorted(documents)))]
        else:
            words = draw(st.lists(st.sampled_from(_WORDS), min_size=3, max_size=40))
            text = " ".join(words) + "."
        documents[document_id] = text
        size = draw(st.integers(5, 40))
        step = draw(st.integers(3, 50))
        pieces = chunks_of(document_id, text, size, step)
        chosen = draw(st.lists(st.sampled_from(range(len(pieces))), unique=True, min_size=1))
        for position in chosen:
            piece = pieces[position]
            vector = None
            if draw(st.booleans()):
                raw = rng.normal(size=4).astype(np.float32)
                vector = raw / np.linalg.norm(raw)
            score = float(draw(st.integers(0, 5)))
            candidates.append(
                PackCandidate(**{**piece._asdict(), "score": score, "vector": vector})
            )
    return candidates, documents


@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    candidate_sets(),
    st.integers(0, 200),
    st.sampled_from([1.0, 1.1, 1.25]),
    st.booleans(),
)
def test_packing_respects_the_budget_and_never_repeats_text(
    generated: tuple[list[PackCandidate], dict[str, str]],
    budget: int,
    margin: float,
    documents_available: bool,
):
    candidates, documents = generated

    def span(document_id: str, start: int, end: int) -> str | None:
        return documents[document_id][start:end] if documents_available else None

    packed = pack_context(
        candidates,
        token_budget=budget,
        count_tokens=count_words,
        token_margin=margin,
        document_span=span,
    )

    assert packed.tokens_used == count_words(packed.context)
    assert math.ceil(packed.tokens_used * margin) <= budget
    assert packed.token_budget == budget

    assert [p.marker for p in packed.passages] == list(range(1, len(packed.passages) + 1))
    blocks = [render_passage(p.marker, p.title, p.section, p.text) for p in packed.passages]
    assert packed.context == "\n\n".join(blocks)
    cursor = 0
    for passage, block in zip(packed.passages, blocks, strict=True):
        marker_at = packed.context.index(f"[{passage.marker}] ", cursor)
        assert packed.context.index(passage.text, marker_at) > marker_at
        assert passage.tokens == count_words(block)
        cursor = marker_at + len(block)

    by_id = {c.chunk_id: c for c in candidates}
    packed_chunks = [by_id[i] for p in packed.passages for i in p.chunk_ids]
    normalized = [normalize_for_duplicates(c.text) for c in packed_chunks]
    assert len(normalized) == len(set(normalized))
    for passage in packed.passages:
        if documents_available:
            text = documents[passage.document_id][passage.char_start : passage.char_end]
            assert passage.text == text
        for other in packed.passages:
            if other.marker != passage.marker and other.document_id == passage.document_id:
                assert other.char_end < passage.char_start or other.char_start > passage.char_end

    assert sorted(o.chunk_id for o in packed.considered) == sorted(by_id)
    for outcome in packed.considered:
        if outcome.outcome in ("included", "merged"):
            passage = packed.passages[outcome.marker - 1]  # type: ignore[operator]
            assert outcome.chunk_id in passage.chunk_ids
        else:
            assert outcome.marker is None
    assert sum(o.outcome == "included" for o in packed.considered) == len(packed.passages)
    for outcome in packed.considered:
        if outcome.outcome == "duplicate":
            dropped = by_id[outcome.chunk_id]
            same_text = normalize_for_duplicates(dropped.text) in normalized
            near = dropped.vector is not None and any(
                c.vector is not None and float(c.vector @ dropped.vector) >= 0.97
                for c in packed_chunks
            )
            assert same_text or near


def test_a_counter_that_pads_the_empty_string_past_the_budget_is_refused():
    with pytest.raises(ValueError, match="must not pad"):
        pack_context(
            [chunk("a", 0, "text", 0, score=1.0)],
            token_budget=10,
            count_tokens=lambda text: 128,
            document_span=no_documents,
        )
