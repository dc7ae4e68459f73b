"""A query takes its collection's caution and citation attributes from the index registry.

A change made through this process must show in the very next answer, however long the poll
interval; a change made by another process must show once the registry next checks the store.
"""

from __future__ import annotations

from collections.abc import Callable, Iterator

import pytest
from fastapi.testclient import TestClient

from service.api.app import create_app
from service.usecases.runtime import Runtime
from tests.api_helpers import BIKE_SCHEMA, Api, make_key

NEW_CAUTION = "Follow the workshop's lockout rules before any repair."
AN_HOUR_MS = 3_600_000


def _caution(api: Api) -> str | None:
    response = api.post("/v1/collections/bikes/answer", json={"query": "brake pads"})
    assert response.status_code == 200, response.text
    caution: str | None = response.json()["caution"]
    return caution


def test_a_caution_changed_here_shows_in_the_next_answer_despite_a_long_poll(
    make_runtime: Callable[..., Runtime],
) -> None:
    runtime = make_runtime(index_poll_ms=AN_HOUR_MS)
    with TestClient(create_app(runtime)) as client:
        api = Api(client, make_key(runtime, "admin", name="admin"))
        assert api.put("/v1/collections/bikes", json=BIKE_SCHEMA).status_code == 201
        assert _caution(api) == BIKE_SCHEMA["answer_caution"]

        changed = {**BIKE_SCHEMA, "answer_caution": NEW_CAUTION}
        assert api.put("/v1/collections/bikes", json=changed).status_code == 200

        assert _caution(api) == NEW_CAUTION


@pytest.fixture
def two_processes(make_runtime: Callable[..., Runtime]) -> Iterator[tuple[Api, Api]]:
    """One admin key on two servers over one store: the one under test, and another process."""
    serving = make_runtime(index_poll_ms=0)
    other = make_runtime(index_poll_ms=0)
    key = make_key(serving, "admin", name="admin")
    with (
        TestClient(create_app(serving)) as serving_client,
        TestClient(create_app(other)) as other_client,
    ):
        api = Api(serving_client, key)
        assert api.put("/v1/collections/bikes", json=BIKE_SCHEMA).status_code == 201
        assert _caution(api) == BIKE_SCHEMA["answer_caution"]
        yield api, Api(other_client, key)


def test_a_caution_changed_by_another_process_shows_after_the_next_check(
    two_processes: tuple[Api, Api],
) -> None:
    api, elsewhere = two_processes
    changed = {**BIKE_SCHEMA, "answer_caution": NEW_CAUTION}
    assert elsewhere.put("/v1/collections/bikes", json=changed).status_code == 200

    assert _caution(api) == NEW_CAUTION


def test_a_collection_deleted_and_made_again_elsewhere_is_served_afresh(
    two_processes: tuple[Api, Api],
) -> None:
    api, elsewhere = two_processes
    assert elsewhere.delete("/v1/collections/bikes").status_code == 204
    missing = api.post("/v1/collections/bikes/answer", json={"query": "brake pads"})
    assert missing.status_code == 404
    assert missing.json()["error"]["code"] == "collection_not_found"

    remade = {**BIKE_SCHEMA, "answer_caution": NEW_CAUTION}
    assert elsewhere.put("/v1/collections/bikes", json=remade).status_code == 201
    assert _caution(api) == NEW_CAUTION
