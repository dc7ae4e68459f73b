"""The HTTP evaluation backend against a fake server (httpx's mock transport): what it sends,
how it pages, and how a refusal reads."""

from __future__ import annotations

import json
from typing import Any

import httpx
import pytest

from service.evaluation.answers import CitedPlace, ObservedAnswer
from service.evaluation.backends import DocumentRanking, documents_from_hits
from service.evaluation.http_backend import HttpAnswers, HttpBackend
from service.server_client import ServerRefused

COLLECTION_VIEW = {
    "retrieval": {"bm25": "smoothed", "k1": 1.2, "b": 0.75, "metric": "cosine"},
    "chunking": {"max_tokens": 200, "overlap_tokens": 40},
    "embedder": "minilm",
    "tokenizer": "wordpiece",
}


INFERRED = {
    "cql2_text": "model_year = 2022",
    "cql2_json": {"op": "=", "args": [{"property": "model_year"}, 2022]},
    "clauses": [],
    "dropped": [],
    "using": "deterministic",
}


class FakeServer:
    def __init__(self, hits: list[tuple[str, float]], document_ids: list[str]) -> None:
        self.hits = hits
        self.document_ids = document_ids
        self.requests: list[httpx.Request] = []

    def __call__(self, request: httpx.Request) -> httpx.Response:
        self.requests.append(request)
        path = request.url.path
        if path == "/v1/collections/bikes/search":
            body = json.loads(request.content)
            hits = [{"document_id": d, "score": s} for d, s in self.hits[: body["top_k"]]]
            inferred = INFERRED if body.get("infer_filter") else None
            return httpx.Response(
                200,
                json={"hits": hits, "candidates": len(self.hits), "inferred_filter": inferred},
            )
        if path == "/v1/collections/bikes/documents":
            after = request.url.params.get("after")
            rest = [d for d in self.document_ids if after is None or d > after]
            page = rest[:2]
            more = len(rest) > 2
            return httpx.Response(
                200,
                json={
                    "documents": [{"id": d} for d in page],
                    "next_after": page[-1] if more else None,
                },
            )
        if path == "/v1/collections/bikes":
            return httpx.Response(200, json=COLLECTION_VIEW)
        return httpx.Response(
            404, json={"error": {"code": "collection_not_found", "message": "Nope."}}
        )


def backend(server: Any, collection: str = "bikes") -> HttpBackend:
    return HttpBackend(
        "http://excerpta.test/", "xk_test", collection, transport=httpx.MockTransport(server)
    )


def test_documents_take_the_place_and_score_of_their_best_chunk() -> None:
    hits = [("a", 0.9), ("b", 0.8), ("a", 0.7), ("c", 0.6)]
    assert documents_from_hits(hits, 10) == [("a", 0.9), ("b", 0.8), ("c", 0.6)]
    assert documents_from_hits(hits, 2) == [("a", 0.9), ("b", 0.8)]


def test_a_ranking_asks_for_more_chunks_until_enough_documents_or_none_left() -> None:
    asked: list[int] = []
    chunks = [(f"d{n // 3}", 1.0 - n / 100) for n in range(30)]  # three chunks per document

    def search(wanted: int) -> list[tuple[str, float]]:
        asked.append(wanted)
        return chunks[:wanted]

    assert len(DocumentRanking(search, chunk_limit=100).rank(4)) == 4
    assert asked == [8, 16]
    asked.clear()
    assert len(DocumentRanking(search, chunk_limit=100).rank(20)) == 10
    assert asked == [40]


def test_a_search_sends_the_systems_settings_and_the_key() -> None:
    server = FakeServer([("ridge", 0.5), ("haul", 0.25)], [])
    ranked = backend(server).rank_documents(
        "brake pads", mode="hybrid", filter="model = 'Ridge'", depth=2, settings={"rrf_k": 10}
    )
    assert ranked == [("ridge", 0.5), ("haul", 0.25)]
    request = server.requests[0]
    assert request.headers["authorization"] == "Bearer xk_test"
    assert json.loads(request.content) == {
        "query": "brake pads",
        "mode": "hybrid",
        "top_k": 4,
        "depth": 4,
        "rrf_k": 10,
        "filter": "model = 'Ridge'",
    }


