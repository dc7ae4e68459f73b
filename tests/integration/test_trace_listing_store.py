"""The trace listing read from the store on both backends, and the migration that fills the
summaries of traces written before it."""

from __future__ import annotations

import datetime as dt

import sqlalchemy as sa
from alembic import command
from sqlalchemy import Engine

from service.store.db import alembic_config
from service.usecases import answering, collections, documents
from service.usecases.callers import LOCAL_ADMIN, Caller, Role
from service.usecases.runtime import Runtime
from service.usecases.search import SearchOptions
from service.usecases.traces import TraceListing, list_traces
from tests.api_helpers import BIKE_SCHEMA

READER = Caller(key_id=7, name="reader", role=Role.READER, groups=frozenset(), collections=None)


def _collection(runtime: Runtime) -> None:
    spec = collections.CollectionSpec(
        attributes=BIKE_SCHEMA["attributes"], chunking=BIKE_SCHEMA["chunking"]
    )
    collections.put_collection(runtime, LOCAL_ADMIN, "bikes", spec)
    documents.upsert_documents(
        runtime, LOCAL_ADMIN, "bikes", [{"id": "a", "text": "Check the brake pads weekly."}]
    )


def test_pages_of_stored_traces_come_newest_first_on_each_backend(runtime: Runtime) -> None:
    _collection(runtime)
    # Once stopped, the writer writes each trace as it comes, so every page is read from SQL.
    runtime.traces.stop()
    made = [
        answering.search(runtime, READER, "bikes", SearchOptions(query=f"brake {n}")).trace_id
        for n in range(5)
    ]
    answering.search(runtime, LOCAL_ADMIN, "bikes", SearchOptions(query="not the reader's"))
    assert runtime.traces.held_rows() == []
    seen: list[str] = []
    cursor = None
    while True:
        page = list_traces(runtime, READER, TraceListing(limit=2, cursor=cursor))
        seen += [t.trace_id for t in page.traces]
        if page.next_cursor is None:
            break
        cursor = page.next_cursor
    assert seen == made[::-1]
    everyone = list_traces(runtime, LOCAL_ADMIN, TraceListing(limit=10))
    assert len(everyone.traces) == 6 and everyone.traces[0].query == "not the reader's"
    first = everyone.traces[-1]
    assert (first.route, first.collection, first.outcome, first.candidates, first.hits) == (
        "search",
        "bikes",
        "returned",
        1,
        1,
    )


def test_the_migration_fills_the_summaries_of_older_traces(store_engine: Engine) -> None:
    config = alembic_config(store_engine)
    command.upgrade(config, "0002_store_identity")
    old = sa.table(
        "traces",
        sa.column("id", sa.String()),
        sa.column("key_id", sa.Integer()),
        sa.column("collection", sa.String()),
        sa.column("route", sa.String()),
        sa.column("created_at", sa.DateTime(timezone=True)),
        sa.column("body", sa.JSON()),
    )
    now = dt.datetime(2026, 12, 1, tzinfo=dt.UTC)
    stages = [{"stage": "filter", "counts": {"candidates": 12, "rows": 20}}]
    packing = {
        "stage": "packing",
        "chunks": [{"outcome": o} for o in ("included", "merged", "budget", "duplicate")],
    }
    bodies = {
        "s": ("search", {"request": {"query": "q1"}, "stages": stages, "hits": ["a#0000"],
                         "total_milliseconds": 3.5}),
        "c": ("context", {"request": {"query": "q2"}, "stages": [*stages, packing],
                          "total_milliseconds": 4.0}),
        "d": ("answer", {"request": {"query": "q3"}, "stages": stages, "reason": "no_candidates",
                         "total_milliseconds": 1.0}),
        "g": ("answer", {"request": {"query": "q4"}, "stages": [*stages, packing],
                         "generator_error": "timed out", "total_milliseconds": 9.0}),
        "a": ("answer", {"request": {"query": "q5"}, "stages": [*stages, packing],
                         "markers": [1], "total_milliseconds": 2.0}),
    }  # fmt: skip
    with store_engine.begin() as connection:
        connection.execute(
            old.insert(),
            [
                {
                    "id": key,
                    "key_id": 1,
                    "collection": "bikes",
                    "route": route,
                    "created_at": now,
                    "body": body,
                }
                for key, (route, body) in bodies.items()
            ],
        )
    command.upgrade(config, "head")
    with store_engine.connect() as connection:
        rows = connection.execute(
            sa.text("SELECT id, query, candidates, hits, outcome, reason, milliseconds FROM traces")
        ).all()
    assert {row[0]: tuple(row[1:]) for row in rows} == {
        "s": ("q1", 12, 1, "returned", None, 3.5),
        "c": ("q2", 12, 2, "returned", None, 4.0),
        "d": ("q3", 12, 0, "declined", "no_candidates", 1.0),
        "g": ("q4", 12, 2, "failed", "generator_unavailable", 9.0),
        "a": ("q5", 12, 2, "answered", None, 2.0),
    }
