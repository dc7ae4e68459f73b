"""Rendering: cql2-text and cql2-json of any tree parse back to the same tree."""

from __future__ import annotations

import datetime as dt

from hypothesis import given, settings
from hypothesis import strategies as st

from service.filters.parse import RESERVED_WORDS, parse_filter
from service.filters.render import property_text, to_json, to_text
from service.filters.syntax import (
    AccentInsensitive,
    ArrayLiteral,
    ArrayOp,
    ArrayPredicate,
    Between,
    BooleanConstant,
    BooleanLiteral,
    CaseInsensitive,
    Comparison,
    ComparisonOp,
    DateLiteral,
    Expression,
    In,
    IntervalLiteral,
    IsNull,
    Like,
    Node,
    Not,
    NumberLiteral,
    OpenEnd,
    Property,
    StringLiteral,
    TemporalOp,
    TemporalPredicate,
    TimestampLiteral,
    conjunction,
    disjunction,
)

names = st.one_of(
    st.sampled_from([*sorted(RESERVED_WORDS), "A_Contains", "my-prop", "a b", 'q"uote', "x.y"]),
    st.text(min_size=1, max_size=6).filter(lambda s: "\x00" not in s),
)
properties = names.map(Property)
literals = st.one_of(
    st.text(max_size=6).map(StringLiteral),
    st.integers(-(2**60), 2**60).map(NumberLiteral),
    st.floats(allow_nan=False, allow_infinity=False).map(NumberLiteral),
    st.booleans().map(BooleanLiteral),
    st.dates().map(DateLiteral),
    st.datetimes(timezones=st.just(dt.UTC)).map(TimestampLiteral),
)
scalars: st.SearchStrategy[Expression] = st.one_of(
    properties,
    literals,
    properties.map(CaseInsensitive),
    st.text(max_size=4).map(lambda s: AccentInsensitive(CaseInsensitive(StringLiteral(s)))),
)
ends = st.one_of(
    st.just(OpenEnd()),
    properties,
    st.dates().map(DateLiteral),
    st.datetimes(timezones=st.just(dt.UTC)).map(TimestampLiteral),
)
intervals = st.builds(IntervalLiteral, ends, ends)
leaves: st.SearchStrategy[Node] = st.one_of(
    st.builds(Comparison, st.sampled_from(list(ComparisonOp)), scalars, scalars),
    st.builds(Like, scalars, scalars),
    st.builds(Between, scalars, scalars, scalars),
    st.builds(In, scalars, st.lists(scalars, min_size=1, max_size=3).map(tuple)),
    st.builds(IsNull, scalars),
    st.builds(
        TemporalPredicate,
        st.sampled_from(list(TemporalOp)),
        st.one_of(scalars, intervals),
        st.one_of(scalars, intervals),
    ),
    st.builds(
        ArrayPredicate,
        st.sampled_from(list(ArrayOp)),
        properties,
        st.lists(literals, max_size=3).map(lambda items: ArrayLiteral(tuple(items))),
    ),
    st.booleans().map(BooleanConstant),
)
trees = st.recursive(
    leaves,
    lambda children: st.one_of(
        children.map(Not),
        st.lists(children, min_size=2, max_size=3).map(conjunction),
        st.lists(children, min_size=2, max_size=3).map(disjunction),
    ),
    max_leaves=8,
)


@settings(max_examples=300, deadline=None)
@given(trees)
def test_text_output_parses_back_to_the_same_tree(tree: Node) -> None:
    assert parse_filter(to_text(tree)) == tree


@settings(max_examples=300, deadline=None)
@given(trees)
def test_json_output_parses_back_to_the_same_tree(tree: Node) -> None:
    assert parse_filter(to_json(tree)) == tree


def test_property_names_are_quoted_only_where_needed() -> None:
    assert property_text("model_year") == "model_year"
    assert property_text("and") == '"and"'
    assert property_text("T_AFTER") == '"T_AFTER"'
    assert property_text("model-year") == '"model-year"'
    assert property_text('say "hi"') == '"say ""hi"""'
