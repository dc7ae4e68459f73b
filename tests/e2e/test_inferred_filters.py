"""infer_filter over HTTP: suggested or applied, shown with its evidence, traced, and never
over the caller's own filter or beyond the caller's access."""

from __future__ import annotations

from typing import Any

import pytest

from tests.api_helpers import BIKE_SCHEMA, Api, make_key

SCHEMA: dict[str, Any] = {
    **BIKE_SCHEMA,
    "attributes": {
        **BIKE_SCHEMA["attributes"],
        "model": {"type": "keyword", "aliases": {"Ridgeline": ["ridge line"]}},
        "discontinued": {"type": "boolean", "phrases": {"true": ["no longer made"]}},
    },
}


def document(doc_id: str, text: str, access: list[str] | None = None, **attributes: Any) -> dict:
    return {"id": doc_id, "title": doc_id, "text": text, "attributes": attributes,
            "access": access or []}  # fmt: skip


DOCUMENTS = [
    document("ridgeline-2022", "Tyre pressure for the trail bike: 1.6 bar front.",
             model="Ridgeline", model_year=2022, published="2021-08-16T09:00:00Z"),
    document("ridgeline-2023", "Tyre pressure for the trail bike: 1.4 bar front.",
             model="Ridgeline", model_year=2023, published="2022-08-22T09:00:00Z"),
    document("larkspur-2023", "Tyre pressure for the gravel bike: 2.8 bar front.",
             model="Larkspur", model_year=2023, published="2024-11-02T09:00:00Z",
             discontinued=True),
    document("haulmark-2024", "Tyre pressure for the cargo bike: 3.2 bar.", access=["staff"],
             model="Haulmark", model_year=2024, published="2025-01-10T09:00:00Z"),
]  # fmt: skip
NOW = "2025-03-15T12:00:00Z"


@pytest.fixture
def shop(api: Api) -> Api:
    assert api.put("/v1/collections/bikes", json=SCHEMA).status_code == 201
    response = api.post("/v1/collections/bikes/documents", json={"documents": DOCUMENTS})
    assert response.status_code == 200, response.text
    return api


def search(api: Api, query: str, **fields: Any) -> dict[str, Any]:
    response = api.post("/v1/collections/bikes/search", json={"query": query, **fields})
    assert response.status_code == 200, response.text
    body: dict[str, Any] = response.json()
    return body


def documents_of(body: dict[str, Any]) -> set[str]:
    return {hit["document_id"] for hit in body["hits"]}


def test_apply_ands_the_inferred_filter_and_shows_each_clause_with_its_words(shop: Api) -> None:
    body = search(shop, "tyre pressure for my 2022 Ridgeline", infer_filter="apply")
    assert documents_of(body) == {"ridgeline-2022"}
    inferred = body["inferred_filter"]
    assert inferred["cql2_text"] == "model_year = 2022 AND model = 'Ridgeline'"
    assert inferred["cql2_json"] == {
        "op": "and",
        "args": [
            {"op": "=", "args": [{"property": "model_year"}, 2022]},
            {"op": "=", "args": [{"property": "model"}, "Ridgeline"]},
        ],
    }
    assert [(c["attribute"], c["op"], c["value"], c["evidence"]) for c in inferred["clauses"]] == [
        ("model_year", "=", 2022, "2022"),
        ("model", "=", "Ridgeline", "Ridgeline"),
    ]
    assert inferred["dropped"] == [] and inferred["using"] == "deterministic"


def test_suggest_reports_the_filter_without_applying_it(shop: Api) -> None:
    body = search(shop, "tyre pressure for my 2022 Ridgeline", infer_filter="suggest")
    assert documents_of(body) == {d["id"] for d in DOCUMENTS}
    assert body["inferred_filter"]["cql2_text"] == "model_year = 2022 AND model = 'Ridgeline'"


def test_off_is_the_default_and_nothing_inferred_is_null(shop: Api) -> None:
    assert search(shop, "tyre pressure for my 2022 Ridgeline")["inferred_filter"] is None
    assert search(shop, "tyre pressure", infer_filter="apply")["inferred_filter"] is None


def test_now_anchors_relative_times(shop: Api) -> None:
    recent = {"mode": "apply", "now": NOW}
    body = search(shop, "tyre pressure published in the last six months", infer_filter=recent)
    assert documents_of(body) == {"larkspur-2023", "haulmark-2024"}
    (clause,) = body["inferred_filter"]["clauses"]
    assert clause["value"] == ["2024-09-15T12:00:00Z", NOW]
    assert clause["source"] == "relative time, back from now, by the cue words around it (P6M)"
    earlier = {"mode": "apply", "now": "2023-01-01T00:00:00Z"}
    body = search(shop, "tyre pressure published in the last six months", infer_filter=earlier)
    assert documents_of(body) == {"ridgeline-2023"}


