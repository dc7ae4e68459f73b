"""Access and tenancy over every route: a key sees, counts and touches only what it may.

The collection holds documents readable by group A, by group B, by both and by everyone. The
B-only document carries marker strings (its id, a word in its title, a word in its text) that no
request here ever sends, so finding one anywhere in a response body means it leaked.
"""

from __future__ import annotations

from collections.abc import Callable, Iterator
from dataclasses import dataclass
from typing import Any

import pytest
from fastapi.testclient import TestClient
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from service.api.app import create_app
from service.store.db import unit_of_work
from service.usecases import keys
from service.usecases.runtime import Runtime
from tests.api_helpers import BIKE_SCHEMA, Api, make_key

B_ONLY_ID = "bravo-secret"
B_MARKERS = (B_ONLY_ID, "quillfeather", "quokkablue")
MODES = ("hybrid", "lexical", "semantic")

DOCUMENTS: list[dict[str, Any]] = [
    {
        "id": "alpha-manual",
        "title": "Alpha brake guide",
        "text": "Brakes: squeeze both levers before every ride and check the brake pads weekly.",
        "attributes": {"model": "Alpha", "model_year": 2022, "price": 120.0, "tags": ["brakes"]},
        "access": ["group-a"],
    },
    {
        "id": "shared-notes",
        "title": "Shared tyre notes",
        "text": "Tyres: run 2.1 bar on the road. Brakes need new pads after a wet winter.",
        "attributes": {"model": "Common", "model_year": 2023, "price": 40.5, "tags": ["tyres"]},
    },
    {
        "id": "joint-bulletin",
        "title": "Joint chain bulletin",
        "text": "Chains: oil the chain monthly; a worn chain wears the brake rotor too.",
        "attributes": {"model": "Alpha", "model_year": 2024, "tags": ["chain"]},
        "access": ["group-a", "group-b"],
    },
    {
        "id": B_ONLY_ID,
        "title": "Quillfeather recall memo",
        "text": (
            "Brakes recall: the quokkablue xylofrost lever replaces every brake pad and "
            "brake cable on the frame; brakes brakes brakes."
        ),
        "attributes": {
            "model": "Bravo",
            "model_year": 2024,
            "price": 999.0,
            "tags": ["brakes", "recall"],
            "discontinued": True,
        },
        "access": ["group-b"],
    },
]
VISIBLE_TO_A = {"alpha-manual", "shared-notes", "joint-bulletin"}


@dataclass
class World:
    runtime: Runtime
    admin: Api
    reader_a: Api
    writer_a: Api
    writer_one: Api
    other_reader: Api


@pytest.fixture
def world(make_runtime: Callable[..., Runtime]) -> Iterator[World]:
    runtime = make_runtime()
    with TestClient(create_app(runtime)) as client:
        admin = Api(client, make_key(runtime, "admin", name="admin"))
        for name in ("bikes", "one"):
            assert admin.put(f"/v1/collections/{name}", json=BIKE_SCHEMA).status_code == 201
        response = admin.post("/v1/collections/bikes/documents", json={"documents": DOCUMENTS})
        assert response.status_code == 200, response.text
        one_doc = {"id": "one-doc", "text": "A document in collection one about brakes."}
        assert admin.post("/v1/collections/one/documents", json={"documents": [one_doc]}).is_success
        yield World(
            runtime=runtime,
            admin=admin,
            reader_a=admin.as_key(make_key(runtime, "reader", groups=["group-a"], name="ra")),
            writer_a=admin.as_key(make_key(runtime, "writer", groups=["group-a"], name="wa")),
            writer_one=admin.as_key(
                make_key(runtime, "writer", groups=["group-b"], collections=["one"], name="w1")
            ),
            other_reader=admin.as_key(make_key(runtime, "reader", groups=["group-a"], name="rb")),
        )


def assert_no_b_only_content(response: Any) -> None:
    body = response.text.lower()
    for marker in B_MARKERS:
        assert marker not in body, f"{marker!r} leaked in {response.request.url}: {body[:400]}"


