"""``excerpta bench --http``: the real server, a scratch store, and concurrent clients.

The collection is created by the service's own use case; its synthetic rows (made by the index's
row builder, see ``service.bench.synthetic``) are then written straight through the store layer
with random unit vectors stored as their embeddings, so nothing is embedded (the runtime that
creates the collection loads the model all the same, as the server does at start); requests
carry ``query_vector`` so queries need no embedding either.
Each concurrency level runs its clients, one thread and one keep-alive connection each, for a
bounded time; the server is stopped at the end whatever happens.
"""

from __future__ import annotations

import hashlib
import json
import os
import socket
import subprocess
import sys
import tempfile
import threading
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import httpx
import numpy as np
from sqlalchemy import insert
from sqlalchemy.orm import Session
from threadpoolctl import threadpool_limits

from service.bench.client import KeepAliveClient, ProtocolError, build_request
from service.bench.inprocess import SERVICE_BLAS_THREADS, hybrid_query
from service.bench.synthetic import (
    BENCH_RETRIEVAL,
    CHUNKS_PER_DOCUMENT,
    QuerySet,
    SyntheticCollection,
    collection_analyzer,
    document_text,
    make_collection,
)
from service.bench.timing import WARMUP_CALLS, Summary
from service.config import Settings
from service.index.collection_index import CollectionIndex
from service.store import repository
from service.store.tables import ChunkRow, CollectionRow, DocumentRow, EmbeddingRow
from service.usecases import keys
from service.usecases.callers import LOCAL_ADMIN
from service.usecases.collections import CollectionSpec, put_collection
from service.usecases.retrieval_settings import ranking_settings
from service.usecases.runtime import Runtime, load_embedder

COLLECTION = "bench"
EMBEDDER_DIMENSIONS = 384
READY_TIMEOUT_SECONDS = 300.0
FIRST_QUERY_TIMEOUT_SECONDS = 600.0
REQUEST_TIMEOUT_SECONDS = 60.0
STOP_TIMEOUT_SECONDS = 15.0
ERROR_SAMPLES = 5
ROUND_SECONDS = 1.0
_INSERT_BATCH = 5_000

Progress = Callable[[str], None]


def free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as probe:
        probe.bind(("127.0.0.1", 0))
        return int(probe.getsockname()[1])


def _chunk_hash(chunk_id: str) -> str:
    return hashlib.sha256(f"bench:{chunk_id}".encode()).hexdigest()


def write_collection(runtime: Runtime, collection: SyntheticCollection) -> None:
    """The collection made by the service with the bench's settings, then the synthetic rows
    as its documents, chunks and stored embeddings."""
    # Exact vectors: the in-process reference is exact, and a graph built in the background
    # would share the cores with the clients (``--vector-index`` measures the graph).
    spec = CollectionSpec(
        description="Synthetic bench collection",
        retrieval=BENCH_RETRIEVAL,
        vectors={"index": "exact"},
    )
    put_collection(runtime, LOCAL_ADMIN, COLLECTION, spec)
    with runtime.transaction() as session:
        row = repository.collection_by_name(session, COLLECTION)
        assert row is not None
        _write_rows(session, row, collection)
        repository.bump_revision(session, row, [(None, "reset")])


def _write_rows(session: Session, row: CollectionRow, collection: SyntheticCollection) -> None:
    now = repository.utcnow()
    records = collection.records
    documents = []
    for first in range(0, len(records), CHUNKS_PER_DOCUMENT):
        chunks = records[first : first + CHUNKS_PER_DOCUMENT]
        text = document_text(collection, chunks[0].document_id)
        documents.append(
            plain_document_row(
                first // CHUNKS_PER_DOCUMENT + 1,
                collection_id=row.id,
                external_id=chunks[0].document_id,
                title=chunks[0].title,
                text=text,
                now=now,
            )
        )
    _insert(session, DocumentRow, documents)
    _insert(
        session,
        ChunkRow,
        [
            {
                "document_id": index // CHUNKS_PER_DOCUMENT + 1,
                "generation": row.chunk_generation,
                "ordinal": r.ordinal,
                "text": r.text,
                "char_start": r.char_start,
                "char_end": r.char_end,
                "tokens": r.tokens,
                "section": r.section,
                "embedded_text_hash": _chunk_hash(r.chunk_id),
            }
            for index, r in enumerate(records)
        ],
    )
    _insert(
        session,
        EmbeddingRow,
        [
            {
                "embedder": row.embedder,
                "text_hash": _chunk_hash(r.chunk_id),
                "dimensions": collection.dimension,
                "vector": np.asarray(r.vector, dtype=np.float32).tobytes(),
            }
            for r in records
        ],
    )


