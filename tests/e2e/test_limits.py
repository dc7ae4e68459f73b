"""Limits, the per-key rate limit and the hardening settings, through the HTTP API."""

from __future__ import annotations

import json
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any

import pytest
from fastapi.testclient import TestClient

from service.api.app import create_app
from service.config import Settings
from service.usecases.runtime import Runtime
from tests.api_helpers import BIKE_SCHEMA, Api, make_key


@pytest.fixture
def client_for(
    make_runtime: Callable[..., Runtime], tmp_path: Path
) -> Iterator[Callable[..., Api]]:
    """An admin client over a fresh store with the given settings and the bikes collection."""
    clients: list[TestClient] = []

    def build(**settings: Any) -> Api:
        runtime = make_runtime(data_dir=tmp_path / f"store-{len(clients)}", **settings)
        client = TestClient(create_app(runtime))
        client.__enter__()
        clients.append(client)
        api = Api(client, make_key(runtime, "admin", name="admin"))
        assert api.put("/v1/collections/bikes", json=BIKE_SCHEMA).status_code == 201
        return api

    yield build
    for client in clients:
        client.__exit__(None, None, None)


def limit_of(response: Any) -> str:
    assert response.status_code == 422, response.text
    error = response.json()["error"]
    assert error["code"] == "limit_exceeded"
    return str(error["limit"])


def test_defaults_are_the_documented_limits() -> None:
    settings = Settings()
    assert settings.max_body_bytes == 10 * 1024 * 1024
    assert settings.max_batch_documents == 1000
    assert settings.max_document_text_bytes == 2 * 1024 * 1024
    assert settings.max_query_chars == 2000
    assert settings.max_top_k == 1000
    assert settings.max_depth == 1000
    assert settings.max_token_budget == 32_768
    assert settings.rate_limit_per_second == 0
    assert settings.cors_origins == []


def test_a_body_over_the_limit_with_content_length_is_413(client_for: Callable[..., Api]) -> None:
    api = client_for(max_body_bytes=2000)
    document = {"id": "big", "text": "word " * 1000}
    response = api.post("/v1/collections/bikes/documents", json={"documents": [document]})
    assert response.status_code == 413
    assert response.json()["error"]["code"] == "payload_too_large"
    assert api.get("/v1/collections/bikes").json()["documents"] == 0


def test_a_streamed_body_over_the_limit_without_content_length_is_413(
    client_for: Callable[..., Api],
) -> None:
    api = client_for(max_body_bytes=2000)
    payload = json.dumps({"documents": [{"id": "big", "text": "word " * 1000}]}).encode()

    def pieces() -> Iterator[bytes]:
        for start in range(0, len(payload), 500):
            yield payload[start : start + 500]

    response = api.post(
        "/v1/collections/bikes/documents",
        content=pieces(),
        headers={"Content-Type": "application/json"},
    )
    assert "content-length" not in response.request.headers
    assert response.status_code == 413
    assert response.json()["error"]["code"] == "payload_too_large"
    assert api.get("/v1/collections/bikes").json()["documents"] == 0


async def _call_with_chunks(
    app: Any, chunks: list[bytes], path: str = "/v1/collections/bikes/documents"
) -> tuple[int, bytes]:
    """Drive the ASGI app with a body split into messages and no Content-Length header."""
    pending = [
        {"type": "http.request", "body": chunk, "more_body": index < len(chunks) - 1}
        for index, chunk in enumerate(chunks)
    ]
    sent: list[dict[str, Any]] = []

    async def receive() -> dict[str, Any]:
        return pending.pop(0) if pending else {"type": "http.disconnect"}

    async def send(message: dict[str, Any]) -> None:
        sent.append(message)

    scope = {
        "type": "http",
        "asgi": {"version": "3.0"},
        "http_version": "1.1",
        "method": "POST",
        "scheme": "http",
        "path": path,
        "raw_path": path.encode(),
        "query_string": b"",
        "root_path": "",
        "headers": [(b"content-type", b"application/json"), (b"host", b"testserver")],
        "client": ("127.0.0.1", 50000),
        "server": ("testserver", 80),
    }
    await app(scope, receive, send)
    status = next(m["status"] for m in sent if m["type"] == "http.response.start")
    body = b"".join(m.get("body", b"") for m in sent if m["type"] == "http.response.body")
    return status, body


def test_the_size_limit_counts_every_message_of_a_chunked_body(
    make_runtime: Callable[..., Runtime],
) -> None:
    import anyio

    app = create_app(make_runtime(max_body_bytes=100))
    status, body = anyio.run(_call_with_chunks, app, [b"x" * 60, b"x" * 60])
    assert status == 413
    assert json.loads(body)["error"]["code"] == "payload_too_large"
    status, _ = anyio.run(_call_with_chunks, app, [b"{", b"}"])
    assert status == 401


