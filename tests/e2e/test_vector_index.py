"""A collection's vector index setting through the API: stored, shown, checked, and used by
semantic search, whose trace names the plan it followed."""

from __future__ import annotations

from typing import Any

from service.usecases.runtime import Runtime
from tests.api_helpers import Api

GRAPH = {"index": "graph", "graph": {"links": 8, "build_breadth": 32, "search_breadth": 32}}
DEFAULT_GRAPH = {
    "links": 32,
    "build_breadth": 100,
    "search_breadth": 128,
    "max_search_breadth": 4096,
}


def _documents(count: int) -> dict[str, Any]:
    words = ["brake", "chain", "saddle", "tyre", "gear", "frame", "light", "pedal"]
    return {
        "documents": [
            {
                "id": f"note-{number}",
                "title": f"Workshop note {number}",
                "text": " ".join(words[(number + k) % len(words)] for k in range(6)),
            }
            for number in range(count)
        ]
    }


def test_a_new_collection_shows_the_default_vector_index(api: Api) -> None:
    response = api.put("/v1/collections/notes", json={})
    assert response.status_code == 201, response.text
    assert response.json()["vectors"] == {"index": "auto", "graph": DEFAULT_GRAPH}


def test_a_graph_collection_is_searched_through_its_graph_and_the_trace_says_so(
    api: Api, api_runtime: Runtime
) -> None:
    response = api.put("/v1/collections/notes", json={"vectors": GRAPH})
    assert response.status_code == 201, response.text
    assert response.json()["vectors"]["graph"] == {**DEFAULT_GRAPH, **GRAPH["graph"]}
    written = api.post("/v1/collections/notes/documents", json=_documents(40))
    assert written.status_code == 200, written.text
    api_runtime.indexes.view("notes")
    api_runtime.indexes.maintain()
    assert api_runtime.indexes.view("notes").snapshot.graph is not None

    found = api.post(
        "/v1/collections/notes/search", json={"query": "brake chain", "mode": "semantic"}
    )
    assert found.status_code == 200, found.text
    assert len(found.json()["hits"]) == 10
    trace = api.get(f"/v1/traces/{found.json()['trace_id']}").json()
    semantic = next(stage for stage in trace["stages"] if stage["stage"] == "semantic")
    assert semantic["plan"]["planned"] == "graph"
    assert semantic["plan"]["method"] == "graph"
    assert semantic["plan"]["fallback"] is None
    assert semantic["plan"]["actual_work"] > 0

    shown = api.get("/v1/collections/notes").json()
    assert shown["vectors"]["index"] == "graph"


def test_an_exact_collection_drops_its_graph_and_scans(api: Api, api_runtime: Runtime) -> None:
    assert api.put("/v1/collections/notes", json={"vectors": GRAPH}).status_code == 201
    assert api.post("/v1/collections/notes/documents", json=_documents(30)).status_code == 200
    api_runtime.indexes.view("notes")
    api_runtime.indexes.maintain()
    changed = api.put("/v1/collections/notes", json={"vectors": {"index": "exact"}})
    assert changed.status_code == 200, changed.text
    # A changed vector setting rebuilds the index, which has no graph until one is wanted.
    api_runtime.indexes.maintain()
    assert api_runtime.indexes.view("notes").snapshot.graph is None
    found = api.post("/v1/collections/notes/search", json={"query": "gear", "mode": "semantic"})
    trace = api.get(f"/v1/traces/{found.json()['trace_id']}").json()
    semantic = next(stage for stage in trace["stages"] if stage["stage"] == "semantic")
    assert semantic["plan"]["method"] == "scan"


def test_bad_vector_settings_are_refused_naming_the_field(api: Api) -> None:
    cases = [
        ({"index": "fastest"}, "vectors.index"),
        ({"graph": {"links": 1}}, "vectors.graph.links"),
        ({"graph": {"search_breadth": 5000, "max_search_breadth": 4096}}, "vectors.graph"),
        ({"graph": {"bogus": 3}}, "vectors.graph.bogus"),
    ]
    for vectors, field in cases:
        response = api.put("/v1/collections/notes", json={"vectors": vectors})
        assert response.status_code == 422, response.text
        error = response.json()["error"]
        assert error["code"] == "invalid_request"
        assert error["field"].startswith(field)
