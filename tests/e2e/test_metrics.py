"""``GET /metrics``: the Prometheus text format, read back with prometheus_client's own parser
(the reference reader of the format), and counts that move by exactly the traffic sent."""

from __future__ import annotations

from collections import Counter
from collections.abc import Callable
from typing import Any

import pytest
from fastapi.testclient import TestClient
from prometheus_client.parser import text_string_to_metric_families

from service.api.app import create_app
from service.usecases.runtime import Runtime
from tests.api_helpers import BIKE_SCHEMA, Api, make_key

Samples = dict[tuple[str, frozenset[tuple[str, str]]], float]
SEARCH = "/v1/collections/{name}/search"
CONTEXT = "/v1/collections/{name}/context"
ANSWER = "/v1/collections/{name}/answer"
DOCUMENTS = [
    {
        "id": "ridge-2023-manual",
        "title": "Ridge 2023 owner's manual",
        "text": "Brakes\n\nBleed the rear brake every two years. Check the pads monthly.\n\n"
        "Frame\n\nThe frame carries a warranty of ten years against cracks at the welds.",
        "attributes": {"model": "Ridge", "model_year": 2023},
    },
    {
        "id": "tarn-2021-bulletin",
        "title": "Tarn 2021 service bulletin",
        "text": "Replace the chain when it has stretched by half a percent. "
        "Clean and oil the chain after riding in rain.",
        "attributes": {"model": "Tarn", "model_year": 2021},
    },
]


def scrape(client: TestClient, **headers: str) -> Samples:
    response = client.get("/metrics", headers=headers)
    assert response.status_code == 200, response.text
    assert response.headers["content-type"].startswith("text/plain")
    samples: Samples = {}
    for family in text_string_to_metric_families(response.text):
        for sample in family.samples:
            samples[(sample.name, frozenset(sample.labels.items()))] = sample.value
    return samples


def value(samples: Samples, name: str, **labels: str) -> float:
    return samples.get((name, frozenset(labels.items())), 0.0)


def moved(before: Samples, after: Samples, name: str, **labels: str) -> float:
    return value(after, name, **labels) - value(before, name, **labels)


@pytest.fixture
def stocked(bikes: Api) -> Api:
    response = bikes.post("/v1/collections/bikes/documents", json={"documents": DOCUMENTS})
    assert response.status_code == 200, response.text
    return bikes


def test_the_exposition_parses_and_names_every_family(stocked: Api) -> None:
    response = stocked.client.get("/metrics")
    families = {
        family.name: family.type
        for family in text_string_to_metric_families(response.text)
        # The library's companion series: when each counter and histogram began.
        if not family.name.endswith("_created")
    }
    assert families == {
        "excerpta_http_requests": "counter",
        "excerpta_http_request_duration_seconds": "histogram",
        "excerpta_query_stage_duration_seconds": "histogram",
        "excerpta_query_candidates": "histogram",
        "excerpta_query_hits": "histogram",
        "excerpta_answers": "counter",
        "excerpta_ingested_documents": "counter",
        "excerpta_ingested_chunks": "counter",
        "excerpta_embedding_duration_seconds": "histogram",
        "excerpta_embedded_texts": "counter",
        "excerpta_index_rows": "gauge",
        "excerpta_index_documents": "gauge",
        "excerpta_index_array_bytes": "gauge",
        "excerpta_trace_writer_waiting": "gauge",
        "excerpta_trace_writer_dropped": "counter",
        "excerpta_store_errors": "counter",
        "excerpta_index_starts": "counter",
        "excerpta_index_saves": "counter",
    }


