"""Re-chunking a collection in the background after its ``chunking`` changed.

New chunks are written as the next generation while queries keep reading the current one;
when every document has them, one transaction switches the generation and drops the old
chunks, and the change log tells every index to reload.

``RebuildWorker`` is the thread that schedules the work; it is handed the step it runs
(``rebuild_batch``, bound to the store and the embedder by the runtime) and the way to find
unfinished rebuilds, so its scheduling can be tested without a store.
"""

from __future__ import annotations

import logging
import threading
from collections.abc import Callable
from functools import partial

from service.embedding.base import Embedder
from service.store import job_rows, repository
from service.store.job_rows import RECHUNK
from service.store.tables import JobRow
from service.store.transactions import Transactions
from service.usecases.drafts import (
    MaterialisedDocument,
    Vectors,
    chunk_rows,
    embed_drafts,
    materialise,
    prepared_from_row,
)
from service.usecases.writes import WriteRetries

log = logging.getLogger("excerpta.rebuild")
BATCH = 16
RETRY_SECONDS = 1.0


class RebuildWorker:
    """Runs ``step(collection)`` until it answers True, one collection at a time.

    A step that raises is logged and retried after ``retry_seconds``; ``pending`` names the
    collections a previous process left half rebuilt.
    """

    def __init__(
        self,
        step: Callable[[str], bool],
        pending: Callable[[], list[str]],
        *,
        retry_seconds: float = RETRY_SECONDS,
    ) -> None:
        self._step = step
        self._pending = pending
        self._retry_seconds = retry_seconds
        self._wanted: set[str] = set()
        self._lock = threading.Lock()
        self._stopping = threading.Event()
        self._thread: threading.Thread | None = None

    def start(self, collection: str) -> None:
        with self._lock:
            self._wanted.add(collection)
            if self._thread is None or not self._thread.is_alive():
                self._thread = threading.Thread(
                    target=self._run, name="excerpta-rebuild", daemon=True
                )
                self._thread.start()

    def resume(self) -> None:
        """Pick up rebuilds a previous process left unfinished."""
        for name in self._pending():
            self.start(name)

    def wait(self, timeout: float | None = None) -> bool:
        thread = self._thread
        if thread is not None:
            thread.join(timeout)
            return not thread.is_alive()
        return True

    def stop(self) -> None:
        self._stopping.set()
        if self._thread is not None:
            self._thread.join(timeout=10)

    def _run(self) -> None:
        while not self._stopping.is_set():
            with self._lock:
                if not self._wanted:
                    self._thread = None
                    return
                name = sorted(self._wanted)[0]
            try:
                finished = self._step(name)
            except Exception:
                log.exception("rebuild of collection %r failed; it will be retried", name)
                finished = False
                self._stopping.wait(self._retry_seconds)
            if finished:
                with self._lock:
                    self._wanted.discard(name)


def pending_rebuilds(transactions: Transactions) -> list[str]:
    with transactions.read() as session:
        return [
            row.name
            for row in repository.all_collections(session)
            if row.settings.get("pending_chunking")
        ]


def rebuild_batch(
    transactions: Transactions, retries: WriteRetries, embedder: Embedder, name: str
) -> bool:
    """Re-chunk one batch of documents; True when the collection has switched over.

    The batch is read and re-chunked outside any lock; its chunks are written under the
    collection's write lock, each only if its document is still the version that was read (a
    document replaced meanwhile got its new chunks of both generations from that write).
    """
    with transactions.read() as session:
        row = repository.collection_by_name(session, name)
        if row is None or not row.settings.get("pending_chunking"):
            return True
        pending = dict(row.settings["pending_chunking"])
        generation = row.chunk_generation
        documents = [
            prepared_from_row(d)
            for d in repository.documents_without_generation(session, row.id, generation + 1, BATCH)
        ]
        materials = [materialise(embedder, d, pending) for d in documents]
        vectors = embed_drafts(embedder, session, [c for m in materials for c in m.chunks])
    return retries.run(
        partial(
            _write_batch, transactions, embedder.name, name, pending, generation, materials, vectors
        )
    )


def _write_batch(
    transactions: Transactions,
    embedder: str,
    name: str,
    pending: dict[str, int],
    generation: int,
    materials: list[MaterialisedDocument],
    vectors: Vectors,
) -> bool:
    target = generation + 1
    with transactions.write() as session:
        row = repository.lock_collection(session, name)
        if row is None:
            return True
        if row.settings.get("pending_chunking") != pending or row.chunk_generation != generation:
            return False  # the chunking changed again; the next step reads afresh
        job = job_rows.lock_open_job(session, name, RECHUNK)
        if not materials:
            if repository.documents_without_generation(session, row.id, target, 1):
                return False  # a document was added meanwhile
            settings = dict(row.settings)
            settings.pop("pending_chunking", None)
            row.settings = settings
            row.chunking = pending
            row.chunk_generation = target
            row.rebuild_done = None
            row.rebuild_total = None
            repository.drop_generations_except(session, row.id, target)
            repository.bump_revision(session, row, [(None, "reset")])
            if job is not None:
                _job_done(job, repository.count_documents(session, row.id, None)[1])
            return True
        vectors.stored(session, embedder)
        current = repository.documents_by_external_id(
            session, row.id, [m.prepared.external_id for m in materials]
        )
        written = 0
        for material in materials:
            document = current.get(material.prepared.external_id)
            if document is None or document.content_hash != material.prepared.content_hash:
                continue
            repository.replace_chunks(session, document.id, target, chunk_rows(material))
            written += 1
        row.rebuild_done = (row.rebuild_done or 0) + written
        row.rebuild_total = max(row.rebuild_total or 0, row.rebuild_done)
        if job is not None:
            _job_moved(job, row.rebuild_done, row.rebuild_total, materials, vectors)
    return False


def _job_moved(
    job: JobRow, done: int, total: int, materials: list[MaterialisedDocument], vectors: Vectors
) -> None:
    """The collection's re-chunking job follows the batch just written (in its transaction)."""
    now = repository.utcnow()
    if job.state == "queued":
        # Run by this process's own rebuild thread rather than a worker that claimed it.
        job.state = "running"
        job.started_at = now
    job.documents = total
    job.documents_done = done
    job.chunks += sum(len(m.chunks) for m in materials)
    job.embedded += len(vectors.fresh)
    job.cached += len(vectors.cached)


def _job_done(job: JobRow, chunks: int) -> None:
    job.state = "done"
    job.started_at = job.started_at or repository.utcnow()
    job.finished_at = repository.utcnow()
    job.lease_expires_at = None
    job.results = [{"status": "switched", "chunks": chunks}]
