"""Filter inference: each kind of clause, ambiguity, dropping, and the caller kept in charge.

The rows are a small invented catalogue of bicycles and documents; ``now`` is fixed.
"""

from __future__ import annotations

import datetime as dt
from typing import Any

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from service.attributes import AttributeType, Schema, normalize_value
from service.filters.check import check_filter
from service.filters.columns import AttributeColumns
from service.filters.evaluate import evaluate
from service.filters.inference.engine import (
    Inference,
    InferenceScope,
    InferredClause,
    infer_clauses,
)
from service.filters.inference.hints import AttributeHints, parse_attribute_hints
from service.filters.inference.lexicon import Lexicon, build_lexicon
from service.filters.render import to_text

NOW = dt.datetime(2025, 3, 15, 12, 0, tzinfo=dt.UTC)
SCHEMA: Schema = {
    "model": AttributeType.KEYWORD,
    "colour": AttributeType.KEYWORD,
    "region": AttributeType.KEYWORD,
    "kind": AttributeType.KEYWORD,
    "frame_size": AttributeType.KEYWORD,
    "tags": AttributeType.KEYWORD_LIST,
    "model_year": AttributeType.INTEGER,
    "battery_wh": AttributeType.INTEGER,
    "price_eur": AttributeType.NUMBER,
    "max_rider_weight_kg": AttributeType.NUMBER,
    "recall": AttributeType.BOOLEAN,
    "effective": AttributeType.DATE,
    "published": AttributeType.DATETIME,
}
ROWS: list[dict[str, Any]] = [
    {"model": "Fenwick", "model_year": 2022, "kind": "manual", "price_eur": 1890.0,
     "colour": "Slate", "frame_size": "M", "published": "2021-09-01T09:00:00Z",
     "tags": ["brakes", "tyres"]},
    {"model": "Fenwick", "model_year": 2024, "kind": "manual", "price_eur": 2190.0,
     "colour": "Slate", "frame_size": "XL", "published": "2023-09-04T09:00:00Z",
     "tags": ["brakes"]},
    {"model": "Brisa", "model_year": 2023, "kind": "manual", "price_eur": 3490.0,
     "battery_wh": 625, "colour": "Fern", "published": "2022-10-03T09:00:00Z"},
    {"model": "Brisa", "model_year": 2024, "kind": "manual", "price_eur": 3690.0,
     "battery_wh": 750, "colour": "Fern", "published": "2023-10-02T09:00:00Z"},
    {"model": "Pip", "model_year": 2024, "kind": "manual", "price_eur": 399.0,
     "max_rider_weight_kg": 45.0, "published": "2023-06-12T09:00:00Z"},
    {"model": "Brisa", "kind": "bulletin", "recall": True, "published": "2024-11-20T08:00:00Z"},
    {"model": "Fenwick", "kind": "bulletin", "recall": False, "published": "2023-02-07T08:00:00Z"},
    {"kind": "warranty", "region": "EU", "effective": "2021-07-01"},
    {"kind": "warranty", "region": "EU", "effective": "2024-04-01"},
    {"kind": "warranty", "region": "US", "effective": "2022-06-01"},
    # "Fern" is also a model, so the word alone could be a colour or a model
    {"model": "Fern", "model_year": 2021, "kind": "manual", "colour": "Slate",
     "published": "2020-09-01T09:00:00Z"},
]  # fmt: skip
HINTS: dict[str, dict[str, Any]] = {
    "region": {
        "description": "Market a warranty applies to",
        "aliases": {"EU": ["Europe", "Austria"], "US": ["United States"]},
    },
    "kind": {"aliases": {"bulletin": ["service bulletin"], "warranty": ["policy"]}},
    "colour": {"description": "Paint colour of the frame"},
    "recall": {"phrases": {"true": ["recalled", "recalls"], "false": []}},
    "published": {"description": "When the document was issued"},
    "effective": {"description": "When a policy took effect"},
    "tags": {"infer": False},
}


