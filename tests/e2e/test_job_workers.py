"""``excerpta serve`` runs document jobs in a worker process of its own, never in itself."""

from __future__ import annotations

import os
import signal
import time
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from pathlib import Path

import httpx

from service.usecases.runtime import Runtime
from tests.api_helpers import make_key
from tests.served import ServerProcess

COLLECTION = "/v1/collections/notes"


@contextmanager
def served_with_worker(
    tmp_path: Path, make_runtime: Callable[..., Runtime], store_url: str, *, timeout: float = 60
) -> Iterator[tuple[ServerProcess, httpx.Client]]:
    """A server process with its one local worker, and a client holding an admin key."""
    data = tmp_path / "data"
    key = make_key(make_runtime(data_dir=data, database_url=store_url), "admin", name="admin")
    server = ServerProcess(data, store_url, test_job_workers="1", job_poll_ms="2000")
    server.start()
    headers = {"Authorization": f"Bearer {key}"}
    try:
        with httpx.Client(base_url=server.base_url, headers=headers, timeout=timeout) as client:
            yield server, client
    finally:
        server.stop()


def test_a_servers_jobs_run_in_its_worker_process_and_their_writes_are_searchable_at_once(
    tmp_path: Path, make_runtime: Callable[..., Runtime], store_url: str
) -> None:
    with served_with_worker(tmp_path, make_runtime, store_url) as (server, client):
        assert client.put(COLLECTION, json={}).status_code == 201
        notes = [{"id": f"note-{n}", "text": f"saddle height note {n}"} for n in range(3)]
        waited = client.post(f"{COLLECTION}/documents", json={"documents": notes})
        assert waited.status_code == 200, waited.text
        assert [r["status"] for r in waited.json()["results"]] == ["created"] * 3
        found = client.post(f"{COLLECTION}/search", json={"query": "saddle", "mode": "lexical"})
        assert {hit["document_id"] for hit in found.json()["hits"]} == {
            "note-0",
            "note-1",
            "note-2",
        }

        later = {"id": "note-9", "text": "chain wear note"}
        sent = client.post(f"{COLLECTION}/documents", json={"documents": [later], "wait": False})
        assert sent.status_code == 202, sent.text
        job_id = sent.json()["job_id"]
        deadline = time.monotonic() + 30
        job = client.get(f"/v1/jobs/{job_id}").json()
        while job["state"] != "done" and time.monotonic() < deadline:
            time.sleep(0.05)
            job = client.get(f"/v1/jobs/{job_id}").json()
        assert job["state"] == "done", job

        jobs = client.get("/v1/jobs", params={"collection": "notes"}).json()["jobs"]
        assert len(jobs) == 2
        assert server.process is not None
        workers = {job["worker"] for job in jobs}
        assert len(workers) == 1
        assert not workers.pop().endswith(f":{server.process.pid}")


def test_a_server_whose_worker_was_killed_still_takes_jobs_and_stops_at_once(
    tmp_path: Path, make_runtime: Callable[..., Runtime], store_url: str
) -> None:
    # A worker killed while it waits for work (the out-of-memory killer, an operator) must
    # leave nothing behind that blocks the server: not the next job's wake-up, not the stop.
    with served_with_worker(tmp_path, make_runtime, store_url, timeout=15) as (server, client):
        assert client.put(COLLECTION, json={}).status_code == 201
        first = {"documents": [{"id": "note-1", "text": "brake pad wear"}]}
        assert client.post(f"{COLLECTION}/documents", json=first).status_code == 200
        (job,) = client.get("/v1/jobs", params={"collection": "notes"}).json()["jobs"]
        worker_pid = int(job["worker"].rsplit(":", 1)[1])
        time.sleep(0.5)  # the worker is back in its idle wait
        os.kill(worker_pid, signal.SIGKILL)

        later = {"documents": [{"id": "note-2", "text": "chain wear"}], "wait": False}
        sent = client.post(f"{COLLECTION}/documents", json=later)
        assert sent.status_code == 202, sent.text
        client.close()
        started = time.monotonic()
        assert server.terminate(timeout=20) == 0
        assert time.monotonic() - started < 10, server.log()


def test_a_servers_rechunking_runs_in_its_worker_process_as_a_job(
    tmp_path: Path, make_runtime: Callable[..., Runtime], store_url: str
) -> None:
    with served_with_worker(tmp_path, make_runtime, store_url) as (server, client):
        coarse = {"chunking": {"max_tokens": 64, "overlap_tokens": 0}}
        assert client.put(COLLECTION, json=coarse).status_code == 201
        text = " ".join(f"Step {n}: true the wheel at spoke {n}." for n in range(20))
        notes = [{"id": f"note-{n}", "text": text} for n in range(2)]
        assert client.post(f"{COLLECTION}/documents", json={"documents": notes}).is_success
        before = client.get(COLLECTION).json()["chunks"]
        fine = {"chunking": {"max_tokens": 16, "overlap_tokens": 0}}
        assert client.put(COLLECTION, json=fine).status_code == 200
        deadline = time.monotonic() + 30
        [job] = client.get("/v1/jobs", params={"collection": "notes"}).json()["jobs"][:1]
        while job["state"] != "done" and time.monotonic() < deadline:
            time.sleep(0.05)
            job = client.get(f"/v1/jobs/{job['job_id']}").json()
        assert (job["kind"], job["state"]) == ("rechunk", "done"), job
        assert server.process is not None
        assert not job["worker"].endswith(f":{server.process.pid}")
        # The worker yields the CPU to the server's queries (EXCERPTA_WORKER_NICE, 10).
        worker_pid = int(job["worker"].rsplit(":", 1)[1])
        served_at = os.getpriority(os.PRIO_PROCESS, server.process.pid)
        assert os.getpriority(os.PRIO_PROCESS, worker_pid) == min(19, served_at + 10)
        after = client.get(COLLECTION).json()
        assert after["chunks"] > before and after["chunking"]["max_tokens"] == 16
