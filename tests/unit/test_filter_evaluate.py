"""The numpy engine: three-valued logic, CASEI/ACCENTI, keyword lists, columns, time windows."""

from __future__ import annotations

import datetime as dt

import numpy as np
import pytest

from service.attributes import AttributeType, AttributeValue, Schema
from service.errors import FilterTypeError, FilterUnknownAttribute, InvalidRequest
from service.filters.check import check_filter
from service.filters.columns import AttributeColumns
from service.filters.evaluate import evaluate
from service.filters.parse import parse_filter
from service.filters.time_window import resolve_time_window

SCHEMA: Schema = {
    "k": AttributeType.KEYWORD,
    "p": AttributeType.BOOLEAN,
    "q": AttributeType.BOOLEAN,
    "tags": AttributeType.KEYWORD_LIST,
    "n": AttributeType.INTEGER,
    "x": AttributeType.NUMBER,
    "d": AttributeType.DATE,
    "ts": AttributeType.DATETIME,
}


def select(text: str, rows: list[dict[str, AttributeValue]]) -> list[int]:
    mask = evaluate(check_filter(parse_filter(text), SCHEMA), AttributeColumns.build(SCHEMA, rows))
    return [int(i) for i in np.flatnonzero(mask)]


# OGC 21-065 (basic CQL2, three-valued logic): T true, F false, U unknown (a NULL operand).
VALUES = {"T": True, "F": False, "U": None}
AND_TABLE = {("T", "T"): "T", ("T", "F"): "F", ("T", "U"): "U", ("F", "F"): "F",
             ("F", "U"): "F", ("U", "U"): "U"}  # fmt: skip
OR_TABLE = {("T", "T"): "T", ("T", "F"): "T", ("T", "U"): "T", ("F", "F"): "F",
            ("F", "U"): "U", ("U", "U"): "U"}  # fmt: skip
NOT_TABLE = {"T": "F", "F": "T", "U": "U"}


def truth(text: str, **values: bool | None) -> str:
    row = {name: value for name, value in values.items() if value is not None}
    is_true = select(text, [row]) == [0]
    is_false = select(f"NOT ({text})", [row]) == [0]
    assert not (is_true and is_false)
    return "T" if is_true else "F" if is_false else "U"


@pytest.mark.parametrize(("left", "right"), list(AND_TABLE))
def test_and_follows_the_three_valued_truth_table(left: str, right: str) -> None:
    for a, b in ((left, right), (right, left)):
        assert truth("p = TRUE AND q = TRUE", p=VALUES[a], q=VALUES[b]) == AND_TABLE[left, right]


@pytest.mark.parametrize(("left", "right"), list(OR_TABLE))
def test_or_follows_the_three_valued_truth_table(left: str, right: str) -> None:
    for a, b in ((left, right), (right, left)):
        assert truth("p = TRUE OR q = TRUE", p=VALUES[a], q=VALUES[b]) == OR_TABLE[left, right]


@pytest.mark.parametrize("value", list(NOT_TABLE))
def test_not_follows_the_three_valued_truth_table(value: str) -> None:
    assert truth("NOT p = TRUE", p=VALUES[value]) == NOT_TABLE[value]


def test_casei_folds_sharp_s_to_match_upper_case() -> None:
    rows: list[dict[str, AttributeValue]] = [{"k": "STRASSE"}, {"k": "Strasse"}, {"k": "Stra"}]
    assert select("CASEI(k) = CASEI('Straße')", rows) == [0, 1]


def test_accenti_strips_combining_marks() -> None:
    rows: list[dict[str, AttributeValue]] = [{"k": "Zürich"}, {"k": "Zurich"}, {"k": "zurich"}]
    assert select("ACCENTI(k) = ACCENTI('Zürich')", rows) == [0, 1]
    assert select("CASEI(ACCENTI(k)) = 'zurich'", rows) == [0, 1, 2]


def test_keywords_order_by_code_point() -> None:
    rows: list[dict[str, AttributeValue]] = [{"k": "Z"}, {"k": "a"}, {"k": "é"}, {}]
    assert select("k < 'a'", rows) == [0]
    assert select("k >= 'b'", rows) == [2]


def test_like_escapes_percent_and_underscore() -> None:
    rows: list[dict[str, AttributeValue]] = [{"k": "100%"}, {"k": "1000"}, {"k": "1_0"}]
    assert select("k LIKE '100\\%'", rows) == [0]
    assert select("k LIKE '1\\_%'", rows) == [2]
    assert select("k LIKE '1_0%'", rows) == [0, 1, 2]


def test_an_empty_list_is_a_value_and_a_missing_list_is_null() -> None:
    rows: list[dict[str, AttributeValue]] = [{"tags": []}, {}, {"tags": ["a", "b"]}]
    assert select("tags IS NULL", rows) == [1]
    assert select("A_CONTAINEDBY(tags, ('a'))", rows) == [0]
    assert select("NOT A_OVERLAPS(tags, ('a'))", rows) == [0]
    assert select("A_EQUALS(tags, ('b', 'a'))", rows) == [2]
    assert select("A_CONTAINS(tags, ('a', 'c'))", rows) == []


