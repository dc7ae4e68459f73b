"""Filter inference through the chat endpoint, against a scripted endpoint on 127.0.0.1.

The reply is checked like any filter and settled like the engine's clauses; on anything
unusable the deterministic inference is used and the result says why.
"""

from __future__ import annotations

import datetime as dt
import json
from collections.abc import Callable
from typing import Any

import numpy as np
import pytest
from fastapi.testclient import TestClient

from service.api.app import create_app
from service.attributes import AttributeType, Schema, normalize_value
from service.filters.inference.hints import AttributeHints
from service.generation.chat_http import ChatEndpoint
from service.generation.filter_proposal import FILTER_SYSTEM_PROMPT, ChatFilterProposer
from service.index.collection_index import ChunkRecord, CollectionIndex, IndexSnapshot
from service.usecases.inference import InferOptions, infer_for_request
from service.usecases.runtime import Runtime
from tests.api_helpers import Api, make_key
from tests.chat_endpoint import FakeEndpoint, Step

NOW = dt.datetime(2025, 3, 15, 12, tzinfo=dt.UTC)
SCHEMA: Schema = {
    "model": AttributeType.KEYWORD,
    "model_year": AttributeType.INTEGER,
    "tags": AttributeType.KEYWORD_LIST,
    "published": AttributeType.DATETIME,
}
ROWS = [
    {"model": "Fenwick", "model_year": 2022, "published": "2021-09-01T09:00:00Z"},
    {"model": "Fenwick", "model_year": 2024, "published": "2023-09-04T09:00:00Z"},
    {"model": "Brisa", "model_year": 2024, "tags": ["battery"]},
]
HINTS = {"tags": AttributeHints(infer=False), "model": AttributeHints(description="Model name")}
QUESTION = "tyre pressure for the 2022 Fenwick"


def snapshot() -> IndexSnapshot:
    records = [
        ChunkRecord(
            chunk_id=f"d{row}#0000",
            document_id=f"d{row}",
            ordinal=0,
            title=f"Document {row}",
            section="",
            text="tyre pressure",
            char_start=0,
            char_end=13,
            tokens=2,
            lexical_tokens=["tyre", "pressur"],
            vector=np.eye(4, dtype=np.float32)[row],
            attributes={k: normalize_value(k, SCHEMA[k], v) for k, v in values.items()},
        )
        for row, values in enumerate(ROWS)
    ]
    return CollectionIndex.build(records, metric="cosine", dimension=4, schema=SCHEMA).snapshot()


SNAPSHOT = snapshot()


def reply(value: Any) -> Step:
    return Step(content=value if isinstance(value, str) else json.dumps(value))


def infer(endpoint: FakeEndpoint, *, explicit_attributes: frozenset[str] = frozenset()) -> Any:
    proposer = ChatFilterProposer(
        ChatEndpoint(endpoint.url, "tiny-chat", None, timeout_seconds=2.0, max_retries=0)
    )
    return infer_for_request(
        QUESTION,
        InferOptions(mode="apply", now=NOW, using="chat-http"),
        snapshot=SNAPSHOT,
        schema=SCHEMA,
        hints=HINTS,
        groups=None,
        explicit=None,
        explicit_attributes=explicit_attributes,
        proposer=proposer,
    )


YEAR_2022 = {"op": "=", "args": [{"property": "model_year"}, 2022]}
FENWICK = {"op": "=", "args": [{"property": "model"}, "Fenwick"]}


def test_a_valid_reply_is_checked_settled_and_used(endpoint: FakeEndpoint) -> None:
    endpoint.script.append(reply({"op": "and", "args": [FENWICK, YEAR_2022]}))
    inferred = infer(endpoint)
    assert inferred.using == "chat-http" and inferred.fallback is None
    shown = inferred.as_json()
    assert shown["cql2_text"] == "model = 'Fenwick' AND model_year = 2022"
    assert [(c["attribute"], c["op"], c["value"], c["source"]) for c in shown["clauses"]] == [
        ("model", "=", "Fenwick", "chat-http"),
        ("model_year", "=", 2022, "chat-http"),
    ]


def test_the_request_carries_the_schema_a_sample_of_values_now_and_the_fenced_question(
    endpoint: FakeEndpoint,
) -> None:
    endpoint.script.append(reply("null"))
    inferred = infer(endpoint)
    assert inferred.using == "chat-http" and inferred.as_json() is None
    _, body = endpoint.requests[0]
    system, user = body["messages"]
    assert system == {"role": "system", "content": FILTER_SYSTEM_PROMPT}
    listing = json.loads(user["content"].split("Attributes:\n", 1)[1].split("\n\nThe moment")[0])
    by_name = {entry["name"]: entry for entry in listing}
    assert set(by_name) == {"model", "model_year", "published"}  # tags: infer is false
    assert by_name["model"] == {
        "name": "model",
        "type": "keyword",
        "description": "Model name",
        "values": ["Brisa", "Fenwick"],
    }
    assert by_name["model_year"]["range"] == ["2022", "2024"]
    assert "2025-03-15T12:00:00Z" in user["content"]
    assert user["content"].endswith(f"```text\n{QUESTION}\n```")


