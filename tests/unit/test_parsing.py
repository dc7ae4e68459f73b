from __future__ import annotations

import itertools

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from service.ingest.parsing import ParsedText, Section, parse_document


def section_texts(parsed: ParsedText) -> list[tuple[tuple[str, ...], str]]:
    return [(s.path, parsed.text[s.start : s.end].strip()) for s in parsed.sections]


def assert_sections_tile_the_text(parsed: ParsedText) -> None:
    if not parsed.text:
        assert parsed.sections == ()
        return
    assert parsed.sections[0].start == 0
    assert parsed.sections[-1].end == len(parsed.text)
    for before, after in itertools.pairwise(parsed.sections):
        assert before.end == after.start
        assert before.start < before.end


def test_markdown_headings_become_plain_lines_with_nested_section_paths() -> None:
    parsed = parse_document(
        "# Brakes\n\nSqueeze the lever.\n\n## Adjusting the cable\n\nTurn the barrel.\n\n"
        "### Tools\n\nA 5 mm key.\n\n## Pads\n\nReplace worn pads.\n\n# Wheels\n\nTrue them.\n",
        "text/markdown",
    )

    assert parsed.text == (
        "Brakes\n\nSqueeze the lever.\n\nAdjusting the cable\n\nTurn the barrel.\n\nTools\n\n"
        "A 5 mm key.\n\nPads\n\nReplace worn pads.\n\nWheels\n\nTrue them."
    )
    assert section_texts(parsed) == [
        (("Brakes",), "Brakes\n\nSqueeze the lever."),
        (("Brakes", "Adjusting the cable"), "Adjusting the cable\n\nTurn the barrel."),
        (("Brakes", "Adjusting the cable", "Tools"), "Tools\n\nA 5 mm key."),
        (("Brakes", "Pads"), "Pads\n\nReplace worn pads."),
        (("Wheels",), "Wheels\n\nTrue them."),
    ]
    assert_sections_tile_the_text(parsed)


def test_markdown_text_before_the_first_heading_has_the_empty_path() -> None:
    parsed = parse_document("Read this first.\n\n# Setup\n\nUnpack.", "text/markdown")

    assert parsed.sections == (
        Section(0, len("Read this first.\n\n"), ()),
        Section(len("Read this first.\n\n"), len(parsed.text), ("Setup",)),
    )


def test_markdown_inline_markup_is_removed_and_whitespace_collapsed() -> None:
    parsed = parse_document(
        "Check   the *tyre* pressure\nbefore **every** ride: see [the chart](http://x.example)"
        " and `psi`.  \nThen go &amp; ride.",
        "text/markdown",
    )

    assert parsed.text == (
        "Check the tyre pressure before every ride: see the chart and psi. Then go & ride."
    )


def test_markdown_list_items_sit_on_their_own_lines_after_a_blank_line() -> None:
    parsed = parse_document(
        "Steps:\n\n1. Loosen the bolt\n2. Slide the\n   wheel out\n   - keep the spacer\n\n"
        "- one\n- two\n\nDone.",
        "text/markdown",
    )

    assert parsed.text == (
        "Steps:\n\n1. Loosen the bolt\n2. Slide the wheel out\n- keep the spacer\n\n"
        "- one\n- two\n\nDone."
    )


def test_markdown_ordered_list_keeps_its_start_number() -> None:
    parsed = parse_document("3. third\n4. fourth", "text/markdown")

    assert parsed.text == "3. third\n4. fourth"


def test_markdown_code_blocks_keep_their_lines_without_blank_ones() -> None:
    parsed = parse_document("Run:\n\n```\nmake  run\n\n  make test   \n```\n", "text/markdown")

    assert parsed.text == "Run:\n\nmake  run\n  make test"


def test_markdown_tables_become_one_line_per_row() -> None:
    parsed = parse_document("| size | psi |\n|---|---|\n| 28 | 80 |\n| 32 | 70 |", "text/markdown")

    assert parsed.text == "size | psi\n28 | 80\n32 | 70"


def test_markdown_raw_html_is_read_as_html_with_scripts_dropped() -> None:
    parsed = parse_document(
        "Intro.\n\n<div>Torque <b>5 Nm</b><script>alert(1)</script></div>\n\nEnd.",
        "text/markdown",
    )

    assert parsed.text == "Intro.\n\nTorque 5 Nm\n\nEnd."


def test_markdown_deeply_nested_lists_keep_their_text() -> None:
    parsed = parse_document("- " * 30 + "innermost", "text/markdown")

    assert parsed.text == "- innermost"


