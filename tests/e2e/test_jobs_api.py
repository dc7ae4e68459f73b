"""Document writes as jobs through the HTTP API: states, progress, cancelling, access, failures.

These runtimes leave jobs in the store (no worker process), and the test runs each job where
it wants to watch it, with ``run_next_job``, as a worker would.
"""

from __future__ import annotations

from collections.abc import Callable, Iterator, Sequence
from typing import Any

import numpy as np
import pytest
from fastapi.testclient import TestClient

from service.api.app import create_app
from service.usecases.job_queues import StoreQueue
from service.usecases.jobs import run_next_job
from service.usecases.runtime import Runtime
from tests.api_helpers import BIKE_SCHEMA, Api, make_key
from tests.hashing_embedder import HashingTestEmbedder

DOCUMENTS = "/v1/collections/bikes/documents"


class WatchedEmbedder(HashingTestEmbedder):
    """Calls ``during(n)`` before its n-th embedding call (from 1), i.e. in the n-th batch."""

    def __init__(self) -> None:
        super().__init__()
        self.during: Callable[[int], None] = lambda _: None

    def embed_documents(self, texts: Sequence[str]) -> np.ndarray:
        self.during(self.calls + 1)
        return super().embed_documents(texts)


def manual(number: int) -> dict[str, Any]:
    return {
        "id": f"manual-{number}",
        "title": f"Manual {number}",
        "text": f"Manual {number}: check the brake pads and the chain number {number} weekly.",
        "attributes": {"model": "Ridge", "model_year": 2020 + number},
    }


@pytest.fixture
def embedder() -> WatchedEmbedder:
    return WatchedEmbedder()


@pytest.fixture
def queued_runtime(make_runtime: Callable[..., Runtime], embedder: WatchedEmbedder) -> Runtime:
    return make_runtime(embedder=embedder, jobs=StoreQueue(), job_batch_documents=2)


@pytest.fixture
def admin(queued_runtime: Runtime) -> Iterator[Api]:
    with TestClient(create_app(queued_runtime)) as client:
        api = Api(client, make_key(queued_runtime, "admin", name="admin"))
        assert api.put("/v1/collections/bikes", json=BIKE_SCHEMA).status_code == 201
        yield api


@pytest.fixture
def writer(admin: Api, queued_runtime: Runtime) -> Api:
    return admin.as_key(make_key(queued_runtime, "writer", name="writer-a"))


def send(api: Api, *documents: dict[str, Any]) -> str:
    response = api.post(DOCUMENTS, json={"documents": list(documents), "wait": False})
    assert response.status_code == 202, response.text
    assert response.json()["status"] == "queued"
    return str(response.json()["job_id"])


def run_one(runtime: Runtime) -> None:
    assert run_next_job(runtime, worker="test-worker")


def test_a_job_sent_without_waiting_is_queued_then_done_with_each_documents_result(
    writer: Api, queued_runtime: Runtime
) -> None:
    job_id = send(writer, *(manual(n) for n in range(5)))
    queued = writer.get(f"/v1/jobs/{job_id}").json()
    assert queued["state"] == "queued" and queued["started_at"] is None
    assert queued["counts"] == {
        "documents": 5,
        "documents_done": 0,
        "chunks": 0,
        "embedded": 0,
        "cached": 0,
    }
    assert queued["key"] == "writer-a" and queued["collection"] == "bikes"
    assert writer.get(f"{DOCUMENTS}/manual-0").status_code == 404

    run_one(queued_runtime)

    done = writer.get(f"/v1/jobs/{job_id}").json()
    assert done["state"] == "done" and done["error"] is None and done["errors"] == []
    assert done["started_at"] <= done["finished_at"]
    assert [(r["id"], r["index"], r["status"]) for r in done["results"]] == [
        (f"manual-{n}", n, "created") for n in range(5)
    ]
    assert done["counts"]["documents_done"] == 5
    assert done["counts"]["chunks"] == sum(r["chunks"] for r in done["results"]) >= 5
    assert done["counts"]["embedded"] == done["counts"]["chunks"]
    assert writer.get(f"{DOCUMENTS}/manual-4").status_code == 200
    listed = writer.get("/v1/jobs", params={"state": "done", "collection": "bikes"}).json()
    assert [job["job_id"] for job in listed["jobs"]] == [job_id]
    assert writer.get("/v1/jobs", params={"state": "queued"}).json()["jobs"] == []