def test_bm25_settings_cannot_vary_through_a_server() -> None:
    with pytest.raises(ValueError, match="--set k1 works only on the store directly"):
        backend(FakeServer([], [])).rank_documents(
            "q", mode="lexical", filter=None, depth=1, settings={"k1": 0.9}
        )


def test_the_documents_passing_a_filter_are_read_page_by_page() -> None:
    server = FakeServer([], ["a", "b", "c", "d", "e"])
    failing = backend(server).documents_failing_filter(
        {"op": "=", "args": [{"property": "model"}, "Ridge"]}, {"a", "e", "x"}
    )
    assert failing == {"x"}
    assert [r.url.params.get("after") for r in server.requests] == [None, "b", "d"]
    assert json.loads(server.requests[0].url.params["filter"])["op"] == "="


def test_the_settings_in_effect_combine_the_system_and_the_collection() -> None:
    described = backend(FakeServer([], [])).describe_settings({"rrf_k": 10})
    assert described == {
        "bm25": "smoothed",
        "k1": 1.2,
        "b": 0.75,
        "rrf_k": 10,
        "metric": "cosine",
        "chunking": {"max_tokens": 200, "overlap_tokens": 40},
        "embedder": "minilm",
        "tokenizer": "wordpiece",
    }


def test_a_refusal_names_the_request_and_the_servers_own_message() -> None:
    with pytest.raises(ServerRefused) as refused:
        backend(FakeServer([], []), collection="nowhere").describe_settings({})
    assert str(refused.value) == (
        "the server answered 404 to GET /v1/collections/nowhere (collection_not_found: Nope.)"
    )


def test_a_server_that_cannot_be_reached_is_reported_as_such() -> None:
    def unreachable(request: httpx.Request) -> httpx.Response:
        raise httpx.ConnectError("connection refused", request=request)

    with pytest.raises(ServerRefused, match=r"^cannot reach http://excerpta\.test: "):
        backend(unreachable).describe_settings({})


def test_an_inferred_filter_is_asked_for_with_the_request_field_and_read_back() -> None:
    server = FakeServer([("a", 0.9)], ["a", "b", "c"])
    http = backend(server)
    asked = {"mode": "suggest", "now": "2025-03-15T12:00:00Z"}
    assert http.inferred_filter("my 2022 bike", infer=asked, filter="region = 'EU'") == INFERRED
    sent = json.loads(server.requests[-1].content)
    assert sent["infer_filter"] == asked and sent["filter"] == "region = 'EU'"
    http.rank_documents(
        "my 2022 bike", mode="hybrid", filter=None, depth=1, settings={}, infer={"mode": "apply"}
    )
    assert json.loads(server.requests[-1].content)["infer_filter"] == {"mode": "apply"}
    assert http.documents_passing(None) == {"a", "b", "c"}


def test_answers_are_asked_of_the_answer_route_with_the_budget_and_filter() -> None:
    seen: list[dict[str, Any]] = []

    def server(request: httpx.Request) -> httpx.Response:
        assert request.url.path == "/v1/collections/bikes/answer"
        seen.append(json.loads(request.content))
        return httpx.Response(
            200,
            json={
                "answer": "Main pivot bolt: 18 Nm [1].",
                "citations": [{"document_id": "m22", "section": "Torque values"}],
                "passages": [],
            },
        )

    backend = HttpBackend("http://test", "key", "bikes", transport=httpx.MockTransport(server))
    answers = HttpAnswers(backend, token_budget=800, generator="extractive")
    observed = answers.answer("torque?", filter="model = 'X'")
    assert seen == [
        {
            "query": "torque?",
            "token_budget": 800,
            "filter": "model = 'X'",
            "generator": "extractive",
        }
    ]
    assert observed == ObservedAnswer(
        "Main pivot bolt: 18 Nm [1].", None, (CitedPlace("m22", "Torque values"),)
    )
