"""Document writes as jobs: recorded in the store, run by a worker, followed by whoever sent them.

A job keeps its documents, its sender's key and how far it got. A worker claims it for a lease,
checks the documents whole, then writes them in batches; each batch is one write transaction
that also moves the job's position and adds its results, so a job taken over after a crash
resumes exactly where the store says it stopped, and a batch is never counted twice. Writing
the same content again is a no-op, and the embedding cache makes whatever had been embedded
cheap, so running a job twice stores every document once.
"""

from __future__ import annotations

import datetime as dt
import logging
import os
import socket
import time
import uuid
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass
from functools import partial
from typing import Any

import numpy as np
from sqlalchemy.orm import Session

from service.embedding.base import Embedder
from service.errors import (
    Conflict,
    InvalidDocuments,
    InvalidRequest,
    JobNotFound,
    ServiceError,
    error_from_body,
)
from service.store import job_rows, repository
from service.store.job_rows import DELETE, RECHUNK, UPSERT
from service.store.tables import JobRow
from service.usecases.callers import Caller, Role
from service.usecases.collections import load_collection
from service.usecases.documents import (
    check_batch_limits,
    check_delete_filter,
    check_documents,
    delete_by_filter,
    upsert_documents,
)
from service.usecases.drafts import Vectors
from service.usecases.rebuild import rebuild_batch
from service.usecases.runtime import Runtime

log = logging.getLogger("excerpta.jobs")

STATES = ("queued", "running", "done", "failed", "cancelled")
FINISHED = ("done", "failed", "cancelled")
# A bug in a job is kept on it in these words; the worker's log has the traceback.
UNEXPECTED = {"code": "job_stopped", "message": "The job stopped on an unexpected error."}
MAX_LISTED = 1000


@dataclass(frozen=True)
class JobCounts:
    documents: int
    documents_done: int
    chunks: int
    embedded: int
    cached: int


@dataclass(frozen=True)
class JobView:
    """A job as its sender sees it."""

    id: str
    collection: str
    kind: str
    state: str
    key: str
    counts: JobCounts
    results: tuple[dict[str, Any], ...]
    errors: tuple[dict[str, Any], ...]
    failure: dict[str, Any] | None
    cancel_requested: bool
    worker: str | None
    created_at: dt.datetime
    started_at: dt.datetime | None
    finished_at: dt.datetime | None

    @property
    def finished(self) -> bool:
        return self.state in FINISHED

    @classmethod
    def of(cls, row: JobRow) -> JobView:
        return cls(
            id=row.id,
            collection=row.collection,
            kind=row.kind,
            state=row.state,
            key=row.key_name,
            counts=JobCounts(
                documents=row.documents,
                documents_done=row.documents_done,
                chunks=row.chunks,
                embedded=row.embedded,
                cached=row.cached,
            ),
            results=tuple(row.results),
            errors=tuple(row.errors),
            failure=row.failure,
            cancel_requested=row.cancel_requested,
            worker=row.worker,
            created_at=row.created_at,
            started_at=row.started_at,
            finished_at=row.finished_at,
        )


def worker_name() -> str:
    """This process as a job's record names the worker that ran it."""
    return f"{socket.gethostname()}:{os.getpid()}"


# sending and following ---------------------------------------------------------------------------


def submit_upsert(
    runtime: Runtime,
    caller: Caller,
    collection: str,
    documents: Sequence[Any],
    *,
    origins: Sequence[str] | None = None,
    skip_invalid: bool = False,
    batch_documents: int | None = None,
) -> JobView:
    """Record a job that writes ``documents``, hand it to the runtime's queue, and return it.

    A request's job (``skip_invalid`` false) is refused whole when any document is invalid, as
    a request always was: here, so the sender hears of it at once, and again by the worker,
    since the collection may have changed meanwhile (the job then fails, naming the documents).
    The command line's job skips each invalid document, records why, and writes the rest.
    """
    caller.require(Role.WRITER)
    if skip_invalid:
        if not documents:
            raise InvalidRequest("The job must hold at least one document.", field="documents")
    else:
        check_batch_limits(runtime, documents)
        check_documents(runtime, caller, collection, documents)
    return _record_job(
        runtime,
        caller,
        collection,
        kind=UPSERT,
        payload={"documents": list(documents), "origins": list(origins or [])},
        documents=len(documents),
        batch_documents=batch_documents or runtime.settings.job_batch_documents,
        skip_invalid=skip_invalid,
    )