def returned_document_ids(route: str, body: dict[str, Any]) -> set[str]:
    if route == "search":
        return {hit["document_id"] for hit in body["hits"]}
    items = body["passages"] + body.get("citations", [])
    return {item["document_id"] for item in items}


def retrieval_body(route: str, query: str, mode: str, filter_text: str | None) -> dict[str, Any]:
    body: dict[str, Any] = {"query": query, "mode": mode, "top_k": 10}
    if filter_text is not None:
        body["filter"] = filter_text
    if route != "search":
        body["token_budget"] = 400
    return body


def test_the_admin_sees_the_b_only_document_so_the_markers_are_meaningful(world: World) -> None:
    response = world.admin.post(
        "/v1/collections/bikes/search", json={"query": "brakes quokkablue", "mode": "lexical"}
    )
    assert B_ONLY_ID in {hit["document_id"] for hit in response.json()["hits"]}
    assert "quokkablue" in response.text.lower()


@pytest.mark.parametrize("route", ["search", "context", "answer"])
@pytest.mark.parametrize("mode", MODES)
def test_reader_of_group_a_never_receives_a_b_only_chunk(
    world: World, route: str, mode: str
) -> None:
    body = retrieval_body(route, "brake pad recall xylofrost lever cable", mode, None)
    response = world.reader_a.post(f"/v1/collections/bikes/{route}", json=body)
    assert response.status_code == 200, response.text
    assert_no_b_only_content(response)
    returned = returned_document_ids(route, response.json())
    assert returned and returned <= VISIBLE_TO_A

    trace = world.reader_a.get(f"/v1/traces/{response.json()['trace_id']}")
    assert trace.status_code == 200
    assert_no_b_only_content(trace)


def test_a_query_vector_equal_to_the_hidden_chunk_still_finds_only_visible_ones(
    world: World,
) -> None:
    hidden_text = next(d for d in DOCUMENTS if d["id"] == B_ONLY_ID)["text"]
    vector = world.runtime.embedder.embed_query(hidden_text).tolist()
    response = world.reader_a.post(
        "/v1/collections/bikes/search",
        json={"query": "lever", "query_vector": vector, "mode": "semantic", "top_k": 50},
    )
    assert response.status_code == 200
    assert_no_b_only_content(response)
    assert response.json()["candidates"] == 3


def test_candidates_count_only_the_chunks_the_caller_may_see(world: World) -> None:
    body = {"query": "brakes", "filter": "model_year = 2024", "mode": "lexical"}
    as_reader = world.reader_a.post("/v1/collections/bikes/search", json=body).json()
    as_admin = world.admin.post("/v1/collections/bikes/search", json=body).json()
    assert as_reader["candidates"] == 1
    assert as_admin["candidates"] == 2


def test_a_filter_that_only_the_hidden_document_matches_answers_no_candidates(
    world: World,
) -> None:
    body = retrieval_body("answer", "brake recall", "hybrid", "model = 'Bravo'")
    response = world.reader_a.post("/v1/collections/bikes/answer", json=body)
    assert response.status_code == 200
    assert response.json()["answer"] is None
    assert response.json()["reason"] == "no_candidates"
    assert_no_b_only_content(response)


def test_the_trace_of_a_reader_reports_no_count_of_hidden_chunks(world: World) -> None:
    response = world.reader_a.post(
        "/v1/collections/bikes/search", json={"query": "brakes", "mode": "lexical"}
    )
    trace = world.reader_a.get(f"/v1/traces/{response.json()['trace_id']}").json()
    visible_chunks = world.reader_a.get("/v1/collections/bikes").json()["chunks"]
    for stage in trace["stages"]:
        numbers = [v for v in stage.get("counts", {}).values() if isinstance(v, int)]
        numbers += [v for k, v in stage.items() if k in ("rows", "candidates")]
        assert all(n <= visible_chunks for n in numbers), stage