def test_queries_move_the_request_stage_candidate_hit_and_answer_counts_by_exactly_that(
    stocked: Api,
) -> None:
    client = stocked.client
    before = scrape(client)
    bodies: dict[str, list[dict[str, Any]]] = {"search": [], "context": [], "answer": []}
    app: Any = client.app
    dimensions = app.state.runtime.embedder.dimensions
    own_vector = [1.0] + [0.0] * (dimensions - 1)
    sent = [
        ("search", {"query": "rear brake"}),
        ("search", {"query": "chain", "mode": "lexical"}),
        ("search", {"query": "frame warranty", "mode": "semantic", "top_k": 1}),
        ("search", {"query": "frame", "mode": "semantic", "query_vector": own_vector}),
        ("context", {"query": "chain oil", "token_budget": 60}),
        ("answer", {"query": "how often do I bleed the rear brake"}),
        # No chunk passes the filter: declined with no_candidates.
        ("answer", {"query": "brake", "filter": "model = 'Nowhere'"}),
    ]
    for route, body in sent:
        response = stocked.post(f"/v1/collections/bikes/{route}", json=body)
        assert response.status_code == 200, response.text
        bodies[route].append(response.json())
    refused = stocked.post("/v1/collections/bikes/search", json={"query": "x", "filter": "(("})
    assert refused.status_code == 400
    assert client.get("/v1/no-such-route").status_code == 404
    after = scrape(client)

    def requests(route: str, status: str, method: str = "POST") -> float:
        return moved(
            before, after, "excerpta_http_requests_total", route=route, method=method, status=status
        )

    assert requests(SEARCH, "200") == 4
    assert requests(SEARCH, "400") == 1
    assert requests(CONTEXT, "200") == 1
    assert requests(ANSWER, "200") == 2
    assert requests("unmatched", "404", "GET") == 1
    # The scrape that took ``before`` is counted by the time ``after`` is taken.
    assert requests("/metrics", "200", "GET") == 1
    for route, count in ((SEARCH, 5), (CONTEXT, 1), (ANSWER, 2)):
        name = "excerpta_http_request_duration_seconds_count"
        assert moved(before, after, name, route=route, method="POST") == count

    # Each stage of each query's trace is one observation of that stage.
    stages: Counter[tuple[str, str]] = Counter()
    for route, responses in bodies.items():
        for body in responses:
            trace = stocked.get(f"/v1/traces/{body['trace_id']}")
            assert trace.status_code == 200, trace.text
            stages.update((route, stage["stage"]) for stage in trace.json()["stages"])
    assert {stage for _, stage in stages} >= {"filter", "lexical", "semantic", "fusion"}
    for (route, stage), count in stages.items():
        name = "excerpta_query_stage_duration_seconds_count"
        assert moved(before, after, name, route=route, stage=stage) == count, (route, stage)

    searches = bodies["search"]
    assert moved(before, after, "excerpta_query_candidates_count", route="search") == 4
    assert moved(before, after, "excerpta_query_candidates_sum", route="search") == sum(
        body["candidates"] for body in searches
    )
    assert moved(before, after, "excerpta_query_hits_count", route="search") == 4
    assert moved(before, after, "excerpta_query_hits_sum", route="search") == sum(
        len(body["hits"]) for body in searches
    )
    assert moved(before, after, "excerpta_query_candidates_count", route="context") == 1
    assert moved(before, after, "excerpta_query_candidates_count", route="answer") == 2
    assert moved(before, after, "excerpta_query_candidates_sum", route="answer") >= 1

    answered = [body for body in bodies["answer"] if body["answer"] is not None]
    declined = Counter(body["reason"] for body in bodies["answer"] if body["answer"] is None)
    assert declined["no_candidates"] == 1
    assert moved(before, after, "excerpta_answers_total", outcome="answered", reason="") == len(
        answered
    )
    for reason, count in declined.items():
        assert (
            moved(before, after, "excerpta_answers_total", outcome="declined", reason=reason)
            == count
        )
    # Every query embeds its question once, but the lexical one and the one that brought its own
    # vector (the refused one never runs).
    assert moved(before, after, "excerpta_embedded_texts_total", purpose="query") == 5
    assert moved(before, after, "excerpta_embedding_duration_seconds_count", purpose="query") == 5


