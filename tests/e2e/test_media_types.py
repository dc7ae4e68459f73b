"""A JSON body must be sent as JSON: any other declared media type is 415, on every route that
takes a body; a body sent without a Content-Type is read as JSON."""

from __future__ import annotations

import json
from collections.abc import Iterator
from typing import Any

import pytest
from fastapi.testclient import TestClient

from service.api.app import create_app
from service.config import Settings
from service.usecases.runtime import Runtime
from tests.api_helpers import BIKE_SCHEMA, Api, make_key
from tests.hashing_embedder import HashingTestEmbedder

DOCUMENT = {"id": "ridge-manual", "text": "Check the brake pads every month."}
BODY_ROUTES: list[tuple[str, str, dict[str, Any]]] = [
    ("PUT", "/v1/collections/bikes", BIKE_SCHEMA),
    ("POST", "/v1/collections/bikes/documents", {"documents": [DOCUMENT]}),
    ("POST", "/v1/collections/bikes/search", {"query": "brake pads"}),
    ("POST", "/v1/collections/bikes/context", {"query": "brake pads"}),
    ("POST", "/v1/collections/bikes/answer", {"query": "brake pads"}),
]
ROUTE_IDS = [f"{method} {path.rsplit('/', 1)[-1]}" for method, path, _ in BODY_ROUTES]


@pytest.fixture(scope="module")
def bikes(tmp_path_factory: pytest.TempPathFactory) -> Iterator[Api]:
    """One server for the whole file: no test here changes what another one sees."""
    data_dir = tmp_path_factory.mktemp("media-types")
    runtime = Runtime(Settings(data_dir=data_dir, index_poll_ms=0), HashingTestEmbedder())
    with TestClient(create_app(runtime)) as client:
        api = Api(client, make_key(runtime, "admin", name="admin"))
        assert api.put("/v1/collections/bikes", json=BIKE_SCHEMA).status_code == 201
        yield api


def send(api: Api, method: str, path: str, body: bytes, content_type: str | None) -> Any:
    headers = {"Authorization": f"Bearer {api.key}"}
    if content_type is not None:
        headers["Content-Type"] = content_type
    return api.client.request(method, path, content=body, headers=headers)


@pytest.mark.parametrize(("method", "path", "body"), BODY_ROUTES, ids=ROUTE_IDS)
@pytest.mark.parametrize(
    "content_type",
    ["application/x-www-form-urlencoded", "text/plain; charset=utf-8", "Application/XML"],
)
def test_a_body_declared_as_anything_but_json_is_415(
    bikes: Api, method: str, path: str, body: dict[str, Any], content_type: str
) -> None:
    response = send(bikes, method, path, json.dumps(body).encode(), content_type)
    assert response.status_code == 415
    declared = content_type.partition(";")[0].lower()
    assert response.json() == {
        "error": {
            "code": "unsupported_media_type",
            "message": "The request body must be JSON sent with Content-Type: "
            f"application/json, not {declared}.",
        }
    }


def test_what_curl_sends_by_default_is_refused_before_anything_is_written(bikes: Api) -> None:
    document = {"id": "curl-default", "text": "Sent as a form."}
    form = send(
        bikes,
        "POST",
        "/v1/collections/bikes/documents",
        json.dumps({"documents": [document]}).encode(),
        "application/x-www-form-urlencoded",
    )
    assert form.status_code == 415
    assert bikes.get("/v1/collections/bikes/documents/curl-default").status_code == 404


@pytest.mark.parametrize(("method", "path", "body"), BODY_ROUTES, ids=ROUTE_IDS)
@pytest.mark.parametrize("content_type", [None, "", "application/json; charset=utf-8"])
def test_a_json_body_without_a_content_type_or_with_parameters_is_accepted(
    bikes: Api, method: str, path: str, body: dict[str, Any], content_type: str | None
) -> None:
    response = send(bikes, method, path, json.dumps(body).encode(), content_type)
    assert response.status_code in (200, 201), response.text


def test_a_body_without_a_content_type_must_still_be_json(bikes: Api) -> None:
    response = send(bikes, "POST", "/v1/collections/bikes/search", b"query=brakes", None)
    assert response.status_code == 400
    assert response.json()["error"]["code"] == "malformed_json"


def test_routes_without_a_body_ignore_the_content_type(bikes: Api) -> None:
    headers = {"Content-Type": "text/plain"}
    assert bikes.get("/v1/collections/bikes", headers=headers).status_code == 200
    assert bikes.delete("/v1/collections/bikes/documents/none", headers=headers).status_code == 404


def test_every_route_taking_a_body_documents_the_415(bikes: Api) -> None:
    operations = bikes.client.get("/openapi.json").json()["paths"]
    for method, path, _ in BODY_ROUTES:
        template = path.replace("/bikes", "/{name}")
        responses = operations[template][method.lower()]["responses"]
        assert responses["415"]["description"] == "The body is not sent as application/json"