def test_an_admin_reads_how_many_chunks_a_readers_query_did_not_see(world: World) -> None:
    response = world.reader_a.post(
        "/v1/collections/bikes/search", json={"query": "brakes", "mode": "lexical"}
    )
    trace_path = f"/v1/traces/{response.json()['trace_id']}"
    as_reader = world.reader_a.get(trace_path).json()["stages"][0]
    as_admin = world.admin.get(trace_path).json()["stages"][0]
    all_chunks = world.admin.get("/v1/collections/bikes").json()["chunks"]
    visible_chunks = world.reader_a.get("/v1/collections/bikes").json()["chunks"]
    assert as_reader["stage"] == as_admin["stage"] == "filter"
    assert "chunks" not in as_reader["counts"]
    assert as_reader["counts"]["rows"] == as_admin["counts"]["rows"] == visible_chunks
    assert as_admin["counts"]["chunks"] == all_chunks > visible_chunks


def test_hidden_document_is_reported_exactly_like_a_missing_one(world: World) -> None:
    hidden = world.reader_a.get(f"/v1/collections/bikes/documents/{B_ONLY_ID}")
    missing = world.reader_a.get("/v1/collections/bikes/documents/no-such-doc")
    assert hidden.status_code == missing.status_code == 404
    assert hidden.json() == {
        "error": {
            **missing.json()["error"],
            "message": missing.json()["error"]["message"].replace("no-such-doc", B_ONLY_ID),
        }
    }
    assert dict(hidden.headers) | {"content-length": ""} == dict(missing.headers) | {
        "content-length": ""
    }


def test_writer_of_group_a_cannot_delete_a_hidden_document(world: World) -> None:
    hidden = world.writer_a.delete(f"/v1/collections/bikes/documents/{B_ONLY_ID}")
    missing = world.writer_a.delete("/v1/collections/bikes/documents/no-such-doc")
    assert hidden.status_code == missing.status_code == 404
    assert hidden.json()["error"]["code"] == missing.json()["error"]["code"]
    assert world.admin.get(f"/v1/collections/bikes/documents/{B_ONLY_ID}").status_code == 200


def test_delete_by_filter_removes_only_what_the_writer_sees(world: World) -> None:
    response = world.writer_a.delete(
        "/v1/collections/bikes/documents", params={"filter": "model_year >= 2024"}
    )
    assert response.status_code == 200
    assert response.json() == {"deleted": 1}
    assert world.admin.get(f"/v1/collections/bikes/documents/{B_ONLY_ID}").status_code == 200
    gone = world.admin.get("/v1/collections/bikes/documents/joint-bulletin")
    assert gone.status_code == 404


@pytest.mark.parametrize("filter_text", [None, "model = 'Bravo'", "model_year >= 2020"])
def test_document_listing_shows_and_counts_only_visible_documents(
    world: World, filter_text: str | None
) -> None:
    params = {} if filter_text is None else {"filter": filter_text}
    response = world.reader_a.get("/v1/collections/bikes/documents", params=params)
    assert response.status_code == 200
    assert_no_b_only_content(response)
    listed = {d["id"] for d in response.json()["documents"]}
    assert listed <= VISIBLE_TO_A
    assert response.json()["total"] == len(listed)


def test_listing_pages_after_a_hidden_id_reveal_nothing_of_it(world: World) -> None:
    response = world.reader_a.get(
        "/v1/collections/bikes/documents", params={"after": "bravo", "limit": 1}
    )
    assert response.status_code == 200
    assert_no_b_only_content(response)


def test_collection_counts_count_only_what_the_caller_sees(world: World) -> None:
    as_reader = world.reader_a.get("/v1/collections/bikes").json()
    as_admin = world.admin.get("/v1/collections/bikes").json()
    assert as_reader["documents"] == 3
    assert as_admin["documents"] == 4
    assert as_reader["chunks"] < as_admin["chunks"]
    listed = world.reader_a.get("/v1/collections").json()["collections"]
    assert {c["name"]: c["documents"] for c in listed}["bikes"] == 3