def test_writes_move_the_ingestion_counts_and_the_index_gauges_follow_the_collection(
    bikes: Api,
) -> None:
    client = bikes.client
    before = scrape(client)
    first = bikes.post("/v1/collections/bikes/documents", json={"documents": DOCUMENTS})
    assert first.status_code == 200, first.text
    again = bikes.post("/v1/collections/bikes/documents", json={"documents": DOCUMENTS})
    assert again.status_code == 200, again.text
    after = scrape(client)
    results = first.json()["results"] + again.json()["results"]
    statuses = Counter(r["status"] for r in results)
    assert statuses == {"created": 2, "unchanged": 2}
    for status, count in statuses.items():
        assert moved(before, after, "excerpta_ingested_documents_total", status=status) == count
    chunks = sum(r["chunks"] for r in first.json()["results"])
    assert moved(before, after, "excerpta_ingested_chunks_total") == chunks
    # One model call for the first batch (the second is unchanged), one text per new chunk.
    name = "excerpta_embedding_duration_seconds_count"
    assert moved(before, after, name, purpose="documents") == 1
    assert moved(before, after, "excerpta_embedded_texts_total", purpose="documents") == chunks

    # The index is read at scrape time: a query loads it, and the gauges show what it holds.
    assert bikes.post("/v1/collections/bikes/search", json={"query": "chain"}).status_code == 200
    collection = bikes.get("/v1/collections/bikes").json()
    deleted = bikes.delete("/v1/collections/bikes/documents/tarn-2021-bulletin")
    assert deleted.status_code in (200, 204), deleted.text
    assert bikes.post("/v1/collections/bikes/search", json={"query": "chain"}).status_code == 200
    later = scrape(client)
    tarn_chunks = next(r["chunks"] for r in first.json()["results"] if r["id"].startswith("tarn"))
    live = value(later, "excerpta_index_rows", collection="bikes", state="live")
    assert live == collection["chunks"] - tarn_chunks
    assert value(later, "excerpta_index_rows", collection="bikes", state="tombstoned") == (
        tarn_chunks
    )
    assert value(later, "excerpta_index_documents", collection="bikes") == 1
    for part in ("lexical", "vectors", "rows"):
        assert value(later, "excerpta_index_array_bytes", collection="bikes", part=part) > 0
    assert value(later, "excerpta_trace_writer_dropped_total") == 0


def test_two_apps_in_one_process_keep_their_own_counts(
    make_runtime: Callable[..., Runtime], tmp_path: Any
) -> None:
    first = make_runtime(data_dir=tmp_path / "one")
    second = make_runtime(data_dir=tmp_path / "two")
    with TestClient(create_app(first)) as one, TestClient(create_app(second)) as two:
        for _ in range(3):
            assert one.get("/healthz").status_code == 200
        name = "excerpta_http_requests_total"
        labels = {"route": "/healthz", "method": "GET", "status": "200"}
        assert value(scrape(one), name, **labels) == 3
        assert value(scrape(two), name, **labels) == 0


def test_a_metrics_key_in_the_settings_is_required_as_a_bearer_key(
    make_runtime: Callable[..., Runtime],
) -> None:
    runtime = make_runtime(metrics_key="scrape-only-secret")
    api_key = make_key(runtime, "admin", name="admin")
    with TestClient(create_app(runtime)) as client:
        for headers in ({}, {"Authorization": f"Bearer {api_key}"}, {"Authorization": "Bearer x"}):
            refused = client.get("/metrics", headers=headers)
            assert refused.status_code == 401, refused.text
            assert refused.json()["error"]["code"] == "unauthenticated"
        samples = scrape(client, Authorization="Bearer scrape-only-secret")
        labels = {"route": "/metrics", "method": "GET", "status": "401"}
        assert value(samples, "excerpta_http_requests_total", **labels) == 3
        # The API keys go on working on /v1 beside it.
        put = client.put(
            "/v1/collections/bikes",
            json=BIKE_SCHEMA,
            headers={"Authorization": f"Bearer {api_key}"},
        )
        assert put.status_code == 201, put.text


def test_an_empty_metrics_key_setting_asks_for_no_key(
    make_runtime: Callable[..., Runtime],
) -> None:
    with TestClient(create_app(make_runtime(metrics_key=""))) as client:
        # ``scrape`` sends no Authorization header and requires a 200.
        assert scrape(client)
