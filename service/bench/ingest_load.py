"""Ingestion beside queries, and ingestion throughput by worker count, with the real model.

``excerpta bench --http --with-ingest``: the server of ``--http`` (the synthetic collection,
hybrid searches carrying ``query_vector``) also serves a second collection into which real
text is sent continuously, as a user would send it (``POST .../documents`` with
``"wait": false``), and which the server's own worker process embeds with the bundled model.
Each concurrency level is driven in rounds of an idle window and an ingest window, so both
figures come from the same stretches of time on a machine whose speed drifts; before an idle
window the queued jobs are cancelled and the running one stops at its batch boundary.

``excerpta bench --ingest-throughput``: a fixed set of real documents sent as jobs to a scratch
store and run by 1, 2, ... ``excerpta worker`` processes (one torch thread each); the rate is
the stored chunks over the time from the first job's start to the last one's end, as the jobs
record them, so the workers' start-up and model loading are not counted.
"""

from __future__ import annotations

import math
import os
import signal
import subprocess
import sys
import tempfile
import threading
import time
from collections.abc import Iterator, Sequence
from pathlib import Path
from typing import Any

import httpx

from service.bench.client import KeepAliveClient
from service.bench.http import (
    EMBEDDER_DIMENSIONS,
    FIRST_QUERY_TIMEOUT_SECONDS,
    READY_TIMEOUT_SECONDS,
    STOP_TIMEOUT_SECONDS,
    Progress,
    Samples,
    Server,
    free_port,
    level_figures,
    request_bodies,
    samples,
    search_requests,
    write_collection,
)
from service.bench.synthetic import QuerySet, make_collection
from service.config import Settings
from service.ingest.source_files import read_source
from service.usecases import jobs, keys
from service.usecases.callers import LOCAL_ADMIN
from service.usecases.collections import CollectionSpec, put_collection
from service.usecases.job_queues import StoreQueue
from service.usecases.runtime import Runtime, embedder_on_first_use

INGEST_COLLECTION = "ingest"
# Documents per job the feeder sends, and per batch (one write transaction) of the server's
# worker: one document a batch lets an idle window begin soon after the feeder pauses, and the
# chunks stored in a window are counted to the document.
FEED_JOB_DOCUMENTS = 16
FEED_BATCH_DOCUMENTS = 1
FEED_JOBS_AHEAD = 2
FEED_POLL_SECONDS = 0.2
WARM_UP_TIMEOUT_SECONDS = 300.0
PAUSE_TIMEOUT_SECONDS = 120.0
ROUNDS = 2
THROUGHPUT_JOB_DOCUMENTS = 8
WORKER_READY_TIMEOUT_SECONDS = 300.0
THROUGHPUT_TIMEOUT_SECONDS = 1800.0
WORKER_READY_LINE = "takes jobs from the store"
CHUNKS_IN_AN_HOUR = 1_000_000


def real_documents(sources: Sequence[Path], limit: int | None = None) -> list[dict[str, Any]]:
    """The documents of each source (a folder or a .jsonl, as ``excerpta ingest`` reads them),
    with their id, title, text and media type only, so any collection takes them."""
    found: list[dict[str, Any]] = []
    for source in sources:
        for item in read_source(source):
            if item.document is None:
                continue
            document = item.document
            found.append(
                {
                    "id": str(document["id"]),
                    "title": document.get("title") or str(document["id"]),
                    "text": document["text"],
                    "media_type": document.get("media_type", "text/plain"),
                }
            )
    if not found:
        raise ValueError("the ingest sources hold no document")
    return found if limit is None else found[:limit]


def passes(documents: Sequence[dict[str, Any]]) -> Iterator[dict[str, Any]]:
    """The documents again and again, each pass under new ids and with its number in every
    title, so each chunk's embedded text is new and nothing comes from the embedding cache."""
    number = 0
    while True:
        number += 1
        for document in documents:
            yield {
                **document,
                "id": f"p{number}:{document['id']}"[:128],
                "title": f"{document['title']} (pass {number})",
            }


