"""The store's use cases behave the same on SQLite and PostgreSQL (the ``store_engine`` fixture).

The test-only hashing embedder keeps these fast; what is under test is the store, not the model.
"""

from __future__ import annotations

import datetime as dt
import itertools
from collections.abc import Callable
from typing import Any

import pytest
from alembic.autogenerate import compare_metadata
from alembic.migration import MigrationContext
from sqlalchemy import bindparam, select, update

from service.errors import DocumentNotFound, Unauthenticated
from service.store import repository
from service.store.driver_query import DriverQuery
from service.store.tables import ApiKeyRow, Base
from service.usecases import answering, collections, documents, keys
from service.usecases.callers import LOCAL_ADMIN, Role
from service.usecases.runtime import Runtime
from service.usecases.search import SearchOptions
from tests.api_helpers import BIKE_SCHEMA

NAME = "bikes"
DOCUMENTS: list[dict[str, Any]] = [
    {
        "id": "ridge-2022",
        "title": "Ridge 2022 manual",
        "text": "# Brakes\nPull the lever firmly.\n\n# Tyres\nRun 2.1 bar at the front.",
        "media_type": "text/markdown",
        "attributes": {"model": "Ridge", "model_year": 2022, "tags": ["brakes", "tyres"]},
    },
    {
        "id": "ridge-2024",
        "title": "Ridge 2024 manual",
        "text": "The 2024 frame takes wider tyres. Check the pressure weekly.",
        "attributes": {"model": "Ridge", "model_year": 2024, "published": "2024-03-01T08:00:00Z"},
    },
    {
        "id": "cote-2023",
        "title": "Côte 2023 manual",
        "text": "<h1>Chain</h1><p>Wax the chain every 300 km.</p><script>x()</script>",
        "media_type": "text/html",
        "attributes": {"model": "Côte", "model_year": 2023},
        "access": ["staff"],
    },
]


def create_collection(runtime: Runtime) -> dict[str, Any]:
    created, view = collections.put_collection(
        runtime,
        LOCAL_ADMIN,
        NAME,
        collections.CollectionSpec(
            description=BIKE_SCHEMA["description"],
            attributes=BIKE_SCHEMA["attributes"],
            chunking=BIKE_SCHEMA["chunking"],
            cite_attributes=BIKE_SCHEMA["cite_attributes"],
            answer_caution=BIKE_SCHEMA["answer_caution"],
        ),
    )
    assert created
    return view


def listed_ids(runtime: Runtime, filter_value: str | None) -> list[str]:
    page = documents.list_documents(
        runtime, LOCAL_ADMIN, NAME, filter_value=filter_value, after=None, limit=100
    )
    assert page["total"] == len(page["documents"])
    return [d["id"] for d in page["documents"]]


def change_log(runtime: Runtime, since: int) -> list[tuple[int, str | None, str]]:
    with runtime.transaction() as session:
        row = repository.collection_by_name(session, NAME)
        assert row is not None
        return [
            (c.revision, c.document_id, c.operation)
            for c in repository.changes_since(session, row.id, since)
        ]


def test_a_collection_is_created_then_updated_with_its_schema_kept(runtime: Runtime) -> None:
    view = create_collection(runtime)
    assert view["attributes"]["published"] == {"type": "datetime"}
    assert view["documents"] == view["chunks"] == 0

    created, updated = collections.put_collection(
        runtime,
        LOCAL_ADMIN,
        NAME,
        collections.CollectionSpec(
            attributes={**BIKE_SCHEMA["attributes"], "colour": {"type": "keyword"}}
        ),
    )

    assert not created
    assert set(updated["attributes"]) == {*BIKE_SCHEMA["attributes"], "colour"}
    assert updated["chunking"] == BIKE_SCHEMA["chunking"]
    assert [c["name"] for c in collections.list_collections(runtime, LOCAL_ADMIN)] == [NAME]


def test_documents_are_created_updated_read_listed_by_filter_and_deleted(
    runtime: Runtime,
) -> None:
    create_collection(runtime)
    results = documents.upsert_documents(runtime, LOCAL_ADMIN, NAME, DOCUMENTS)
    assert [r["status"] for r in results] == ["created"] * 3

    stored = documents.get_document(runtime, LOCAL_ADMIN, NAME, "cote-2023")
    assert "x()" not in stored["text"]
    for chunk in stored["chunks"]:
        assert stored["text"][chunk["char_start"] : chunk["char_end"]] == chunk["text"]
    assert stored["chunks"][0]["chunk_id"] == "cote-2023#0000"

    changed = {**DOCUMENTS[1], "text": DOCUMENTS[1]["text"] + " Replace the valve cores yearly."}
    statuses = documents.upsert_documents(runtime, LOCAL_ADMIN, NAME, [DOCUMENTS[0], changed])
    assert [r["status"] for r in statuses] == ["unchanged", "updated"]
    reread = documents.get_document(runtime, LOCAL_ADMIN, NAME, "ridge-2024")
    assert "valve cores" in reread["text"]
    assert "valve cores" in " ".join(c["text"] for c in reread["chunks"])

    assert listed_ids(runtime, None) == ["cote-2023", "ridge-2022", "ridge-2024"]
    assert listed_ids(runtime, "model_year >= 2023") == ["cote-2023", "ridge-2024"]
    assert listed_ids(runtime, "ACCENTI(CASEI(model)) = ACCENTI(CASEI('COTE'))") == ["cote-2023"]
    assert listed_ids(runtime, "published IS NULL") == ["cote-2023", "ridge-2022"]
    assert listed_ids(runtime, "A_CONTAINS(tags, ('tyres'))") == ["ridge-2022"]

    documents.delete_document(runtime, LOCAL_ADMIN, NAME, "ridge-2022")
    with pytest.raises(DocumentNotFound):
        documents.get_document(runtime, LOCAL_ADMIN, NAME, "ridge-2022")
    assert documents.delete_by_filter(runtime, LOCAL_ADMIN, NAME, "model = 'Ridge'") == 1
    assert listed_ids(runtime, None) == ["cote-2023"]
    view = collections.get_collection(runtime, LOCAL_ADMIN, NAME)
    assert view["documents"] == 1
    assert view["chunks"] == len(stored["chunks"])


