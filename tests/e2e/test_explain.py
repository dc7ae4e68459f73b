"""POST /v1/collections/{name}/explain: for each chunk of a document, the first stage that left
it out and why, held to what search, context and answer themselves return."""

from __future__ import annotations

from collections.abc import Callable, Iterator
from dataclasses import dataclass
from typing import Any

import pytest
from fastapi.testclient import TestClient

from service.api.app import create_app
from service.usecases.runtime import Runtime
from tests.api_helpers import BIKE_SCHEMA, Api, make_key

SCHEMA: dict[str, Any] = {**BIKE_SCHEMA, "chunking": {"max_tokens": 24, "overlap_tokens": 0}}
MANUAL = (
    "Brake pads wear faster in the wet. Check the brake pads every week and replace them when "
    "the groove is gone. Brake cables stretch in the first month, so adjust the brake lever "
    "reach after a few rides. Bleed the brake hoses once a year and whenever the brake lever "
    "feels soft."
)
REPEATED = "Worn brake pads squeal; replace the brake pads before the backing plate shows."


def document(doc_id: str, text: str, access: list[str] | None = None, **attributes: Any) -> dict:
    return {"id": doc_id, "title": doc_id, "text": text, "attributes": attributes,
            "access": access or []}  # fmt: skip


DOCUMENTS = [
    document("ridge-manual", MANUAL, model="Ridge", model_year=2022, price=120.0,
             effective="2025-02-01"),
    document("ridge-bulletin", "Brake pads recall for the old frames; brake pads swapped free.",
             model="Ridge", model_year=2019, price=15.0, effective="2020-01-01"),
    document("shop-note", "A note on brake pads from the shop counter.", model="Larkspur",
             model_year=2023),
    document("tyre-guide", "Inflate the tyres to two bar before a long ride.", model="Ridge",
             model_year=2022, price=30.0, effective="2025-03-01"),
    document("copy-one", REPEATED, model="Ridge", model_year=2022),
    document("copy-two", REPEATED, model="Ridge", model_year=2022),
    document("staff-memo", "Staff only: brake pads stock is low.", access=["staff"],
             model="Ridge", model_year=2022),
]  # fmt: skip


@dataclass
class Shop:
    admin: Api
    reader: Api


@pytest.fixture
def shop(make_runtime: Callable[..., Runtime]) -> Iterator[Shop]:
    runtime = make_runtime()
    with TestClient(create_app(runtime)) as client:
        admin = Api(client, make_key(runtime, "admin", name="admin"))
        assert admin.put("/v1/collections/bikes", json=SCHEMA).status_code == 201
        response = admin.post("/v1/collections/bikes/documents", json={"documents": DOCUMENTS})
        assert response.status_code == 200, response.text
        yield Shop(admin, admin.as_key(make_key(runtime, "reader", name="reader")))


def explain(api: Api, query: str, **fields: Any) -> dict[str, Any]:
    response = api.post("/v1/collections/bikes/explain", json={"query": query, **fields})
    assert response.status_code == 200, response.text
    body: dict[str, Any] = response.json()
    return body


def only_chunk(body: dict[str, Any]) -> dict[str, Any]:
    (chunk,) = body["chunks"]
    result: dict[str, Any] = chunk
    return result


def post(api: Api, route: str, query: str, **fields: Any) -> dict[str, Any]:
    response = api.post(f"/v1/collections/bikes/{route}", json={"query": query, **fields})
    assert response.status_code == 200, response.text
    body: dict[str, Any] = response.json()
    return body


# Access ----------------------------------------------------------------------------------------


def test_a_hidden_document_is_not_found_for_a_reader_exactly_like_a_missing_one(
    shop: Shop,
) -> None:
    for field, hidden, missing in (
        ("document_id", "staff-memo", "no-such-memo"),
        ("chunk_id", "staff-memo#0000", "no-such-memo#0000"),
    ):
        answers = [
            shop.reader.post(
                "/v1/collections/bikes/explain", json={"query": "brake pads", field: target}
            )
            for target in (hidden, missing)
        ]
        assert [a.status_code for a in answers] == [404, 404]
        hidden_error, missing_error = (a.json()["error"] for a in answers)
        assert hidden_error["code"] == missing_error["code"] == "document_not_found"
        assert hidden_error["message"] == missing_error["message"].replace(missing, hidden)


