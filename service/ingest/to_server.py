"""``excerpta ingest --url``: a folder or a .jsonl file sent to a running server as jobs, and
the jobs followed document by document through ``remote_jobs.RemoteJobs``."""

from __future__ import annotations

import json
import time
from collections.abc import Sequence
from pathlib import Path
from typing import Any

from service.ingest.progress import IngestCounts, IngestTally, ProgressView, Refusal, read_documents
from service.ingest.remote_jobs import BatchTooLarge, DocumentsRefused, RemoteJobs

# Documents per job sent to a server: well under its batch and body limits for ordinary files.
SERVER_JOB_DOCUMENTS = 100


def ingest_to_server(
    remote: RemoteJobs,
    collection: str,
    path: Path,
    *,
    schema_file: Path | None,
    view: ProgressView,
    job_documents: int = SERVER_JOB_DOCUMENTS,
    pause: float = 0.2,
) -> IngestCounts:
    """Send the source as jobs of ``job_documents`` and follow them document by document. A
    batch the server refuses for some of its documents is sent again without them, each shown
    with its reason; Ctrl-C cancels the jobs not yet done."""
    if schema_file is not None:
        remote.put_collection(collection, json.loads(schema_file.read_text(encoding="utf-8")))
    tally = IngestTally(view)
    documents = read_documents(path, tally)
    sent: list[tuple[str, list[str]]] = []  # job id, the origin of each of its documents
    try:
        for start in range(0, len(documents), job_documents):
            _send_batch(remote, collection, documents[start : start + job_documents], tally, sent)
        written = _follow_jobs(remote, sent, tally, pause)
    except KeyboardInterrupt:
        for job_id, _ in sent:
            remote.cancel(job_id)
        view.report("interrupted: the jobs stop after their current batch; run again to go on")
        raise
    return IngestCounts(written, tally.failures)


def _send_batch(
    remote: RemoteJobs,
    collection: str,
    batch: list[tuple[str, dict[str, Any]]],
    tally: IngestTally,
    sent: list[tuple[str, list[str]]],
) -> None:
    """Send (origin, document) pairs as one job; the documents the server refuses are shown
    and the rest sent again, and a batch past one of its limits is sent in halves, so only a
    document that is itself too large is refused."""
    while batch:
        try:
            job_id = remote.submit(collection, [document for _, document in batch])
        except DocumentsRefused as refused:
            for problem in refused.documents:
                tally.refused(Refusal(batch[problem.index][0], problem.id, problem.message))
            bad = {problem.index for problem in refused.documents}
            batch = [entry for place, entry in enumerate(batch) if place not in bad]
            continue
        except BatchTooLarge as too_large:
            if len(batch) == 1:
                origin, document = batch[0]
                tally.refused(Refusal(origin, document.get("id"), str(too_large)))
                return
            middle = len(batch) // 2
            _send_batch(remote, collection, batch[:middle], tally, sent)
            _send_batch(remote, collection, batch[middle:], tally, sent)
            return
        sent.append((job_id, [origin for origin, _ in batch]))
        return


def _follow_jobs(
    remote: RemoteJobs, sent: Sequence[tuple[str, list[str]]], tally: IngestTally, pause: float
) -> int:
    """Read each job until it finishes; the documents written (new or changed)."""
    written = 0
    for job_id, origins in sent:
        while True:
            job = remote.job(job_id)
            refusals = [
                Refusal(origins[problem.index], problem.id, problem.message)
                for problem in job.refused
            ]
            tally.job_read(job_id, done=len(job.statuses), refusals=refusals, chunks=job.chunks)
            if job.finished:
                break
            time.sleep(pause)
        if job.state != "done":
            if job.state == "failed":
                tally.view.report(f"job {job_id} failed: {job.failure}")
            tally.not_written(job.documents - len(job.statuses) - len(job.refused))
        written += sum(1 for status in job.statuses if status != "unchanged")
    return written
