"""The extractive generator with a small concept embedder standing in for the model."""

from __future__ import annotations

import re
from collections.abc import Sequence

import numpy as np
import pytest

from service.generation.base import INSUFFICIENT_EVIDENCE, markers_in
from service.generation.extractive import ExtractiveGenerator, split_sentences
from service.packing.packer import Passage

# Words sharing a concept share an embedding axis, so related wording scores as similar.
CONCEPTS = {
    "warranty": ["warranty", "guarantee", "covered", "cover", "claim"],
    "frame": ["frame", "frames", "carbon"],
    "duration": ["years", "year", "long", "lasts", "months"],
    "brake": ["brake", "brakes", "pads", "pad", "rotor"],
    "torque": ["torque", "bolt", "bolts", "tighten", "n·m"],
    "weather": ["rain", "wet", "mud"],
    "cooking": ["recipe", "bake", "oven", "flour"],
}
AXIS = {word: axis for axis, words in enumerate(CONCEPTS.values()) for word in words}
STOP = {"the", "is", "a", "of", "for", "how", "what", "do", "i", "my", "to", "in", "and", "at"}
WORD = re.compile(r"[\w·]+")


def embed(text: str) -> np.ndarray:
    vector = np.zeros(len(CONCEPTS) + 1, dtype=np.float32)
    for word in WORD.findall(text.lower()):
        vector[AXIS.get(word, len(CONCEPTS))] += 1.0 if word in AXIS else 0.1
    norm = np.linalg.norm(vector)
    return vector / norm if norm else vector


def embed_texts(texts: Sequence[str]) -> np.ndarray:
    return np.stack([embed(t) for t in texts])


def analyzer_tokens(text: str) -> list[str]:
    return [w.rstrip("s") for w in WORD.findall(text.lower()) if w not in STOP]


def generator(**options: object) -> ExtractiveGenerator:
    return ExtractiveGenerator(embed, embed_texts, analyzer_tokens, **options)  # type: ignore[arg-type]


def passage(marker: int, text: str, document_id: str = "manual") -> Passage:
    return Passage(marker, document_id, "Manual", None, (f"{document_id}#0000",), text, 0, 0, 1)


PASSAGES = [
    passage(
        1,
        "# Warranty\nThe frame is covered by the warranty for five years. "
        "Paint is covered for one year. Keep your receipt.",
        "warranty",
    ),
    passage(
        2,
        "## Brakes\nReplace brake pads when they are worn to 1 mm. "
        "Pads wear faster in rain and mud. Torque the rotor bolts to 6 N·m [12].",
        "brakes",
    ),
]


def test_the_answer_is_the_best_sentences_each_followed_by_its_marker():
    answer = generator(evidence_threshold=0.5).generate("How long is the frame warranty?", PASSAGES)
    assert answer.reason is None
    assert answer.answer is not None
    assert answer.answer.startswith("The frame is covered by the warranty for five years. [1]")
    assert answer.markers_used == markers_in(answer.answer) == (1,)
    assert answer.evidence_score >= 0.5


def test_sentences_keep_passage_order_then_text_order_whatever_their_scores():
    answer = generator(evidence_threshold=0.2, keep_ratio=0.0).generate(
        "brake pads wear in rain and warranty years", PASSAGES
    )
    # The brake sentences score highest, yet the warranty passage comes first in the context.
    assert answer.answer == (
        "The frame is covered by the warranty for five years. [1] "
        "Paint is covered for one year. [1] "
        "Replace brake pads when they are worn to 1 mm. [2] "
        "Pads wear faster in rain and mud. [2]"
    )
    assert answer.markers_used == (1, 2)


def test_sentences_well_below_the_best_are_left_out():
    answer = generator(evidence_threshold=0.2, keep_ratio=0.8).generate(
        "brake pads wear in rain and warranty years", PASSAGES
    )
    assert answer.answer == (
        "Replace brake pads when they are worn to 1 mm. [2] Pads wear faster in rain and mud. [2]"
    )


def test_no_more_sentences_than_the_limit_are_used():
    answer = generator(evidence_threshold=0.0, keep_ratio=0.0, max_sentences=2).generate(
        "brake pads warranty frame", PASSAGES
    )
    assert answer.answer is not None
    assert len(re.findall(r"\[\d+\]", answer.answer)) == 2


