"""The query routes as ordinary routes: dependencies that tests can swap, and requests refused
with messages that name what to change."""

from __future__ import annotations

from typing import Any

import pytest
from fastapi.testclient import TestClient

from service.api.deps import get_caller
from service.usecases.callers import Caller, Role
from tests.api_helpers import Api

ROUTES = ("search", "context", "answer")
DOCUMENT = {
    "id": "ridge-2023-manual",
    "title": "Ridge 2023 owner's manual",
    "text": "Brakes\n\nBleed the rear brake every two years. Check the pads monthly.",
    "attributes": {"model": "Ridge", "model_year": 2023, "published": "2024-01-01T00:00:00Z"},
}


@pytest.fixture
def stocked(bikes: Api) -> Api:
    response = bikes.post("/v1/collections/bikes/documents", json={"documents": [DOCUMENT]})
    assert response.status_code == 200, response.text
    return bikes


def error_of(response: Any, status: int, code: str) -> dict[str, Any]:
    assert response.status_code == status, response.text
    error: dict[str, Any] = response.json()["error"]
    assert error["code"] == code
    return error


def assert_failed_trace(api: Api, trace_id: str, code: str) -> None:
    """A query refused once it reached its use case keeps a trace naming the error."""
    trace = api.get(f"/v1/traces/{trace_id}")
    assert trace.status_code == 200, trace.text
    assert trace.json()["error"]["code"] == code


@pytest.mark.parametrize("route", ROUTES)
def test_an_overridden_authentication_dependency_takes_effect_on_every_query_route(
    stocked: Api, route: str
) -> None:
    app: Any = stocked.client.app
    seen: list[str] = []

    async def reader_without_a_key() -> Caller:
        seen.append(route)
        return Caller(
            key_id=None, name="override", role=Role.READER, groups=frozenset(), collections=None
        )

    app.dependency_overrides[get_caller] = reader_without_a_key
    try:
        # No Authorization header at all: only the override can let this through.
        response = TestClient(app).post(
            f"/v1/collections/bikes/{route}", json={"query": "rear brake"}
        )
    finally:
        app.dependency_overrides.clear()
    assert response.status_code == 200, response.text
    assert seen == [route]
    without_override = TestClient(app).post(
        f"/v1/collections/bikes/{route}", json={"query": "rear brake"}
    )
    error_of(without_override, 401, "unauthenticated")


@pytest.mark.parametrize("route", ROUTES)
@pytest.mark.parametrize("body", [{}, {"query": ""}, {"mode": "lexical"}])
def test_a_missing_or_empty_query_names_the_query_field(
    stocked: Api, route: str, body: dict[str, Any]
) -> None:
    error = error_of(
        stocked.post(f"/v1/collections/bikes/{route}", json=body), 422, "invalid_request"
    )
    assert error["field"] == "query"
    assert error["message"].startswith("Field 'query' is invalid:")


def test_a_query_of_spaces_names_the_query_field(stocked: Api) -> None:
    error = error_of(
        stocked.post("/v1/collections/bikes/search", json={"query": "   "}), 422, "invalid_request"
    )
    assert_failed_trace(stocked, error.pop("trace_id"), "invalid_request")
    assert error == {
        "code": "invalid_request",
        "message": "Field 'query' must not be empty.",
        "field": "query",
    }


@pytest.mark.parametrize("value", [12, 1.5, True, ["model = 'Ridge'"]])
def test_a_filter_that_is_neither_text_nor_an_object_says_what_a_filter_is(
    stocked: Api, value: Any
) -> None:
    response = stocked.post("/v1/collections/bikes/search", json={"query": "x", "filter": value})
    assert error_of(response, 422, "invalid_request") == {
        "code": "invalid_request",
        "message": (
            "Field 'filter' is invalid: a filter is a CQL2 text string or a CQL2 JSON object."
        ),
        "field": "filter",
    }


@pytest.mark.parametrize(
    ("field", "route"),
    [("top_k", "search"), ("depth", "search"), ("rrf_k", "search"), ("token_budget", "context")],
)
@pytest.mark.parametrize("value", [True, False])
def test_a_boolean_is_not_a_count(stocked: Api, field: str, route: str, value: bool) -> None:
    response = stocked.post(f"/v1/collections/bikes/{route}", json={"query": "x", field: value})
    assert error_of(response, 422, "invalid_request") == {
        "code": "invalid_request",
        "message": f"Field '{field}' is invalid: Input should be an integer, not true or false.",
        "field": field,
    }


def test_a_depth_below_top_k_is_raised_and_the_trace_shows_both(stocked: Api) -> None:
    response = stocked.post(
        "/v1/collections/bikes/search", json={"query": "brake", "top_k": 5, "depth": 2}
    )
    assert response.status_code == 200, response.text
    trace = stocked.get(f"/v1/traces/{response.json()['trace_id']}").json()
    assert trace["request"]["depth"] == 2
    assert trace["request"]["depth_used"] == 5


def test_a_time_window_reaching_before_year_one_names_now(stocked: Api) -> None:
    body = {
        "query": "brake",
        "time_window": {"attribute": "published", "last": "P1Y", "now": "0001-03-01T00:00:00Z"},
    }
    response = stocked.post("/v1/collections/bikes/search", json=body)
    error = error_of(response, 422, "invalid_request")
    assert_failed_trace(stocked, error.pop("trace_id"), "invalid_request")
    assert error == {
        "code": "invalid_request",
        "message": (
            "time_window.now 0001-03-01T00:00:00+00:00 is too early: P1Y before it falls "
            "before the year 1."
        ),
        "field": "time_window.now",
    }


def test_a_bad_duration_still_names_last(stocked: Api) -> None:
    body = {"query": "brake", "time_window": {"attribute": "published", "last": "P1X"}}
    error = error_of(
        stocked.post("/v1/collections/bikes/search", json=body), 422, "invalid_request"
    )
    assert error["field"] == "time_window.last"


def test_a_trace_keeps_the_top_twenty_entries_of_each_ranking(bikes: Api) -> None:
    documents = [
        {"id": f"bulletin-{n:02d}", "text": f"Brake bulletin {n}: check the brake pads."}
        for n in range(30)
    ]
    response = bikes.post("/v1/collections/bikes/documents", json={"documents": documents})
    assert response.status_code == 200, response.text
    found = bikes.post("/v1/collections/bikes/search", json={"query": "brake pads", "top_k": 3})
    trace = bikes.get(f"/v1/traces/{found.json()['trace_id']}").json()
    tops = {stage["stage"]: len(stage.get("top", [])) for stage in trace["stages"]}
    assert tops["lexical"] == tops["semantic"] == tops["fusion"] == 20