def submit_delete(
    runtime: Runtime, caller: Caller, collection: str, filter_value: str | dict[str, Any] | None
) -> JobView:
    """Record a job that deletes every document the filter matches (as the caller sees them),
    and hand it to the runtime's queue; a bad filter is refused here, before any job."""
    check_delete_filter(runtime, caller, collection, filter_value)
    return _record_job(
        runtime,
        caller,
        collection,
        kind=DELETE,
        payload={"filter": filter_value},
        documents=0,
        batch_documents=runtime.settings.job_batch_documents,
        skip_invalid=False,
    )


def _record_job(
    runtime: Runtime,
    caller: Caller,
    collection: str,
    *,
    kind: str,
    payload: dict[str, Any],
    documents: int,
    batch_documents: int,
    skip_invalid: bool,
) -> JobView:
    """Record a queued job in one transaction (retried on a busy store) and hand it over."""
    job_id = str(uuid.uuid4())

    def attempt() -> JobView:
        with runtime.write_transaction() as session:
            load_collection(session, caller, collection)
            row = job_rows.add_job(
                session,
                job_id=job_id,
                collection=collection,
                kind=kind,
                key_id=caller.key_id,
                key_name=caller.name,
                caller=caller.record(),
                payload=payload,
                documents=documents,
                batch_documents=batch_documents,
                skip_invalid=skip_invalid,
                now=repository.utcnow(),
            )
            return JobView.of(row)

    return _hand_over(runtime, runtime.retries.run(attempt))


def _hand_over(runtime: Runtime, job: JobView) -> JobView:
    if runtime.jobs.runs_here:
        run_job(runtime, job.id, worker=worker_name())
    else:
        runtime.jobs.submitted(job.id)
    return job


def _visible(caller: Caller, row: JobRow | None, job_id: str) -> JobRow:
    """The job if the caller sent it (or is an admin); the same 404 as a missing one otherwise."""
    if row is None or not (
        caller.is_admin or (row.key_id is not None and row.key_id == caller.key_id)
    ):
        raise JobNotFound(f"Job {job_id!r} does not exist.")
    return row


def get_job(runtime: Runtime, caller: Caller, job_id: str) -> JobView:
    with runtime.transaction() as session:
        return JobView.of(_visible(caller, job_rows.job_by_id(session, job_id), job_id))


def list_jobs(
    runtime: Runtime,
    caller: Caller,
    *,
    collection: str | None = None,
    state: str | None = None,
    limit: int = 100,
) -> list[JobView]:
    """The caller's jobs (an admin's: every key's), newest first."""
    if state is not None and state not in STATES:
        raise InvalidRequest(f"The state must be one of {', '.join(STATES)}.", field="state")
    if not 1 <= limit <= MAX_LISTED:
        raise InvalidRequest(f"The limit must be from 1 to {MAX_LISTED}.", field="limit")
    with runtime.transaction() as session:
        rows = job_rows.list_jobs(
            session,
            key_id=caller.key_id,
            everyone=caller.is_admin,
            collection=collection,
            states=[state] if state else [],
            limit=limit,
        )
        return [JobView.of(row) for row in rows]


def cancel_job(runtime: Runtime, caller: Caller, job_id: str) -> JobView:
    """A queued job is cancelled at once; a running one stops at its next batch boundary (the
    batches already written stay). A finished job cannot be cancelled (409)."""

    def attempt() -> JobView:
        with runtime.write_transaction() as session:
            row = _visible(caller, job_rows.lock_job(session, job_id), job_id)
            if row.state in FINISHED:
                raise Conflict(f"Job {job_id!r} has already finished ({row.state}).")
            if row.kind == RECHUNK:
                raise Conflict(
                    f"Job {job_id!r} re-chunks its collection and cannot be cancelled; "
                    "put the collection's previous chunking back to stop it."
                )
            if row.state == "queued":
                _close(row, "cancelled")
            else:
                row.cancel_requested = True
            session.flush()
            return JobView.of(row)

    return runtime.retries.run(attempt)