def _columns() -> AttributeColumns:
    rows = [{k: normalize_value(k, SCHEMA[k], v) for k, v in row.items()} for row in ROWS]
    return AttributeColumns.build(SCHEMA, rows)


COLUMNS = _columns()


def _hints(raw: dict[str, dict[str, Any]]) -> dict[str, AttributeHints]:
    return {name: parse_attribute_hints(SCHEMA[name], spec) for name, spec in raw.items()}


LEXICON = build_lexicon(SCHEMA, _hints(HINTS), COLUMNS)
ALL = np.ones(len(ROWS), dtype=bool)


def infer(
    question: str,
    *,
    lexicon: Lexicon = LEXICON,
    visible: np.ndarray = ALL,
    allowed: np.ndarray | None = None,
    explicit: frozenset[str] = frozenset(),
    now: dt.datetime = NOW,
) -> Inference:
    scope = InferenceScope(
        columns=COLUMNS,
        visible=visible,
        allowed=visible if allowed is None else allowed,
        explicit=explicit,
        now=now,
    )
    return infer_clauses(question, lexicon, scope)


def text_of(inference: Inference) -> str | None:
    return None if inference.node is None else to_text(inference.node)


def rows_of(inference: Inference) -> list[int]:
    assert inference.node is not None
    return np.flatnonzero(evaluate(inference.node, COLUMNS)).tolist()


# keyword values -----------------------------------------------------------------------------


def test_a_keyword_value_is_found_whatever_its_case_and_accents_with_the_words_as_evidence() -> (
    None
):
    inference = infer("How do I adjust the brakes on a fenwick?")
    assert text_of(inference) == "model = 'Fenwick'"
    (clause,) = inference.clauses
    assert (clause.attribute, clause.op, clause.value) == ("model", "=", "Fenwick")
    assert clause.evidence == "fenwick"
    assert clause.source == "value in the index"


def test_plural_and_possessive_forms_find_the_value() -> None:
    assert text_of(infer("The Fenwick's brakes squeal")) == "model = 'Fenwick'"
    assert text_of(infer("Which policies cover the frame?")) == "kind = 'warranty'"


def test_an_alias_from_the_hints_names_its_value_and_an_alias_of_two_values_names_both() -> None:
    assert text_of(infer("Frame warranty in the United States?")) == (
        "kind = 'warranty' AND region = 'US'"
    )
    inference = infer("Do customers in Austria get more?")
    assert text_of(inference) == "region = 'EU'"
    assert inference.clauses[0].source == "alias in the schema hints"


def test_two_values_of_one_attribute_become_an_in_list() -> None:
    assert text_of(infer("Compare the Fenwick and the Brisa")) == ("model IN ('Fenwick', 'Brisa')")


def test_a_short_upper_case_value_is_matched_only_as_written() -> None:
    assert text_of(infer("Does the warranty cover us in the US?")) == (
        "kind = 'warranty' AND region = 'US'"
    )
    assert text_of(infer("Does the warranty cover us?")) == "kind = 'warranty'"


def test_a_value_spelled_like_a_common_word_counts_only_after_its_attribute_name() -> None:
    assert text_of(infer("Is frame size M in stock?")) == "frame_size = 'M'"
    assert infer("M is for Monday").node is None
    assert text_of(infer("Is the XL a good fit?")) == "frame_size = 'XL'"
    assert infer("Is the xl a good fit?").node is None


def test_a_negated_value_becomes_a_not_equal_clause() -> None:
    assert text_of(infer("Which manuals are not for the Brisa?")) == (
        "kind = 'manual' AND model <> 'Brisa'"
    )


def test_an_attribute_the_hints_exclude_is_never_inferred() -> None:
    assert text_of(infer("Which manuals talk about tyres?")) == "kind = 'manual'"