def test_a_job_sent_again_embeds_nothing_and_reports_each_document_unchanged(
    writer: Api, queued_runtime: Runtime
) -> None:
    send(writer, manual(1), manual(2))
    run_one(queued_runtime)
    again = send(writer, manual(1), manual(2))
    run_one(queued_runtime)
    job = writer.get(f"/v1/jobs/{again}").json()
    assert [r["status"] for r in job["results"]] == ["unchanged", "unchanged"]
    assert job["counts"]["embedded"] == 0


def test_a_running_job_shows_its_progress_batch_by_batch(
    writer: Api, queued_runtime: Runtime, embedder: WatchedEmbedder
) -> None:
    job_id = send(writer, *(manual(n) for n in range(5)))
    seen: dict[int, dict[str, Any]] = {}
    embedder.during = lambda call: seen.setdefault(call, writer.get(f"/v1/jobs/{job_id}").json())
    run_one(queued_runtime)
    assert [seen[call]["state"] for call in (1, 2, 3)] == ["running"] * 3
    assert [seen[call]["counts"]["documents_done"] for call in (1, 2, 3)] == [0, 2, 4]
    assert [len(seen[call]["results"]) for call in (1, 2, 3)] == [0, 2, 4]
    assert writer.get(f"/v1/jobs/{job_id}").json()["counts"]["documents_done"] == 5


def test_a_queued_job_is_cancelled_at_once_and_never_runs(
    writer: Api, queued_runtime: Runtime
) -> None:
    job_id = send(writer, manual(1))
    response = writer.delete(f"/v1/jobs/{job_id}")
    assert response.status_code == 200, response.text
    assert response.json()["state"] == "cancelled"
    assert not run_next_job(queued_runtime, worker="test-worker")
    assert writer.get(f"{DOCUMENTS}/manual-1").status_code == 404
    again = writer.delete(f"/v1/jobs/{job_id}")
    assert again.status_code == 409 and again.json()["error"]["code"] == "conflict"


def test_a_running_job_stops_at_the_next_batch_boundary_keeping_what_it_wrote(
    writer: Api, queued_runtime: Runtime, embedder: WatchedEmbedder
) -> None:
    job_id = send(writer, *(manual(n) for n in range(5)))
    cancels: list[dict[str, Any]] = []
    embedder.during = lambda call: (
        cancels.append(writer.delete(f"/v1/jobs/{job_id}").json()) if call == 2 else None
    )
    run_one(queued_runtime)
    assert cancels[0]["state"] == "running" and cancels[0]["cancel_requested"] is True
    job = writer.get(f"/v1/jobs/{job_id}").json()
    assert job["state"] == "cancelled" and job["counts"]["documents_done"] == 4
    assert [r["id"] for r in job["results"]] == [f"manual-{n}" for n in range(4)]
    assert writer.get(f"{DOCUMENTS}/manual-3").status_code == 200
    assert writer.get(f"{DOCUMENTS}/manual-4").status_code == 404


