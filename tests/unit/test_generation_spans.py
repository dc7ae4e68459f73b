"""Candidate spans: cut the way facts are written, never a fragment of a sentence."""

from __future__ import annotations

from service.generation.spans import PassageWindow, passage_spans
from service.packing.packer import Passage


def window(text: str, before: str = "", after: str = "", start: int = 0) -> PassageWindow:
    passage = Passage(1, "doc", "Doc", None, ("doc#0000",), text, 1, start, start + len(text))
    return PassageWindow(passage, before, after)


def texts(found: list) -> list[tuple[str, str]]:
    return [(span.kind, span.text) for span in found]


def test_headings_are_not_candidates_and_become_the_spans_heading():
    found = passage_spans(window("Warranty\n\nThe frame is covered.\n\nBrakes\n\n- Check pads."))
    assert texts(found) == [("sentence", "The frame is covered."), ("item", "Check pads.")]
    assert [span.heading for span in found] == ["Warranty", "Brakes"]


def test_a_table_row_reads_with_its_header():
    text = (
        "Common codes\n\nCode | Meaning | First action\nE-14 | Battery temperature | Warm it."
        "\nE-21 | Motor overheating | Let the motor cool for 30 minutes."
    )
    found = passage_spans(window(text))
    assert texts(found) == [
        ("row", "Code: E-14; Meaning: Battery temperature; First action: Warm it."),
        (
            "row",
            "Code: E-21; Meaning: Motor overheating; First action: Let the motor cool for"
            " 30 minutes.",
        ),
    ]


def test_a_table_row_in_a_passage_that_starts_below_the_header_gets_the_header_from_the_document():
    before = "Torque values\n\nFastener | Torque\nStem bolts | 5 Nm\n"
    found = passage_spans(window("Main pivot bolt | 18 Nm", before=before, start=len(before)))
    assert texts(found) == [("row", "Fastener: Main pivot bolt; Torque: 18 Nm")]
    assert found[0].start == len(before)


def test_key_value_lines_stand_alone():
    text = "TORQUE VALUES\n\nStem bolts: Torque 6 Nm\nSeat clamp bolt: Torque 6 Nm"
    found = passage_spans(window(text))
    assert texts(found) == [
        ("line", "Stem bolts: Torque 6 Nm"),
        ("line", "Seat clamp bolt: Torque 6 Nm"),
    ]
    assert found[0].heading == "TORQUE VALUES"


def test_a_sentence_cut_by_the_passage_is_extended_from_the_document_text():
    found = passage_spans(
        window(
            "pads at 1 mm. Bed them in.",
            before="Intro. Replace the ",
            after=" Done here.",
            start=19,
        )
    )
    assert texts(found)[:2] == [
        ("sentence", "Replace the pads at 1 mm."),
        ("sentence", "Bed them in."),
    ]
    assert found[0].start == len("Intro. ")


def test_a_short_paragraph_is_a_candidate_beside_its_sentences():
    found = passage_spans(window("The brakes use mineral oil. Bleeding them is dealer only."))
    assert texts(found)[-1] == (
        "paragraph",
        "The brakes use mineral oil. Bleeding them is dealer only.",
    )


def test_lower_case_abstracts_split_into_sentences_but_not_at_abbreviations():
    text = "tests were made at mach 3.1 e.g. in air. the results agree with theory."
    found = passage_spans(window(text))
    assert [s.text for s in found if s.kind == "sentence"] == [
        "tests were made at mach 3.1 e.g. in air.",
        "the results agree with theory.",
    ]