def test_a_value_of_two_attributes_is_resolved_by_a_cue_word_or_dropped_with_the_reason() -> None:
    resolved = infer("Which bikes come in the colour Fern?")
    assert text_of(resolved) == "colour = 'Fern'"
    unresolved = infer("Tell me about the Fern")
    assert unresolved.node is None
    assert {d.clause.attribute for d in unresolved.dropped} == {"colour", "model"}
    assert all("no word of the question says which" in d.reason for d in unresolved.dropped)


# numbers -----------------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("question", "expected"),
    [
        ("bikes with at least 700 Wh", "battery_wh >= 700"),
        ("bikes with more than 700 Wh", "battery_wh > 700"),
        ("bikes under 2,000 euros", "price_eur < 2000"),
        ("bikes that cost no more than 3500 €", "price_eur <= 3500"),
        ("bikes between 600 and 700 Wh", "battery_wh BETWEEN 600 AND 700"),
        ("bikes from 2000 to 3000 euros", "price_eur BETWEEN 2000 AND 3000"),
        ("a battery of 625 Wh or more", "battery_wh >= 625"),
        ("bikes priced over 3000", "price_eur > 3000"),
    ],
)
def test_numbers_with_their_comparison_words_find_the_attribute_by_unit_or_name(
    question: str, expected: str
) -> None:
    assert text_of(infer(question)) == expected


def test_a_number_against_a_maximum_asks_for_a_limit_at_least_that_high() -> None:
    inference = infer("a bike for a 42 kg rider")
    assert text_of(inference) == "max_rider_weight_kg >= 42"
    assert "maximum" in inference.clauses[0].source


def test_a_bare_number_with_no_unit_and_no_cue_word_is_no_clause() -> None:
    assert infer("error 625 on the display").node is None


def test_a_year_beside_a_model_is_its_model_year() -> None:
    inference = infer("tyre pressure for my 2022 Fenwick")
    assert text_of(inference) == "model_year = 2022 AND model = 'Fenwick'"
    assert inference.clauses[0].evidence == "2022"


def test_years_with_since_before_and_a_range_compare_the_model_year() -> None:
    assert text_of(infer("Brisa models from 2024 onwards")) == (
        "model = 'Brisa' AND model_year >= 2024"
    )
    assert text_of(infer("the 2022 and 2024 Fenwick")) == (
        "model_year IN (2022, 2024) AND model = 'Fenwick'"
    )


def test_numbers_written_as_words_are_read() -> None:
    assert text_of(infer("bikes with more than seven hundred Wh")) == "battery_wh > 700"


# dates and times ---------------------------------------------------------------------------


def test_a_year_after_a_cue_word_of_a_datetime_is_a_period_of_that_attribute() -> None:
    inference = infer("bulletins issued in 2023")
    assert text_of(inference) == (
        "kind = 'bulletin' AND T_INTERSECTS(published, INTERVAL('2023-01-01T00:00:00Z',"
        " '2023-12-31T23:59:59.999999Z'))"
    )


def during(start: str, end: str) -> str:
    return f"T_INTERSECTS(published, INTERVAL('{start}', '{end}'))"