def test_a_job_is_seen_only_by_its_key_and_admins_others_get_the_missing_jobs_404(
    admin: Api, writer: Api, queued_runtime: Runtime
) -> None:
    job_id = send(writer, manual(1))
    reader = admin.as_key(make_key(queued_runtime, "reader", name="reader"))
    other_writer = admin.as_key(make_key(queued_runtime, "writer", name="writer-b"))
    missing = reader.get("/v1/jobs/00000000-0000-0000-0000-000000000000")
    assert missing.status_code == 404 and missing.json()["error"]["code"] == "job_not_found"
    for outsider in (reader, other_writer):
        hidden = outsider.get(f"/v1/jobs/{job_id}")
        assert hidden.status_code == 404
        assert hidden.json()["error"]["code"] == "job_not_found"
        assert hidden.json()["error"]["message"] == f"Job {job_id!r} does not exist."
        assert outsider.delete(f"/v1/jobs/{job_id}").status_code == 404
        assert outsider.get("/v1/jobs").json()["jobs"] == []
    assert admin.get(f"/v1/jobs/{job_id}").status_code == 200
    assert [job["job_id"] for job in admin.get("/v1/jobs").json()["jobs"]] == [job_id]
    assert writer.get("/v1/jobs", params={"state": "finished"}).status_code == 422


def test_a_batch_with_an_invalid_document_is_refused_at_once_and_makes_no_job(
    writer: Api,
) -> None:
    bad = {**manual(2), "attributes": {"colour": "red"}}
    response = writer.post(DOCUMENTS, json={"documents": [manual(1), bad], "wait": False})
    assert response.status_code == 422, response.text
    assert response.json()["error"]["code"] == "invalid_documents"
    assert [(d["id"], d["index"]) for d in response.json()["error"]["documents"]] == [
        ("manual-2", 1)
    ]
    assert writer.get("/v1/jobs").json()["jobs"] == []


def test_a_document_the_collection_no_longer_takes_fails_its_job_which_names_it(
    admin: Api, writer: Api, queued_runtime: Runtime
) -> None:
    plain = [{**manual(n), "attributes": {"model_year": 2020}} for n in (1, 3)]
    job_id = send(writer, plain[0], manual(2), plain[1])
    removed = admin.put("/v1/collections/bikes", json={"remove_attributes": ["model"]})
    assert removed.status_code == 200, removed.text
    run_one(queued_runtime)
    job = writer.get(f"/v1/jobs/{job_id}").json()
    assert job["state"] == "failed"
    assert job["error"]["code"] == "invalid_documents"
    assert [(e["id"], e["index"], e["reason"]) for e in job["errors"]] == [
        ("manual-2", 1, "unknown_attribute")
    ]
    assert job["results"] == [] and job["counts"]["documents_done"] == 0
    assert writer.get(f"{DOCUMENTS}/manual-1").status_code == 404


def test_a_job_whose_collection_went_away_fails_with_the_collections_error(
    admin: Api, writer: Api, queued_runtime: Runtime
) -> None:
    job_id = send(writer, manual(1))
    assert admin.delete("/v1/collections/bikes").status_code == 204
    run_one(queued_runtime)
    job = writer.get(f"/v1/jobs/{job_id}").json()
    assert job["state"] == "failed" and job["error"]["code"] == "collection_not_found"


def test_waiting_for_a_job_answers_with_the_batch_results_or_its_error(
    make_runtime: Callable[..., Runtime],
) -> None:
    runtime = make_runtime(job_batch_documents=2)
    with TestClient(create_app(runtime)) as client:
        api = Api(client, make_key(runtime, "admin", name="admin"))
        assert api.put("/v1/collections/bikes", json=BIKE_SCHEMA).status_code == 201
        response = api.post(DOCUMENTS, json={"documents": [manual(n) for n in range(3)]})
        assert response.status_code == 200, response.text
        assert [r["status"] for r in response.json()["results"]] == ["created"] * 3
        assert set(response.json()["results"][0]) == {"id", "status", "chunks"}
        bad = api.post(DOCUMENTS, json={"documents": [{"id": "x", "text": ""}], "wait": True})
        assert bad.status_code == 422 and bad.json()["error"]["code"] == "invalid_documents"
        [job] = api.get("/v1/jobs").json()["jobs"]
        assert job["state"] == "done" and job["counts"]["documents_done"] == 3


