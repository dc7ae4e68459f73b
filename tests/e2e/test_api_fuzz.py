"""Schema-driven fuzzing of the whole API against its own OpenAPI document.

Every operation gets a fixed, small number of generated requests (valid and invalid ones) sent
in-process over ASGI with an admin key, against a collection that holds documents. Checks: no
5xx, a declared status code and content type, and a body matching the declared schema.
"""

from __future__ import annotations

import time
from collections.abc import Callable, Iterator
from dataclasses import dataclass
from typing import Any

import pytest
import schemathesis
from fastapi import FastAPI
from hypothesis import HealthCheck, event, settings
from hypothesis import strategies as st
from schemathesis.checks import not_a_server_error
from schemathesis.python.asgi import shutdown_lifespans
from schemathesis.specs.openapi.checks import (
    content_type_conformance,
    negative_data_rejection,
    response_schema_conformance,
    status_code_conformance,
)

from service.api.app import create_app
from service.config import Settings
from service.usecases import collections, documents
from service.usecases.callers import LOCAL_ADMIN
from service.usecases.runtime import Runtime
from tests.api_helpers import BIKE_SCHEMA, make_key
from tests.hashing_embedder import HashingTestEmbedder

EXAMPLES_PER_OPERATION = 25
CHECKS = [
    not_a_server_error,
    status_code_conformance,
    content_type_conformance,
    response_schema_conformance,
    negative_data_rejection,
]
SEED_DOCUMENTS = [
    {
        "id": "ridge-2023",
        "title": "Ridge 2023 owner's manual",
        "text": "# Brakes\n\nSqueeze both levers before every ride.\n\n# Tyres\n\nRun 2.1 bar.",
        "media_type": "text/markdown",
        "source_url": "https://docs.example.invalid/ridge",
        "attributes": {
            "model": "Ridge",
            "model_year": 2023,
            "price": 1299.0,
            "effective": "2023-04-01",
            "published": "2023-04-01T08:00:00Z",
            "tags": ["brakes", "tyres"],
        },
    },
    {
        "id": "staff-note",
        "text": "Brake pads wear faster in wet winters; stock more of them.",
        "attributes": {"model": "Summit", "discontinued": True},
        "access": ["staff"],
    },
]


@dataclass
class FuzzTarget:
    app: FastAPI
    admin_key: str


@pytest.fixture
def fuzz_target(make_runtime: Callable[..., Runtime]) -> Iterator[FuzzTarget]:
    runtime = make_runtime()
    spec = collections.CollectionSpec(
        **{k: v for k, v in BIKE_SCHEMA.items() if k != "description"},
        description=BIKE_SCHEMA["description"],
    )
    collections.put_collection(runtime, LOCAL_ADMIN, "bikes", spec)
    documents.upsert_documents(runtime, LOCAL_ADMIN, "bikes", SEED_DOCUMENTS)
    key = make_key(runtime, "admin", name="fuzz-admin")
    # Loaded before the first request, so /readyz answers for a ready server: its 503 while the
    # index is built is the server's state, not something a request caused.
    runtime.indexes.start_background()
    _wait_until_ready(runtime)
    try:
        yield FuzzTarget(create_app(runtime), key)
    finally:
        # The ASGI transport keeps each app's lifespan running until told otherwise.
        shutdown_lifespans()


def _wait_until_ready(runtime: Runtime, timeout: float = 30.0) -> None:
    deadline = time.monotonic() + timeout
    while (reason := runtime.indexes.not_ready()) is not None:
        assert time.monotonic() < deadline, reason
        time.sleep(0.02)


def _openapi_document() -> dict[str, Any]:
    """The document the service serves; building it touches no store, so none is migrated."""
    runtime = Runtime(
        Settings(database_url="sqlite://"), HashingTestEmbedder(), run_migrations=False
    )
    try:
        return create_app(runtime).openapi()
    finally:
        runtime.close()


