"""The hybrid steps beyond plain fusion as collection settings: put, shown, checked with a 422
naming the field, switched off, and each step a stage of the query's trace."""

from __future__ import annotations

from typing import Any

import pytest

from tests.api_helpers import BIKE_SCHEMA, Api

DOCUMENTS = [
    {
        "id": f"ridge-{n}",
        "title": title,
        "text": text,
        "attributes": {"model": "Ridge", "model_year": 2020 + n},
    }
    for n, (title, text) in enumerate(
        [
            ("Brake pads", "Check the brake pads monthly and replace worn pads."),
            ("Brake bleeding", "Bleed the rear brake every two years with fresh fluid."),
            ("Chain care", "Clean and oil the chain after a wet ride."),
            ("Tyres", "Keep the tyres at the pressure printed on their sidewall."),
        ]
    )
]
EVERY_STEP = {
    "lexical_feedback_chunks": 2,
    "lexical_feedback_terms": 5,
    "lexical_feedback_query_weight": 0.6,
    # Four chunks: every term is in at least a quarter of them, so only no cap lets RM3 expand.
    "lexical_feedback_max_share": 1.0,
    "semantic_feedback_chunks": 2,
    "semantic_feedback_weight": 0.4,
    "feedback_source": "fused",
    "fusion": "z_score",
    "semantic_weight": 0.6,
    "second_chunk_weight": 0.3,
    "rrf_k": 30,
}
PLAIN = {
    "lexical_feedback_chunks": 0,
    "semantic_feedback_chunks": 0,
    "fusion": "rrf",
    "semantic_weight": 0.5,
    "second_chunk_weight": 0.0,
    "rrf_k": 60,
}


def put_retrieval(api: Api, retrieval: dict[str, Any]) -> Any:
    return api.put("/v1/collections/bikes", json={**BIKE_SCHEMA, "retrieval": retrieval})


def stages_of(api: Api, body: dict[str, Any]) -> dict[str, dict[str, Any]]:
    response = api.post("/v1/collections/bikes/search", json=body)
    assert response.status_code == 200, response.text
    trace = api.get(f"/v1/traces/{response.json()['trace_id']}").json()
    return {stage["stage"]: stage for stage in trace["stages"]}


@pytest.fixture
def stocked(bikes: Api) -> Api:
    response = bikes.post("/v1/collections/bikes/documents", json={"documents": DOCUMENTS})
    assert response.status_code == 200, response.text
    return bikes


def test_every_step_is_a_setting_shown_and_a_stage_of_the_trace(stocked: Api) -> None:
    response = put_retrieval(stocked, EVERY_STEP)
    assert response.status_code == 200, response.text
    shown = stocked.get("/v1/collections/bikes").json()["retrieval"]
    assert {name: shown[name] for name in EVERY_STEP} == EVERY_STEP

    stages = stages_of(stocked, {"query": "brake pads"})
    assert list(stages) == [
        "filter",
        "query_embedding",
        "lexical",
        "semantic",
        "feedback_fusion",
        "lexical_feedback",
        "semantic_feedback",
        "fusion",
    ]
    assert stages["feedback_fusion"]["notes"]["method"] == "z_score"
    feedback = stages["lexical_feedback"]["notes"]
    assert feedback["chunks"] == 2 and feedback["query_weight"] == 0.6
    assert feedback["max_share"] == 1.0
    assert feedback["source"] == "fused"
    assert {"brake", "pad"} <= {term["term"] for term in feedback["terms"]}
    assert stages["semantic_feedback"]["notes"] == {"chunks": 2, "weight": 0.4, "source": "fused"}

    assert put_retrieval(stocked, {"feedback_source": "own"}).status_code == 200
    own = stages_of(stocked, {"query": "brake pads"})
    assert list(own) == [
        "filter",
        "query_embedding",
        "lexical",
        "lexical_feedback",
        "semantic",
        "semantic_feedback",
        "fusion",
    ]
    assert own["semantic_feedback"]["notes"]["source"] == "own"
    assert stages["fusion"]["notes"]["method"] == "z_score"
    assert stages["fusion"]["notes"]["second_chunk_weight"] == 0.3


def test_switched_off_steps_leave_plain_fusion_with_the_collections_rrf_k(stocked: Api) -> None:
    assert put_retrieval(stocked, EVERY_STEP).status_code == 200
    assert put_retrieval(stocked, PLAIN).status_code == 200
    stages = stages_of(stocked, {"query": "brake pads"})
    assert list(stages) == ["filter", "query_embedding", "lexical", "semantic", "fusion"]
    assert stages["fusion"]["notes"] == {"method": "rrf", "semantic_weight": 0.5, "rrf_k": 60}
    assert put_retrieval(stocked, {"rrf_k": 20}).status_code == 200
    assert stages_of(stocked, {"query": "brake pads"})["fusion"]["notes"]["rrf_k"] == 20
    asked = stages_of(stocked, {"query": "brake pads", "rrf_k": 45})
    assert asked["fusion"]["notes"]["rrf_k"] == 45


def test_lexical_and_semantic_modes_ignore_the_hybrid_steps(stocked: Api) -> None:
    assert put_retrieval(stocked, EVERY_STEP).status_code == 200
    assert list(stages_of(stocked, {"query": "brake pads", "mode": "lexical"})) == [
        "filter",
        "lexical",
    ]


def test_a_title_weight_reindexes_the_title_terms(stocked: Api) -> None:
    def lexical_score() -> float:
        response = stocked.post(
            "/v1/collections/bikes/search", json={"query": "tyres", "mode": "lexical"}
        )
        assert response.status_code == 200, response.text
        hit = response.json()["hits"][0]
        assert hit["document_id"] == "ridge-3"
        return float(hit["score"])

    plain = lexical_score()
    assert put_retrieval(stocked, {"title_weight": 3}).status_code == 200
    assert lexical_score() > plain


@pytest.mark.parametrize(
    ("name", "value"),
    [
        ("semantic_weight", 1.5),
        ("semantic_weight", "half"),
        ("fusion", "average"),
        ("feedback_source", "both"),
        ("lexical_feedback_chunks", -1),
        ("lexical_feedback_chunks", 2.5),
        ("lexical_feedback_terms", 0),
        ("lexical_feedback_query_weight", 2),
        ("lexical_feedback_max_share", 1.5),
        ("semantic_feedback_weight", -0.1),
        ("second_chunk_weight", 1.1),
        ("title_weight", 0),
        ("section_weight", 9),
        ("rrf_k", 0),
    ],
)
def test_a_bad_setting_is_a_422_naming_its_field(bikes: Api, name: str, value: Any) -> None:
    response = put_retrieval(bikes, {name: value})
    assert response.status_code == 422, response.text
    error = response.json()["error"]
    assert error["code"] == "invalid_request"
    assert error["field"].endswith(name)
    assert name in error["message"] or "retrieval" in error["field"]