def test_a_reply_in_a_code_fence_is_read(endpoint: FakeEndpoint) -> None:
    endpoint.script.append(reply(f"Here it is:\n```json\n{json.dumps(YEAR_2022)}\n```"))
    assert infer(endpoint).as_json()["cql2_text"] == "model_year = 2022"


@pytest.mark.parametrize(
    ("content", "why"),
    [
        ("model_year = 2022", "not JSON"),
        (json.dumps([YEAR_2022]), "not a cql2-json object"),
        (json.dumps({"op": "=", "args": [{"property": "colour"}, "red"]}), "no attribute"),
        (json.dumps({"op": "=", "args": [{"property": "model_year"}, "2022"]}), "cannot compare"),
        (json.dumps({"op": "frobnicate", "args": []}), "frobnicate"),
    ],
)
def test_an_unusable_reply_falls_back_to_the_deterministic_inference_and_says_why(
    endpoint: FakeEndpoint, content: str, why: str
) -> None:
    endpoint.script.append(reply(content))
    inferred = infer(endpoint)
    assert inferred.using == "deterministic"
    assert "reply was not a usable filter" in inferred.fallback
    assert why in inferred.fallback
    shown = inferred.as_json()
    assert shown["cql2_text"] == "model_year = 2022 AND model = 'Fenwick'"
    assert shown["fallback"] == inferred.fallback


def test_a_failing_endpoint_falls_back_too(endpoint: FakeEndpoint) -> None:
    endpoint.script.append(Step(status=500))
    inferred = infer(endpoint)
    assert inferred.using == "deterministic"
    assert inferred.fallback.startswith("the chat endpoint failed")
    assert inferred.as_json()["cql2_text"] == "model_year = 2022 AND model = 'Fenwick'"


def test_a_proposed_clause_is_settled_like_the_engines(endpoint: FakeEndpoint) -> None:
    brisa_2022 = {"op": "=", "args": [{"property": "model"}, "Brisa"]}
    tagged = {"op": "a_contains", "args": [{"property": "tags"}, ["battery"]]}
    endpoint.script.append(reply({"op": "and", "args": [YEAR_2022, brisa_2022, tagged]}))
    inferred = infer(endpoint, explicit_attributes=frozenset({"model_year"}))
    shown = inferred.as_json()
    assert inferred.using == "chat-http"
    assert shown["cql2_text"] == "model = 'Brisa'"
    reasons = {d["clause"]["attribute"]: d["reason"] for d in shown["dropped"]}
    assert "request's own filter" in reasons["model_year"]
    assert reasons["tags"] == "the collection's hints exclude tags from inference"


def test_the_api_uses_the_configured_endpoint_and_the_trace_says_when_it_fell_back(
    endpoint: FakeEndpoint, make_runtime: Callable[..., Runtime]
) -> None:
    runtime = make_runtime(chat_url=endpoint.url, chat_model="tiny-chat", chat_max_retries=0)
    with TestClient(create_app(runtime)) as client:
        api = Api(client, make_key(runtime, "admin", name="admin"))
        schema = {"attributes": {"model": {"type": "keyword"}, "model_year": {"type": "integer"}}}
        assert api.put("/v1/collections/bikes", json=schema).status_code == 201
        documents = [
            {"id": f"fenwick-{year}", "text": "tyre pressure", "attributes": row}
            for year, row in (
                (2022, {"model": "Fenwick", "model_year": 2022}),
                (2024, {"model": "Fenwick", "model_year": 2024}),
            )
        ]
        response = api.post("/v1/collections/bikes/documents", json={"documents": documents})
        assert response.status_code == 200, response.text
        using_chat = {"mode": "apply", "using": "chat-http", "now": "2025-03-15T12:00:00Z"}

        endpoint.script.append(reply(YEAR_2022))
        body = api.post(
            "/v1/collections/bikes/search", json={"query": QUESTION, "infer_filter": using_chat}
        ).json()
        assert body["inferred_filter"]["using"] == "chat-http"
        assert {hit["document_id"] for hit in body["hits"]} == {"fenwick-2022"}

        endpoint.script.append(reply("I think you mean the 2022 model."))
        body = api.post(
            "/v1/collections/bikes/search", json={"query": QUESTION, "infer_filter": using_chat}
        ).json()
        inferred = body["inferred_filter"]
        assert inferred["using"] == "deterministic"
        assert inferred["cql2_text"] == "model_year = 2022 AND model = 'Fenwick'"
        trace = api.get(f"/v1/traces/{body['trace_id']}").json()
        (stage,) = [s for s in trace["stages"] if s["stage"] == "filter"]
        assert stage["inference_using"] == "deterministic"
        assert "reply was not a usable filter" in stage["inference_fallback"]
        assert "deterministic inference was used instead" in stage["inference_fallback"]