class IngestFeeder:
    """Keeps ``FEED_JOBS_AHEAD`` jobs of real text queued or running on the server, sent over
    the API with ``"wait": false``; ``pause`` cancels them and returns once none runs."""

    def __init__(self, base_url: str, key: str, documents: Sequence[dict[str, Any]]) -> None:
        self._client = httpx.Client(
            base_url=base_url, headers={"Authorization": f"Bearer {key}"}, timeout=60.0
        )
        self._stream = passes(documents)
        self._outstanding: dict[str, bool] = {}  # job id -> cancel sent
        self._active = threading.Event()
        self._idle = threading.Event()
        self._stopping = threading.Event()
        self._thread = threading.Thread(target=self._run, name="bench-feeder", daemon=True)
        self.errors: list[str] = []
        self.jobs_sent = 0
        self.jobs_done = 0

    def start(self) -> None:
        self._thread.start()

    def resume(self) -> None:
        self._idle.clear()
        self._active.set()

    def pause(self) -> None:
        self._idle.clear()
        self._active.clear()
        if not self._idle.wait(PAUSE_TIMEOUT_SECONDS):
            raise RuntimeError(f"the ingest jobs did not stop within {PAUSE_TIMEOUT_SECONDS:g} s")

    def stop(self) -> None:
        self._active.clear()
        self._stopping.set()
        self._thread.join(STOP_TIMEOUT_SECONDS + 60.0)
        self._client.close()

    def chunks(self) -> int:
        response = self._client.get(f"/v1/collections/{INGEST_COLLECTION}")
        response.raise_for_status()
        return int(response.json()["chunks"])

    def _run(self) -> None:
        while not self._stopping.is_set():
            try:
                self._look()
                if self._active.is_set():
                    while len(self._outstanding) < FEED_JOBS_AHEAD:
                        self._send()
                else:
                    self._cancel_all()
                    if not self._outstanding:
                        self._idle.set()
            except httpx.HTTPError as exc:
                self.errors.append(f"{type(exc).__name__}: {exc}")
            self._stopping.wait(FEED_POLL_SECONDS)
        self._cancel_all()

    def _send(self) -> None:
        batch = [next(self._stream) for _ in range(FEED_JOB_DOCUMENTS)]
        response = self._client.post(
            f"/v1/collections/{INGEST_COLLECTION}/documents",
            json={"documents": batch, "wait": False},
        )
        if response.status_code != 202:
            self.errors.append(f"{response.status_code}: {response.text[:200]}")
            return
        self._outstanding[response.json()["job_id"]] = False
        self.jobs_sent += 1

    def _look(self) -> None:
        for job_id in list(self._outstanding):
            response = self._client.get(f"/v1/jobs/{job_id}")
            if response.status_code != 200:
                self.errors.append(f"{response.status_code}: {response.text[:200]}")
                del self._outstanding[job_id]
                continue
            job = response.json()
            if job["state"] in jobs.FINISHED:
                del self._outstanding[job_id]
                if job["state"] == "done":
                    self.jobs_done += 1
                elif job["state"] == "failed":
                    self.errors.append(f"job {job_id} failed: {job['error']}")

    def _cancel_all(self) -> None:
        for job_id, sent in list(self._outstanding.items()):
            if not sent:
                # 409: it finished meanwhile, which the next look sees.
                self._client.delete(f"/v1/jobs/{job_id}")
                self._outstanding[job_id] = True


def _prepare_store(data_dir: Path, chunks: int, dimension: int, seed: int) -> tuple[str, str]:
    """The synthetic collection, the empty ingest collection, and a reader and a writer key."""
    settings = Settings(
        data_dir=data_dir, database_url=f"sqlite:///{(data_dir / 'excerpta.db').as_posix()}"
    )
    runtime = Runtime(settings, embedder_on_first_use(settings))
    try:
        write_collection(runtime, make_collection(chunks, dimension, seed))
        put_collection(
            runtime,
            LOCAL_ADMIN,
            INGEST_COLLECTION,
            CollectionSpec(
                description="Real text sent during the bench", vectors={"index": "exact"}
            ),
        )
        with runtime.transaction() as session:
            reader, _ = keys.create_key(
                session, role="reader", groups=[], collections=None, name="bench"
            )
            writer, _ = keys.create_key(
                session, role="writer", groups=[], collections=None, name="bench-ingest"
            )
    finally:
        runtime.close()
    return reader, writer


