"""Marker rules shared by every generator."""

from __future__ import annotations

import pytest

from service.generation.base import GeneratedAnswer, clean_markers, markers_in, settle_markers


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
    assert settled.text == "Torque to 5 N·m [2]."
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