def test_a_worker_told_to_stop_puts_its_job_back_at_a_batch_boundary_for_the_next_one(
    writer: Api, queued_runtime: Runtime, embedder: WatchedEmbedder
) -> None:
    job_id = send(writer, *(manual(n) for n in range(5)))
    stopping: list[bool] = []
    embedder.during = lambda call: stopping.append(True) if call == 2 else None
    assert run_next_job(queued_runtime, worker="stopping-worker", should_stop=lambda: any(stopping))
    paused = writer.get(f"/v1/jobs/{job_id}").json()
    assert paused["state"] == "queued" and paused["counts"]["documents_done"] == 4
    assert paused["finished_at"] is None
    run_one(queued_runtime)
    done = writer.get(f"/v1/jobs/{job_id}").json()
    assert done["state"] == "done" and done["worker"] == "test-worker"
    assert [r["index"] for r in done["results"]] == [0, 1, 2, 3, 4]


def long_manual(number: int) -> dict[str, Any]:
    steps = " ".join(
        f"Step {s}: tighten bolt {s} of frame {number} to the torque." for s in range(8)
    )
    return {**manual(number), "text": steps}


def test_a_delete_by_filter_is_a_job_that_records_each_deleted_document(
    writer: Api, queued_runtime: Runtime
) -> None:
    send(writer, *(manual(n) for n in range(4)))
    run_one(queued_runtime)
    sent = writer.delete(DOCUMENTS, params={"filter": "model_year >= 2022", "wait": "false"})
    assert sent.status_code == 202, sent.text
    job_id = sent.json()["job_id"]
    queued = writer.get(f"/v1/jobs/{job_id}").json()
    assert (queued["kind"], queued["state"]) == ("delete", "queued")
    assert writer.get(f"{DOCUMENTS}/manual-3").status_code == 200

    run_one(queued_runtime)

    done = writer.get(f"/v1/jobs/{job_id}").json()
    assert done["state"] == "done" and done["error"] is None
    assert sorted((r["id"], r["status"]) for r in done["results"]) == [
        ("manual-2", "deleted"),
        ("manual-3", "deleted"),
    ]
    assert done["counts"]["documents"] == done["counts"]["documents_done"] == 2
    assert writer.get(f"{DOCUMENTS}/manual-3").status_code == 404
    assert writer.get(f"{DOCUMENTS}/manual-1").status_code == 200
    kinds = [job["kind"] for job in writer.get("/v1/jobs", params={"state": "done"}).json()["jobs"]]
    assert kinds == ["delete", "upsert"]

    refused = writer.delete(DOCUMENTS, params={"filter": "colour = 'red'", "wait": "false"})
    assert refused.status_code == 400
    assert refused.json()["error"]["code"] == "filter_unknown_attribute"
    assert writer.delete(DOCUMENTS, params={"filter": " "}).status_code == 422
    assert len(writer.get("/v1/jobs").json()["jobs"]) == 2


def test_a_delete_by_filter_that_waits_answers_with_the_count_its_job_recorded(
    make_runtime: Callable[..., Runtime],
) -> None:
    runtime = make_runtime()
    with TestClient(create_app(runtime)) as client:
        admin = Api(client, make_key(runtime, "admin", name="admin"))
        assert admin.put("/v1/collections/bikes", json=BIKE_SCHEMA).status_code == 201
        documents = {"documents": [manual(n) for n in range(3)]}
        assert admin.post(DOCUMENTS, json=documents).status_code == 200
        deleted = admin.delete(DOCUMENTS, params={"filter": "model_year < 2022"})
        assert deleted.status_code == 200 and deleted.json() == {"deleted": 2}
        [job] = admin.get("/v1/jobs", params={"state": "done", "collection": "bikes"}).json()[
            "jobs"
        ][:1]
        assert job["kind"] == "delete" and job["counts"]["documents_done"] == 2


