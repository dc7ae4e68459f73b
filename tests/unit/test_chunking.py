from __future__ import annotations

import itertools
import re

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from service.ingest.chunking import ChunkSpan, TokenCounter, chunk_document
from service.ingest.embedding_text import embedding_input
from service.ingest.parsing import ParsedText, Section, parse_document


class WordCounter:
    """One token per run of word characters and per punctuation mark."""

    _TOKEN = re.compile(r"\w+|[^\w\s]")

    def offsets(self, text: str) -> list[tuple[int, int]]:
        return [m.span() for m in self._TOKEN.finditer(text)]

    def count(self, text: str) -> int:
        return len(self.offsets(text))


class PieceCounter:
    """Word pieces of 2 characters, then 4 each, and '~' makes no token at all.

    Like WordPiece, a text cut inside a word re-tokenizes differently from the whole word, so the
    count of a chunk can exceed what the whole text's offsets promise.
    """

    _WORD = re.compile(r"[^\W_]+|[^\w\s~]|_")

    def offsets(self, text: str) -> list[tuple[int, int]]:
        spans = []
        for match in self._WORD.finditer(text):
            start, end = match.span()
            spans.append((start, min(end, start + 2)))
            spans.extend((s, min(end, s + 4)) for s in range(start + 2, end, 4))
        return spans

    def count(self, text: str) -> int:
        return len(self.offsets(text))


class LongWordsCostMore(WordCounter):
    """Offsets say one token per word, but counting says two for any word over six letters."""

    def count(self, text: str) -> int:
        return sum(2 if len(m.group()) > 6 else 1 for m in self._TOKEN.finditer(text))


def plain(text: str) -> ParsedText:
    return ParsedText(text, (Section(0, len(text), ()),))


def words(count: int, prefix: str = "w") -> str:
    return " ".join(f"{prefix}{i}" for i in range(count))


def assert_chunk_invariants(
    parsed: ParsedText,
    chunks: list[ChunkSpan],
    counter: TokenCounter,
    max_tokens: int,
    overlap_tokens: int,
) -> None:
    text = parsed.text
    assert [c.ordinal for c in chunks] == list(range(len(chunks)))
    covered = [False] * len(text)
    for chunk in chunks:
        assert chunk.text == text[chunk.char_start : chunk.char_end]
        assert chunk.text and chunk.text == chunk.text.strip()
        assert chunk.tokens == counter.count(chunk.text) <= max_tokens
        enclosing = [
            s.path for s in parsed.sections if s.start < chunk.char_end and chunk.char_start < s.end
        ]
        # Either the chunk's own section or its ancestors' heading lines, which lead into it.
        path = tuple(chunk.section.split(" > ")) if chunk.section else ()
        assert path in {s.path for s in parsed.sections}
        assert all(path[: len(other)] == other for other in enclosing)
        for position in range(chunk.char_start, chunk.char_end):
            covered[position] = True
    assert all(covered[i] or text[i].isspace() for i in range(len(text)))
    for before, after in itertools.pairwise(chunks):
        assert before.char_start < after.char_start
        assert before.char_end < after.char_end
        if after.char_start < before.char_end:
            assert before.section == after.section
            shared_tokens = [
                start
                for start, _ in counter.offsets(text)
                if after.char_start <= start < before.char_end
            ]
            assert len(shared_tokens) <= overlap_tokens
        if overlap_tokens == 0:
            assert after.char_start >= before.char_end


DEMO_STYLE_PAGE = (
    "<!DOCTYPE html><html><head><title>SB-2023-04</title></head><body>"
    "<nav><a href='/'>Tarnwick documentation</a></nav><main>"
    "<h1>Summary</h1><p>Some Haulmark 2023 cargo decks crack at the rear mount. Stop carrying"
    " loads until the deck is replaced.</p>"
    "<h1>What the dealer does</h1><p>Fit the reinforced deck and tighten its four bolts to"
    " 8 Nm.</p></main><footer>Tarnwick Cycle Works technical service</footer></body></html>"
)


def test_html_navigation_and_footer_text_never_become_chunks() -> None:
    parsed = parse_document(DEMO_STYLE_PAGE, "text/html")

    chunks = chunk_document(parsed, WordCounter(), max_tokens=16, overlap_tokens=4)

    assert chunks[0].text.startswith("Summary")
    assert not any("Tarnwick" in chunk.text for chunk in chunks)
    assert {chunk.section for chunk in chunks} == {"Summary", "What the dealer does"}