def test_rebuild_progress_reveals_no_count_of_hidden_documents(
    world: World, monkeypatch: pytest.MonkeyPatch
) -> None:
    # Hold the rebuild at its start so its progress can be read.
    monkeypatch.setattr(world.runtime.rebuilds, "start", lambda name: None)
    response = world.admin.put(
        "/v1/collections/bikes", json={"chunking": {"max_tokens": 20, "overlap_tokens": 4}}
    )
    assert response.json()["rebuild"] == {"done": 0, "total": 4}
    as_reader = world.reader_a.get("/v1/collections/bikes").json()
    listed = world.reader_a.get("/v1/collections").json()["collections"]
    for view in (as_reader, *listed):
        progress = view.get("rebuild") or {}
        assert all(count <= 3 for count in progress.values()), view


def test_writer_of_group_a_cannot_overwrite_a_b_only_document(world: World) -> None:
    before = world.admin.get(f"/v1/collections/bikes/documents/{B_ONLY_ID}").json()
    batch = [
        {"id": "brand-new", "text": "A new document that must not be written."},
        {"id": B_ONLY_ID, "text": "Overwritten by a writer who cannot see it."},
    ]
    response = world.writer_a.post("/v1/collections/bikes/documents", json={"documents": batch})
    assert response.status_code == 422
    error = response.json()["error"]
    assert error["code"] == "invalid_documents"
    assert [(d["id"], d["index"], d["reason"]) for d in error["documents"]] == [
        (B_ONLY_ID, 1, "not_writable")
    ]
    assert world.admin.get(f"/v1/collections/bikes/documents/{B_ONLY_ID}").json() == before
    assert world.admin.get("/v1/collections/bikes/documents/brand-new").status_code == 404


def test_writer_of_group_a_may_replace_a_document_it_shares_a_group_with(world: World) -> None:
    replaced = {**DOCUMENTS[2], "text": "Chains: replace the chain every 3000 km."}
    response = world.writer_a.post(
        "/v1/collections/bikes/documents", json={"documents": [replaced]}
    )
    assert response.status_code == 200
    assert response.json()["results"][0]["status"] == "updated"


def assert_same_as_missing_collection(response: Any, missing: Any, name: str) -> None:
    """Alike but for the name, and for the id of the trace a query saves (each its own)."""
    assert response.status_code == missing.status_code == 404
    expected = missing.json()["error"]["message"].replace("no-such-collection", name)
    body, missing_body = response.json()["error"], missing.json()["error"]
    assert ("trace_id" in body) == ("trace_id" in missing_body)
    body.pop("trace_id", None)
    missing_body.pop("trace_id", None)
    assert body == {**missing_body, "message": expected}


@pytest.mark.parametrize(
    ("method", "path", "payload"),
    [
        ("get", "/v1/collections/bikes", None),
        ("get", "/v1/collections/bikes/documents", None),
        ("get", "/v1/collections/bikes/documents/shared-notes", None),
        ("delete", "/v1/collections/bikes/documents/shared-notes", None),
        ("post", "/v1/collections/bikes/documents", {"documents": [{"id": "x", "text": "words"}]}),
        ("post", "/v1/collections/bikes/search", {"query": "brakes"}),
        ("post", "/v1/collections/bikes/context", {"query": "brakes"}),
        ("post", "/v1/collections/bikes/answer", {"query": "brakes"}),
        ("post", "/v1/collections/bikes/explain", {"query": "brakes", "document_id": "x"}),
    ],
)
def test_writer_limited_to_one_collection_cannot_touch_another(
    world: World, method: str, path: str, payload: dict[str, Any] | None
) -> None:
    kwargs = {} if payload is None else {"json": payload}
    response = getattr(world.writer_one, method)(path, **kwargs)
    missing = getattr(world.writer_one, method)(
        path.replace("/bikes", "/no-such-collection"), **kwargs
    )
    assert_same_as_missing_collection(response, missing, "bikes")
    assert world.admin.get("/v1/collections/bikes/documents/shared-notes").status_code == 200
    assert world.admin.get("/v1/collections/bikes/documents/x").status_code == 404


