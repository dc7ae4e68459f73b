"""Schema hints for filter inference: given per attribute in a PUT, checked, kept, shown."""

from __future__ import annotations

from typing import Any

import pytest

from tests.api_helpers import BIKE_SCHEMA, Api

HINTED: dict[str, Any] = {
    **BIKE_SCHEMA,
    "attributes": {
        **BIKE_SCHEMA["attributes"],
        "model": {
            "type": "keyword",
            "description": "Bicycle model name",
            "aliases": {"Ridgeline": ["ridge line"]},
        },
        "discontinued": {
            "type": "boolean",
            "phrases": {"true": ["no longer made"], "false": []},
        },
        "tags": {"type": "keyword[]", "infer": False},
    },
}


def test_hints_given_in_a_put_are_shown_by_get_beside_the_type(api: Api) -> None:
    assert api.put("/v1/collections/bikes", json=HINTED).status_code == 201
    attributes = api.get("/v1/collections/bikes").json()["attributes"]
    assert attributes["model"] == {
        "type": "keyword",
        "description": "Bicycle model name",
        "aliases": {"Ridgeline": ["ridge line"]},
    }
    assert attributes["discontinued"] == {
        "type": "boolean",
        "phrases": {"true": ["no longer made"], "false": []},
    }
    assert attributes["tags"] == {"type": "keyword[]", "infer": False}
    assert attributes["price"] == {"type": "number"}


def test_a_put_that_names_an_attribute_without_hints_clears_them(api: Api) -> None:
    assert api.put("/v1/collections/bikes", json=HINTED).status_code == 201
    assert api.put("/v1/collections/bikes", json=BIKE_SCHEMA).status_code == 200
    attributes = api.get("/v1/collections/bikes").json()["attributes"]
    assert attributes["model"] == {"type": "keyword"}
    assert attributes["tags"] == {"type": "keyword[]"}


def test_a_put_without_attributes_keeps_the_hints(api: Api) -> None:
    assert api.put("/v1/collections/bikes", json=HINTED).status_code == 201
    assert api.put("/v1/collections/bikes", json={"description": "renamed"}).status_code == 200
    attributes = api.get("/v1/collections/bikes").json()["attributes"]
    assert attributes["model"]["aliases"] == {"Ridgeline": ["ridge line"]}


@pytest.mark.parametrize(
    ("attribute", "spec", "field"),
    [
        ("price", {"type": "number", "aliases": {"1": ["one"]}}, "attributes.price.aliases"),
        ("model", {"type": "keyword", "phrases": {"true": ["x"]}}, "attributes.model.phrases"),
        ("model", {"type": "keyword", "aliases": {"Ridgeline": [""]}}, "attributes.model.aliases"),
        ("model", {"type": "keyword", "description": "x" * 1001}, "attributes.model.description"),
    ],
)
def test_an_unusable_hint_is_refused_naming_its_field(
    api: Api, attribute: str, spec: dict[str, Any], field: str
) -> None:
    body = {**BIKE_SCHEMA, "attributes": {**BIKE_SCHEMA["attributes"], attribute: spec}}
    response = api.put("/v1/collections/bikes", json=body)
    assert response.status_code == 422, response.text
    error = response.json()["error"]
    assert error["code"] == "invalid_request"
    assert error["field"].startswith(field)
    assert api.get("/v1/collections/bikes").status_code == 404


def test_an_unknown_hint_key_is_refused(api: Api) -> None:
    body = {
        **BIKE_SCHEMA,
        "attributes": {**BIKE_SCHEMA["attributes"], "model": {"type": "keyword", "synonyms": {}}},
    }
    response = api.put("/v1/collections/bikes", json=body)
    assert response.status_code == 422
    assert response.json()["error"]["code"] == "invalid_request"