@pytest.mark.parametrize(
    ("question", "expected"),
    [
        ("bulletins issued in March 2024",
         during("2024-03-01T00:00:00Z", "2024-03-31T23:59:59.999999Z")),
        ("bulletins issued on 2023-02-07",
         during("2023-02-07T00:00:00Z", "2023-02-07T23:59:59.999999Z")),
        ("bulletins issued before 2024", "published < TIMESTAMP('2024-01-01T00:00:00Z')"),
        ("bulletins issued after March 2024", "published >= TIMESTAMP('2024-04-01T00:00:00Z')"),
        ("bulletins issued since last March", "published >= TIMESTAMP('2024-03-01T00:00:00Z')"),
        ("bulletins issued between January and June 2023",
         during("2023-01-01T00:00:00Z", "2023-06-30T23:59:59.999999Z")),
        ("bulletins issued this year",
         during("2025-01-01T00:00:00Z", "2025-03-15T12:00:00Z")),
        ("bulletins issued last year",
         during("2024-01-01T00:00:00Z", "2024-12-31T23:59:59.999999Z")),
        ("bulletins issued in the last six months",
         during("2024-09-15T12:00:00Z", "2025-03-15T12:00:00Z")),
        ("bulletins issued in the past 30 days",
         during("2025-02-13T12:00:00Z", "2025-03-15T12:00:00Z")),
        ("bulletins issued over the past year",
         during("2024-03-15T12:00:00Z", "2025-03-15T12:00:00Z")),
    ],
)  # fmt: skip
def test_absolute_and_relative_times_resolve_against_now(question: str, expected: str) -> None:
    assert [to_text(c.node) for c in published_clauses(question)] == [expected]


def published_clauses(question: str) -> list[InferredClause]:
    """The clauses on ``published``, kept or dropped (few rows match these times)."""
    inference = infer(question)
    found = [*inference.clauses, *(d.clause for d in inference.dropped)]
    return [c for c in found if c.attribute == "published"]


def test_a_relative_window_matches_the_time_window_arithmetic() -> None:
    from service.filters.time_window import resolve_time_window

    (clause,) = published_clauses("bulletins issued in the last 3 months")
    node, _ = resolve_time_window("published", "P3M", NOW, SCHEMA)
    assert clause.node == node


def test_a_date_attribute_gets_date_literals() -> None:
    inference = infer("policies that took effect since 2022")
    assert text_of(inference) == "kind = 'warranty' AND effective >= DATE('2022-01-01')"


def test_a_time_is_tied_to_the_attribute_the_rows_of_the_other_clauses_have() -> None:
    # No cue word: only published has values among the bulletins.
    assert text_of(infer("bulletins from 2024")) == (
        "kind = 'bulletin' AND T_INTERSECTS(published, INTERVAL('2024-01-01T00:00:00Z',"
        " '2024-12-31T23:59:59.999999Z'))"
    )


def test_a_time_that_fits_two_attributes_equally_is_dropped_with_the_reason() -> None:
    inference = infer("anything from 2024?")
    assert inference.node is None
    assert {d.clause.attribute for d in inference.dropped} >= {"effective", "published"}


# booleans ----------------------------------------------------------------------------------


def test_a_boolean_phrase_from_the_hints_and_its_negation() -> None:
    recalled = infer("Which Brisa bikes were recalled?")
    assert text_of(recalled) == "model = 'Brisa' AND recall = TRUE"
    assert "phrase in the schema hints" in recalled.clauses[1].source
    assert text_of(infer("Fenwick bulletins that are not recalls")) == (
        "model = 'Fenwick' AND kind = 'bulletin' AND recall = FALSE"
    )


def test_without_hints_a_boolean_is_found_by_its_own_name() -> None:
    lexicon = build_lexicon(SCHEMA, {}, COLUMNS)
    inference = infer("any recall for the Brisa?", lexicon=lexicon)
    assert text_of(inference) == "recall = TRUE AND model = 'Brisa'"
    assert inference.clauses[0].source == "attribute name"


# dropping and the caller in charge ---------------------------------------------------------


def test_a_clause_that_would_leave_no_candidate_is_dropped_and_reported() -> None:
    inference = infer("the 2021 Brisa")
    assert text_of(inference) == "model = 'Brisa'"
    (dropped,) = inference.dropped
    assert to_text(dropped.clause.node) == "model_year = 2021"
    assert dropped.reason == "no document matches it together with model = 'Brisa'"


def test_a_clause_no_visible_row_matches_is_dropped_alone() -> None:
    inference = infer("bikes with more than 900 Wh")
    assert inference.node is None
    assert inference.dropped[0].reason == "no document you can see matches it"