def test_an_admin_is_told_the_document_is_hidden_from_the_key_it_asks_as(shop: Shop) -> None:
    chunk = only_chunk(explain(shop.admin, "brake pads", document_id="staff-memo", as_key="reader"))
    assert (chunk["stage"], chunk["outcome"]) == ("access", "not_visible")
    assert "staff" in chunk["reason"] and "'reader'" in chunk["reason"]
    as_itself = only_chunk(explain(shop.admin, "brake pads", document_id="staff-memo"))
    assert as_itself["stage"] != "access"


def test_only_an_admin_may_ask_as_another_key(shop: Shop) -> None:
    response = shop.reader.post(
        "/v1/collections/bikes/explain",
        json={"query": "brake pads", "document_id": "shop-note", "as_key": "admin"},
    )
    assert response.status_code == 403
    unknown = shop.admin.post(
        "/v1/collections/bikes/explain",
        json={"query": "brake pads", "document_id": "shop-note", "as_key": "nobody"},
    )
    assert unknown.status_code == 422 and unknown.json()["error"]["field"] == "as_key"


@pytest.mark.parametrize("fields", [{}, {"document_id": "shop-note", "chunk_id": "shop-note#0000"}])
def test_exactly_one_of_document_and_chunk_is_named(shop: Shop, fields: dict[str, Any]) -> None:
    response = shop.reader.post(
        "/v1/collections/bikes/explain", json={"query": "brake pads", **fields}
    )
    assert response.status_code == 422
    assert response.json()["error"]["code"] == "invalid_request"


# Filters ---------------------------------------------------------------------------------------


def test_the_false_clause_of_the_filter_is_named_with_the_documents_value(shop: Shop) -> None:
    body = explain(
        shop.reader,
        "brake pads",
        filter="model = 'Ridge' AND model_year >= 2022",
        document_id="ridge-bulletin",
    )
    chunk = only_chunk(body)
    assert (chunk["stage"], chunk["outcome"]) == ("filter", "clause_false")
    assert chunk["clause"] == {
        "source": "filter",
        "clause": "model_year >= 2022",
        "result": "false",
        "values": {"model_year": 2019},
    }
    assert chunk["ranks"] is None


def test_a_clause_on_a_missing_value_is_unknown(shop: Shop) -> None:
    chunk = only_chunk(
        explain(shop.reader, "brake pads", filter="price < 500", document_id="shop-note")
    )
    assert (chunk["stage"], chunk["outcome"]) == ("filter", "clause_unknown")
    assert chunk["clause"]["values"] == {"price": None}


def test_a_document_outside_the_time_window_or_without_its_date_is_told_so(shop: Shop) -> None:
    window = {"attribute": "effective", "last": "P1Y", "now": "2025-06-01T00:00:00Z"}
    old = only_chunk(
        explain(shop.reader, "brake pads", time_window=window, document_id="ridge-bulletin")
    )
    assert (old["stage"], old["outcome"]) == ("time_window", "outside_window")
    assert old["clause"]["values"] == {"effective": "2020-01-01"}
    assert "2024-06-01 to 2025-06-01" in old["reason"]
    undated = only_chunk(
        explain(shop.reader, "brake pads", time_window=window, document_id="shop-note")
    )
    assert (undated["stage"], undated["outcome"]) == ("time_window", "no_value")


