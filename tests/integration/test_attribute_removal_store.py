"""Removing attributes rewrites the stored documents alike on SQLite and PostgreSQL."""

from __future__ import annotations

from sqlalchemy import select

from service.store.tables import AttributeValueRow, DocumentRow
from service.usecases import collections, documents
from service.usecases.callers import LOCAL_ADMIN
from service.usecases.runtime import Runtime
from tests.integration.test_store_backends import DOCUMENTS, NAME, create_collection


def test_removed_attributes_leave_every_stored_document_and_their_value_rows(
    runtime: Runtime,
) -> None:
    create_collection(runtime)
    documents.upsert_documents(runtime, LOCAL_ADMIN, NAME, DOCUMENTS)
    spec = collections.CollectionSpec(remove_attributes=["tags", "model_year"])
    created, view = collections.put_collection(runtime, LOCAL_ADMIN, NAME, spec)
    assert not created
    assert "tags" not in view["attributes"] and "model" in view["attributes"]
    with runtime.transaction() as session:
        names = set(session.scalars(select(AttributeValueRow.name).distinct()))
        stored = {row.external_id: row.attributes for row in session.scalars(select(DocumentRow))}
    assert names.isdisjoint({"tags", "model_year"}) and "model" in names
    expected = {
        doc["id"]: {
            k: v for k, v in doc.get("attributes", {}).items() if k not in ("tags", "model_year")
        }
        for doc in DOCUMENTS
    }
    assert stored == expected
