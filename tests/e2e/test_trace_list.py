"""GET /v1/traces: summaries newest first, paged by cursor, filtered, own traces or (admins)
all; a failed query keeps its trace and its error names it."""

from __future__ import annotations

import logging
from collections.abc import Callable, Iterator
from dataclasses import dataclass
from typing import Any

import pytest
from fastapi.testclient import TestClient

from service.api.app import create_app
from service.usecases.runtime import Runtime
from tests.api_helpers import BIKE_SCHEMA, Api, make_key

DOCUMENTS = [
    {"id": "alpha-brakes", "title": "Alpha brakes", "text": "Squeeze the brake levers daily.",
     "attributes": {"model": "Alpha", "model_year": 2022}},
    {"id": "bravo-chain", "title": "Bravo chain", "text": "Oil the chain and check the brake pads.",
     "attributes": {"model": "Bravo", "model_year": 2024}},
]  # fmt: skip


@dataclass
class Keys:
    runtime: Runtime
    admin: Api
    reader: Api
    other: Api


@pytest.fixture
def keys(make_runtime: Callable[..., Runtime]) -> Iterator[Keys]:
    runtime = make_runtime()
    with TestClient(create_app(runtime)) as client:
        admin = Api(client, make_key(runtime, "admin", name="admin"))
        for name in ("bikes", "trikes"):
            assert admin.put(f"/v1/collections/{name}", json=BIKE_SCHEMA).status_code == 201
            response = admin.post(
                f"/v1/collections/{name}/documents", json={"documents": DOCUMENTS}
            )
            assert response.status_code == 200, response.text
        yield Keys(
            runtime=runtime,
            admin=admin,
            reader=admin.as_key(make_key(runtime, "reader", name="reader")),
            other=admin.as_key(make_key(runtime, "reader", name="other")),
        )


def query(api: Api, route: str, text: str, collection: str = "bikes", **fields: Any) -> Any:
    response = api.post(f"/v1/collections/{collection}/{route}", json={"query": text, **fields})
    assert response.status_code == 200, response.text
    return response.json()


def listing(api: Api, **params: Any) -> dict[str, Any]:
    response = api.get("/v1/traces", params=params)
    assert response.status_code == 200, response.text
    body: dict[str, Any] = response.json()
    return body


def test_each_route_is_summarised_newest_first(keys: Keys) -> None:
    searched = query(keys.reader, "search", "brake levers", top_k=1)
    context = query(keys.reader, "context", "chain oil")
    answered = query(keys.reader, "answer", "how often to squeeze the brake levers")
    traces = listing(keys.reader)["traces"]
    assert [t["trace_id"] for t in traces] == [
        answered["trace_id"],
        context["trace_id"],
        searched["trace_id"],
    ]
    newest, middle, oldest = traces
    assert oldest["route"] == "search" and oldest["collection"] == "bikes"
    assert oldest["query"] == "brake levers" and oldest["outcome"] == "returned"
    assert oldest["candidates"] == searched["candidates"] == 2 and oldest["hits"] == 1
    assert middle["hits"] == sum(len(p["chunk_ids"]) for p in context["passages"])
    assert newest["outcome"] == ("declined" if answered["answer"] is None else "answered")
    assert newest["reason"] == answered.get("reason")
    assert all(t["milliseconds"] > 0 for t in traces)
    assert listing(keys.reader)["next_cursor"] is None


def test_pages_follow_the_cursor_without_repeating_or_skipping(keys: Keys) -> None:
    made = [query(keys.reader, "search", f"brake check {n}")["trace_id"] for n in range(5)]
    seen: list[str] = []
    cursor = None
    pages = 0
    while True:
        page = listing(keys.reader, limit=2, **({"cursor": cursor} if cursor else {}))
        seen += [t["trace_id"] for t in page["traces"]]
        pages += 1
        cursor = page["next_cursor"]
        if cursor is None:
            break
    assert seen == made[::-1]
    assert pages == 3


def test_filters_by_collection_route_and_time(keys: Keys) -> None:
    first = query(keys.reader, "search", "brakes")["trace_id"]
    second = query(keys.reader, "context", "brakes", collection="trikes")["trace_id"]
    third = query(keys.reader, "search", "chain", collection="trikes")["trace_id"]
    ids = lambda **p: [t["trace_id"] for t in listing(keys.reader, **p)["traces"]]  # noqa: E731
    assert ids(collection="trikes") == [third, second]
    assert ids(route="search") == [third, first]
    assert ids(collection="trikes", route="context") == [second]
    at = {t["trace_id"]: t["created_at"] for t in listing(keys.reader)["traces"]}
    assert ids(since=at[second]) == [third, second]
    assert ids(until=at[second]) == [first]
    assert ids(since=at[first], until=at[third]) == [second, first]