def test_an_applied_inferred_filter_is_explained_like_the_callers_own(shop: Shop) -> None:
    body = explain(
        shop.reader,
        "brake pads for my 2022 Ridge",
        infer_filter="apply",
        document_id="ridge-bulletin",
    )
    assert "model_year = 2022" in body["inferred_filter"]["cql2_text"]
    chunk = only_chunk(body)
    assert (chunk["stage"], chunk["outcome"]) == ("inferred_filter", "clause_false")
    assert chunk["clause"]["clause"] == "model_year = 2022"
    assert chunk["clause"]["values"] == {"model_year": 2019}
    suggested = explain(
        shop.reader,
        "brake pads for my 2022 Ridge",
        infer_filter="suggest",
        document_id="ridge-bulletin",
    )
    assert only_chunk(suggested)["stage"] != "inferred_filter"


# Rankings --------------------------------------------------------------------------------------


def test_a_chunk_without_a_query_term_is_out_of_the_lexical_ranking(shop: Shop) -> None:
    chunk = only_chunk(explain(shop.reader, "brake pads", mode="lexical", document_id="tyre-guide"))
    assert (chunk["stage"], chunk["outcome"]) == ("lexical", "no_query_term")
    assert chunk["ranks"] == {"lexical": {"rank": None, "score": None}}


@pytest.mark.parametrize("mode", ["lexical", "semantic", "hybrid"])
def test_a_chunk_ranked_beyond_depth_is_told_its_rank_and_the_cut(shop: Shop, mode: str) -> None:
    deep = post(shop.reader, "search", "brake pads", mode=mode, top_k=20, depth=20)
    # A chunk first in no ranking: beyond a depth of 1 in each.
    beyond = next(
        hit
        for hit in deep["hits"]
        if all(rank is None or rank > 1 for rank in hit["ranks"].values())
    )
    body = explain(
        shop.reader, "brake pads", mode=mode, top_k=1, depth=1, chunk_id=beyond["chunk_id"]
    )
    chunk = only_chunk(body)
    stage = "fusion" if mode == "hybrid" else mode
    assert (chunk["stage"], chunk["outcome"]) == (stage, "below_depth")
    for ranking, rank in beyond["ranks"].items():
        if rank is not None and ranking in chunk["ranks"]:
            assert chunk["ranks"][ranking]["rank"] == rank
    first = deep["hits"][0]
    cuts = {cut["stage"]: cut for cut in body["cuts"]}
    if mode != "hybrid":
        assert cuts[mode]["chunk_id"] == first["chunk_id"]
        assert cuts[mode]["score"] == pytest.approx(first["score"])
        assert cuts[mode]["cut_at"] == 1


def test_a_chunk_fused_below_top_k_is_told_its_rank_and_the_last_hit(shop: Shop) -> None:
    deep = post(shop.reader, "search", "brake pads", top_k=20)
    third = deep["hits"][2]
    body = explain(shop.reader, "brake pads", top_k=2, chunk_id=third["chunk_id"])
    chunk = only_chunk(body)
    assert (chunk["stage"], chunk["outcome"]) == ("top_k", "below_top_k")
    assert chunk["ranks"]["fused"]["rank"] == 3
    assert chunk["ranks"]["fused"]["score"] == pytest.approx(third["score"])
    assert chunk["ranks"]["lexical"]["rank"] == third["ranks"]["lexical"]
    assert chunk["ranks"]["semantic"]["rank"] == third["ranks"]["semantic"]
    top_k_cut = next(cut for cut in body["cuts"] if cut["stage"] == "top_k")
    assert (top_k_cut["cut_at"], top_k_cut["rank"]) == (2, 2)
    assert top_k_cut["chunk_id"] == deep["hits"][1]["chunk_id"]


def test_every_chunk_a_search_returns_is_explained_as_returned_and_no_other(shop: Shop) -> None:
    hits = post(shop.reader, "search", "brake lever", top_k=3)["hits"]
    returned = {hit["chunk_id"] for hit in hits}
    for document_id in {c["id"] for c in DOCUMENTS} - {"staff-memo"}:
        body = explain(shop.reader, "brake lever", top_k=3, document_id=document_id)
        for chunk in body["chunks"]:
            assert (chunk["outcome"] == "returned") == (chunk["chunk_id"] in returned)
            assert (chunk["stage"] is None) == (chunk["chunk_id"] in returned)


# Packing and the answer ------------------------------------------------------------------------