def wait_for_job(
    runtime: Runtime, caller: Caller, job_id: str, *, poll_seconds: float = 0.1
) -> JobView:
    """Follow the job until it finishes; a failed job raises the error it failed with.

    The store is read again after short pauses that grow to ``poll_seconds``; the job's
    collection is re-read by this process's next query, so its sender sees what it wrote.
    """
    pause = 0.005
    while True:
        job = get_job(runtime, caller, job_id)
        if job.finished:
            break
        time.sleep(pause)
        pause = min(pause * 2, poll_seconds)
    runtime.indexes.expire(job.collection)
    if job.state == "failed":
        if job.failure is None or job.failure.get("code") == UNEXPECTED["code"]:
            raise RuntimeError(f"job {job.id} stopped on an unexpected error")
        raise error_from_body(job.failure)
    return job


# running -----------------------------------------------------------------------------------------


class JobTakenOver(Exception):
    """This worker's claim on the job ran out and another worker took it over."""


@dataclass(frozen=True)
class ClaimedJob:
    id: str
    collection: str
    kind: str
    caller: Caller
    filter: str | dict[str, Any] | None
    documents: tuple[Any, ...]
    origins: tuple[str, ...]
    position: int
    batch_documents: int
    skip_invalid: bool


def run_job(
    runtime: Runtime,
    job_id: str,
    *,
    worker: str,
    should_stop: Callable[[], bool] | None = None,
) -> float | None:
    """Run the job unless another live worker holds it: then the seconds its claim has left.

    Nothing happens to a job that has finished or is missing, so a task delivered twice is
    harmless. When ``should_stop()`` turns true the job goes back to the queue at its next
    batch boundary, for whichever worker looks next (only workers that poll the store may ask
    this: a broker's task is acknowledged once it returns).
    """
    claimed = runtime.retries.run(partial(_claim, runtime, job_id, worker))
    if isinstance(claimed, float):
        return claimed
    if claimed is not None:
        _work(runtime, claimed, worker, should_stop or (lambda: False))
    return None


def run_next_job(
    runtime: Runtime, *, worker: str, should_stop: Callable[[], bool] | None = None
) -> bool:
    """Claim the oldest job no live worker holds and run it; False when there is none."""

    def attempt() -> str | None:
        with runtime.write_transaction() as session:
            row = job_rows.next_claimable_job(session, repository.utcnow())
            return None if row is None else row.id

    job_id = runtime.retries.run(attempt)
    if job_id is None:
        return False
    run_job(runtime, job_id, worker=worker, should_stop=should_stop)
    return True


def _claim(runtime: Runtime, job_id: str, worker: str) -> ClaimedJob | float | None:
    with runtime.write_transaction() as session:
        row = job_rows.lock_job(session, job_id, with_payload=True)
        if row is None or row.state in FINISHED:
            return None
        now = repository.utcnow()
        lease = row.lease_expires_at
        if row.state == "running" and lease is not None and lease > now and row.worker != worker:
            return (lease - now).total_seconds()
        if row.cancel_requested:
            _close(row, "cancelled")
            return None
        row.state = "running"
        row.worker = worker
        row.attempts += 1
        row.started_at = row.started_at or now
        row.lease_expires_at = now + dt.timedelta(seconds=runtime.settings.job_lease_seconds)
        payload = row.payload
        return ClaimedJob(
            id=row.id,
            collection=row.collection,
            kind=row.kind,
            caller=Caller.from_record(row.key_id, row.key_name, row.caller),
            filter=payload.get("filter"),
            documents=tuple(payload.get("documents") or ()),
            origins=tuple(payload.get("origins") or ()),
            position=row.documents_done,
            batch_documents=row.batch_documents,
            skip_invalid=row.skip_invalid,
        )


