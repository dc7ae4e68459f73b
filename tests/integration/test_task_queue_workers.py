"""Jobs through a Celery broker: a server and two ``excerpta worker`` processes on PostgreSQL.

Two hundred Cranfield documents go in as several jobs sent without waiting. Both workers take
tasks; one is killed outright in the middle of a job, and the other finishes it from where the
store says it stopped. Every document is then stored exactly once, and the chunks and vectors
equal those of one process ingesting the same documents alone. The broker is the machine's
Redis (``EXCERPTA_TEST_BROKER_URL``); the workers use the test-only embedder, slowed down so a
job lasts long enough to be interrupted.
"""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time
import uuid
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any

import httpx
import pytest
from sqlalchemy import func, select

from service.store.db import make_engine
from service.store.tables import ChangeRow, ChunkRow, DocumentRow, EmbeddingRow
from service.usecases import collections, documents
from service.usecases.callers import LOCAL_ADMIN
from service.usecases.runtime import Runtime
from tests.api_helpers import make_key
from tests.conftest import REPO, need, postgres_schema, postgres_url_for_schema
from tests.served import ServerProcess

DOCUMENTS = 200
JOBS = 8
BATCH = 5
COLLECTION = "cranfield"
FINISH_SECONDS = 150.0


@pytest.fixture(scope="module")
def broker_url() -> str:
    url = os.environ.get("EXCERPTA_TEST_BROKER_URL", "")
    need(bool(url), "EXCERPTA_TEST_BROKER_URL is not set")
    return url


def cranfield_documents(cranfield_dir: Path) -> list[dict[str, Any]]:
    with open(cranfield_dir / "documents.jsonl", encoding="utf-8") as lines:
        return [json.loads(line) for _, line in zip(range(DOCUMENTS), lines, strict=False)]


def cranfield_spec(cranfield_dir: Path) -> collections.CollectionSpec:
    raw = json.loads((cranfield_dir / "schema.json").read_text(encoding="utf-8"))
    return collections.CollectionSpec(
        description=raw.get("description"),
        attributes=raw.get("attributes"),
        chunking=raw.get("chunking"),
    )


class WorkerProcess:
    """``python -m tests.worker_process``: ``excerpta worker`` with the test-only embedder."""

    def __init__(self, log_path: Path, environment: dict[str, str]) -> None:
        self.log_path = log_path
        with open(log_path, "ab") as log:
            self.process = subprocess.Popen(
                [sys.executable, "-m", "tests.worker_process"],
                cwd=REPO,
                env=environment,
                stdout=log,
                stderr=subprocess.STDOUT,
            )

    @property
    def name_suffix(self) -> str:
        return f":{self.process.pid}"

    def log(self) -> str:
        return self.log_path.read_text(encoding="utf-8", errors="replace")

    def wait_ready(self, deadline: float) -> None:
        while " ready." not in self.log():
            if self.process.poll() is not None or time.monotonic() > deadline:
                raise RuntimeError(f"the worker did not start:\n{self.log()}")
            time.sleep(0.1)

    def stop(self) -> None:
        if self.process.poll() is None:
            self.process.send_signal(signal.SIGTERM)
            try:
                self.process.wait(timeout=30)
            except subprocess.TimeoutExpired:
                self.process.kill()
                self.process.wait(timeout=30)


@contextmanager
def workers(count: int, data: Path, environment: dict[str, str]) -> Iterator[list[WorkerProcess]]:
    started = [WorkerProcess(data / f"worker-{n}.log", environment) for n in range(count)]
    try:
        deadline = time.monotonic() + 60
        for worker in started:
            worker.wait_ready(deadline)
        yield started
    finally:
        for worker in started:
            worker.stop()


def stored(runtime: Runtime) -> tuple[list[tuple[Any, ...]], dict[str, bytes], dict[str, int]]:
    """Every chunk of the collection, the vectors they use, and each document's upsert count."""
    with runtime.transaction() as session:
        chunks = session.execute(
            select(
                DocumentRow.external_id,
                ChunkRow.ordinal,
                ChunkRow.text,
                ChunkRow.char_start,
                ChunkRow.char_end,
                ChunkRow.tokens,
                ChunkRow.section,
                ChunkRow.embedded_text_hash,
            )
            .join(DocumentRow, ChunkRow.document_id == DocumentRow.id)
            .order_by(DocumentRow.external_id, ChunkRow.ordinal)
        ).all()
        hashes = sorted({row.embedded_text_hash for row in chunks})
        vectors = dict(
            session.execute(
                select(EmbeddingRow.text_hash, EmbeddingRow.vector).where(
                    EmbeddingRow.text_hash.in_(hashes)
                )
            ).all()
        )
        upserts = dict(
            session.execute(
                select(ChangeRow.document_id, func.count())
                .where(ChangeRow.operation == "upsert")
                .group_by(ChangeRow.document_id)
            ).all()
        )
    return [tuple(row) for row in chunks], vectors, upserts