def packing_outcomes(api: Api, trace_id: str) -> dict[str, dict[str, Any]]:
    trace = api.get(f"/v1/traces/{trace_id}").json()
    (packing,) = [stage for stage in trace["stages"] if stage["stage"] == "packing"]
    return {chunk["chunk_id"]: chunk for chunk in packing["chunks"]}


def test_packing_outcomes_are_those_the_context_route_traces(shop: Shop) -> None:
    seen: set[str] = set()
    for budget in (40, 400):
        context = post(shop.reader, "context", "brake pads", token_budget=budget)
        traced = packing_outcomes(shop.reader, context["trace_id"])
        for document_id in ("ridge-manual", "copy-one", "copy-two", "ridge-bulletin"):
            body = explain(
                shop.reader,
                "brake pads",
                route="context",
                token_budget=budget,
                document_id=document_id,
            )
            for chunk in body["chunks"]:
                packing = chunk["packing"]
                if packing is None:
                    continue
                expected = traced[chunk["chunk_id"]]
                assert packing["outcome"] == expected["outcome"]
                assert packing["marker"] == expected["marker"]
                assert packing["duplicate_of"] == expected["duplicate_of"]
                seen.add(packing["outcome"])
                if packing["outcome"] in ("budget", "duplicate"):
                    assert chunk["stage"] == "packing"
                else:
                    assert chunk["stage"] is None
                    (passage,) = [
                        p for p in context["passages"] if p["marker"] == packing["marker"]
                    ]
                    assert passage["chunk_ids"] == packing["passage_chunk_ids"]
                    assert chunk["chunk_id"] in passage["chunk_ids"]
    assert seen == {"included", "merged", "budget", "duplicate"}


def test_a_duplicate_names_the_chunk_it_repeats(shop: Shop) -> None:
    chunks = [
        only_chunk(explain(shop.reader, "brake pads", route="context", document_id=d))
        for d in ("copy-one", "copy-two")
    ]
    duplicates = [c for c in chunks if c["outcome"] == "duplicate"]
    kept = [c for c in chunks if c["outcome"] == "included"]
    assert len(duplicates) == len(kept) == 1
    assert duplicates[0]["packing"]["duplicate_of"] == kept[0]["chunk_id"]
    assert kept[0]["chunk_id"] in duplicates[0]["reason"]


def test_an_answer_says_which_packed_chunks_it_cites_and_the_spans_it_weighed(
    shop: Shop,
) -> None:
    question = "how often should I check the brake pads"
    answered = post(shop.reader, "answer", question)
    cited = {c for citation in answered["citations"] for c in citation["chunk_ids"]}
    packed = {c for passage in answered["passages"] for c in passage["chunk_ids"]}
    reached = 0
    for document_id in ("ridge-manual", "ridge-bulletin", "shop-note", "copy-one"):
        body = explain(shop.reader, question, route="answer", document_id=document_id)
        texts = {
            c["chunk_id"]: c["text"]
            for c in shop.reader.get(f"/v1/collections/bikes/documents/{document_id}").json()[
                "chunks"
            ]
        }
        for chunk in body["chunks"]:
            finding = chunk["answer"]
            if chunk["chunk_id"] not in packed:
                assert finding is None
                continue
            reached += 1
            assert finding["answered"] == (answered["answer"] is not None)
            assert finding["cited"] == (chunk["chunk_id"] in cited)
            if answered["answer"] is None:
                assert (chunk["stage"], chunk["outcome"]) == ("generation", "declined")
            elif finding["cited"]:
                assert (chunk["stage"], chunk["outcome"]) == (None, "cited")
            else:
                assert (chunk["stage"], chunk["outcome"]) == ("generation", "not_cited")
            # The extractive generator reports the sentences it weighed.
            assert finding["spans"] is not None
            flat = " ".join(texts[chunk["chunk_id"]].split()).casefold()
            for span in finding["spans"]:
                assert " ".join(span["text"].split()).casefold() in flat
                assert span["marker"] == chunk["packing"]["marker"]
    assert reached >= 2