def test_a_changed_chunking_is_a_rechunk_job_that_a_worker_runs_and_none_may_cancel(
    admin: Api, writer: Api, queued_runtime: Runtime
) -> None:
    send(writer, *(long_manual(n) for n in range(3)))
    run_one(queued_runtime)
    before = admin.get("/v1/collections/bikes").json()["chunks"]
    finer = {**BIKE_SCHEMA, "chunking": {"max_tokens": 24, "overlap_tokens": 0}}
    assert admin.put("/v1/collections/bikes", json=finer).status_code == 200
    [job] = admin.get("/v1/jobs", params={"state": "queued"}).json()["jobs"]
    assert (job["kind"], job["key"], job["counts"]["documents"]) == ("rechunk", "admin", 3)
    assert writer.get(f"/v1/jobs/{job['job_id']}").status_code == 404
    refused = admin.delete(f"/v1/jobs/{job['job_id']}")
    assert refused.status_code == 409 and refused.json()["error"]["code"] == "conflict"
    # A second change while the first is pending goes on in the same job.
    finest = {**BIKE_SCHEMA, "chunking": {"max_tokens": 16, "overlap_tokens": 0}}
    assert admin.put("/v1/collections/bikes", json=finest).status_code == 200
    assert len(admin.get("/v1/jobs", params={"state": "queued"}).json()["jobs"]) == 1
    assert admin.get("/v1/collections/bikes").json()["chunks"] == before

    run_one(queued_runtime)

    done = admin.get(f"/v1/jobs/{job['job_id']}").json()
    collection = admin.get("/v1/collections/bikes").json()
    assert done["state"] == "done" and done["started_at"] <= done["finished_at"]
    assert done["counts"]["documents_done"] == done["counts"]["documents"] == 3
    [switched] = done["results"]
    assert (switched["status"], switched["chunks"]) == ("switched", collection["chunks"])
    assert done["counts"]["chunks"] == collection["chunks"] > before
    assert collection["chunking"]["max_tokens"] == 16 and collection.get("rebuild") is None


def test_putting_the_chunking_back_cancels_the_rechunk_job(
    admin: Api, writer: Api, queued_runtime: Runtime
) -> None:
    send(writer, long_manual(1))
    run_one(queued_runtime)
    finer = {**BIKE_SCHEMA, "chunking": {"max_tokens": 16, "overlap_tokens": 0}}
    assert admin.put("/v1/collections/bikes", json=finer).status_code == 200
    assert admin.put("/v1/collections/bikes", json=BIKE_SCHEMA).status_code == 200
    [job] = admin.get("/v1/jobs", params={"collection": "bikes"}).json()["jobs"][:1]
    assert (job["kind"], job["state"]) == ("rechunk", "cancelled")
    assert not run_next_job(queued_runtime, worker="test-worker")


def test_a_rechunk_job_of_a_process_that_runs_its_own_jobs_moves_with_its_rebuild_thread(
    make_runtime: Callable[..., Runtime],
) -> None:
    runtime = make_runtime()
    with TestClient(create_app(runtime)) as client:
        admin = Api(client, make_key(runtime, "admin", name="admin"))
        assert admin.put("/v1/collections/bikes", json=BIKE_SCHEMA).status_code == 201
        documents = {"documents": [long_manual(n) for n in range(2)]}
        assert admin.post(DOCUMENTS, json=documents).status_code == 200
        finer = {**BIKE_SCHEMA, "chunking": {"max_tokens": 16, "overlap_tokens": 0}}
        assert admin.put("/v1/collections/bikes", json=finer).status_code == 200
        assert runtime.rebuilds.wait(30)
        [job] = admin.get("/v1/jobs", params={"collection": "bikes"}).json()["jobs"][:1]
        assert (job["kind"], job["state"]) == ("rechunk", "done")
        assert job["counts"]["documents_done"] == 2
        assert job["results"][0]["chunks"] == admin.get("/v1/collections/bikes").json()["chunks"]