def test_plain_text_chunks_carry_their_upper_case_headings_as_sections() -> None:
    parsed = parse_document(
        "SCOPE AND VALIDITY\n\nThis policy applies to bicycles bought in the United Kingdom.\n\n"
        "TRANSFER TO A NEW OWNER\n\nThe frame warranty covers the original owner only.",
        "text/plain",
    )

    chunks = chunk_document(parsed, WordCounter(), max_tokens=16, overlap_tokens=0)

    assert [(chunk.section, chunk.text.split("\n")[0]) for chunk in chunks] == [
        ("SCOPE AND VALIDITY", "SCOPE AND VALIDITY"),
        ("TRANSFER TO A NEW OWNER", "TRANSFER TO A NEW OWNER"),
    ]
    assert chunks[1].text.endswith("original owner only.")


def test_chunks_end_at_paragraph_boundaries_before_sentence_boundaries() -> None:
    first = "Alpha beta gamma. Delta epsilon zeta eta theta."
    second = "Iota kappa lambda. Mu nu xi omicron pi."
    parsed = plain(f"{first}\n\n{second}")

    chunks = chunk_document(parsed, WordCounter(), max_tokens=16, overlap_tokens=0)

    assert [c.text for c in chunks] == [first, second]


def test_a_long_paragraph_breaks_at_the_last_sentence_that_fits() -> None:
    text = "One two three four five. Six seven eight nine. Ten eleven twelve thirteen fourteen."
    chunks = chunk_document(plain(text), WordCounter(), max_tokens=12, overlap_tokens=0)

    assert [c.text for c in chunks] == [
        "One two three four five. Six seven eight nine.",
        "Ten eleven twelve thirteen fourteen.",
    ]


def test_a_sentence_longer_than_the_bound_breaks_between_words() -> None:
    chunks = chunk_document(plain(words(10)), WordCounter(), max_tokens=4, overlap_tokens=0)

    assert [c.text for c in chunks] == ["w0 w1 w2 w3", "w4 w5 w6 w7", "w8 w9"]


def test_list_items_break_at_line_ends() -> None:
    parsed = parse_document("- " + "\n- ".join(words(3, p) for p in "abcd"), "text/markdown")

    chunks = chunk_document(parsed, WordCounter(), max_tokens=9, overlap_tokens=0)

    assert [c.text for c in chunks] == ["- a0 a1 a2\n- b0 b1 b2", "- c0 c1 c2\n- d0 d1 d2"]


def test_a_short_heading_is_not_left_alone_in_a_chunk() -> None:
    parsed = parse_document("# Brakes\n\n" + words(30), "text/markdown")

    chunks = chunk_document(parsed, WordCounter(), max_tokens=10, overlap_tokens=0)

    assert chunks[0].text == "Brakes\n\nw0 w1 w2 w3 w4 w5 w6 w7 w8"
    assert {c.section for c in chunks} == {"Brakes"}


def test_a_word_longer_than_the_bound_is_cut_at_token_boundaries() -> None:
    counter = PieceCounter()
    word = "abcdefghijklmnopqrstuvwxyz"
    chunks = chunk_document(plain(f"start {word} end"), counter, max_tokens=3, overlap_tokens=0)

    assert "".join(c.text for c in chunks).replace("start", "").replace("end", "") == word
    assert all(counter.count(c.text) <= 3 for c in chunks)
    cut_points = {c.char_start for c in chunks} | {c.char_end for c in chunks}
    token_edges = {edge for span in counter.offsets(f"start {word} end") for edge in span}
    assert cut_points <= token_edges


def test_consecutive_chunks_overlap_by_the_requested_tokens_at_word_boundaries() -> None:
    chunks = chunk_document(plain(words(40)), WordCounter(), max_tokens=10, overlap_tokens=3)

    assert chunks[0].text == words(10)
    for before, after in itertools.pairwise(chunks):
        shared = before.text.split()[-3:]
        assert after.text.split()[:3] == shared
    assert chunks[-1].text.endswith("w39")


def test_overlap_as_large_as_the_bound_still_makes_progress() -> None:
    parsed = plain(words(25))

    chunks = chunk_document(parsed, WordCounter(), max_tokens=5, overlap_tokens=5)

    assert_chunk_invariants(parsed, chunks, WordCounter(), 5, 5)
    assert chunks[-1].text.endswith("w24")


def test_chunks_are_recounted_and_shrunk_when_counting_disagrees_with_offsets() -> None:
    counter = LongWordsCostMore()
    parsed = plain("elephant giraffe cat dog hippopotamus rhinoceros ox ant " * 4)

    chunks = chunk_document(parsed, counter, max_tokens=6, overlap_tokens=2)

    assert_chunk_invariants(parsed, chunks, counter, 6, 2)