def test_aliases_and_boolean_phrases_from_the_hints_are_used(shop: Api) -> None:
    body = search(shop, "tyre pressure on the ridge line", infer_filter="apply")
    assert documents_of(body) == {"ridgeline-2022", "ridgeline-2023"}
    body = search(shop, "tyre pressure on bikes no longer made", infer_filter="apply")
    assert documents_of(body) == {"larkspur-2023"}


def test_the_request_filter_wins_and_the_dropped_clause_says_why(shop: Api) -> None:
    body = search(
        shop,
        "tyre pressure for my 2022 Ridgeline",
        filter="model_year = 2023",
        infer_filter="apply",
    )
    assert documents_of(body) == {"ridgeline-2023"}
    inferred = body["inferred_filter"]
    assert inferred["cql2_text"] == "model = 'Ridgeline'"
    (dropped,) = inferred["dropped"]
    assert dropped["clause"]["cql2_text"] == "model_year = 2022"
    assert "request's own filter" in dropped["reason"]


def test_a_clause_that_would_leave_no_candidate_is_dropped_not_applied(shop: Api) -> None:
    body = search(shop, "tyre pressure for the 2021 Ridgeline", infer_filter="apply")
    assert documents_of(body) == {"ridgeline-2022", "ridgeline-2023"}
    (dropped,) = body["inferred_filter"]["dropped"]
    assert dropped["clause"]["cql2_text"] == "model_year = 2021"
    assert dropped["reason"] == "no document you can see matches it"


def test_inference_never_widens_access_nor_reveals_hidden_values(shop: Api) -> None:
    reader = shop.as_key(make_key(shop.client.app.state.runtime, "reader", name="reader"))
    body = search(reader, "tyre pressure for the Haulmark", infer_filter="apply")
    assert documents_of(body) <= {"ridgeline-2022", "ridgeline-2023", "larkspur-2023"}
    assert body["inferred_filter"] is None  # the value exists only in a hidden document
    body = search(reader, "tyre pressure for 2024 bikes", infer_filter="apply")
    assert "haulmark-2024" not in documents_of(body)
    assert body["inferred_filter"]["dropped"][0]["reason"] == "no document you can see matches it"
    staff = shop.as_key(
        make_key(shop.client.app.state.runtime, "reader", name="staff", groups=["staff"])
    )
    body = search(staff, "tyre pressure for the Haulmark", infer_filter="apply")
    assert documents_of(body) == {"haulmark-2024"}


def test_context_and_answer_carry_the_inferred_filter_and_the_trace_shows_it(shop: Api) -> None:
    for route in ("context", "answer"):
        response = shop.post(
            f"/v1/collections/bikes/{route}",
            json={"query": "tyre pressure for my 2022 Ridgeline", "infer_filter": "apply"},
        )
        assert response.status_code == 200, response.text
        body = response.json()
        assert body["inferred_filter"]["cql2_text"] == "model_year = 2022 AND model = 'Ridgeline'"
        trace = shop.get(f"/v1/traces/{body['trace_id']}").json()
        (filter_stage,) = [s for s in trace["stages"] if s["stage"] == "filter"]
        assert filter_stage["inferred_filter"] == body["inferred_filter"]
        assert filter_stage["inference_using"] == "deterministic"
        assert trace["request"]["infer_filter"] == "apply"
    passages = response.json()["passages"]
    assert {p["document_id"] for p in passages} == {"ridgeline-2022"}


@pytest.mark.parametrize(
    ("value", "field"),
    [
        ("always", "infer_filter"),
        ({"mode": "sometimes"}, "infer_filter"),
        ({"now": NOW}, "infer_filter"),
        ({"mode": "apply", "now": "2025-03-15T12:00:00"}, "infer_filter.now"),
        ({"mode": "apply", "now": "yesterday"}, "infer_filter.now"),
        ({"mode": "apply", "using": "oracle"}, "infer_filter"),
        ({"mode": "apply", "when": NOW}, "infer_filter"),
        ({"mode": "apply", "using": "chat-http"}, "infer_filter.using"),
    ],
)
def test_a_bad_infer_filter_is_refused_naming_its_field(shop: Api, value: Any, field: str) -> None:
    response = shop.post(
        "/v1/collections/bikes/search", json={"query": "tyre pressure", "infer_filter": value}
    )
    assert response.status_code == 422, response.text
    error = response.json()["error"]
    assert error["code"] == "invalid_request"
    assert error["field"].startswith(field)
