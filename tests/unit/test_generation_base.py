"""Marker rules shared by every generator."""

from __future__ import annotations

import pytest

from service.generation.base import (
    GeneratedAnswer,
    cited_sentences,
    clean_markers,
    markers_in,
    place_markers,
    settle_markers,
)


def test_markers_matching_no_passage_are_removed_and_reported():
    text, removed = clean_markers("Pads last a year [1]. Chains rust [7].", {1, 2})
    assert text == "Pads last a year [1]. Chains rust."
    assert removed == (7,)


def test_a_marker_group_keeps_its_valid_markers_as_plain_markers():
    text, removed = clean_markers("Both agree [1, 9,2] and [2,2].", {1, 2})
    assert text == "Both agree [1][2] and [2]."
    assert removed == (9,)


def test_markers_are_listed_once_in_order_of_first_appearance():
    assert markers_in("a [3] b [1][3] c [2, 1]") == (3, 1, 2)


def test_settled_text_uses_exactly_the_markers_left_in_it():
    settled = settle_markers("Torque to 5 N·m [4] [2].", {2, 3})
    assert settled.text == "Torque to 5 N·m. [2]"
    assert settled.markers_used == (2,)
    assert settled.removed_markers == (4,)


def test_an_answer_whose_markers_disagree_with_markers_used_cannot_be_built():
    with pytest.raises(ValueError, match="markers_used"):
        GeneratedAnswer("Yes [1] [2].", None, (1,), 1.0, (), 0.0)


def test_a_declined_answer_needs_a_reason_and_no_markers():
    with pytest.raises(ValueError, match="declined"):
        GeneratedAnswer(None, None, (), 0.0, (), 0.0)
    with pytest.raises(ValueError, match="declined"):
        GeneratedAnswer(None, "insufficient_evidence", (1,), 0.0, (), 0.0)


@pytest.mark.parametrize(
    ("written", "placed"),
    [
        # A marker before the final punctuation, a run of dots included.
        ("The frame is covered for five years [1].", "The frame is covered for five years. [1]"),
        ("Check the pads [1]..", "Check the pads.. [1]"),
        ("Wait for the beep [2]...", "Wait for the beep... [2]"),
        # Inside a bracket: after the bracket closes.
        ("Run [file [1]...] on the console.", "Run [file...] [1] on the console."),
        ("Five years (frame only [1]).", "Five years (frame only). [1]"),
        # Inside a word: at the word's end.
        ("The warr[3]anty lasts two years.", "The warranty [3] lasts two years."),
        # Closing quotes stay with the sentence they close.
        (
            'The label says "dealer only [1]." Ask first.',
            'The label says "dealer only." [1] Ask first.',
        ),
        # Glued to the next sentence, or a run of markers.
        ("Five years.[1]Paint one year.[2]", "Five years. [1] Paint one year. [2]"),
        ("Tighten to 5 Nm [1][2].", "Tighten to 5 Nm. [1] [2]"),
        # Before a comma the marker cites the clause and stays.
        ("Frames five years [1], paint one [2].", "Frames five years [1], paint one. [2]"),
        # Already in place: unchanged.
        ("Five years. [1] Paint one year. [2]", "Five years. [1] Paint one year. [2]"),
    ],
)
def test_markers_are_placed_after_the_sentence_outside_words_and_brackets(
    written: str, placed: str
) -> None:
    assert place_markers(written) == placed
    assert markers_in(place_markers(written)) == markers_in(written)


def test_each_marker_cites_the_text_before_it_back_to_the_previous_marker():
    answer = "Frames five years. [1] Paint one year. [2] [1] Batteries two years. [3]"

    assert cited_sentences(answer) == {
        1: ("Frames five years.", "Paint one year."),
        2: ("Paint one year.",),
        3: ("Batteries two years.",),
    }