def run_http_with_ingest(
    *,
    chunks: int,
    dimension: int,
    queries: QuerySet,
    seed: int,
    seconds: float,
    clients: Sequence[int],
    top_k: int,
    depth: int,
    sources: Sequence[Path],
    progress: Progress,
) -> dict[str, Any]:
    """Each level's hybrid search latencies idle and while the server ingests real text."""
    if dimension != EMBEDDER_DIMENSIONS:
        raise ValueError(f"--http needs --dims {EMBEDDER_DIMENSIONS}, the server model's size")
    documents = real_documents(sources)
    with tempfile.TemporaryDirectory(prefix="excerpta-bench-") as scratch:
        data_dir = Path(scratch)
        reader, writer = _prepare_store(data_dir, chunks, dimension, seed)
        progress(f"{chunks:,} chunks written to the scratch store; starting the server")
        server = Server(
            data_dir, free_port(), {"EXCERPTA_JOB_BATCH_DOCUMENTS": str(FEED_BATCH_DOCUMENTS)}
        )
        levels = []
        try:
            server.start()
            server.wait_ready(READY_TIMEOUT_SECONDS)
            requests = search_requests(
                server.port, reader, request_bodies(queries, top_k=top_k, depth=depth)
            )
            _first_search(server, requests[0])
            feeder = IngestFeeder(server.base_url, writer, documents)
            feeder.start()
            try:
                _warm_up(feeder, progress)
                for clients_at_once in clients:
                    progress(
                        f"driving {clients_at_once} client(s): {ROUNDS} rounds of "
                        f"{seconds / ROUNDS:g} s idle, then {seconds / ROUNDS:g} s while ingesting"
                    )
                    levels.append(_level(server.port, requests, clients_at_once, seconds, feeder))
            finally:
                feeder.stop()
        finally:
            server.stop()
    ingest_seconds = sum(level["ingest"]["seconds"] for level in levels)
    ingested = sum(level["chunks_ingested"] for level in levels)
    return {
        "chunks": chunks,
        "dimensions": dimension,
        "seconds_per_level": seconds,
        "rounds": ROUNDS,
        "ingest_documents": len(documents),
        "ingest_sources": [str(source) for source in sources],
        "worker_batch_documents": FEED_BATCH_DOCUMENTS,
        "levels": levels,
        "chunks_ingested": ingested,
        "ingest_seconds": ingest_seconds,
        "chunks_per_second": ingested / ingest_seconds if ingest_seconds > 0 else 0.0,
        "jobs_sent": feeder.jobs_sent,
        "jobs_done": feeder.jobs_done,
        "ingest_errors": len(feeder.errors),
        "error_samples": [
            *[
                e
                for level in levels
                for part in ("idle", "ingest")
                for e in level[part]["error_samples"]
            ],
            *feeder.errors,
        ][:5],
    }


def _first_search(server: Server, request: bytes) -> None:
    first = KeepAliveClient("127.0.0.1", server.port, FIRST_QUERY_TIMEOUT_SECONDS)
    try:
        response = first.send(request)
    finally:
        first.close()
    if response.status != 200:
        raise RuntimeError(
            f"the first search failed with {response.status}: {response.body[:500]!r}\n"
            f"{server.log_tail()}"
        )


def _warm_up(feeder: IngestFeeder, progress: Progress) -> None:
    """Until the worker process has its model and has written a batch, then idle again."""
    progress("waiting for the server's worker to store its first ingested chunks")
    feeder.resume()
    deadline = time.monotonic() + WARM_UP_TIMEOUT_SECONDS
    while feeder.chunks() == 0:
        if feeder.errors:
            raise RuntimeError(f"ingesting failed: {feeder.errors[0]}")
        if time.monotonic() > deadline:
            raise RuntimeError(f"nothing was ingested within {WARM_UP_TIMEOUT_SECONDS:g} s")
        time.sleep(0.5)
    feeder.pause()


def _level(
    port: int,
    requests: Sequence[bytes],
    clients: int,
    seconds: float,
    feeder: IngestFeeder,
) -> dict[str, Any]:
    idle, busy = Samples(), Samples()
    ingested = 0
    window = seconds / ROUNDS
    for _ in range(ROUNDS):
        idle.add(samples(port, requests, clients=clients, seconds=window))
        feeder.resume()
        # The worker takes the first job at once (the queue wakes it) and embeds from there.
        time.sleep(1.0)
        before = feeder.chunks()
        busy.add(samples(port, requests, clients=clients, seconds=window))
        ingested += feeder.chunks() - before
        feeder.pause()
    idle_figures, busy_figures = level_figures(clients, idle), level_figures(clients, busy)
    return {
        "clients": clients,
        "idle": idle_figures,
        "ingest": busy_figures,
        "p50_ratio": busy_figures["p50_ms"] / idle_figures["p50_ms"],
        "p99_ratio": busy_figures["p99_ms"] / idle_figures["p99_ms"],
        "chunks_ingested": ingested,
    }


# throughput by worker count ----------------------------------------------------------------------