def test_html_drops_scripts_styles_head_noscript_template_and_comments() -> None:
    parsed = parse_document(
        "<!DOCTYPE html><html><head><title>Page title</title><style>p{}</style></head>"
        "<body><p>Visible<script>var hidden = 1;</script> text</p><noscript>enable js</noscript>"
        "<template><p>template</p></template><!-- a comment --><p>More</p></body></html>",
        "text/html",
    )

    assert parsed.text == "Visible text\n\nMore"


def test_html_headings_open_sections_and_block_elements_become_paragraphs() -> None:
    parsed = parse_document(
        "<h1>Warranty</h1><div>Frames: <em>ten</em> years.<div>Paint: two years.</div></div>"
        "<h3>Exclusions</h3><section><p>Crashes.</p><p>Racing.</p></section>"
        "<h2>Claims</h2><article>Ask your dealer.</article>",
        "text/html",
    )

    assert section_texts(parsed) == [
        (("Warranty",), "Warranty\n\nFrames: ten years.\n\nPaint: two years."),
        (("Warranty", "Exclusions"), "Exclusions\n\nCrashes.\n\nRacing."),
        (("Warranty", "Claims"), "Claims\n\nAsk your dealer."),
    ]
    assert_sections_tile_the_text(parsed)


def test_html_lists_and_tables_become_lines_and_entities_are_decoded() -> None:
    parsed = parse_document(
        "<p>Sizes&nbsp;&amp;&nbsp;pressures</p><ul><li>small</li><li>large<ol><li>a</li>"
        "<li>b</li></ol></li></ul><table><tr><th>size</th><th>psi</th></tr>"
        "<tr><td>28</td><td>80</td></tr></table>",
        "text/html",
    )

    assert parsed.text == "Sizes & pressures\n\n- small\n- large\n1. a\n2. b\n\nsize | psi\n28 | 80"


def test_html_empty_headings_are_ignored() -> None:
    parsed = parse_document("<h1>Top</h1><h2> </h2><p>body</p>", "text/html")

    assert parsed.sections == (Section(0, len(parsed.text), ("Top",)),)


def test_html_navigation_banner_and_footer_are_dropped_but_the_banner_heading_is_kept() -> None:
    parsed = parse_document(
        "<body><header><a href='/'>Tarnwick documentation</a><h1>Wren 2022 manual</h1>"
        "<nav>Previous | Next</nav></header><nav><a href='/'>Tarnwick documentation</a></nav>"
        "<main><p>Read this first.</p><h2>Brakes</h2><p>Squeeze both levers.</p></main>"
        "<div role='navigation'>Site map</div><footer>Tarnwick Cycle Works, Elsbrook</footer>"
        "</body>",
        "text/html",
    )

    assert parsed.text == "Wren 2022 manual\n\nRead this first.\n\nBrakes\n\nSqueeze both levers."
    assert section_texts(parsed) == [
        (("Wren 2022 manual",), "Wren 2022 manual\n\nRead this first."),
        (("Wren 2022 manual", "Brakes"), "Brakes\n\nSqueeze both levers."),
    ]


def test_html_header_and_footer_of_an_article_are_its_content() -> None:
    parsed = parse_document(
        "<main><article><header><h1>SB-2024-02</h1><p>Published 2024-02-12</p></header>"
        "<p>Replace the collar.</p><footer>Technical service</footer></article></main>",
        "text/html",
    )

    assert parsed.text == (
        "SB-2024-02\n\nPublished 2024-02-12\n\nReplace the collar.\n\nTechnical service"
    )
    assert [s.path for s in parsed.sections] == [("SB-2024-02",)]


def test_html_nested_far_beyond_the_recursion_limit_is_read() -> None:
    parsed = parse_document("<div>" * 3000 + "deep" + "</div>" * 3000, "text/html")

    assert parsed.text == "deep"


def test_plain_text_normalises_line_ends_trailing_spaces_and_blank_runs() -> None:
    parsed = parse_document(
        "\r\n \r\nFirst line  \r\n  indented\tline\t\r\n\r\n\r\n\r\nLast\n\n \n", "text/plain"
    )

    assert parsed.text == "First line\n  indented\tline\n\nLast"
    assert parsed.sections == (Section(0, len(parsed.text), ()),)