def test_the_request_filter_wins_over_an_inferred_clause_on_the_same_attribute() -> None:
    inference = infer("the 2022 Fenwick", explicit=frozenset({"model_year"}))
    assert text_of(inference) == "model = 'Fenwick'"
    (dropped,) = inference.dropped
    assert dropped.clause.attribute == "model_year"
    assert "request's own filter" in dropped.reason


def test_a_clause_that_empties_the_request_filter_is_dropped() -> None:
    fenwick_only = evaluate(infer("Fenwick").node, COLUMNS)  # type: ignore[arg-type]
    inference = infer("the Brisa manual", allowed=fenwick_only)
    assert text_of(inference) == "kind = 'manual'"
    assert inference.dropped[0].reason == (
        "no document matches it together with the request's filter"
    )


def test_inference_never_selects_a_row_the_caller_cannot_see() -> None:
    visible = ALL.copy()
    visible[[5, 6]] = False  # the bulletins are hidden
    inference = infer("Which Brisa bikes were recalled?", visible=visible)
    assert text_of(inference) == "model = 'Brisa'"
    assert inference.dropped[0].clause.attribute == "recall"
    assert inference.dropped[0].reason == "no document you can see matches it"


def test_a_value_that_only_hidden_rows_hold_is_treated_as_unknown() -> None:
    visible = ALL.copy()
    visible[9] = False  # the only US row
    inference = infer("warranty in the US", visible=visible)
    assert text_of(inference) == "kind = 'warranty'"
    assert inference.dropped == ()


def test_an_inferred_filter_selects_what_the_clauses_say() -> None:
    assert rows_of(infer("the 2024 Fenwick manual")) == [1]


def test_a_year_stays_a_number_or_a_date_when_its_best_reading_selects_nothing() -> None:
    # "from 2024" reads best as a date; no Fenwick manual has a date in 2024, and the year is
    # not moved over to the model year: the date is dropped and reported.
    inference = infer("Fenwick manuals from 2024")
    assert text_of(inference) == "model = 'Fenwick' AND kind = 'manual'"
    assert {d.clause.attribute for d in inference.dropped} == {"effective", "published"}


def test_clauses_carry_cql2_text_and_json_ready_values() -> None:
    (clause,) = published_clauses("bulletins issued in November 2024")
    shown = clause.as_json()
    assert shown["op"] == "t_intersects"
    assert shown["value"] == ["2024-11-01T00:00:00Z", "2024-11-30T23:59:59.999999Z"]
    assert shown["evidence"] == "in November 2024"
    assert shown["cql2_text"].startswith("T_INTERSECTS(published")


PIECES = [
    *"0123456789 -,.'%",
    "\u20ac",
    "é",
    "Fenwick",
    "Brisa",
    " in ",
    " the last ",
    " since ",
    " March ",
    " 2024",
    " years",
    " kg",
    " Wh",
    " more than ",
    " between ",
    " and ",
    " not ",
    " this year",
    " recalled",
    "9" * 30,
    " last 9999 years",
    " US",
]


@given(
    question=st.lists(st.sampled_from(PIECES), max_size=20).map("".join),
    now=st.sampled_from(
        [NOW, dt.datetime(1, 1, 2, tzinfo=dt.UTC), dt.datetime(9999, 12, 31, tzinfo=dt.UTC)]
    ),
)
@settings(max_examples=150, deadline=None)
def test_any_question_gives_checked_clauses_and_never_an_error(
    question: str, now: dt.datetime
) -> None:
    inference = infer(question, now=now)
    if inference.node is not None:
        assert check_filter(inference.node, SCHEMA) == inference.node
        evaluate(inference.node, COLUMNS)
    for clause in [*inference.clauses, *(d.clause for d in inference.dropped)]:
        assert check_filter(clause.node, SCHEMA) == clause.node
        assert clause.evidence in question