def test_a_batch_over_the_document_limit_is_limit_exceeded(
    client_for: Callable[..., Api],
) -> None:
    api = client_for(max_batch_documents=3)
    documents = [{"id": f"d{i}", "text": "brake pads"} for i in range(4)]
    response = api.post("/v1/collections/bikes/documents", json={"documents": documents})
    assert limit_of(response) == "batch_documents"
    assert api.get("/v1/collections/bikes").json()["documents"] == 0
    allowed = api.post("/v1/collections/bikes/documents", json={"documents": documents[:3]})
    assert allowed.status_code == 200


def test_a_document_text_over_the_byte_limit_is_limit_exceeded(
    client_for: Callable[..., Api],
) -> None:
    api = client_for(max_document_text_bytes=100)
    # 40 characters, 120 bytes in UTF-8: the limit counts bytes, not characters.
    text = "\u20ac" * 40
    documents = [{"id": "ok", "text": "fits"}, {"id": "long", "text": text}]
    response = api.post("/v1/collections/bikes/documents", json={"documents": documents})
    assert limit_of(response) == "document_text_bytes"
    assert api.get("/v1/collections/bikes").json()["documents"] == 0


@pytest.mark.parametrize("route", ["search", "context", "answer"])
@pytest.mark.parametrize(
    ("fields", "limit"),
    [
        ({"query": "q" * 2001}, "query_chars"),
        ({"top_k": 1001}, "top_k"),
        ({"depth": 1001}, "depth"),
    ],
)
def test_retrieval_over_a_default_limit_is_limit_exceeded(
    client_for: Callable[..., Api], route: str, fields: dict[str, Any], limit: str
) -> None:
    api = client_for()
    body = {"query": "brakes", **fields}
    assert limit_of(api.post(f"/v1/collections/bikes/{route}", json=body)) == limit


@pytest.mark.parametrize("route", ["search", "context", "answer"])
def test_retrieval_at_the_default_limits_is_accepted(
    client_for: Callable[..., Api], route: str
) -> None:
    api = client_for()
    body: dict[str, Any] = {"query": "q" * 2000, "top_k": 1000, "depth": 1000}
    if route != "search":
        body["token_budget"] = 32_768
    assert api.post(f"/v1/collections/bikes/{route}", json=body).status_code == 200


@pytest.mark.parametrize("route", ["context", "answer"])
def test_a_token_budget_over_the_limit_is_limit_exceeded(
    client_for: Callable[..., Api], route: str
) -> None:
    api = client_for()
    body = {"query": "brakes", "token_budget": 32_769}
    assert limit_of(api.post(f"/v1/collections/bikes/{route}", json=body)) == "token_budget"


def test_a_configured_limit_is_the_one_enforced(client_for: Callable[..., Api]) -> None:
    api = client_for(max_query_chars=10, max_top_k=5)
    search = "/v1/collections/bikes/search"
    assert limit_of(api.post(search, json={"query": "q" * 11})) == "query_chars"
    assert limit_of(api.post(search, json={"query": "q", "top_k": 6})) == "top_k"
    assert api.post(search, json={"query": "q" * 10, "top_k": 5}).status_code == 200


def test_a_burst_over_the_rate_limit_is_429_with_retry_after(
    client_for: Callable[..., Api],
) -> None:
    api = client_for(rate_limit_per_second=0.01, rate_limit_burst=3)
    statuses = [api.get("/v1/collections").status_code for _ in range(5)]
    # The collection was created with the first token, so two more requests fit the burst.
    assert statuses == [200, 200, 429, 429, 429]
    response = api.get("/v1/collections")
    assert response.json()["error"]["code"] == "rate_limited"
    assert int(response.headers["Retry-After"]) >= 1


def test_the_rate_limit_is_per_key(client_for: Callable[..., Api]) -> None:
    api = client_for(rate_limit_per_second=0.01, rate_limit_burst=1)
    assert api.get("/v1/collections").status_code == 429
    runtime: Runtime = api.client.app.state.runtime  # type: ignore[attr-defined]
    other = api.as_key(make_key(runtime, "reader", name="other"))
    assert other.get("/v1/collections").status_code == 200


def test_no_rate_limit_by_default(client_for: Callable[..., Api]) -> None:
    api = client_for()
    assert all(api.get("/v1/collections").status_code == 200 for _ in range(60))


def test_cors_is_off_by_default(client_for: Callable[..., Api]) -> None:
    api = client_for()
    origin = {"Origin": "https://app.example.invalid"}
    response = api.get("/v1/collections", headers=origin)
    assert "access-control-allow-origin" not in response.headers
    preflight = api.client.options(
        "/v1/collections",
        headers={**origin, "Access-Control-Request-Method": "GET"},
    )
    assert "access-control-allow-origin" not in preflight.headers


