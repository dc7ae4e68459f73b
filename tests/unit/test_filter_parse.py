"""Parsing cql2-text and cql2-json: precedence, errors with positions, limits, hostile input."""

from __future__ import annotations

import contextlib
import datetime as dt

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from service.attributes import AttributeType
from service.errors import FilterSyntaxError, FilterTooLarge, InvalidFilter
from service.filters.check import check_filter
from service.filters.parse import parse_filter
from service.filters.syntax import (
    And,
    Comparison,
    ComparisonOp,
    Not,
    NumberLiteral,
    Or,
    Property,
    StringLiteral,
    TimestampLiteral,
)


def eq(name: str, value: int) -> Comparison:
    return Comparison(ComparisonOp.EQ, Property(name), NumberLiteral(value))


def test_and_binds_tighter_than_or() -> None:
    assert parse_filter("a = 1 OR b = 2 AND c = 3") == Or(
        (eq("a", 1), And((eq("b", 2), eq("c", 3))))
    )


def test_not_binds_tighter_than_and() -> None:
    assert parse_filter("NOT a = 1 AND b = 2") == And((Not(eq("a", 1)), eq("b", 2)))


def test_keywords_are_case_insensitive() -> None:
    assert parse_filter("a = 1 oR b = 2 aNd c = 3") == parse_filter("a = 1 OR b = 2 AND c = 3")


def test_negated_forms_parse_as_not_of_the_positive_form() -> None:
    assert parse_filter("a NOT LIKE 'x'") == Not(parse_filter("a LIKE 'x'"))
    assert parse_filter("a IS NOT NULL") == Not(parse_filter("a IS NULL"))
    assert parse_filter("a NOT IN (1)") == Not(parse_filter("a IN (1)"))


def test_doubled_quotes_escape_quotes() -> None:
    node = parse_filter("""\"we""ird" = 'it''s'""")
    assert node == Comparison(ComparisonOp.EQ, Property('we"ird'), StringLiteral("it's"))


def test_a_timestamp_with_an_offset_is_a_syntax_error_showing_the_accepted_form() -> None:
    with pytest.raises(FilterSyntaxError) as caught:
        parse_filter("published > TIMESTAMP('2024-05-01T09:30:00+02:00')")
    assert "TIMESTAMP('2024-05-01T09:30:00Z')" in caught.value.message
    assert caught.value.extra["position"] == 23


def test_a_timestamp_reads_as_utc() -> None:
    node = parse_filter("t = TIMESTAMP('2024-05-01T09:30:00.25Z')")
    assert isinstance(node, Comparison)
    assert node.right == TimestampLiteral(dt.datetime(2024, 5, 1, 9, 30, 0, 250000, tzinfo=dt.UTC))


@pytest.mark.parametrize(
    ("text", "position"),
    [
        ("a = ", 4),
        ("a = 1 AND", 9),
        ("a == 1", 3),
        ("(a = 1", 6),
        ("a = 'open", 4),
        ("a = 1 b = 2", 6),
        ("and = 1", 0),
        ("a = DATE('2023-02-30')", 10),
        ("FOO(a, 1)", 0),
        ("a = 1 $", 6),
    ],
)
def test_syntax_errors_name_the_position_with_a_caret(text: str, position: int) -> None:
    with pytest.raises(FilterSyntaxError) as caught:
        parse_filter(text)
    assert caught.value.code == "filter_syntax"
    assert caught.value.extra["position"] == position
    line, caret = caught.value.extra["excerpt"].split("\n")
    assert caret == " " * position + "^" and line == text


def test_filter_text_beyond_8_kib_is_too_large() -> None:
    with pytest.raises(FilterTooLarge):
        parse_filter("a = '" + "x" * 8200 + "'")