class WorkerProcess:
    """``excerpta worker`` on a scratch store, without a broker, with one torch thread."""

    def __init__(self, data_dir: Path, number: int, threads: int) -> None:
        self.log_path = data_dir / f"worker-{number}.log"
        environment = dict(os.environ)
        environment.pop("EXCERPTA_BROKER_URL", None)
        environment.update(
            {
                "EXCERPTA_DATA_DIR": str(data_dir),
                "EXCERPTA_DATABASE_URL": f"sqlite:///{(data_dir / 'excerpta.db').as_posix()}",
                "EXCERPTA_WORKER_TORCH_THREADS": str(threads),
                "EXCERPTA_JOB_POLL_MS": "100",
            }
        )
        with open(self.log_path, "wb") as log:
            self._process = subprocess.Popen(
                [sys.executable, "-m", "service.cli", "worker"],
                env=environment,
                stdout=log,
                stderr=subprocess.STDOUT,
            )

    def ready(self) -> bool:
        if self._process.poll() is not None:
            raise RuntimeError(f"a worker exited early:\n{self.log_tail()}")
        return WORKER_READY_LINE in self.log_path.read_text(encoding="utf-8", errors="replace")

    def log_tail(self, lines: int = 20) -> str:
        text = self.log_path.read_text(encoding="utf-8", errors="replace")
        return "\n".join(text.splitlines()[-lines:])

    def stop(self) -> None:
        if self._process.poll() is not None:
            return
        self._process.send_signal(signal.SIGTERM)
        try:
            self._process.wait(timeout=STOP_TIMEOUT_SECONDS + 30.0)
        except subprocess.TimeoutExpired:
            self._process.kill()
            self._process.wait(timeout=STOP_TIMEOUT_SECONDS)


def run_ingest_throughput(
    *,
    sources: Sequence[Path],
    documents: int,
    workers: Sequence[int],
    threads: int,
    progress: Progress,
) -> dict[str, Any]:
    """Chunks per second with each number of worker processes, on a fresh store each time."""
    chosen = real_documents(sources, documents)
    runs = []
    for count in workers:
        progress(f"{len(chosen)} documents with {count} worker(s) of {threads} torch thread(s)")
        runs.append(_throughput_run(chosen, count, threads))
    single = next((run for run in runs if run["workers"] == 1), None)
    per_core = single["chunks_per_second"] / threads if single else None
    return {
        "documents": len(chosen),
        "sources": [str(source) for source in sources],
        "torch_threads_per_worker": threads,
        "runs": runs,
        "chunks_per_second_per_core": per_core,
        "cores_for_a_million_chunks_an_hour": (
            math.ceil(CHUNKS_IN_AN_HOUR / 3600.0 / per_core) if per_core else None
        ),
    }


def _throughput_run(
    documents: Sequence[dict[str, Any]], count: int, threads: int
) -> dict[str, Any]:
    with tempfile.TemporaryDirectory(prefix="excerpta-bench-") as scratch:
        data_dir = Path(scratch)
        settings = Settings(
            data_dir=data_dir, database_url=f"sqlite:///{(data_dir / 'excerpta.db').as_posix()}"
        )
        runtime = Runtime(settings, embedder_on_first_use(settings), jobs=StoreQueue())
        started: list[WorkerProcess] = []
        try:
            put_collection(
                runtime,
                LOCAL_ADMIN,
                INGEST_COLLECTION,
                CollectionSpec(description="Real text for the throughput bench"),
            )
            started = [WorkerProcess(data_dir, n, threads) for n in range(count)]
            deadline = time.monotonic() + WORKER_READY_TIMEOUT_SECONDS
            while not all(worker.ready() for worker in started):
                if time.monotonic() > deadline:
                    raise RuntimeError("the workers were not ready in time")
                time.sleep(0.5)
            sent = [
                jobs.submit_upsert(
                    runtime,
                    LOCAL_ADMIN,
                    INGEST_COLLECTION,
                    documents[start : start + THROUGHPUT_JOB_DOCUMENTS],
                ).id
                for start in range(0, len(documents), THROUGHPUT_JOB_DOCUMENTS)
            ]
            finished = _wait_for_jobs(runtime, sent)
        finally:
            for worker in started:
                worker.stop()
            runtime.close()
    failed = [job for job in finished if job.state != "done"]
    if failed:
        raise RuntimeError(f"{len(failed)} job(s) did not finish: {failed[0].failure}")
    began = min(job.started_at for job in finished if job.started_at is not None)
    ended = max(job.finished_at for job in finished if job.finished_at is not None)
    seconds = (ended - began).total_seconds()
    chunks = sum(job.counts.chunks for job in finished)
    return {
        "workers": count,
        "jobs": len(finished),
        "chunks": chunks,
        "embedded": sum(job.counts.embedded for job in finished),
        "seconds": seconds,
        "chunks_per_second": chunks / seconds if seconds > 0 else 0.0,
        "workers_that_ran_jobs": len({job.worker for job in finished}),
    }


def _wait_for_jobs(runtime: Runtime, job_ids: Sequence[str]) -> list[jobs.JobView]:
    deadline = time.monotonic() + THROUGHPUT_TIMEOUT_SECONDS
    while True:
        found = [jobs.get_job(runtime, LOCAL_ADMIN, job_id) for job_id in job_ids]
        if all(job.finished for job in found):
            return found
        if time.monotonic() > deadline:
            raise RuntimeError(f"the jobs were not done within {THROUGHPUT_TIMEOUT_SECONDS:g} s")
        time.sleep(1.0)
