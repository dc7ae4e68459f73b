"""``excerpta ingest`` on the store: a folder or a .jsonl file written
as one job, which this process runs and follows document by document."""

from __future__ import annotations

import json
import threading
from pathlib import Path
from typing import Any

from service.errors import error_from_body
from service.ingest.progress import IngestCounts, IngestTally, ProgressView, Refusal, read_documents
from service.store.job_rows import RECHUNK
from service.usecases import jobs
from service.usecases.callers import LOCAL_ADMIN
from service.usecases.collections import CollectionSpec, put_collection
from service.usecases.runtime import Runtime


def ingest_path(
    runtime: Runtime,
    collection: str,
    path: Path,
    *,
    schema_file: Path | None,
    batch_size: int,
    view: ProgressView,
) -> IngestCounts:
    """Ingest a folder or a .jsonl file as one job, following it document by document.

    The job is recorded in the store and run by this process (unless a worker on the same
    store takes it first); it writes ``batch_size`` documents per transaction, skips each
    invalid document with its reason, and leaves what it wrote in place when interrupted, so a
    second run embeds only what the first did not store.
    """
    if schema_file is not None:
        raw = json.loads(schema_file.read_text(encoding="utf-8"))
        spec = CollectionSpec.from_file(raw)
        put_collection(runtime, LOCAL_ADMIN, collection, spec)
        run_pending_rechunk(runtime, collection, view)

    tally = IngestTally(view)
    documents = read_documents(path, tally)
    if not documents:
        return IngestCounts(0, tally.failures)
    job = jobs.submit_upsert(
        runtime,
        LOCAL_ADMIN,
        collection,
        [document for _, document in documents],
        origins=[origin for origin, _ in documents],
        skip_invalid=True,
        batch_documents=batch_size,
    )
    finished = follow_job(runtime, job.id, tally)
    if finished.state == "failed" and finished.failure is not None:
        raise error_from_body(finished.failure)
    written = sum(1 for result in finished.results if result["status"] != "unchanged")
    return IngestCounts(written, tally.failures)


def run_pending_rechunk(runtime: Runtime, collection: str, view: ProgressView) -> None:
    """A changed chunking's job, run here before the documents are written (so they are chunked
    once, the new way), unless a worker on the same store has taken it already."""
    for job in jobs.list_jobs(runtime, LOCAL_ADMIN, collection=collection, state="queued"):
        if job.kind == RECHUNK:
            view.report(f"re-chunking the {job.counts.documents} documents of {collection!r} first")
            jobs.run_job(runtime, job.id, worker=jobs.worker_name())


def follow_job(
    runtime: Runtime, job_id: str, tally: IngestTally, *, pause: float = 0.2
) -> jobs.JobView:
    """Run the job on a thread of this process (a worker may have taken it already) and show
    its progress from the store until it finishes. Ctrl-C cancels it at the next batch."""
    runner = threading.Thread(
        target=jobs.run_job,
        args=(runtime, job_id),
        kwargs={"worker": jobs.worker_name()},
        name="excerpta-ingest",
        daemon=True,
    )
    runner.start()
    try:
        while True:
            job = jobs.get_job(runtime, LOCAL_ADMIN, job_id)
            tally.job_read(
                job_id,
                done=len(job.results),
                refusals=[_refusal(problem) for problem in job.errors],
                chunks=job.counts.chunks,
            )
            if job.finished:
                runner.join()
                return job
            runner.join(pause)
    except KeyboardInterrupt:
        jobs.cancel_job(runtime, LOCAL_ADMIN, job_id)
        tally.view.report("interrupted: the job stops after its current batch; run again to go on")
        runner.join()
        raise


def _refusal(problem: dict[str, Any]) -> Refusal:
    return Refusal(
        problem.get("origin", f"#{problem['index']}"), problem.get("id"), problem["message"]
    )