def test_writer_limited_to_one_collection_lists_and_uses_only_that_one(world: World) -> None:
    listed = world.writer_one.get("/v1/collections").json()["collections"]
    assert [c["name"] for c in listed] == ["one"]
    response = world.writer_one.post(
        "/v1/collections/one/documents",
        json={"documents": [{"id": "two", "text": "Second document of one."}]},
    )
    assert response.status_code == 200


def test_revoked_key_is_401(world: World) -> None:
    assert world.reader_a.get("/v1/collections/bikes").status_code == 200
    with unit_of_work(world.runtime.sessions) as session:
        keys.revoke_key(session, "ra")
    for response in (
        world.reader_a.get("/v1/collections/bikes"),
        world.reader_a.post("/v1/collections/bikes/search", json={"query": "brakes"}),
    ):
        assert response.status_code == 401
        assert response.json()["error"]["code"] == "unauthenticated"


@pytest.mark.parametrize(
    "header",
    ["", "Bearer", "Bearer ", "Basic abc", "Bearer xk_0123456789abcdef_" + "a" * 43, "bearer x"],
)
def test_missing_or_unknown_key_is_401(world: World, header: str) -> None:
    response = world.admin.client.get("/v1/collections", headers={"Authorization": header})
    assert response.status_code == 401
    assert response.json()["error"]["code"] == "unauthenticated"


def test_a_tampered_secret_of_a_real_key_is_401(world: World) -> None:
    prefix, lookup, secret = world.reader_a.key.split("_", 2)
    flipped = ("B" if secret[0] == "A" else "A") + secret[1:]
    tampered = world.reader_a.as_key(f"{prefix}_{lookup}_{flipped}")
    assert tampered.get("/v1/collections").status_code == 401


@pytest.mark.parametrize(
    ("method", "path", "payload"),
    [
        ("post", "/v1/collections/bikes/documents", {"documents": [{"id": "x", "text": "words"}]}),
        ("delete", "/v1/collections/bikes/documents/shared-notes", None),
        ("delete", "/v1/collections/bikes/documents?filter=model_year>0", None),
        ("put", "/v1/collections/bikes", {"description": "changed"}),
        ("put", "/v1/collections/fresh", BIKE_SCHEMA),
        ("delete", "/v1/collections/bikes", None),
    ],
)
def test_reader_gets_403_on_writes_and_nothing_changes(
    world: World, method: str, path: str, payload: dict[str, Any] | None
) -> None:
    before = world.admin.get("/v1/collections/bikes").json()
    kwargs = {} if payload is None else {"json": payload}
    response = getattr(world.reader_a, method)(path, **kwargs)
    assert response.status_code == 403
    assert response.json()["error"]["code"] == "forbidden"
    assert world.admin.get("/v1/collections/bikes").json() == before
    assert world.admin.get("/v1/collections/fresh").status_code == 404


def test_writer_gets_403_on_collection_admin_routes(world: World) -> None:
    assert world.writer_a.put("/v1/collections/bikes", json={}).status_code == 403
    assert world.writer_a.delete("/v1/collections/bikes").status_code == 403


def test_traces_are_readable_by_their_key_and_an_admin_only(world: World) -> None:
    trace_id = world.reader_a.post("/v1/collections/bikes/search", json={"query": "brakes"}).json()[
        "trace_id"
    ]
    assert world.reader_a.get(f"/v1/traces/{trace_id}").status_code == 200
    assert world.admin.get(f"/v1/traces/{trace_id}").status_code == 200
    missing_id = "00000000-0000-4000-8000-000000000000"
    for other in (world.other_reader, world.writer_a, world.writer_one):
        response = other.get(f"/v1/traces/{trace_id}")
        missing = other.get(f"/v1/traces/{missing_id}")
        assert response.status_code == missing.status_code == 404
        expected = missing.json()["error"]["message"].replace(missing_id, trace_id)
        assert response.json() == {"error": {**missing.json()["error"], "message": expected}}