def test_a_reader_lists_its_own_traces_and_an_admin_everyones(keys: Keys) -> None:
    mine = query(keys.reader, "search", "brakes")["trace_id"]
    theirs = query(keys.other, "search", "chain")["trace_id"]
    admins = query(keys.admin, "search", "pads")["trace_id"]
    assert [t["trace_id"] for t in listing(keys.reader)["traces"]] == [mine]
    assert [t["trace_id"] for t in listing(keys.other)["traces"]] == [theirs]
    assert [t["trace_id"] for t in listing(keys.admin)["traces"]] == [admins, theirs, mine]
    # Reading one trace keeps its rule: another reader's is missing.
    missing = keys.other.get("/v1/traces/00000000-0000-4000-8000-000000000000")
    hidden = keys.other.get(f"/v1/traces/{mine}")
    assert hidden.status_code == missing.status_code == 404
    assert hidden.json()["error"]["code"] == "trace_not_found"


@pytest.mark.parametrize(
    ("params", "field"),
    [
        ({"limit": 0}, "limit"),
        ({"limit": 501}, "limit"),
        ({"limit": "many"}, "limit"),
        ({"route": "explain"}, "route"),
        ({"collection": "Not a name\u0000"}, "collection"),
        ({"since": "2026-01-01T00:00:00"}, "since"),
        ({"until": "yesterday"}, "until"),
        ({"cursor": "not-a-cursor"}, "cursor"),
        ({"cursor": "WyJ4Il0"}, "cursor"),
    ],
)
def test_a_bad_parameter_is_a_422_naming_it(keys: Keys, params: dict[str, Any], field: str) -> None:
    response = keys.reader.get("/v1/traces", params=params)
    assert response.status_code == 422, response.text
    error = response.json()["error"]
    assert error["code"] == "invalid_request" and error["field"] == field


def test_a_failed_query_keeps_its_trace_and_the_error_names_it(keys: Keys) -> None:
    response = keys.reader.post(
        "/v1/collections/bikes/search", json={"query": "brakes", "filter": "model = "}
    )
    assert response.status_code == 400
    error = response.json()["error"]
    assert error["code"] == "filter_syntax"
    trace = keys.reader.get(f"/v1/traces/{error['trace_id']}").json()
    assert trace["error"]["code"] == "filter_syntax"
    assert trace["request"]["filter"] == "model = "
    (summary,) = listing(keys.reader)["traces"]
    assert summary["trace_id"] == error["trace_id"]
    assert summary["outcome"] == "failed" and summary["reason"] == "filter_syntax"
    assert summary["candidates"] is None and summary["hits"] is None


def test_an_error_before_any_trace_carries_no_trace_id(keys: Keys) -> None:
    response = keys.reader.post("/v1/collections/bikes/search", json={"query": ""})
    assert response.status_code == 422
    assert "trace_id" not in response.json()["error"]
    assert listing(keys.reader)["traces"] == []


def test_the_access_log_names_the_trace_each_response_carries(
    keys: Keys, caplog: pytest.LogCaptureFixture
) -> None:
    with caplog.at_level(logging.INFO, logger="excerpta.access"):
        returned = query(keys.reader, "search", "brakes")["trace_id"]
        failed = keys.reader.post(
            "/v1/collections/bikes/search", json={"query": "brakes", "top_k": 100_000}
        ).json()["error"]["trace_id"]
        keys.reader.get("/v1/traces")
    records = [r for r in caplog.records if r.name == "excerpta.access"]
    assert [getattr(r, "trace_id", "absent") for r in records] == [returned, failed, None]
    assert [r.getMessage().rsplit(" ", 1)[-1] for r in records] == [returned, failed, "-"]


@pytest.mark.parametrize(
    "filter_value",
    [
        "model_year = 100000000000000000000000",
        {"op": "=", "args": [{"property": "model_year"}, 2**70]},
    ],
)
def test_a_query_holding_an_integer_beyond_64_bits_keeps_its_trace(
    keys: Keys, filter_value: Any
) -> None:
    response = keys.reader.post(
        "/v1/collections/bikes/search", json={"query": "brakes", "filter": filter_value}
    )
    body = response.json()
    trace_id = body["trace_id"] if response.status_code == 200 else body["error"]["trace_id"]
    keys.runtime.traces.stop()  # writes every held trace
    assert keys.runtime.traces.waiting() == 0
    trace = keys.reader.get(f"/v1/traces/{trace_id}").json()
    assert trace["request"]["filter"] == filter_value