def _work(runtime: Runtime, job: ClaimedJob, worker: str, should_stop: Callable[[], bool]) -> None:
    embedder = LeaseKeepingEmbedder(
        runtime.embedder,
        renew=partial(_renew_lease, runtime, job.id, worker),
        every_seconds=runtime.settings.job_lease_seconds / 3,
    )
    try:
        if job.kind == RECHUNK:
            _rechunk(runtime, job, worker, embedder, should_stop)
            return
        if job.kind == DELETE:
            _delete(runtime, job, worker)
            return
        if not job.skip_invalid:
            check_documents(runtime, job.caller, job.collection, job.documents)
        position = job.position
        while position < len(job.documents):
            if _cancel_wanted(runtime, job.id):
                _finish(runtime, job.id, worker, "cancelled")
                return
            if should_stop():
                _finish(runtime, job.id, worker, "queued")
                return
            end = min(position + job.batch_documents, len(job.documents))
            _write_slice(runtime, job, worker, embedder, position, end)
            position = end
        _finish(runtime, job.id, worker, "done")
    except JobTakenOver:
        log.warning("job %s was taken over by another worker; this one stops", job.id)
    except ServiceError as error:
        documents = error.extra.get("documents") if isinstance(error, InvalidDocuments) else None
        _finish(
            runtime,
            job.id,
            worker,
            "failed",
            failure=error.body()["error"],
            errors=_with_origins(job, documents or []),
        )
    except Exception:
        log.exception("job %s stopped on an unexpected error", job.id)
        _finish(runtime, job.id, worker, "failed", failure=dict(UNEXPECTED))
        raise


def _write_slice(
    runtime: Runtime,
    job: ClaimedJob,
    worker: str,
    embedder: Embedder,
    start: int,
    end: int,
) -> None:
    """Write the job's documents ``start:end`` as one batch; with ``skip_invalid``, the invalid
    ones are recorded and left out, and the rest is written."""
    pending = list(range(start, end))
    skipped: list[dict[str, Any]] = []
    while pending:
        record = partial(_record_batch, job.id, worker, pending, skipped, end, runtime)
        try:
            upsert_documents(
                runtime,
                job.caller,
                job.collection,
                [job.documents[i] for i in pending],
                embedder=embedder,
                on_written=record,
            )
            return
        except InvalidDocuments as invalid:
            if not job.skip_invalid:
                raise
            problems = invalid.extra["documents"]
            bad = {problem["index"] for problem in problems}
            skipped.extend(
                _with_origins(job, [{**p, "index": pending[p["index"]]} for p in problems])
            )
            pending = [index for place, index in enumerate(pending) if place not in bad]

    def attempt() -> None:
        with runtime.write_transaction() as session:
            _advance(session, job.id, worker, [], skipped, end, runtime, Vectors({}, {}))

    runtime.retries.run(attempt)


def _rechunk(
    runtime: Runtime,
    job: ClaimedJob,
    worker: str,
    embedder: Embedder,
    should_stop: Callable[[], bool],
) -> None:
    """Re-chunk the collection a batch at a time until it switches over; each batch's write
    also moves the job (``rebuild.rebuild_batch``), so its progress is the collection's."""
    while not rebuild_batch(runtime.transactions, runtime.retries, embedder, job.collection):
        if should_stop():
            _finish(runtime, job.id, worker, "queued")
            return
        _renew_lease(runtime, job.id, worker)
    _finish(runtime, job.id, worker, "done")


def _delete(runtime: Runtime, job: ClaimedJob, worker: str) -> None:
    """Delete what the filter matches in one write, which also records each deleted document
    on the job; a job taken over meanwhile has that write rolled back."""
    if _cancel_wanted(runtime, job.id):
        _finish(runtime, job.id, worker, "cancelled")
        return

    def record(session: Session, deleted: Sequence[str]) -> None:
        row = job_rows.lock_job(session, job.id)
        if row is None or row.state != "running" or row.worker != worker:
            raise JobTakenOver(job.id)
        row.documents = row.documents_done = len(deleted)
        row.results = [{"id": document, "status": "deleted"} for document in deleted]

    delete_by_filter(runtime, job.caller, job.collection, job.filter, on_deleted=record)
    _finish(runtime, job.id, worker, "done")


def _with_origins(job: ClaimedJob, problems: Sequence[dict[str, Any]]) -> list[dict[str, Any]]:
    if not job.origins:
        return list(problems)
    return [{**p, "origin": job.origins[p["index"]]} for p in problems]