def plain_document_row(
    row_id: int, *, collection_id: int, external_id: str, title: str, text: str, now: Any
) -> dict[str, Any]:
    """A stored plain-text document with no sections, attributes or access groups, as the
    benches write their scratch stores directly (a bulk insert, not the ingest path)."""
    return {
        "id": row_id,
        "collection_id": collection_id,
        "external_id": external_id,
        "title": title,
        "media_type": "text/plain",
        "source_url": None,
        "content_hash": hashlib.sha256(text.encode()).hexdigest(),
        "source_text": text,
        "text": text,
        "sections": [],
        "attributes": {},
        "access": [],
        "created_at": now,
        "updated_at": now,
    }


def _insert(session: Session, table: type, rows: Sequence[dict[str, Any]]) -> None:
    for start in range(0, len(rows), _INSERT_BATCH):
        session.execute(insert(table), list(rows[start : start + _INSERT_BATCH]))


class InProcessHybrid:
    """The hybrid query on the index the server builds (the same rows, from the same row
    builder and analyzer), with the queries analysed as the server does and the ranking steps
    the served collection takes (its settings are ``BENCH_RETRIEVAL``).

    It is timed in rounds between the one-client rounds over HTTP, so that both figures come
    from the same stretches of time on a machine whose speed drifts.
    """

    def __init__(
        self, collection: SyntheticCollection, queries: QuerySet, *, top_k: int, depth: int
    ) -> None:
        analyzer = collection_analyzer()
        index = CollectionIndex.build(
            collection.records, metric="cosine", dimension=collection.dimension
        )
        self._snapshot = index.snapshot()
        self._tokens = [analyzer.tokens(text) for text in queries.texts]
        self._vectors = list(queries.vectors)
        self._top_k = top_k
        self._depth = depth
        self._ranking = ranking_settings(BENCH_RETRIEVAL)
        self.timings: list[float] = []
        with threadpool_limits(limits=SERVICE_BLAS_THREADS):
            for i in range(min(WARMUP_CALLS, len(self._tokens))):
                self._query(i)

    def time_round(self) -> None:
        # With the BLAS threads the server gives each query, so the two agree.
        with threadpool_limits(limits=SERVICE_BLAS_THREADS):
            for i in range(len(self._tokens)):
                started = time.perf_counter_ns()
                self._query(i)
                self.timings.append((time.perf_counter_ns() - started) / 1e6)

    def _query(self, i: int) -> object:
        return hybrid_query(
            self._snapshot,
            self._tokens[i],
            self._vectors[i],
            top_k=self._top_k,
            depth=self._depth,
            ranking=self._ranking,
        )

    def summary(self) -> Summary:
        return Summary.of(self.timings)


