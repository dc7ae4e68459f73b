"""The one check of a retrieval request and the query the core takes from it."""

from __future__ import annotations

import datetime as dt

import numpy as np
import pytest

from service.attributes import AttributeType
from service.config import Settings
from service.errors import InvalidRequest, LimitExceeded
from service.index.analyzer import Analyzer
from service.index.collection_index import CollectionIndex
from service.index.lexical import LexicalScoring
from service.index.view import CollectionFacts, IndexView
from service.usecases.search import SearchOptions, TimeWindow, check_limits, prepare_query
from tests.hashing_embedder import HashingTestEmbedder

EMBEDDER = HashingTestEmbedder()
SCHEMA = {"published": AttributeType.DATETIME, "model": AttributeType.KEYWORD}
CREATED = dt.datetime(2026, 3, 1, 9, 30, tzinfo=dt.UTC)


def view() -> IndexView:
    index = CollectionIndex.build([], metric="cosine", dimension=EMBEDDER.dimensions, schema=SCHEMA)
    return IndexView(
        facts=CollectionFacts(1, CREATED, SCHEMA, (), None),
        snapshot=index.snapshot(),
        analyzer=Analyzer.english(),
        scoring=LexicalScoring(k1=0.9, b=0.4),
    )


def test_depth_below_top_k_is_raised_to_it_and_the_request_keeps_both() -> None:
    options = SearchOptions(query="rear brakes", top_k=8, depth=3)
    prepared = prepare_query(options, view(), EMBEDDER, None, whole_ranking=False)
    assert prepared.retrieval.depth == 8
    assert prepared.retrieval.keep == 8
    assert options.as_request()["depth"] == 3
    assert options.as_request()["depth_used"] == 8


def test_packing_keeps_the_ranking_to_depth_and_modes_get_what_they_use() -> None:
    options = SearchOptions(query="rear brakes", mode="lexical", top_k=4, depth=30)
    prepared = prepare_query(options, view(), EMBEDDER, frozenset({"a"}), whole_ranking=True)
    query = prepared.retrieval
    assert (query.keep, query.vector, query.groups) == (30, None, frozenset({"a"}))
    assert query.tokens == ("rear", "brake")
    assert query.scoring == LexicalScoring(k1=0.9, b=0.4)
    semantic = prepare_query(
        SearchOptions(query="rear brakes", mode="semantic"),
        view(),
        EMBEDDER,
        None,
        whole_ranking=False,
    ).retrieval
    assert semantic.tokens == () and semantic.vector is not None


def test_the_filter_and_time_window_become_one_checked_tree_and_trace_notes() -> None:
    options = SearchOptions(
        query="x",
        filter="model = 'Ridge'",
        time_window=TimeWindow(attribute="published", last="P30D", now="2024-05-01T00:00:00Z"),
    )
    prepared = prepare_query(options, view(), EMBEDDER, None, whole_ranking=False)
    assert prepared.retrieval.filter is not None
    assert prepared.filter_notes["filter"] == "model = 'Ridge'"
    assert prepared.filter_notes["time_window"]["start"] == "2024-04-01T00:00:00+00:00"


@pytest.mark.parametrize(
    ("options", "error", "field_or_limit"),
    [
        (SearchOptions(query="  "), InvalidRequest, "query"),
        (SearchOptions(query="x", top_k=0), InvalidRequest, "top_k"),
        (SearchOptions(query="x", depth=0), InvalidRequest, "depth"),
        (SearchOptions(query="x", rrf_k=0), InvalidRequest, "rrf_k"),
        (SearchOptions(query="x", top_k=1001), LimitExceeded, "top_k"),
        (SearchOptions(query="x", depth=1001), LimitExceeded, "depth"),
        (SearchOptions(query="x" * 2001), LimitExceeded, "query_chars"),
        (SearchOptions(query="x", query_vector=[1.0, 2.0]), InvalidRequest, "query_vector"),
        (SearchOptions(query="x", query_vector=[0.0] * 32), InvalidRequest, "query_vector"),
        (SearchOptions(query="x", query_vector=[np.nan] * 32), InvalidRequest, "query_vector"),
    ],
)
def test_each_limit_is_checked_once_with_the_field_or_limit_it_concerns(
    options: SearchOptions, error: type[Exception], field_or_limit: str
) -> None:
    with pytest.raises(error) as raised:
        check_limits(options, Settings(), 32)
    extra = raised.value.extra  # type: ignore[attr-defined]
    assert extra.get("field", extra.get("limit")) == field_or_limit