def test_two_workers_share_the_jobs_and_a_killed_workers_job_is_finished_by_the_other(
    tmp_path: Path,
    make_runtime: Callable[..., Runtime],
    postgres_url: str,
    broker_url: str,
    cranfield_dir: Path,
) -> None:
    sent = cranfield_documents(cranfield_dir)
    assert len(sent) == DOCUMENTS
    spec = cranfield_spec(cranfield_dir)

    alone = make_runtime(data_dir=tmp_path / "alone")
    collections.put_collection(alone, LOCAL_ADMIN, COLLECTION, spec)
    documents.upsert_documents(alone, LOCAL_ADMIN, COLLECTION, sent)
    expected_chunks, expected_vectors, _ = stored(alone)

    data = tmp_path / "data"
    data.mkdir()
    with postgres_schema(postgres_url) as schema:
        url = postgres_url_for_schema(postgres_url, schema)
        shared = make_runtime(engine=make_engine(postgres_url, schema=schema), data_dir=data)
        collections.put_collection(shared, LOCAL_ADMIN, COLLECTION, spec)
        key = make_key(shared, "writer", name="loader")
        admin_key = make_key(shared, "admin", name="watcher")
        queue = f"excerpta-test-{uuid.uuid4().hex[:12]}"
        queue_settings = {
            "EXCERPTA_BROKER_URL": broker_url,
            "EXCERPTA_BROKER_QUEUE": queue,
            # A killed worker's task goes back to the broker after this long ...
            "EXCERPTA_BROKER_VISIBILITY_SECONDS": "6",
            # ... and its claim on the job runs out after this long.
            "EXCERPTA_JOB_LEASE_SECONDS": "3",
        }
        server = ServerProcess(
            data,
            url,
            test_job_workers="1",
            job_batch_documents=str(BATCH),
            **{
                name.removeprefix("EXCERPTA_").lower(): value
                for name, value in queue_settings.items()
            },
        )
        worker_environment = {
            **os.environ,
            **queue_settings,
            "EXCERPTA_DATA_DIR": str(data),
            "EXCERPTA_DATABASE_URL": url,
            "EXCERPTA_TEST_EMBED_PAUSE_SECONDS": "0.25",
        }
        server.start()
        try:
            with workers(2, data, worker_environment) as (first, second):
                job_ids = send_jobs(server.base_url, key, sent)
                with httpx.Client(
                    base_url=server.base_url,
                    headers={"Authorization": f"Bearer {admin_key}"},
                    timeout=30,
                ) as watcher:
                    interrupted = kill_mid_job(watcher, first, second)
                    finished = wait_all_done(watcher, job_ids)
                    logs = first.log() + second.log()
        finally:
            server.stop()

        assert all(job["state"] == "done" for job in finished.values()), (finished, logs)
        # Both workers were seen running a job at once before one was killed; the killed
        # worker's job was finished by the other.
        survivor = interrupted["survivor"]
        taken_over = finished[interrupted["job_id"]]
        assert taken_over["worker"].endswith(survivor.name_suffix)
        ran_by = {job["worker"].rsplit(":", 1)[1] for job in finished.values()}
        assert ran_by <= {str(first.process.pid), str(second.process.pid)}
        assert sum(job["counts"]["documents_done"] for job in finished.values()) == DOCUMENTS
        results = [r for job in finished.values() for r in job["results"]]
        assert sorted(r["id"] for r in results) == sorted(d["id"] for d in sent)
        assert {r["status"] for r in results} == {"created"}

        chunks, vectors, upserts = stored(shared)
        assert upserts == {d["id"]: 1 for d in sent}
        assert chunks == expected_chunks
        assert vectors == expected_vectors


def send_jobs(base_url: str, key: str, sent: list[dict[str, Any]]) -> list[str]:
    size = len(sent) // JOBS
    job_ids = []
    with httpx.Client(
        base_url=base_url, headers={"Authorization": f"Bearer {key}"}, timeout=30
    ) as client:
        for start in range(0, len(sent), size):
            response = client.post(
                f"/v1/collections/{COLLECTION}/documents",
                json={"documents": sent[start : start + size], "wait": False},
            )
            assert response.status_code == 202, response.text
            job_ids.append(response.json()["job_id"])
    return job_ids


def kill_mid_job(
    watcher: httpx.Client, first: WorkerProcess, second: WorkerProcess
) -> dict[str, Any]:
    """SIGKILL whichever worker is first seen half-way through a job, once both have taken
    one; returns that job's id, the killed worker's pid and the worker left."""
    deadline = time.monotonic() + 60
    while time.monotonic() < deadline:
        running = watcher.get("/v1/jobs", params={"state": "running"}).json()["jobs"]
        by = {job["worker"].rsplit(":", 1)[1]: job for job in running if job["worker"]}
        pids = {str(first.process.pid), str(second.process.pid)}
        if pids <= set(by):
            for victim, survivor in ((first, second), (second, first)):
                job = by[str(victim.process.pid)]
                done = job["counts"]["documents_done"]
                if 0 < done < job["counts"]["documents"]:
                    victim.process.send_signal(signal.SIGKILL)
                    victim.process.wait(timeout=30)
                    return {
                        "job_id": job["job_id"],
                        "victim_pid": victim.process.pid,
                        "survivor": survivor,
                    }
        time.sleep(0.05)
    raise AssertionError("no worker was seen half-way through a job while both were busy")


def wait_all_done(watcher: httpx.Client, job_ids: list[str]) -> dict[str, dict[str, Any]]:
    deadline = time.monotonic() + FINISH_SECONDS
    while True:
        jobs = {job_id: watcher.get(f"/v1/jobs/{job_id}").json() for job_id in job_ids}
        if all(job["state"] in ("done", "failed", "cancelled") for job in jobs.values()):
            return jobs
        if time.monotonic() > deadline:
            return jobs
        time.sleep(0.5)
