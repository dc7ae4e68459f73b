"""What a question asks for, and the entities texts name."""

from __future__ import annotations

import pytest

from service.generation.reading import (
    Entity,
    answer_type,
    conflicting,
    counted_noun,
    given_values,
    holds_type,
    literal_entities,
)


@pytest.mark.parametrize(
    ("question", "expected"),
    [
        ("What is the price of the 2025 Ridgeline?", "money"),
        ("How much cheaper is a replacement frame after a crash?", "quantity"),
        ("How long does a full charge take?", "duration"),
        ("How many years is the frame covered?", "duration"),
        ("How many charge cycles does the warranty cover?", "count"),
        ("What torque does the main pivot bolt take?", "quantity"),
        ("When was the chart withdrawn?", "date"),
        ("Which brake pads does it use?", "name"),
        ("Does the warranty pass to a second owner?", "any"),
    ],
)
def test_the_answer_type_follows_the_questions_wording(question: str, expected: str) -> None:
    assert answer_type(question) == expected


def test_spans_hold_a_type_only_when_they_say_it() -> None:
    assert holds_type("duration", "covered for the lifetime of the original owner")
    assert holds_type("duration", "a full charge takes about 5.5 hours")
    assert not holds_type("duration", "covered by the warranty")
    assert holds_type("money", "it costs 349 euros")
    assert not holds_type("money", "it costs 40 percent less")
    assert holds_type("count", "six batteries came out")
    assert holds_type("name", "The pads are TW-S4 finned sintered.")
    assert holds_type("duration", "Check the pads every 300 km.")
    assert not holds_type("duration", "Check the pads every ride.")


def test_a_how_many_question_counts_the_word_that_follows() -> None:
    assert counted_noun("How many passengers can the bomber carry?") == "passengers"
    assert counted_noun("How many charge cycles does it cover?") == "charge"
    assert counted_noun("How many of them are left?") is None
    assert counted_noun("How long is the warranty?") is None


def test_values_the_question_gives_do_not_count_as_its_answer() -> None:
    given = given_values("What front tyre pressure is recommended for a 75 kg rider?")
    assert not holds_type("quantity", "For a 75 kg rider on mixed gravel.", given)
    assert holds_type("quantity", "For a 75 kg rider, use 4.6 bar.", given)
    named = given_values("Which battery does the Ridgeline 2024 use?")
    assert not holds_type("name", "Register your new Ridgeline 2024 online.", named)
    assert holds_type("name", "The Ridgeline 2024 takes the TW-B2 battery.", named)
    assert given_values("how long is the warranty?") is None


def test_years_and_codes_are_entities_with_codes_grouped_by_their_letters() -> None:
    assert literal_entities("Error E-21 on the 2024 bike, not TW-S3") == {
        Entity("year", "2024"),
        Entity("code:E", "E-21"),
        Entity("code:TW-S", "TW-S3"),
    }


def test_naming_another_value_of_an_asked_kind_conflicts_unless_the_asked_one_is_named() -> None:
    wanted = {Entity("code:E", "E-21")}
    assert conflicting({Entity("code:E", "E-14")}, wanted) == {Entity("code:E", "E-14")}
    assert conflicting({Entity("code:E", "E-14"), Entity("code:E", "E-21")}, wanted) == set()
    assert conflicting({Entity("year", "2023")}, wanted) == set()
