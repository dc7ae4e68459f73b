"""Collections and documents through the HTTP API, as the contract specifies them."""

from __future__ import annotations

from typing import Any

import pytest

from service.usecases.runtime import Runtime
from tests.api_helpers import BIKE_SCHEMA, Api

MANUAL = """# Brakes

Squeeze both levers before every ride. The pads should sit two millimetres from the rim.

## Adjusting the cable

Turn the barrel adjuster a quarter turn at a time until the lever stops at half travel.
Check the pads again after adjusting.

# Tyres

Run 2.1 bar on the road and 1.6 bar on gravel. Check pressure weekly.
"""


def document(doc_id: str = "ridge-2023-manual", **fields: Any) -> dict[str, Any]:
    body: dict[str, Any] = {
        "id": doc_id,
        "title": "Ridge 2023 owner's manual",
        "text": MANUAL,
        "media_type": "text/markdown",
        "source_url": "https://docs.example.invalid/ridge-2023",
        "attributes": {"model": "Ridge", "model_year": 2023, "tags": ["brakes", "tyres"]},
    }
    body.update(fields)
    return body


def upsert(api: Api, *docs: dict[str, Any]) -> Any:
    return api.post("/v1/collections/bikes/documents", json={"documents": list(docs)})


def error_code(response: Any) -> str:
    return str(response.json()["error"]["code"])


def test_created_document_reads_back_with_chunks_that_slice_its_text(bikes: Api) -> None:
    response = upsert(bikes, document())
    assert response.status_code == 200, response.text
    [result] = response.json()["results"]
    assert result["status"] == "created" and result["chunks"] >= 2

    body = bikes.get("/v1/collections/bikes/documents/ridge-2023-manual").json()
    assert body["attributes"] == {"model": "Ridge", "model_year": 2023, "tags": ["brakes", "tyres"]}
    assert "#" not in body["text"].splitlines()[0]
    for ordinal, chunk in enumerate(body["chunks"]):
        assert chunk["chunk_id"] == f"ridge-2023-manual#{ordinal:04d}"
        assert body["text"][chunk["char_start"] : chunk["char_end"]] == chunk["text"]
        assert chunk["tokens"] <= BIKE_SCHEMA["chunking"]["max_tokens"]
    assert body["chunks"][-1]["section"] == "Tyres"


def test_resending_an_identical_document_is_unchanged_and_embeds_nothing(
    bikes: Api, api_runtime: Runtime
) -> None:
    upsert(bikes, document())
    embedded_before = api_runtime.embedder.embedded_texts  # type: ignore[attr-defined]
    response = upsert(bikes, document())
    assert response.json()["results"][0]["status"] == "unchanged"
    assert api_runtime.embedder.embedded_texts == embedded_before  # type: ignore[attr-defined]


def test_editing_one_section_re_embeds_only_new_text(bikes: Api, api_runtime: Runtime) -> None:
    upsert(bikes, document(), document("other-manual", title="Other manual"))
    before = bikes.get("/v1/collections/bikes/documents/other-manual").json()["chunks"]
    embedded_before = api_runtime.embedder.embedded_texts  # type: ignore[attr-defined]
    edited = MANUAL.replace("Check pressure weekly.", "Check pressure before every ride.")
    response = upsert(bikes, document(text=edited))
    assert response.json()["results"][0]["status"] == "updated"
    new_texts = api_runtime.embedder.embedded_texts - embedded_before  # type: ignore[attr-defined]
    assert 1 <= new_texts < response.json()["results"][0]["chunks"]
    assert bikes.get("/v1/collections/bikes/documents/other-manual").json()["chunks"] == before


def test_batch_with_one_bad_document_writes_nothing_and_lists_every_bad_one(bikes: Api) -> None:
    response = upsert(
        bikes,
        document("good-one"),
        document("bad-type", attributes={"model_year": "2023"}),
        document("bad-name", attributes={"colour": "red"}),
    )
    assert response.status_code == 422
    error = response.json()["error"]
    assert error["code"] == "invalid_documents"
    assert [(d["id"], d["index"]) for d in error["documents"]] == [("bad-type", 1), ("bad-name", 2)]
    assert bikes.get("/v1/collections/bikes/documents/good-one").status_code == 404
    assert bikes.get("/v1/collections/bikes").json()["documents"] == 0


@pytest.mark.parametrize(
    ("fields", "reason"),
    [
        ({"attributes": {"colour": "red"}}, "unknown_attribute"),
        ({"attributes": {"model_year": "2023"}}, "invalid_attribute"),
        ({"attributes": {"published": "2024-05-01T09:30:00"}}, "invalid_attribute"),
        ({"attributes": {"model_year": 2**53}}, "invalid_attribute"),
        ({"attributes": {"price": "cheap"}}, "invalid_attribute"),
        ({"attributes": {"effective": "2024-02-30"}}, "invalid_attribute"),
        ({"attributes": {"tags": "brakes"}}, "invalid_attribute"),
        ({"text": ""}, "missing_text"),
        ({"text": "  ... !!"}, "missing_text"),
        ({"text": None}, "missing_text"),
        ({"id": "has space"}, "invalid_id"),
        ({"id": "x" * 129}, "invalid_id"),
        ({"media_type": "application/pdf"}, "invalid_media_type"),
        ({"access": "staff"}, "invalid_access"),
    ],
)
def test_bad_document_is_rejected_with_its_reason(
    bikes: Api, fields: dict[str, Any], reason: str
) -> None:
    response = upsert(bikes, document(**fields))
    assert response.status_code == 422
    assert response.json()["error"]["documents"][0]["reason"] == reason


