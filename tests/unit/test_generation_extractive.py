"""The extractive generator with a small concept embedder standing in for the model."""

from __future__ import annotations

import re
from collections.abc import Sequence

import numpy as np
import pytest

from service.generation.base import (
    INSUFFICIENT_EVIDENCE,
    AnswerSupport,
    ChunkVector,
    markers_in,
)
from service.generation.extractive import (
    LEXICAL_WEIGHT,
    SEMANTIC_WEIGHT,
    TYPE_CUE_WEIGHT,
    ExtractiveGenerator,
)
from service.generation.reading import YEAR_KIND, Entity
from service.generation.spans import PassageWindow
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


def passage(
    marker: int, text: str, document_id: str = "manual", title: str = "Manual", start: int = 0
) -> Passage:
    return Passage(
        marker,
        document_id,
        title,
        None,
        (f"{document_id}#0000",),
        text,
        0,
        start,
        start + len(text),
    )


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
        "Pads wear faster in rain and mud. Torque the rotor bolts to 6 N·m. [12]",
        "brakes",
    ),
]


def test_the_answer_is_the_best_span_ending_with_its_marker():
    answer = generator(evidence_threshold=0.5).generate("How long is the frame warranty?", PASSAGES)
    assert answer.reason is None
    assert answer.answer == "The frame is covered by the warranty for five years. [1]"
    assert answer.markers_used == markers_in(answer.answer) == (1,)
    assert answer.evidence_score >= 0.5
    assert answer.threshold == 0.5
    assert answer.decision.startswith("answered: the best span scored")


def test_quoted_spans_keep_passage_order_whatever_their_scores():
    answer = generator(evidence_threshold=0.1, keep_ratio=0.0).generate(
        "brake pads wear in rain and warranty years", PASSAGES
    )
    assert answer.answer is not None
    assert answer.answer.index("[1]") < answer.answer.index("[2]")
    assert answer.markers_used == (1, 2)


def test_no_more_spans_than_the_limit_are_quoted_and_none_overlap():
    answer = generator(evidence_threshold=0.0, keep_ratio=0.0, max_sentences=2).generate(
        "brake pads warranty frame", PASSAGES
    )
    assert answer.answer is not None
    assert len(re.findall(r"\[\d+\]", answer.answer)) == 2
    quoted = answer.quoted
    assert not any(
        a.marker == b.marker and a.start < b.end and b.start < a.end
        for i, a in enumerate(quoted)
        for b in quoted[i + 1 :]
    )


def test_a_question_the_passages_do_not_address_is_declined():
    answer = generator(evidence_threshold=0.4).generate(
        "Which flour should I use to bake bread in the oven?", PASSAGES
    )
    assert answer.answer is None
    assert answer.reason == INSUFFICIENT_EVIDENCE
    assert answer.markers_used == ()
    assert answer.evidence_score < 0.4
    assert answer.decision.startswith("declined")


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


def test_a_span_score_adds_the_documented_parts():
    """Semantic similarity is the question's to the chunk the span lies in (here the passage,
    embedded whole because no stored chunk vectors are given)."""
    gen = generator(evidence_threshold=0.0)
    question = "How long is the frame warranty?"
    answer = gen.generate(question, PASSAGES[:1])
    best = answer.considered[0]
    assert best.text == "The frame is covered by the warranty for five years."
    cosine = float(embed(question) @ embed(PASSAGES[0].text))
    terms = set(analyzer_tokens("frame warranty"))
    lexical = len(terms & set(analyzer_tokens(best.text))) / len(terms)
    assert best.semantic == pytest.approx(cosine, abs=1e-6)
    assert best.lexical == pytest.approx(lexical)
    assert best.type_cue == 1.0
    assert best.total == pytest.approx(
        SEMANTIC_WEIGHT * cosine + LEXICAL_WEIGHT * lexical + TYPE_CUE_WEIGHT, abs=1e-6
    )


def test_stored_chunk_vectors_give_each_span_the_similarity_of_its_own_chunk():
    text = "Replace brake pads at 1 mm. The frame is covered for five years."
    cut = len("Replace brake pads at 1 mm.")
    chunks = (
        ChunkVector(0, cut, embed("brake pads")),
        ChunkVector(cut + 1, len(text), embed("frame warranty years")),
    )
    support = AnswerSupport(
        query_vector=embed("How long is the frame warranty?"), chunk_vectors={1: chunks}
    )
    answer = generator(evidence_threshold=0.0).generate(
        "How long is the frame warranty?", [passage(1, text)], support
    )
    by_text = {span.text: span.semantic for span in answer.considered}
    assert by_text["The frame is covered for five years."] == pytest.approx(
        float(embed("How long is the frame warranty?") @ embed("frame warranty years"))
    )
    assert answer.answer == "The frame is covered for five years. [1]"


def test_a_question_for_a_number_is_not_answered_by_a_span_without_one():
    passages = [passage(1, "The frame is covered by the warranty. Keep your receipt.")]
    answer = generator(evidence_threshold=0.0).generate(
        "How many years is the frame warranty?", passages
    )
    assert answer.answer is None
    assert "holds no duration" in answer.decision


def test_idf_weights_make_a_rare_question_word_count_more():
    weights = {"frame": 5.0, "warranty": 1.0}
    support = AnswerSupport(term_weight=lambda term: weights.get(term, 1.0))
    passages = [passage(1, "The frame is light. The warranty needs a receipt.")]
    answer = generator(evidence_threshold=0.0).generate("frame warranty", passages, support)
    lexical = {span.text: span.lexical for span in answer.considered}
    assert lexical["The frame is light."] == pytest.approx(5 / 6)
    assert lexical["The warranty needs a receipt."] == pytest.approx(1 / 6)


