"""The section a citation names: where its cited sentence lies in a merged passage."""

from __future__ import annotations

from service.packing.citing import section_at, section_of_quote
from service.packing.packer import Passage, SectionEntry

# A merged passage of an invented warranty policy, starting 100 characters into its document.
TEXT = (
    "FRAME WARRANTY\n\n"
    "Tarnwick warrants the frame for five years from the date of purchase.\n\n"
    "TRANSFER TO A NEW OWNER\n\n"
    "- The frame warranty covers the original owner only.\n"
    "- Code | Meaning\n"
    "- E-21 | Motor overheat"
)
TRANSFER_AT = 100 + TEXT.index("TRANSFER")
PASSAGE = Passage(
    marker=1,
    document_id="warranty-us-2019",
    title="Warranty policy US 2019",
    section="FRAME WARRANTY",
    chunk_ids=("warranty-us-2019#0001", "warranty-us-2019#0002"),
    text=TEXT,
    tokens=60,
    char_start=100,
    char_end=100 + len(TEXT),
    sections=(
        SectionEntry(100, "FRAME WARRANTY"),
        SectionEntry(TRANSFER_AT, "TRANSFER TO A NEW OWNER"),
    ),
)


def test_a_sentence_under_the_second_heading_is_cited_with_that_heading():
    quote = "The frame warranty covers the original owner only."

    assert section_of_quote(PASSAGE, quote) == "TRANSFER TO A NEW OWNER"


def test_a_sentence_under_the_first_heading_keeps_the_passages_section():
    quote = "Tarnwick warrants the frame for five years from the date of purchase."

    assert section_of_quote(PASSAGE, quote) == "FRAME WARRANTY"


def test_case_spacing_and_a_dropped_bullet_do_not_hide_the_sentence():
    quote = "the  FRAME warranty covers\nthe original owner only"

    assert section_of_quote(PASSAGE, quote) == "TRANSFER TO A NEW OWNER"


def test_a_table_row_reworded_around_its_cells_is_placed_by_its_longest_run_of_words():
    quote = "Meaning of E-21 | Motor overheat"

    assert section_of_quote(PASSAGE, quote) == "TRANSFER TO A NEW OWNER"


def test_words_the_passage_does_not_hold_in_order_name_the_first_section():
    assert section_of_quote(PASSAGE, "Owners change; warranties stay.") == "FRAME WARRANTY"
    assert section_of_quote(PASSAGE, "") == "FRAME WARRANTY"


def test_a_passage_of_one_section_names_it_without_searching():
    single = Passage(2, "d", "D", "Brakes", ("d#0000",), "Squeeze the lever.", 5, 0, 18)

    assert section_of_quote(single, "anything at all") == "Brakes"


def test_a_document_offset_is_in_the_section_entered_last_before_it():
    assert section_at(PASSAGE, 100) == "FRAME WARRANTY"
    assert section_at(PASSAGE, TRANSFER_AT - 1) == "FRAME WARRANTY"
    assert section_at(PASSAGE, TRANSFER_AT) == "TRANSFER TO A NEW OWNER"
    assert section_at(PASSAGE, 99) == "FRAME WARRANTY"