class Server:
    """``excerpta serve`` in a subprocess on 127.0.0.1, with its output in a log file."""

    def __init__(self, data_dir: Path, port: int, settings: dict[str, str] | None = None) -> None:
        self.data_dir = data_dir
        self.settings = dict(settings or {})
        self.port = port
        self.base_url = f"http://127.0.0.1:{port}"
        self.log_path = data_dir / "server.log"
        self._process: subprocess.Popen[bytes] | None = None

    def start(self) -> None:
        environment = dict(os.environ)
        # The embedded default: the server's own worker process runs document jobs.
        environment.pop("EXCERPTA_BROKER_URL", None)
        environment.update(
            {
                "EXCERPTA_DATA_DIR": str(self.data_dir),
                "EXCERPTA_DATABASE_URL": f"sqlite:///{(self.data_dir / 'excerpta.db').as_posix()}",
                "EXCERPTA_HOST": "127.0.0.1",
                "EXCERPTA_PORT": str(self.port),
                "EXCERPTA_AUTH": "required",
                "EXCERPTA_BLAS_THREADS": str(SERVICE_BLAS_THREADS),
                "EXCERPTA_RATE_LIMIT_PER_SECOND": "0",
                **self.settings,
            }
        )
        command = [sys.executable, "-m", "service.cli", "serve"]
        command += ["--host", "127.0.0.1", "--port", str(self.port)]
        with open(self.log_path, "wb") as log:
            self._process = subprocess.Popen(
                command, env=environment, stdout=log, stderr=subprocess.STDOUT
            )

    def wait_ready(self, timeout: float) -> None:
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            if self._process is not None and self._process.poll() is not None:
                raise RuntimeError(f"the server exited early:\n{self.log_tail()}")
            try:
                if httpx.get(f"{self.base_url}/readyz", timeout=2.0).status_code == 200:
                    return
            except httpx.HTTPError:
                pass
            time.sleep(0.5)
        raise RuntimeError(f"the server was not ready after {timeout:g} s:\n{self.log_tail()}")

    def log_tail(self, lines: int = 30) -> str:
        try:
            text = self.log_path.read_text(encoding="utf-8", errors="replace")
        except OSError:
            return ""
        return "\n".join(text.splitlines()[-lines:])

    def stop(self) -> None:
        process = self._process
        if process is None or process.poll() is not None:
            return
        process.terminate()
        try:
            process.wait(timeout=STOP_TIMEOUT_SECONDS)
        except subprocess.TimeoutExpired:
            process.kill()
            process.wait(timeout=STOP_TIMEOUT_SECONDS)


def request_bodies(queries: QuerySet, *, top_k: int, depth: int) -> list[bytes]:
    return [
        json.dumps(
            {
                "query": text,
                "query_vector": vector.tolist(),
                "mode": "hybrid",
                "top_k": top_k,
                "depth": depth,
            }
        ).encode()
        for text, vector in zip(queries.texts, queries.vectors, strict=True)
    ]


@dataclass
class Samples:
    """What one stretch of driving saw: each success's latency and each failure's message."""

    latencies_ms: list[float] = field(default_factory=list)
    errors: list[str] = field(default_factory=list)
    seconds: float = 0.0

    def add(self, other: Samples) -> None:
        self.latencies_ms += other.latencies_ms
        self.errors += other.errors
        self.seconds += other.seconds


SEARCH_PATH = f"/v1/collections/{COLLECTION}/search"


def search_requests(port: int, key: str, bodies: Sequence[bytes]) -> list[bytes]:
    """Each body as a whole search request, built once before any clock starts."""
    headers = {
        "Host": f"127.0.0.1:{port}",
        "Authorization": f"Bearer {key}",
        "Content-Type": "application/json",
    }
    return [build_request("POST", SEARCH_PATH, headers, body) for body in bodies]


def drive(port: int, requests: Sequence[bytes], *, clients: int, seconds: float) -> dict[str, Any]:
    """``clients`` threads sending requests back to back until the time is up."""
    return level_figures(clients, samples(port, requests, clients=clients, seconds=seconds))


def samples(
    port: int, requests: Sequence[bytes], *, clients: int, seconds: float, first: int = 0
) -> Samples:
    latencies: list[list[float]] = [[] for _ in range(clients)]
    errors: list[list[str]] = [[] for _ in range(clients)]
    start_line = threading.Barrier(clients + 1)
    finished_at = [0.0] * clients
    deadline_box: list[float] = []

    def client(number: int) -> None:
        try:
            session = KeepAliveClient("127.0.0.1", port, REQUEST_TIMEOUT_SECONDS)
        except OSError as exc:
            errors[number].append(f"{type(exc).__name__}: {exc}")
            start_line.wait()
            return
        try:
            start_line.wait()
            deadline = deadline_box[0]
            position = first + number
            while time.perf_counter() < deadline:
                request = requests[position % len(requests)]
                position += clients
                started = time.perf_counter()
                try:
                    response = session.send(request)
                except (OSError, ProtocolError) as exc:
                    errors[number].append(f"{type(exc).__name__}: {exc}")
                    continue
                elapsed = (time.perf_counter() - started) * 1000
                if response.status == 200:
                    latencies[number].append(elapsed)
                else:
                    text = response.body[:200].decode("utf-8", "replace")
                    errors[number].append(f"{response.status}: {text}")
            finished_at[number] = time.perf_counter()
        finally:
            session.close()

    threads = [threading.Thread(target=client, args=(n,), daemon=True) for n in range(clients)]
    for thread in threads:
        thread.start()
    started = time.perf_counter()
    deadline_box.append(started + seconds)
    start_line.wait()
    for thread in threads:
        thread.join(seconds + REQUEST_TIMEOUT_SECONDS + 5)
    return Samples(
        [value for values in latencies for value in values],
        [error for values in errors for error in values],
        max([*finished_at, started + 1e-9]) - started,
    )