def test_cors_allows_only_a_configured_origin(client_for: Callable[..., Api]) -> None:
    api = client_for(cors_origins=["https://app.example.invalid"])
    allowed = api.get("/v1/collections", headers={"Origin": "https://app.example.invalid"})
    assert allowed.headers["access-control-allow-origin"] == "https://app.example.invalid"
    other = api.get("/v1/collections", headers={"Origin": "https://evil.example.invalid"})
    assert "access-control-allow-origin" not in other.headers
    preflight = api.client.options(
        "/v1/collections",
        headers={
            "Origin": "https://app.example.invalid",
            "Access-Control-Request-Method": "POST",
            "Access-Control-Request-Headers": "Authorization",
        },
    )
    assert preflight.status_code == 200
    assert preflight.headers["access-control-allow-origin"] == "https://app.example.invalid"


@pytest.mark.parametrize("route", ["search", "context", "answer"])
def test_cors_and_the_body_limit_apply_to_the_query_routes(
    client_for: Callable[..., Api], route: str
) -> None:
    api = client_for(cors_origins=["https://app.example.invalid"], max_body_bytes=4096)
    origin = {"Origin": "https://app.example.invalid"}
    path = f"/v1/collections/bikes/{route}"
    answered = api.post(path, json={"query": "brakes"}, headers=origin)
    assert answered.status_code == 200, answered.text
    assert answered.headers["access-control-allow-origin"] == "https://app.example.invalid"
    too_large = api.post(path, json={"query": "brakes " * 1000}, headers=origin)
    assert too_large.status_code == 413
    assert too_large.headers["access-control-allow-origin"] == "https://app.example.invalid"


@pytest.mark.parametrize("route", ["search", "context", "answer"])
def test_the_body_limit_applies_to_the_query_routes_declared_or_streamed(
    client_for: Callable[..., Api], make_runtime: Callable[..., Runtime], route: str
) -> None:
    import anyio

    path = f"/v1/collections/bikes/{route}"
    declared = client_for(max_body_bytes=4096).post(path, json={"query": "brakes " * 1000})
    assert declared.status_code == 413
    assert declared.json()["error"]["code"] == "payload_too_large"
    app = create_app(make_runtime(max_body_bytes=100))
    query = b'{"query": "' + b"brakes " * 20 + b'"}'
    status, body = anyio.run(_call_with_chunks, app, [query[:60], query[60:]], path)
    assert status == 413
    assert json.loads(body)["error"]["code"] == "payload_too_large"


def test_the_openapi_document_is_served(client_for: Callable[..., Api]) -> None:
    response = client_for().client.get("/openapi.json")
    assert response.status_code == 200
    assert response.json()["info"]["title"] == "excerpta"


LEAK_SIGNS = ("traceback", 'file "', "sqlalchemy", "select ", "insert into", "sqlite", "psycopg")


@pytest.mark.parametrize(
    ("method", "path", "payload"),
    [
        ("post", "/v1/collections/bikes/search", {"query": "x", "filter": "model = 'a' AND ("}),
        ("post", "/v1/collections/bikes/search", {"query": "x", "filter": "colour = 'red'"}),
        ("post", "/v1/collections/bikes/search", {"query": "x", "filter": "model_year = 'x'"}),
        ("post", "/v1/collections/bikes/search", {"query": "x", "filter": "a = 'x'; DROP"}),
        ("post", "/v1/collections/bikes/search", {"query": 5}),
        ("post", "/v1/collections/bikes/documents", {"documents": [{"id": "a b"}]}),
        ("post", "/v1/collections/bikes/documents", {"documents": [{"id": "x" * 500}]}),
        ("get", "/v1/collections/bikes/documents?filter=model%20%3D%20%27", None),
        ("get", "/v1/collections/bikes/documents?filter=%7Bnot%20json", None),
        ("get", "/v1/collections/bikes/documents/' OR 1=1 --", None),
        ("get", "/v1/traces/'; DROP TABLE traces; --", None),
        ("put", "/v1/collections/bikes", {"attributes": {"model": {"type": "integer"}}}),
        ("get", "/v1/no-such-route", None),
    ],
)
def test_error_bodies_hold_no_stack_trace_or_sql(
    client_for: Callable[..., Api], method: str, path: str, payload: dict[str, Any] | None
) -> None:
    api = client_for()
    kwargs = {} if payload is None else {"json": payload}
    response = getattr(api, method)(path, **kwargs)
    assert 400 <= response.status_code < 500, response.text
    assert set(response.json()) == {"error"}
    assert {"code", "message"} <= set(response.json()["error"])
    text = response.text.lower()
    assert not [sign for sign in LEAK_SIGNS if sign in text], response.text
