"""A PUT of a collection sends its whole schema: leaving an attribute out is a conflict, unless
``remove_attributes`` names it, which removes it everywhere."""

from __future__ import annotations

from typing import Any

from sqlalchemy import func, select

from service.store.tables import AttributeValueRow
from service.usecases.runtime import Runtime
from tests.api_helpers import BIKE_SCHEMA, Api

DOCUMENT: dict[str, Any] = {
    "id": "ridge-2023-manual",
    "title": "Ridge 2023 owner's manual",
    "text": "Check the brake pads every month and the chain every week.",
    "attributes": {"model": "Ridge", "model_year": 2023, "tags": ["brakes", "chain"]},
}
WITHOUT = {
    name: spec
    for name, spec in BIKE_SCHEMA["attributes"].items()
    if name not in ("model_year", "tags")
}


def put(api: Api, body: dict[str, Any]) -> Any:
    return api.put("/v1/collections/bikes", json=body)


def stored_values(runtime: Runtime, name: str) -> int:
    with runtime.transaction() as session:
        query = select(func.count()).where(AttributeValueRow.name == name)
        return int(session.scalar(query) or 0)


def test_leaving_one_attribute_out_is_a_conflict_that_names_it(bikes: Api) -> None:
    attributes = {k: v for k, v in BIKE_SCHEMA["attributes"].items() if k != "tags"}
    response = put(bikes, {"attributes": attributes})
    assert response.status_code == 409
    assert response.json() == {
        "error": {
            "code": "conflict",
            "message": "Attribute 'tags' is missing from attributes; send it again to keep it, "
            "or list it in remove_attributes to remove it from the collection and its "
            "documents.",
            "attributes": ["tags"],
        }
    }
    assert "tags" in bikes.get("/v1/collections/bikes").json()["attributes"]


def test_leaving_several_out_names_them_all(bikes: Api) -> None:
    response = put(bikes, {"attributes": WITHOUT})
    assert response.status_code == 409
    error = response.json()["error"]
    assert error["message"] == (
        "Attributes 'model_year' and 'tags' are missing from attributes; send them again to "
        "keep them, or list them in remove_attributes to remove them from the collection and "
        "its documents."
    )
    assert error["attributes"] == ["model_year", "tags"]


def test_a_put_without_attributes_keeps_the_schema(bikes: Api) -> None:
    response = put(bikes, {"description": "Renamed"})
    assert response.status_code == 200, response.text
    assert response.json()["description"] == "Renamed"
    assert response.json()["attributes"] == BIKE_SCHEMA["attributes"]


def test_removed_attributes_leave_the_schema_the_documents_the_index_and_the_citations(
    bikes: Api, api_runtime: Runtime
) -> None:
    written = bikes.post("/v1/collections/bikes/documents", json={"documents": [DOCUMENT]})
    assert written.status_code == 200, written.text
    assert stored_values(api_runtime, "tags") == 2
    filtered = {"query": "brake pads", "filter": "model_year = 2023"}
    assert bikes.post("/v1/collections/bikes/search", json=filtered).json()["hits"]

    body = {"attributes": WITHOUT, "remove_attributes": ["model_year", "tags"]}
    response = put(bikes, body)
    assert response.status_code == 200, response.text
    view = response.json()
    assert sorted(view["attributes"]) == sorted(WITHOUT)
    assert view["cite_attributes"] == ["effective"]

    document = bikes.get("/v1/collections/bikes/documents/ridge-2023-manual").json()
    assert document["attributes"] == {"model": "Ridge"}
    assert stored_values(api_runtime, "tags") == stored_values(api_runtime, "model_year") == 0
    refused = bikes.post("/v1/collections/bikes/search", json=filtered)
    assert refused.status_code == 400
    assert refused.json()["error"]["code"] == "filter_unknown_attribute"
    listing = bikes.get("/v1/collections/bikes/documents", params={"filter": "tags = 'x'"})
    assert listing.json()["error"]["code"] == "filter_unknown_attribute"

    # The stored document is now what it would be if sent without them: re-sending is a no-op.
    resent = {**DOCUMENT, "attributes": {"model": "Ridge"}}
    again = bikes.post("/v1/collections/bikes/documents", json={"documents": [resent]})
    assert again.json()["results"][0]["status"] == "unchanged"
    # And the same PUT once more changes nothing.
    assert put(bikes, body).json()["attributes"] == view["attributes"]


def test_removing_without_sending_attributes_keeps_the_others(bikes: Api) -> None:
    response = put(bikes, {"remove_attributes": ["tags", "never_declared"]})
    assert response.status_code == 200, response.text
    expected = {k: v for k, v in BIKE_SCHEMA["attributes"].items() if k != "tags"}
    assert response.json()["attributes"] == expected


def test_an_attribute_both_declared_and_removed_is_refused(bikes: Api) -> None:
    response = put(bikes, {"attributes": BIKE_SCHEMA["attributes"], "remove_attributes": ["tags"]})
    assert response.status_code == 422
    assert response.json() == {
        "error": {
            "code": "invalid_request",
            "message": "Attribute 'tags' is both declared in attributes and listed in "
            "remove_attributes.",
            "field": "remove_attributes",
        }
    }


def test_citing_an_attribute_being_removed_is_refused(bikes: Api) -> None:
    response = put(bikes, {"remove_attributes": ["model_year"], "cite_attributes": ["model_year"]})
    assert response.status_code == 422
    error = response.json()["error"]
    assert error["message"] == "cite_attributes names 'model_year', which is not an attribute."
    assert "model_year" in bikes.get("/v1/collections/bikes").json()["attributes"]