def test_nesting_beyond_32_levels_is_too_large() -> None:
    parse_filter("(" * 31 + "a = 1" + ")" * 31)
    with pytest.raises(FilterTooLarge):
        parse_filter("(" * 33 + "a = 1" + ")" * 33)
    with pytest.raises(FilterTooLarge):
        parse_filter("NOT " * 40 + "a = 1")


def test_an_in_list_beyond_1000_values_is_too_large() -> None:
    parse_filter("a IN (" + ", ".join(["1"] * 1000) + ")")
    with pytest.raises(FilterTooLarge) as caught:
        parse_filter("a IN (" + ", ".join(["1"] * 1001) + ")")
    assert caught.value.code == "filter_too_large"


def test_deep_json_is_too_large_without_recursing_first() -> None:
    deep: dict = {"op": "not", "args": [{"op": "=", "args": [{"property": "a"}, 1]}]}
    for _ in range(5000):
        deep = {"op": "not", "args": [deep]}
    with pytest.raises(FilterTooLarge):
        parse_filter(deep)


def test_json_errors_carry_a_path() -> None:
    with pytest.raises(FilterSyntaxError) as caught:
        parse_filter(
            {
                "op": "and",
                "args": [{"op": "=", "args": [{"property": "a"}, 1]}, {"op": "nope", "args": []}],
            }
        )
    assert caught.value.extra["path"] == "$.args[1]"


INJECTIONS = [
    "x' OR '1'='1",
    "x'; DROP TABLE documents; --",
    'x" OR 1=1 --',
    "/* comment */ x",
    "x\u0000y",
    "\u202ex'",
    "ｘ' ＯＲ '1'='1",
    "%' OR name LIKE '%",
    "\\'; DELETE FROM attribute_values; --",
]


@pytest.mark.parametrize("payload", INJECTIONS)
def test_injection_payloads_in_literals_stay_literal(payload: str) -> None:
    text = "k = '" + payload.replace("'", "''") + "'"
    node = parse_filter(text)
    assert node == Comparison(ComparisonOp.EQ, Property("k"), StringLiteral(payload))


@pytest.mark.parametrize("payload", INJECTIONS)
def test_injection_payloads_as_attribute_names_are_unknown_attributes(payload: str) -> None:
    node = parse_filter('"' + payload.replace('"', '""') + '" = 1')
    with pytest.raises(InvalidFilter) as caught:
        check_filter(node, {"k": AttributeType.KEYWORD})
    assert caught.value.code == "filter_unknown_attribute"


@settings(max_examples=300, deadline=None)
@given(st.text(max_size=200))
def test_arbitrary_text_raises_only_filter_errors(text: str) -> None:
    with contextlib.suppress(InvalidFilter):
        parse_filter(text)


@settings(max_examples=200, deadline=None)
@given(st.binary(max_size=200))
def test_arbitrary_bytes_decoded_leniently_raise_only_filter_errors(data: bytes) -> None:
    with contextlib.suppress(InvalidFilter):
        parse_filter(data.decode("utf-8", "surrogateescape"))


@settings(max_examples=100, deadline=None)
@given(st.integers(min_value=10**15, max_value=10**80), st.sampled_from(["", ".5", "e400", "e3"]))
def test_huge_numbers_raise_only_filter_errors(number: int, suffix: str) -> None:
    with contextlib.suppress(InvalidFilter):
        check_filter(parse_filter(f"n = {number}{suffix}"), {"n": AttributeType.NUMBER})


@settings(max_examples=100, deadline=None)
@given(
    st.recursive(
        st.one_of(st.none(), st.booleans(), st.integers(), st.floats(), st.text(max_size=5)),
        lambda inner: st.one_of(
            st.lists(inner, max_size=3),
            st.dictionaries(
                st.sampled_from(["op", "args", "property", "date", "interval"]), inner, max_size=3
            ),
        ),
        max_leaves=20,
    )
)
def test_arbitrary_json_raises_only_filter_errors(value: object) -> None:
    with contextlib.suppress(InvalidFilter):
        parse_filter(value)  # type: ignore[arg-type]
