"""Ingesting corpus_example with the bundled model: offsets, token bounds, the embedding cache.

The demo collection is the session's (ingested once); tests that change documents work on a copy
of the corpus in its own collection, which the embedding cache fills without calling the model.
"""

from __future__ import annotations

from typing import Any

import pytest

from service.embedding.minilm import MiniLmEmbedder
from service.errors import InvalidDocuments
from service.ingest.embedding_text import embedding_input
from service.ingest.source_files import read_source
from service.store import repository
from service.usecases import collections, documents
from service.usecases.callers import LOCAL_ADMIN
from tests.integration.conftest import DEMO_CORPUS, IngestedCollection

pytestmark = pytest.mark.model

EDIT_COLLECTION = "bikes-edit"


def corpus_documents() -> list[dict[str, Any]]:
    items = list(read_source(DEMO_CORPUS / "documents"))
    assert all(item.error is None and item.document is not None for item in items)
    return [item.document for item in items if item.document is not None]


def schema_spec(demo: IngestedCollection) -> collections.CollectionSpec:
    view = collections.get_collection(demo.runtime, LOCAL_ADMIN, demo.name)
    return collections.CollectionSpec(
        attributes=view["attributes"],
        chunking=view["chunking"],
        cite_attributes=view["cite_attributes"],
        answer_caution=view["answer_caution"],
    )


def stored_documents(demo: IngestedCollection, collection: str) -> dict[str, dict[str, Any]]:
    listing = documents.list_documents(
        demo.runtime, LOCAL_ADMIN, collection, filter_value=None, after=None, limit=1000
    )
    return {
        summary["id"]: documents.get_document(demo.runtime, LOCAL_ADMIN, collection, summary["id"])
        for summary in listing["documents"]
    }


def revision_of(demo: IngestedCollection, collection: str) -> int:
    with demo.runtime.transaction() as session:
        row = repository.collection_by_name(session, collection)
        assert row is not None
        return row.revision


@pytest.fixture(scope="module")
def edit_copy(demo: IngestedCollection) -> IngestedCollection:
    """The demo corpus again in a collection of its own, for tests that change documents."""
    collections.put_collection(demo.runtime, LOCAL_ADMIN, EDIT_COLLECTION, schema_spec(demo))
    calls = demo.embedder.document_calls
    results = documents.upsert_documents(
        demo.runtime, LOCAL_ADMIN, EDIT_COLLECTION, corpus_documents()
    )
    assert {r["status"] for r in results} == {"created"}
    assert demo.embedder.document_calls == calls, "the cache held every text already"
    return IngestedCollection(demo.runtime, EDIT_COLLECTION, demo.embedder)


def test_the_demo_collection_is_embedded_by_the_bundled_model(demo: IngestedCollection) -> None:
    assert isinstance(demo.embedder.inner, MiniLmEmbedder)
    assert demo.runtime.embedder.name == "minilm"
    view = collections.get_collection(demo.runtime, LOCAL_ADMIN, demo.name)
    assert view["embedder"] == "minilm"
    assert demo.failures == 0, demo.report
    assert view["documents"] == len(corpus_documents()) >= 40
    assert view["chunks"] >= 150


def test_every_chunk_is_its_slice_of_the_normalized_text_within_max_tokens(
    demo: IngestedCollection, reference_model: Any
) -> None:
    max_tokens = collections.get_collection(demo.runtime, LOCAL_ADMIN, demo.name)["chunking"][
        "max_tokens"
    ]
    tokenizer = reference_model.tokenizer
    checked = 0
    for document in stored_documents(demo, demo.name).values():
        assert document["chunks"], document["id"]
        for chunk in document["chunks"]:
            assert document["text"][chunk["char_start"] : chunk["char_end"]] == chunk["text"]
            tokens = len(tokenizer.encode(chunk["text"], add_special_tokens=False))
            assert tokens == chunk["tokens"] <= max_tokens, chunk["chunk_id"]
            checked += 1
    assert checked >= 150


def test_reingesting_reports_every_document_unchanged_and_embeds_nothing(
    demo: IngestedCollection,
) -> None:
    calls, revision = demo.embedder.document_calls, revision_of(demo, demo.name)
    results = documents.upsert_documents(demo.runtime, LOCAL_ADMIN, demo.name, corpus_documents())
    assert len(results) == len(corpus_documents())
    assert {r["status"] for r in results} == {"unchanged"}
    assert demo.embedder.document_calls == calls
    assert revision_of(demo, demo.name) == revision


def test_editing_one_document_changes_only_its_chunks_and_embeds_only_new_text(
    edit_copy: IngestedCollection,
) -> None:
    runtime = edit_copy.runtime
    before = stored_documents(edit_copy, edit_copy.name)
    edited_id = max(before, key=lambda doc_id: len(before[doc_id]["chunks"]))
    assert len(before[edited_id]["chunks"]) >= 3
    batch = corpus_documents()
    edited = next(doc for doc in batch if doc["id"] == edited_id)
    edited["text"] = (
        edited["text"].rstrip() + "\n\nStore the bicycle indoors over winter, away from frost.\n"
    )
    embedded_before = len(edit_copy.embedder.embedded)

    results = documents.upsert_documents(runtime, LOCAL_ADMIN, edit_copy.name, batch)

    statuses = {r["id"]: r["status"] for r in results}
    assert statuses.pop(edited_id) == "updated"
    assert set(statuses.values()) == {"unchanged"}
    after = stored_documents(edit_copy, edit_copy.name)
    for doc_id, document in before.items():
        if doc_id != edited_id:
            assert after[doc_id]["chunks"] == document["chunks"], doc_id
    assert after[edited_id]["chunks"] != before[edited_id]["chunks"]

    def embedded_texts(document: dict[str, Any]) -> list[str]:
        counter, embedder = runtime.embedder.tokens, runtime.embedder
        return [
            embedding_input(
                document["title"],
                chunk["section"],
                chunk["text"],
                counter,
                embedder.window - embedder.special_tokens,
            )
            for chunk in document["chunks"]
        ]

    old_texts = set(embedded_texts(before[edited_id]))
    new_texts = [t for t in embedded_texts(after[edited_id]) if t not in old_texts]
    fresh = edit_copy.embedder.embedded[embedded_before:]
    assert new_texts, "the edit must change at least the last chunk"
    assert sorted(fresh) == sorted(set(new_texts))
    assert len(fresh) < len(after[edited_id]["chunks"]), "unchanged chunks came from the cache"


def test_a_batch_with_one_bad_document_writes_nothing(edit_copy: IngestedCollection) -> None:
    runtime = edit_copy.runtime
    before = stored_documents(edit_copy, edit_copy.name)
    revision, calls = revision_of(edit_copy, edit_copy.name), edit_copy.embedder.document_calls
    changed = dict(corpus_documents()[0])
    changed["text"] = changed["text"] + "\n\nA sentence that must never be stored.\n"
    batch = [
        {"id": "brand-new-note", "title": "New note", "text": "Chain wax lasts about 300 km."},
        changed,
        {"id": "bad-one", "text": "Valid text.", "attributes": {"no_such_attribute": 1}},
    ]

    with pytest.raises(InvalidDocuments) as raised:
        documents.upsert_documents(runtime, LOCAL_ADMIN, edit_copy.name, batch)

    problems = raised.value.extra["documents"]
    assert [(p["id"], p["index"], p["reason"]) for p in problems] == [
        ("bad-one", 2, "unknown_attribute")
    ]
    assert stored_documents(edit_copy, edit_copy.name) == before
    assert revision_of(edit_copy, edit_copy.name) == revision
    assert edit_copy.embedder.document_calls == calls