def test_every_write_advances_the_revision_once_and_logs_its_documents(
    runtime: Runtime,
) -> None:
    start = create_collection(runtime)["revision"]

    documents.upsert_documents(runtime, LOCAL_ADMIN, NAME, DOCUMENTS[:2])
    documents.upsert_documents(runtime, LOCAL_ADMIN, NAME, DOCUMENTS[:2])
    documents.delete_document(runtime, LOCAL_ADMIN, NAME, "ridge-2022")

    assert change_log(runtime, start) == [
        (start + 1, "ridge-2022", "upsert"),
        (start + 1, "ridge-2024", "upsert"),
        (start + 2, "ridge-2022", "delete"),
    ]
    assert collections.get_collection(runtime, LOCAL_ADMIN, NAME)["revision"] == start + 2


def test_the_migrated_schema_matches_the_models(runtime: Runtime) -> None:
    with runtime.engine.connect() as connection:
        context = MigrationContext.configure(connection, opts={"compare_type": True})
        differences = compare_metadata(context, Base.metadata)
    assert differences == []


def test_a_search_builds_its_index_from_the_store_and_finds_the_document(
    runtime: Runtime,
) -> None:
    create_collection(runtime)
    documents.upsert_documents(runtime, LOCAL_ADMIN, NAME, DOCUMENTS)
    options = SearchOptions(query="chain wax", mode="lexical", top_k=1)
    result = answering.search(runtime, LOCAL_ADMIN, NAME, options, keep_trace=False)
    assert [hit.document_id for hit in result.hits] == ["cote-2023"]


def test_a_snapshot_rebuilds_each_documents_stored_text_and_source_from_its_own_chunks(
    runtime: Runtime, make_runtime: Callable[..., Runtime]
) -> None:
    """Both ways an index is made: from a write in this process, and from the store alone."""
    create_collection(runtime)
    sourced = [{**d, "source_url": f"https://docs.example.invalid/{d['id']}"} for d in DOCUMENTS]
    documents.upsert_documents(runtime, LOCAL_ADMIN, NAME, sourced)
    fresh = make_runtime(engine=runtime.engine)
    for snapshot in (runtime.indexes.view(NAME).snapshot, fresh.indexes.view(NAME).snapshot):
        for doc in sourced:
            stored = documents.get_document(runtime, LOCAL_ADMIN, NAME, doc["id"])
            assert snapshot.source_url(doc["id"]) == stored["source_url"] == doc["source_url"]
            chunks = stored["chunks"]
            for first, last in itertools.combinations_with_replacement(range(len(chunks)), 2):
                start, end = chunks[first]["char_start"], chunks[last]["char_end"]
                assert snapshot.document_span(doc["id"], start, end) == stored["text"][start:end]


def test_a_key_authenticates_with_its_groups_and_collections_until_revoked(
    runtime: Runtime,
) -> None:
    create_collection(runtime)
    with runtime.transaction() as session:
        secret, _ = keys.create_key(
            session, role="writer", groups=["staff", "field"], collections=["bikes"], name="w"
        )
    caller = keys.authenticate(runtime.key_reader, secret)
    assert (caller.name, caller.role, caller.groups) == ("w", Role.WRITER, {"staff", "field"})
    assert caller.collections == {"bikes"}
    with runtime.transaction() as session:
        assert [k.last_used_at is not None for k in keys.list_keys(session)] == [True]
    with runtime.transaction() as session:
        keys.revoke_key(session, "w")
    with pytest.raises(Unauthenticated):
        keys.authenticate(runtime.key_reader, secret)


def test_the_driver_lookup_returns_what_core_returns_for_the_same_statement(
    runtime: Runtime,
) -> None:
    create_collection(runtime)
    with runtime.transaction() as session:
        keys.create_key(session, role="reader", groups=[], collections=None, name="plain")
        keys.create_key(session, role="admin", groups=["a", "b"], collections=[NAME], name="full")
        keys.revoke_key(session, "full")
    with runtime.transaction() as session:
        session.execute(
            update(ApiKeyRow).values(last_used_at=dt.datetime(2024, 5, 1, tzinfo=dt.UTC))
        )
    statement = select(
        ApiKeyRow.id,
        ApiKeyRow.groups,
        ApiKeyRow.collections,
        ApiKeyRow.salt,
        ApiKeyRow.last_used_at,
        ApiKeyRow.revoked_at,
    ).where(ApiKeyRow.name == bindparam("name"))
    lookup = DriverQuery(runtime.engine, statement)
    for name in ("plain", "full"):
        with runtime.engine.begin() as connection:
            expected = tuple(connection.execute(statement, {"name": name}).one())
        assert lookup.first({"name": name}) == expected
        assert [type(value) for value in lookup.first({"name": name}) or ()] == [
            type(value) for value in expected
        ]
    assert lookup.first({"name": "absent"}) is None