def _record_batch(
    job_id: str,
    worker: str,
    indexes: Sequence[int],
    skipped: Sequence[dict[str, Any]],
    end: int,
    runtime: Runtime,
    session: Session,
    results: list[dict[str, Any]],
    vectors: Vectors,
) -> None:
    placed = [{**result, "index": index} for result, index in zip(results, indexes, strict=True)]
    _advance(session, job_id, worker, placed, skipped, end, runtime, vectors)


def _advance(
    session: Session,
    job_id: str,
    worker: str,
    results: Sequence[dict[str, Any]],
    skipped: Sequence[dict[str, Any]],
    end: int,
    runtime: Runtime,
    vectors: Vectors,
) -> None:
    """Inside a batch's write: move the job past the batch, or roll the batch back when the job
    is no longer this worker's."""
    row = job_rows.lock_job(session, job_id)
    if row is None or row.state != "running" or row.worker != worker:
        raise JobTakenOver(job_id)
    row.documents_done = end
    row.results = [*row.results, *results]
    row.errors = [*row.errors, *skipped]
    row.chunks += sum(int(r["chunks"]) for r in results)
    row.embedded += len(vectors.fresh)
    row.cached += len(vectors.cached)
    row.lease_expires_at = repository.utcnow() + dt.timedelta(
        seconds=runtime.settings.job_lease_seconds
    )


def _cancel_wanted(runtime: Runtime, job_id: str) -> bool:
    with runtime.transaction() as session:
        row = job_rows.job_by_id(session, job_id)
        return row is None or row.cancel_requested


def _renew_lease(runtime: Runtime, job_id: str, worker: str) -> None:
    def attempt() -> None:
        with runtime.write_transaction() as session:
            row = job_rows.lock_job(session, job_id)
            if row is None or row.state != "running" or row.worker != worker:
                raise JobTakenOver(job_id)
            row.lease_expires_at = repository.utcnow() + dt.timedelta(
                seconds=runtime.settings.job_lease_seconds
            )

    runtime.retries.run(attempt)


def _finish(
    runtime: Runtime,
    job_id: str,
    worker: str,
    state: str,
    *,
    failure: dict[str, Any] | None = None,
    errors: Sequence[dict[str, Any]] | None = None,
) -> None:
    def attempt() -> None:
        with runtime.write_transaction() as session:
            row = job_rows.lock_job(session, job_id)
            if row is None or row.state != "running" or row.worker != worker:
                return
            _close(row, state)
            row.failure = failure
            if errors:
                row.errors = [*row.errors, *errors]

    runtime.retries.run(attempt)


def _close(row: JobRow, state: str) -> None:
    """End the worker's claim: the job finished in ``state``, or went back to the queue."""
    row.state = state
    row.finished_at = None if state == "queued" else repository.utcnow()
    row.lease_expires_at = None


class LeaseKeepingEmbedder:
    """The runtime's embedder, embedding in slices and renewing the job's claim between them
    when a third of the lease has passed, so a long document never loses its worker's claim."""

    SLICE = 64

    def __init__(self, inner: Embedder, *, renew: Callable[[], None], every_seconds: float) -> None:
        self._inner = inner
        self._renew = renew
        self._every = every_seconds
        self._renewed = time.monotonic()
        self.name = inner.name
        self.dimensions = inner.dimensions
        self.window = inner.window
        self.special_tokens = inner.special_tokens
        self.tokenizer_name = inner.tokenizer_name
        self.tokens = inner.tokens

    def embed_documents(self, texts: Sequence[str]) -> np.ndarray:
        parts = []
        for part in _slices(texts, self.SLICE):
            parts.append(self._inner.embed_documents(part))
            if time.monotonic() - self._renewed >= self._every:
                self._renew()
                self._renewed = time.monotonic()
        if not parts:
            return self._inner.embed_documents([])
        return np.concatenate(parts)

    def embed_query(self, text: str) -> np.ndarray:
        return self._inner.embed_query(text)


def _slices(texts: Sequence[str], size: int) -> Iterator[Sequence[str]]:
    for start in range(0, len(texts), size):
        yield texts[start : start + size]


def document_result(result: dict[str, Any]) -> dict[str, Any]:
    """A job's result for one document as a request's response gives it (without its place)."""
    return {"id": result["id"], "status": result["status"], "chunks": result["chunks"]}