def test_a_word_that_counts_more_alone_than_its_offsets_say_gets_a_chunk_of_its_own() -> None:
    chunks = chunk_document(
        plain("elephant giraffe"), LongWordsCostMore(), max_tokens=2, overlap_tokens=0
    )

    assert [(c.text, c.tokens) for c in chunks] == [("elephant", 2), ("giraffe", 2)]


def test_a_word_too_costly_for_the_bound_is_cut_at_the_longest_prefix_that_fits() -> None:
    chunks = chunk_document(
        plain("elephant ox"), LongWordsCostMore(), max_tokens=1, overlap_tokens=0
    )

    assert [c.text for c in chunks] == ["elepha", "nt", "ox"]


def test_chunks_never_cross_into_a_section_with_its_own_text() -> None:
    parsed = parse_document(
        "# Brakes\n\nCheck pads.\n\n## Cable\n\nTurn the barrel.\n\n# Wheels\n\nSpin them.",
        "text/markdown",
    )

    chunks = chunk_document(parsed, WordCounter(), max_tokens=50, overlap_tokens=10)

    assert [(c.section, c.text) for c in chunks] == [
        ("Brakes", "Brakes\n\nCheck pads."),
        ("Brakes > Cable", "Cable\n\nTurn the barrel."),
        ("Wheels", "Wheels\n\nSpin them."),
    ]


def test_a_heading_only_section_joins_its_first_subsection() -> None:
    parsed = parse_document(
        "# Service\n\n## Brakes\n\n### Pads\n\nReplace them.\n\n## Gears\n\nIndex them.",
        "text/markdown",
    )

    chunks = chunk_document(parsed, WordCounter(), max_tokens=50, overlap_tokens=0)

    assert [(c.section, c.text) for c in chunks] == [
        ("Service > Brakes > Pads", "Service\n\nBrakes\n\nPads\n\nReplace them."),
        ("Service > Gears", "Gears\n\nIndex them."),
    ]


def test_a_final_heading_without_text_is_still_a_chunk() -> None:
    parsed = parse_document("# Notes\n\nSome.\n\n# Appendix", "text/markdown")

    chunks = chunk_document(parsed, WordCounter(), max_tokens=50, overlap_tokens=0)

    assert [(c.section, c.text) for c in chunks] == [
        ("Notes", "Notes\n\nSome."),
        ("Appendix", "Appendix"),
    ]


def test_characters_without_tokens_are_still_covered() -> None:
    parsed = plain("~~ a b ~ c d ~~e f~")

    chunks = chunk_document(parsed, PieceCounter(), max_tokens=2, overlap_tokens=1)

    assert_chunk_invariants(parsed, chunks, PieceCounter(), 2, 1)
    assert chunks[0].char_start == 0
    assert chunks[-1].char_end == len(parsed.text)


def test_text_outside_the_given_sections_is_chunked_with_the_empty_path() -> None:
    text = "lead in\n\nHeading\n\nbody\n\ntail end"
    parsed = ParsedText(text, (Section(9, 24, ("Heading",)),))

    chunks = chunk_document(parsed, WordCounter(), max_tokens=50, overlap_tokens=0)

    assert [(c.section, c.text) for c in chunks] == [
        ("", "lead in"),
        ("Heading", "Heading\n\nbody"),
        ("", "tail end"),
    ]


def test_empty_text_has_no_chunks() -> None:
    assert chunk_document(ParsedText("", ()), WordCounter(), max_tokens=5, overlap_tokens=1) == []


def test_a_bound_below_one_token_or_a_negative_overlap_is_refused() -> None:
    with pytest.raises(ValueError, match="max_tokens"):
        chunk_document(plain("a"), WordCounter(), max_tokens=0, overlap_tokens=0)
    with pytest.raises(ValueError, match="overlap_tokens"):
        chunk_document(plain("a"), WordCounter(), max_tokens=5, overlap_tokens=-1)


def test_a_character_that_cannot_fit_the_bound_is_refused() -> None:
    class EveryCharacterIsTwoTokens(WordCounter):
        def count(self, text: str) -> int:
            return 2 * len(text.strip())

    with pytest.raises(ValueError, match="cannot fit"):
        chunk_document(plain("ab"), EveryCharacterIsTwoTokens(), max_tokens=1, overlap_tokens=0)