schema = schemathesis.openapi.from_dict(_openapi_document())

BINARY_BODY = {"type": "string", "format": "binary"}
TEXT_BODY = {"type": "string"}

# Half the cases aim at what exists, so generated bodies get past the 404 of a random name.
EXISTING = {"name": "bikes", "document_id": "ridge-2023"}


@schema.parametrize()
@schema.given(use_existing=st.booleans())
@settings(
    max_examples=EXAMPLES_PER_OPERATION,
    deadline=None,
    derandomize=True,
    suppress_health_check=list(HealthCheck),
)
def test_every_operation_answers_within_its_declared_schema(
    case: Any, use_existing: bool, fuzz_target: FuzzTarget
) -> None:
    if use_existing and case.path_parameters:
        for parameter, value in EXISTING.items():
            if parameter in case.path_parameters:
                case.path_parameters[parameter] = value
    headers = {"Authorization": f"Bearer {fuzz_target.admin_key}"}
    response = case.call(app=fuzz_target.app, headers=headers)
    event(f"{case.method} {response.status_code}")
    assert response.status_code < 500, response.text
    if response.headers.get("content-type", [""])[0].startswith("application/json"):
        text = response.text.lower()
        assert "traceback" not in text and "sqlalchemy" not in text
    case.validate_response(response, checks=CHECKS, transport_kwargs={"app": fuzz_target.app})


def test_every_route_declares_its_success_and_error_responses(fuzz_target: FuzzTarget) -> None:
    document = fuzz_target.app.openapi()
    error_ref = "#/components/schemas/ErrorOut"
    for path, operations in document["paths"].items():
        for method, operation in operations.items():
            responses = operation["responses"]
            success = [code for code in responses if code.startswith("2")]
            assert success, f"{method} {path} declares no success response"
            for code in success:
                if code == "204":
                    continue
                content = responses[code]["content"]
                if "application/json" in content:
                    schema_of = content["application/json"]["schema"]
                    assert schema_of.get("$ref"), f"{method} {path} {code} has no model"
                else:
                    # A file download declares its media types and a binary body instead; a
                    # text body (the metrics) declares a string.
                    for media_type, declared_file in content.items():
                        expected = TEXT_BODY if media_type == "text/plain" else BINARY_BODY
                        assert declared_file["schema"] == expected, f"{method} {path} {code}"
            if path.startswith("/v1/"):
                for code in ("400", "401", "403", "404", "413", "422", "429"):
                    declared = responses[code]["content"]["application/json"]["schema"]
                    assert declared == {"$ref": error_ref}, f"{method} {path} {code}"
    answer = document["paths"]["/v1/collections/{name}/answer"]["post"]["responses"]
    assert answer["502"]["content"]["application/json"]["schema"] == {"$ref": error_ref}


def test_every_v1_operation_refuses_a_request_without_a_valid_key(
    fuzz_target: FuzzTarget,
) -> None:
    from fastapi.testclient import TestClient

    filled = {"{name}": "bikes", "{document_id}": "ridge-2023", "{trace_id}": "any"}
    operations = [
        (method, path)
        for path, methods in fuzz_target.app.openapi()["paths"].items()
        for method in methods
        if path.startswith("/v1/")
    ]
    assert len(operations) >= 12
    with TestClient(fuzz_target.app) as client:
        for method, path in operations:
            for placeholder, value in filled.items():
                path = path.replace(placeholder, value)
            for headers in ({}, {"Authorization": "Bearer not-a-key"}):
                response = client.request(method, path, json={}, headers=headers)
                assert response.status_code == 401, (method, path, response.text)
                assert response.json()["error"]["code"] == "unauthenticated"
        # Nothing was changed by any of the refused requests.
        admin = {"Authorization": f"Bearer {fuzz_target.admin_key}"}
        assert client.get("/v1/collections/bikes", headers=admin).json()["documents"] == 2