def test_malformed_json_is_a_400_in_the_contract_shape(bikes: Api) -> None:
    response = bikes.post(
        "/v1/collections/bikes/documents",
        content=b'{"documents": [',
        headers={"Content-Type": "application/json"},
    )
    assert response.status_code == 400
    assert error_code(response) == "malformed_json"


def test_missing_field_is_invalid_request_naming_the_field(bikes: Api) -> None:
    response = bikes.post("/v1/collections/bikes/documents", json={"docs": []})
    assert response.status_code == 422
    assert error_code(response) == "invalid_request"
    assert response.json()["error"]["field"]


@pytest.mark.parametrize("name", ["Bikes", "1bikes", "b" * 64, "bi kes"])
def test_bad_collection_name_is_rejected(api: Api, name: str) -> None:
    response = api.put(f"/v1/collections/{name}", json=BIKE_SCHEMA)
    assert response.status_code == 422
    assert error_code(response) == "invalid_request"


def test_bad_attribute_name_is_rejected(api: Api) -> None:
    schema = {**BIKE_SCHEMA, "attributes": {"Model": {"type": "keyword"}}}
    response = api.put("/v1/collections/bikes", json=schema)
    assert response.status_code == 422 and error_code(response) == "invalid_request"


def test_unknown_attribute_type_is_rejected(api: Api) -> None:
    schema = {**BIKE_SCHEMA, "attributes": {"model": {"type": "text"}}}
    response = api.put("/v1/collections/bikes", json=schema)
    assert response.status_code == 422 and error_code(response) == "invalid_request"


def test_max_tokens_over_the_embedder_window_is_rejected(api: Api, api_runtime: Runtime) -> None:
    too_many = api_runtime.embedder.window - 32 + 1
    schema = {**BIKE_SCHEMA, "chunking": {"max_tokens": too_many, "overlap_tokens": 8}}
    response = api.put("/v1/collections/bikes", json=schema)
    assert response.status_code == 422
    assert response.json()["error"]["field"] == "chunking.max_tokens"


def test_changing_an_attribute_type_is_a_conflict(bikes: Api) -> None:
    schema = {**BIKE_SCHEMA, "attributes": {"model_year": {"type": "keyword"}}}
    response = bikes.put("/v1/collections/bikes", json=schema)
    assert response.status_code == 409 and error_code(response) == "conflict"


def test_updating_a_collection_is_200_and_shows_counts_and_tokenizer(bikes: Api) -> None:
    upsert(bikes, document())
    response = bikes.put("/v1/collections/bikes", json={"description": "Manuals"})
    assert response.status_code == 200
    body = bikes.get("/v1/collections/bikes").json()
    assert body["description"] == "Manuals"
    assert body["documents"] == 1 and body["chunks"] >= 2
    assert body["tokenizer"] and body["embedder"]


def test_deleted_document_is_gone_with_its_chunks(bikes: Api) -> None:
    upsert(bikes, document())
    assert bikes.delete("/v1/collections/bikes/documents/ridge-2023-manual").status_code == 204
    assert bikes.get("/v1/collections/bikes/documents/ridge-2023-manual").status_code == 404
    assert bikes.get("/v1/collections/bikes").json()["chunks"] == 0


def test_changed_chunking_rebuilds_in_the_background(bikes: Api, api_runtime: Runtime) -> None:
    upsert(bikes, document(), document("second", title="Second"))
    old = bikes.get("/v1/collections/bikes/documents/second").json()["chunks"]
    response = bikes.put(
        "/v1/collections/bikes", json={"chunking": {"max_tokens": 20, "overlap_tokens": 4}}
    )
    assert response.status_code == 200
    assert "rebuild" in response.json()
    assert api_runtime.rebuilds.wait(timeout=30)
    body = bikes.get("/v1/collections/bikes").json()
    assert "rebuild" not in body or body["rebuild"] is None
    assert body["chunking"] == {"max_tokens": 20, "overlap_tokens": 4}
    new = bikes.get("/v1/collections/bikes/documents/second").json()["chunks"]
    assert len(new) > len(old)
    assert all(c["tokens"] <= 20 for c in new)


def test_unknown_collection_is_404(api: Api) -> None:
    response = api.get("/v1/collections/nothing-here")
    assert response.status_code == 404 and error_code(response) == "collection_not_found"


def test_health_needs_no_key(api: Api) -> None:
    assert api.client.get("/healthz").status_code == 200
    assert api.client.get("/readyz").json()["status"] == "ready"


def test_requests_without_a_key_are_401(api: Api) -> None:
    response = api.client.get("/v1/collections")
    assert response.status_code == 401 and error_code(response) == "unauthenticated"


def test_list_documents_pages_in_id_order(bikes: Api) -> None:
    upsert(bikes, *[document(f"doc-{i}", title=f"Doc {i}") for i in range(5)])
    first = bikes.get("/v1/collections/bikes/documents", params={"limit": 2}).json()
    assert [d["id"] for d in first["documents"]] == ["doc-0", "doc-1"]
    assert first["total"] == 5
    second = bikes.get(
        "/v1/collections/bikes/documents", params={"limit": 2, "after": first["next_after"]}
    ).json()
    assert [d["id"] for d in second["documents"]] == ["doc-2", "doc-3"]
