"""The clause that keeps a row out: the first one not TRUE, found through ANDs; an OR or a NOT
named whole; UNKNOWN where the clause reads a missing value (OGC 21-065's three-valued logic)."""

from __future__ import annotations

from service.attributes import AttributeType, AttributeValue, Schema
from service.filters.check import check_filter
from service.filters.columns import AttributeColumns
from service.filters.explain import FailedClause, failed_clauses
from service.filters.parse import parse_filter

SCHEMA: Schema = {
    "model": AttributeType.KEYWORD,
    "year": AttributeType.INTEGER,
    "price": AttributeType.NUMBER,
}


def explain(text: str, rows: list[dict[str, AttributeValue]]) -> list[FailedClause | None]:
    node = check_filter(parse_filter(text), SCHEMA)
    return failed_clauses(node, AttributeColumns.build(SCHEMA, rows))


def test_a_row_the_filter_selects_has_no_failed_clause() -> None:
    assert explain("model = 'Ridge' AND year >= 2022", [{"model": "Ridge", "year": 2023}]) == [None]


def test_the_first_false_part_of_an_and_is_named_with_the_attribute_it_reads() -> None:
    rows = [{"model": "Ridge", "year": 2019}, {"model": "Larkspur", "year": 2019}]
    assert explain("model = 'Ridge' AND year >= 2022", rows) == [
        FailedClause("year >= 2022", "false", ("year",)),
        FailedClause("model = 'Ridge'", "false", ("model",)),
    ]


def test_a_missing_value_makes_its_clause_unknown() -> None:
    assert explain("year >= 2022 AND price < 100", [{"year": 2023}]) == [
        FailedClause("price < 100", "unknown", ("price",))
    ]


def test_an_or_and_a_not_are_named_whole() -> None:
    rows = [{"model": "Bravo", "year": 2019, "price": 10.0}]
    assert explain("year > 2000 AND (model = 'Ridge' OR price > 50)", rows) == [
        FailedClause("model = 'Ridge' OR price > 50", "false", ("model", "price"))
    ]
    assert explain("NOT (model = 'Bravo')", rows) == [
        FailedClause("NOT model = 'Bravo'", "false", ("model",))
    ]