def test_a_span_naming_another_year_than_asked_is_penalised():
    passages = [
        passage(
            1,
            "The 2023 frame is covered for five years. The 2024 frame is covered for ten years.",
        )
    ]
    answer = generator(evidence_threshold=0.0, keep_ratio=1.0).generate(
        "How long is the 2024 frame warranty?", passages
    )
    assert answer.answer == "The 2024 frame is covered for ten years. [1]"
    other = next(s for s in answer.considered if s.kind == "sentence" and "2023" in s.text)
    assert other.penalty == 1.0
    assert other.notes == ("does not name 2024", "names 2023")
    assert other.eligible is False


def test_a_question_naming_an_entity_no_passage_names_is_declined():
    """The filter says Larkspur, the question asks about the Ridgeline: no span can answer."""
    names = {"ridgeline": Entity("model", "Ridgeline"), "larkspur": Entity("model", "Larkspur")}

    def find(text: str) -> frozenset[Entity]:
        return frozenset(e for word, e in names.items() if word in text.lower())

    passages = [passage(1, "Inflate the tyres to 2.8 bar.", "larkspur", "Larkspur manual")]
    support = AnswerSupport(
        find_entities=find, document_entities={1: frozenset({Entity("model", "Larkspur")})}
    )
    answer = generator(evidence_threshold=0.0).generate(
        "What tyre pressure for my Ridgeline?", passages, support
    )
    assert answer.answer is None
    assert answer.decision == (
        "declined: no span can answer (the best one does not name Ridgeline)"
    )
    assert answer.considered[0].eligible is False


def test_a_year_the_documents_do_not_have_is_declined():
    support = AnswerSupport(document_entities={1: frozenset({Entity(YEAR_KIND, "2024")})})
    passages = [passage(1, "The frame is covered by the warranty for five years.")]
    answer = generator(evidence_threshold=0.0).generate(
        "How long is the warranty of the 2025 frame?", passages, support
    )
    assert answer.answer is None
    assert "does not name 2025" in answer.decision


def test_a_sentence_cut_by_the_passage_is_quoted_whole_from_the_document_text():
    text = "pads when they are worn to 1 mm. Pads wear faster in rain."
    cut = passage(1, text, start=100)
    window = PassageWindow(cut, before="The rotor is steel. Replace brake ", after=" Keep dry.")
    answer = generator(evidence_threshold=0.0, max_sentences=1).generate(
        "When should brake pads be replaced?", [cut], AnswerSupport(windows={1: window})
    )
    assert answer.answer == "Replace brake pads when they are worn to 1 mm. [1]"
    assert answer.quoted[0].start == 100 - len("Replace brake ")


def test_nothing_is_embedded_when_the_support_carries_the_vectors():
    def refuse(_texts: Sequence[str]) -> np.ndarray:
        raise AssertionError("no span or passage may be embedded")

    def refuse_query(_text: str) -> np.ndarray:
        raise AssertionError("the question's vector is given")

    gen = ExtractiveGenerator(refuse_query, refuse, analyzer_tokens, evidence_threshold=0.0)
    text = PASSAGES[0].text
    support = AnswerSupport(
        query_vector=embed("frame warranty"),
        chunk_vectors={1: (ChunkVector(0, len(text), embed(text)),)},
    )
    answer = gen.generate("How long is the frame warranty?", PASSAGES[:1], support)
    assert answer.answer is not None


def test_a_question_naming_a_word_the_collection_never_holds_is_declined():
    support = AnswerSupport(
        analyzer_tokens=analyzer_tokens, known_term=lambda term: term != "canada"
    )
    answer = generator(evidence_threshold=0.0).generate(
        "How many years is the frame covered in Canada?", PASSAGES, support
    )
    assert answer.answer is None
    assert answer.decision == "declined: the collection never mentions Canada"


def test_a_best_span_weak_on_both_words_and_meaning_is_declined():
    question = "What torque does the main pivot bolt take?"
    text = "Stem bolts: Torque 6 Nm"
    weights = {"main": 3.0, "pivot": 3.0, "torque": 1.0, "bolt": 1.0}
    far = AnswerSupport(
        term_weight=lambda term: weights.get(term, 1.0),
        query_vector=embed(question),
        chunk_vectors={1: (ChunkVector(0, len(text), embed("rain and mud")),)},
    )
    declined = generator(evidence_threshold=0.0).generate(question, [passage(1, text)], far)
    assert declined.answer is None
    assert declined.considered[0].lexical == pytest.approx(2 / 8)
    assert "below 0.36" in declined.decision and "below 0.5" in declined.decision
    # The same words from a chunk that means what the question asks are evidence.
    near = AnswerSupport(
        term_weight=far.term_weight,
        query_vector=far.query_vector,
        chunk_vectors={1: (ChunkVector(0, len(text), embed(question)),)},
    )
    answered = generator(evidence_threshold=0.0).generate(question, [passage(1, text)], near)
    assert answered.answer == "Stem bolts: Torque 6 Nm. [1]"


def test_a_count_is_answered_only_by_a_number_of_the_counted_thing():
    question = "How many passengers can the bomber carry?"
    weights = passage(1, "The bomber flew at 30,000 feet with a gross weight of 83,000 pounds.")
    answer = generator(evidence_threshold=0.0).generate(question, [weights])
    assert answer.answer is None
    assert "holds no count" in answer.decision
    seats = passage(1, "The bomber carries 12 passengers.")
    assert generator(evidence_threshold=0.0).generate(question, [seats]).answer is not None