def drive_alternating(
    port: int,
    requests: Sequence[bytes],
    *,
    seconds: float,
    reference: InProcessHybrid,
) -> dict[str, Any]:
    """One client in rounds, the in-process reference timed between them."""
    rounds = max(1, round(seconds / ROUND_SECONDS))
    seen = Samples()
    for _ in range(rounds):
        sent = len(seen.latencies_ms) + len(seen.errors)
        seen.add(samples(port, requests, clients=1, seconds=seconds / rounds, first=sent))
        reference.time_round()
    return level_figures(1, seen)


def level_figures(clients: int, seen: Samples) -> dict[str, Any]:
    latencies, errors, elapsed = seen.latencies_ms, seen.errors, seen.seconds
    figures: dict[str, Any] = {
        "clients": clients,
        "requests": len(latencies),
        "errors": len(errors),
        "seconds": elapsed,
        "requests_per_second": len(latencies) / elapsed if elapsed > 0 else 0.0,
        "error_samples": errors[:ERROR_SAMPLES],
    }
    if latencies:
        summary = Summary.of(latencies)
        figures.update(p50_ms=summary.median_ms, p95_ms=summary.p95_ms, p99_ms=summary.p99_ms)
    else:
        figures.update(p50_ms=float("nan"), p95_ms=float("nan"), p99_ms=float("nan"))
    return figures


def run_http(
    *,
    chunks: int,
    dimension: int,
    queries: QuerySet,
    seed: int,
    seconds: float,
    clients: Sequence[int],
    top_k: int,
    depth: int,
    progress: Progress,
) -> dict[str, Any]:
    if dimension != EMBEDDER_DIMENSIONS:
        raise ValueError(f"--http needs --dims {EMBEDDER_DIMENSIONS}, the server model's size")
    collection = make_collection(chunks, dimension, seed)
    reference = InProcessHybrid(collection, queries, top_k=top_k, depth=depth)

    with tempfile.TemporaryDirectory(prefix="excerpta-bench-") as scratch:
        data_dir = Path(scratch)
        settings = Settings(
            data_dir=data_dir, database_url=f"sqlite:///{(data_dir / 'excerpta.db').as_posix()}"
        )
        runtime = Runtime(settings, load_embedder(settings))
        try:
            write_collection(runtime, collection)
            with runtime.transaction() as session:
                key, _ = keys.create_key(
                    session, role="reader", groups=[], collections=None, name="bench"
                )
        finally:
            runtime.close()
        progress(f"{chunks:,} chunks written to the scratch store; starting the server")
        server = Server(data_dir, free_port())
        levels = []
        try:
            server.start()
            server.wait_ready(READY_TIMEOUT_SECONDS)
            bodies = request_bodies(queries, top_k=top_k, depth=depth)
            requests = search_requests(server.port, key, bodies)
            first = KeepAliveClient("127.0.0.1", server.port, FIRST_QUERY_TIMEOUT_SECONDS)
            try:
                response = first.send(requests[0])
            finally:
                first.close()
            if response.status != 200:
                raise RuntimeError(
                    f"the first search failed with {response.status}: {response.body[:500]!r}\n"
                    f"{server.log_tail()}"
                )
            for clients_at_once in clients:
                progress(f"driving {clients_at_once} concurrent client(s) for {seconds:g} s")
                if clients_at_once == 1:
                    level = drive_alternating(
                        server.port, requests, seconds=seconds, reference=reference
                    )
                else:
                    level = drive(server.port, requests, clients=clients_at_once, seconds=seconds)
                levels.append(level)
        finally:
            server.stop()
    if not reference.timings:
        reference.time_round()
    return {
        "chunks": chunks,
        "dimensions": dimension,
        "server_port": server.port,
        "seconds_per_level": seconds,
        "in_process_hybrid": reference.summary().as_dict(),
        "levels": levels,
        "error_samples": [e for level in levels for e in level["error_samples"]][:ERROR_SAMPLES],
    }