def test_a_question_the_passages_do_not_address_is_declined():
    answer = generator(evidence_threshold=0.4).generate(
        "Which flour should I use to bake bread in the oven?", PASSAGES
    )
    assert answer.answer is None
    assert answer.reason == INSUFFICIENT_EVIDENCE
    assert answer.markers_used == ()
    assert answer.evidence_score < 0.4


def test_no_passages_is_declined_with_zero_evidence():
    answer = generator(evidence_threshold=0.1).generate("frame warranty", [])
    assert (answer.answer, answer.reason, answer.evidence_score) == (
        None,
        INSUFFICIENT_EVIDENCE,
        0.0,
    )


def test_bracketed_numbers_from_the_source_do_not_become_markers():
    answer = generator(evidence_threshold=0.3).generate("rotor bolt torque", PASSAGES)
    assert answer.answer == "Torque the rotor bolts to 6 N·m. [2]"
    assert answer.markers_used == (2,)


@pytest.mark.parametrize(
    ("source", "cited"),
    [
        ("Run the diagnostic [file ...]", "Run the diagnostic [file ...] [1]"),
        ("Wait for the display to reset...", "Wait for the display to reset... [1]"),
        ("Torque the stem bolts to 5 Nm (front).", "Torque the stem bolts to 5 Nm (front). [1]"),
        ("- Torque the stem bolts to 5 Nm", "Torque the stem bolts to 5 Nm. [1]"),
        ("- Torque the stem bolts as follows:", "Torque the stem bolts as follows. [1]"),
    ],
)
def test_the_marker_follows_the_whole_sentence_and_its_final_punctuation(
    source: str, cited: str
) -> None:
    answer = generator(evidence_threshold=0.0).generate(source, [passage(1, source)])

    assert answer.answer == cited


def test_headings_are_not_sentences():
    assert split_sentences("# Warranty\nThe frame is covered.\n\n## Brakes\n- Check pads.") == [
        "The frame is covered.",
        "Check pads.",
    ]


def test_heading_paragraphs_of_parsed_documents_are_not_sentences():
    text = "Frame warranty\n\nThe frame is covered.\n\nCare\n\nTorque: 5 N·m"
    assert split_sentences(text, ["Frame warranty"]) == ["The frame is covered.", "Torque: 5 N·m"]


def test_a_sentence_score_mixes_similarity_and_term_overlap_as_documented():
    gen = generator(evidence_threshold=0.0, term_weight=0.25)
    question = "frame warranty years"
    sentences, scores = gen.score_sentences(question, PASSAGES[:1])
    first = sentences[0].text
    cosine = float(embed(question) @ embed(first))
    terms = set(analyzer_tokens(question))
    overlap = len(terms & set(analyzer_tokens(first))) / len(terms)
    assert scores[0] == pytest.approx(0.75 * cosine + 0.25 * overlap)


def test_only_the_bounded_number_of_sentences_is_embedded_chosen_by_term_overlap():
    """Sixty filler sentences and, in the last passage, the one that answers: the bound keeps
    every sentence sharing a question term, fills up with the earliest others, and the answer
    is still found."""
    filler = " ".join(f"Section {n} lists part number {n}." for n in range(30))
    passages = [
        passage(1, filler, "parts-a"),
        passage(2, filler.replace("Section", "Table"), "parts-b"),
        passage(3, "Replace brake pads when they are worn to 1 mm.", "brakes"),
    ]
    embedded: list[str] = []

    def counting_embed_texts(texts: Sequence[str]) -> np.ndarray:
        embedded.extend(texts)
        return embed_texts(texts)

    gen = ExtractiveGenerator(
        embed,
        counting_embed_texts,
        analyzer_tokens,
        evidence_threshold=0.5,
        max_embedded_sentences=10,
    )
    sentences, _ = gen.score_sentences("When are brake pads worn?", passages)
    assert len(embedded) == len(sentences) == 10
    assert embedded[-1] == "Replace brake pads when they are worn to 1 mm."
    assert embedded[:9] == [f"Section {n} lists part number {n}." for n in range(9)]
    answer = gen.generate("When are brake pads worn?", passages)
    assert answer.answer == "Replace brake pads when they are worn to 1 mm. [3]"


def test_a_sentence_bound_below_the_answer_length_is_refused():
    with pytest.raises(ValueError, match="max_embedded_sentences"):
        generator(max_sentences=4, max_embedded_sentences=3)