vocabulary = st.sampled_from(
    [
        "brake",
        "cable",
        "the",
        "a",
        "Ridge",
        "café",
        "naïve",
        "12.5mm",
        "e.g.",
        "end.",
        "why?",
        "(note)",
        '"quoted."',
        "extraordinarilylongwordwithoutanybreaks",
        "~",
        "x~y",
        "—",
        "東京",
    ]
)
sentences = st.lists(vocabulary, min_size=1, max_size=14).map(" ".join)
paragraphs = st.lists(sentences, min_size=1, max_size=4).map(" ".join)
blocks = st.one_of(
    paragraphs,
    st.sampled_from(["# Top", "## Middle", "### Low", "# Top"]),
    st.lists(sentences, min_size=1, max_size=4).map(lambda items: "- " + "\n- ".join(items)),
)
documents = st.lists(blocks, min_size=1, max_size=8).map("\n\n".join)


@settings(max_examples=150, deadline=None)
@given(
    source=documents,
    media_type=st.sampled_from(["text/markdown", "text/plain"]),
    counter=st.sampled_from([WordCounter(), PieceCounter(), LongWordsCostMore()]),
    max_tokens=st.integers(min_value=1, max_value=40),
    overlap_fraction=st.floats(min_value=0, max_value=1),
)
def test_chunks_reproduce_the_text_within_the_bound_and_cover_it(
    source: str,
    media_type: str,
    counter: TokenCounter,
    max_tokens: int,
    overlap_fraction: float,
) -> None:
    parsed = parse_document(source, media_type)
    overlap_tokens = int(max_tokens * overlap_fraction)

    chunks = chunk_document(parsed, counter, max_tokens=max_tokens, overlap_tokens=overlap_tokens)

    assert_chunk_invariants(parsed, chunks, counter, max_tokens, overlap_tokens)


@settings(max_examples=100, deadline=None)
@given(
    text=st.text(alphabet=st.characters(codec="utf-8"), max_size=120),
    max_tokens=st.integers(min_value=1, max_value=8),
    overlap_tokens=st.integers(min_value=0, max_value=8),
)
def test_any_text_is_chunked_within_the_bound(
    text: str, max_tokens: int, overlap_tokens: int
) -> None:
    parsed = parse_document(text, "text/plain")

    chunks = chunk_document(
        parsed, WordCounter(), max_tokens=max_tokens, overlap_tokens=overlap_tokens
    )

    assert_chunk_invariants(parsed, chunks, WordCounter(), max_tokens, overlap_tokens)


def test_embedding_input_joins_title_section_and_chunk_leaving_out_empty_parts() -> None:
    counter = WordCounter()

    assert embedding_input("Manual", "Brakes > Pads", "Replace.", counter, 100) == (
        "Manual\nBrakes > Pads\nReplace."
    )
    assert embedding_input("Manual", "", "Replace.", counter, 100) == "Manual\nReplace."
    assert embedding_input("", "", "Replace.", counter, 100) == "Replace."


def test_embedding_input_shortens_title_and_section_but_never_the_chunk() -> None:
    counter = WordCounter()
    chunk = words(8, "c")

    result = embedding_input(words(10, "t"), words(10, "s"), chunk, counter, 14)

    assert result == "t0 t1 t2\ns0 s1 s2\n" + chunk
    assert counter.count(result) == 14


def test_embedding_input_gives_a_short_section_its_whole_length() -> None:
    counter = WordCounter()

    result = embedding_input(words(10, "t"), "Pads", "c0 c1", counter, 6)

    assert result == "t0 t1 t2\nPads\nc0 c1"


def test_embedding_input_recounts_pieces_that_cost_more_than_their_offsets() -> None:
    counter = LongWordsCostMore()
    title = "extraordinary adventures elsewhere"

    result = embedding_input(title, "", "chunk", counter, 4)

    assert counter.count(result) <= 4
    assert result.endswith("\nchunk")


def test_embedding_input_recounts_the_joined_text_when_joining_costs_tokens() -> None:
    class JoinCostsOneToken(WordCounter):
        """Counts are not additive: this one junction costs a token of its own."""

        def count(self, text: str) -> int:
            return super().count(text) + ("t2\ns" in text)

    counter = JoinCostsOneToken()

    result = embedding_input(words(5, "t"), words(5, "s"), "c0", counter, 8)

    assert result == "t0 t1 t2\ns0 s1 s2\nc0"
    assert counter.count(result) == 8


def test_embedding_input_returns_a_chunk_too_long_for_the_window_alone() -> None:
    chunk = words(10, "c")

    assert embedding_input("Title", "Section", chunk, WordCounter(), 5) == chunk