def test_an_admin_trace_with_hidden_hits_is_404_to_a_reader(world: World) -> None:
    trace_id = world.admin.post(
        "/v1/collections/bikes/search", json={"query": "quokkablue brakes"}
    ).json()["trace_id"]
    response = world.reader_a.get(f"/v1/traces/{trace_id}")
    assert response.status_code == 404
    assert_no_b_only_content(response)


# Queries and filters the reader might write: words that match the hidden document best, and
# valid filters over every attribute type, nested with AND, OR and NOT.
QUERY_WORDS = ["brakes", "brake", "pad", "recall", "xylofrost", "lever", "cable", "chain", "tyres"]
COMPARISONS = st.one_of(
    st.sampled_from(["Alpha", "Bravo", "Common", "Zed"]).map(lambda m: f"model = '{m}'"),
    st.tuples(st.sampled_from(["<", "<=", "=", ">=", ">", "<>"]), st.integers(2000, 2030)).map(
        lambda p: f"model_year {p[0]} {p[1]}"
    ),
    st.floats(0, 2000, allow_nan=False).map(lambda v: f"price > {v:.2f}"),
    st.sampled_from(["discontinued = true", "discontinued = false", "price IS NULL"]),
    st.sampled_from(["brakes", "recall", "tyres"]).map(lambda t: f"A_CONTAINS(tags, ('{t}'))"),
    st.sampled_from(["model LIKE 'B%'", "model IN ('Bravo', 'Alpha')", "model_year IS NOT NULL"]),
)
FILTERS = st.recursive(
    COMPARISONS,
    lambda inner: st.one_of(
        st.tuples(inner, st.sampled_from(["AND", "OR"]), inner).map(
            lambda p: f"({p[0]} {p[1]} {p[2]})"
        ),
        inner.map(lambda f: f"NOT ({f})"),
    ),
    max_leaves=6,
)


@settings(
    max_examples=40,
    deadline=None,
    suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow],
)
@given(
    words=st.lists(st.sampled_from(QUERY_WORDS), min_size=1, max_size=6),
    filter_text=st.none() | FILTERS,
    mode=st.sampled_from(MODES),
    route=st.sampled_from(["search", "context", "answer", "documents"]),
)
def test_no_generated_query_or_filter_reveals_a_b_only_document(
    world: World, words: list[str], filter_text: str | None, mode: str, route: str
) -> None:
    if route == "documents":
        params = {} if filter_text is None else {"filter": filter_text}
        response = world.reader_a.get("/v1/collections/bikes/documents", params=params)
        assert response.status_code == 200, response.text
        assert_no_b_only_content(response)
        return
    body = retrieval_body(route, " ".join(words), mode, filter_text)
    response = world.reader_a.post(f"/v1/collections/bikes/{route}", json=body)
    assert response.status_code == 200, response.text
    assert_no_b_only_content(response)
    assert returned_document_ids(route, response.json()) <= VISIBLE_TO_A
    trace = world.reader_a.get(f"/v1/traces/{response.json()['trace_id']}")
    assert_no_b_only_content(trace)


@pytest.mark.parametrize("route", ["search", "context", "answer"])
def test_explain_reports_a_hidden_document_as_missing_and_never_names_it(
    world: World, route: str
) -> None:
    body = {"query": "brakes quokkablue recall", "route": route}
    hidden = world.reader_a.post(
        "/v1/collections/bikes/explain", json={**body, "document_id": B_ONLY_ID}
    )
    missing = world.reader_a.post(
        "/v1/collections/bikes/explain", json={**body, "document_id": "no-such-memo"}
    )
    assert hidden.status_code == missing.status_code == 404
    expected = missing.json()["error"]["message"].replace("no-such-memo", B_ONLY_ID)
    assert hidden.json() == {"error": {**missing.json()["error"], "message": expected}}
    for document_id in sorted(VISIBLE_TO_A):
        response = world.reader_a.post(
            "/v1/collections/bikes/explain", json={**body, "document_id": document_id}
        )
        assert response.status_code == 200, response.text
        assert_no_b_only_content(response)