def test_integers_and_numbers_compare_with_each_other() -> None:
    rows: list[dict[str, AttributeValue]] = [{"n": 2, "x": 2.0}, {"n": 3, "x": 2.5}]
    assert select("n = x", rows) == [0]
    assert select("n > 2.5", rows) == [1]
    assert select("x BETWEEN 2 AND 2.4", rows) == [0]


def test_temporal_relations_on_instants_and_intervals() -> None:
    rows: list[dict[str, AttributeValue]] = [
        {"d": dt.date(2023, 1, 1)},
        {"d": dt.date(2023, 6, 1)},
        {},
    ]
    assert select("T_AFTER(d, DATE('2023-01-01'))", rows) == [1]
    assert select("T_INTERSECTS(d, INTERVAL('2023-01-01', '2023-03-01'))", rows) == [0]
    assert select("T_DURING(INTERVAL(d, d), INTERVAL('2022-12-31', '..'))", rows) == [0, 1]
    assert select("d BETWEEN DATE('2023-05-01') AND DATE('2023-06-01')", rows) == [1]


def test_columns_grow_by_concatenation_and_compact_by_taking_rows() -> None:
    first = AttributeColumns.build(SCHEMA, [{"k": "b", "tags": ["x"]}, {"k": "a"}])
    second = AttributeColumns.build(SCHEMA, [{"k": "c", "tags": ["y", "x"]}, {}])
    joined = AttributeColumns.concat([first, second])
    assert len(joined) == 4
    node = check_filter(parse_filter("k > 'a' AND A_CONTAINS(tags, ('x'))"), SCHEMA)
    assert evaluate(node, joined).tolist() == [True, False, True, False]
    kept = joined.take(np.array([2, 1]))
    assert evaluate(node, kept).tolist() == [True, False]


def test_an_attribute_added_later_is_null_in_older_parts() -> None:
    old = AttributeColumns.build({"k": AttributeType.KEYWORD}, [{"k": "a"}])
    new = AttributeColumns.build(SCHEMA, [{"k": "a", "n": 1}])
    joined = AttributeColumns.concat([old, new])
    assert evaluate(check_filter(parse_filter("n IS NULL"), SCHEMA), joined).tolist() == [
        True,
        False,
    ]


@pytest.mark.parametrize(
    ("text", "phrase"),
    [
        ("tags = 'a'", "A_CONTAINS"),
        ("n = 9007199254740992", "2^53"),
        ("ts > DATE('2023-01-01')", "TIMESTAMP"),
        ("T_DURING(d, INTERVAL('2023-01-01', '..'))", "two intervals"),
        ("k LIKE 1", "pattern"),
        ("p < TRUE", "only with = and <>"),
        ("n = 'x'", "cannot compare"),
        ("1 = 1", "name an attribute"),
        ("d = TIMESTAMP('2023-01-01T00:00:00Z')", "DATE"),
    ],
)
def test_type_errors_explain_themselves(text: str, phrase: str) -> None:
    with pytest.raises(FilterTypeError) as caught:
        check_filter(parse_filter(text), SCHEMA)
    assert phrase in caught.value.message and caught.value.code == "filter_type"


def test_an_unknown_attribute_names_the_known_ones() -> None:
    with pytest.raises(FilterUnknownAttribute) as caught:
        check_filter(parse_filter("colour = 'red'"), SCHEMA)
    assert caught.value.extra["known"] == sorted(SCHEMA)


def test_a_time_window_ends_now_and_reaches_back_by_the_duration() -> None:
    now = dt.datetime(2024, 3, 31, 12, tzinfo=dt.UTC)
    node, window = resolve_time_window("ts", "P1M2DT1H", now, SCHEMA)
    assert window.start == dt.datetime(2024, 2, 27, 11, tzinfo=dt.UTC) and window.end == now
    rows: list[dict[str, AttributeValue]] = [
        {"ts": dt.datetime(2024, 2, 27, 10, tzinfo=dt.UTC)},
        {"ts": dt.datetime(2024, 3, 1, tzinfo=dt.UTC)},
    ]
    assert evaluate(check_filter(node, SCHEMA), AttributeColumns.build(SCHEMA, rows)).tolist() == [
        False,
        True,
    ]
    _, by_date = resolve_time_window("d", "P2W", now, SCHEMA)
    assert (by_date.start, by_date.end) == (dt.date(2024, 3, 17), dt.date(2024, 3, 31))


@pytest.mark.parametrize(
    ("attribute", "last", "field"),
    [("ts", "30D", "time_window.last"), ("ts", "P", "time_window.last"),
     ("k", "P1D", "time_window.attribute"), ("nope", "P1D", "time_window.attribute")],
)  # fmt: skip
def test_a_bad_time_window_is_an_invalid_request(attribute: str, last: str, field: str) -> None:
    with pytest.raises(InvalidRequest) as caught:
        resolve_time_window(attribute, last, None, SCHEMA)
    assert caught.value.extra["field"] == field