def test_plain_text_upper_case_lines_that_open_a_paragraph_are_headings() -> None:
    parsed = parse_document(
        "FRAME WARRANTY\n\nTarnwick warrants the frame for five years.\n\n"
        "E-BIKE BATTERY AND MOTOR\n\nBatteries are covered for two years.\n"
        "Motors are covered for two years.",
        "text/plain",
    )

    assert section_texts(parsed) == [
        (("FRAME WARRANTY",), "FRAME WARRANTY\n\nTarnwick warrants the frame for five years."),
        (
            ("E-BIKE BATTERY AND MOTOR",),
            "E-BIKE BATTERY AND MOTOR\n\nBatteries are covered for two years.\n"
            "Motors are covered for two years.",
        ),
    ]
    assert_sections_tile_the_text(parsed)


def test_plain_text_underlined_headings_nest_in_the_order_their_styles_first_appear() -> None:
    parsed = parse_document(
        "Read this first.\n\nLarkspur owner's guide\n======================\n\n"
        "Brakes\n------\nSqueeze both levers.\n\nTOOLS\n\nA 5 mm key.\n\n"
        "Tyres\n-----\n\nInflate to 3.5 bar.\n\nWarranty\n========\n\nFive years.",
        "text/plain",
    )

    assert parsed.text == (
        "Read this first.\n\nLarkspur owner's guide\n\nBrakes\nSqueeze both levers.\n\n"
        "TOOLS\n\nA 5 mm key.\n\nTyres\n\nInflate to 3.5 bar.\n\nWarranty\n\nFive years."
    )
    assert section_texts(parsed) == [
        ((), "Read this first."),
        (("Larkspur owner's guide",), "Larkspur owner's guide"),
        (("Larkspur owner's guide", "Brakes"), "Brakes\nSqueeze both levers."),
        (("Larkspur owner's guide", "Brakes", "TOOLS"), "TOOLS\n\nA 5 mm key."),
        (("Larkspur owner's guide", "Tyres"), "Tyres\n\nInflate to 3.5 bar."),
        (("Warranty",), "Warranty\n\nFive years."),
    ]
    assert_sections_tile_the_text(parsed)


@pytest.mark.parametrize(
    "text",
    [
        "Read the manual.\nTORQUE VALUES\n\nStem: 5 Nm.",  # upper case, but inside a paragraph
        "DO NOT RIDE A DAMAGED FRAME.\n\nAsk your dealer.",  # ends like a sentence
        "- BRAKES\n- TYRES",  # list items
        "E-21 | MOTOR OVERHEAT\n\nLet it cool.",  # a table row
        "SB-22\n\nReplace the collar.",  # mostly not letters
        "Check the pads.\nThen the rotors.\n---\n\nDone.",  # a rule under a paragraph
        "Torque values for the Larkspur 2023 in newton metres as measured at the bolt\n===",
    ],
)
def test_plain_text_lines_that_only_resemble_headings_stay_text(text: str) -> None:
    parsed = parse_document(text, "text/plain")

    assert parsed.text == text
    assert [s.path for s in parsed.sections] == [()]


@pytest.mark.parametrize("media_type", ["text/plain", "text/markdown", "text/html"])
def test_text_is_nfc_normalised(media_type: str) -> None:
    parsed = parse_document("cafe\u0301 ja\u0308", media_type)

    assert parsed.text == "caf\u00e9 j\u00e4"


@pytest.mark.parametrize("media_type", ["text/plain", "text/markdown", "text/html"])
def test_blank_input_gives_empty_text_and_no_sections(media_type: str) -> None:
    assert parse_document(" \n\t\n", media_type) == ParsedText("", ())


def test_unknown_media_type_is_refused() -> None:
    with pytest.raises(ValueError, match="unsupported media type"):
        parse_document("x", "application/pdf")


markdown_lines = st.one_of(
    st.sampled_from(["", "", "# Top", "## Middle", "### Low", "- item", "1. step", "> quote"]),
    st.text(alphabet="ab é\t*_#-`<>&", min_size=0, max_size=12),
)


@settings(max_examples=150, deadline=None)
@given(st.lists(markdown_lines, max_size=25), st.sampled_from(["text/markdown", "text/plain"]))
def test_normalised_text_has_no_blank_runs_and_sections_tile_it(
    lines: list[str], media_type: str
) -> None:
    parsed = parse_document("\n".join(lines), media_type)

    assert "\n\n\n" not in parsed.text
    assert parsed.text == parsed.text.strip("\n")
    assert all(line == line.rstrip() for line in parsed.text.split("\n"))
    assert_sections_tile_the_text(parsed)
