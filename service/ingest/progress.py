"""How far an ingest of files has got, for whoever shows it.

An ingest (into the store, or to a server) reads its source, sends the documents as jobs and
reads the jobs until they finish. ``IngestTally`` keeps what it has shown of each job and counts
what failed; a ``ProgressView`` shows it (the command line's bar), so the work knows nothing of
how it is drawn.
"""

from __future__ import annotations

import time
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any, NamedTuple, Protocol

from service.ingest.source_files import read_source


class ProgressView(Protocol):
    """What an ingest shows as it goes."""

    def begin(self, documents: int) -> None:
        """The source holds this many documents (readable or not)."""
        ...

    def advance(self, documents: int) -> None:
        """This many more documents are done with, written or refused."""
        ...

    def report(self, line: str) -> None:
        """A line to show: a refused document and why, or what the ingest is doing."""
        ...

    def rate(self, chunks: int, per_second: float) -> None:
        """Chunks written so far, and how many a second since the ingest began."""
        ...


class IngestCounts(NamedTuple):
    """Documents an ingest wrote (new or changed) and documents it could not write."""

    written: int
    failed: int


@dataclass(frozen=True)
class Refusal:
    """A document that was not written: where it came from, its id if it has one, and why."""

    origin: str
    document_id: str | None
    reason: str


class IngestTally:
    """What an ingest has shown of each job, and how many documents failed."""

    def __init__(self, view: ProgressView) -> None:
        self.view = view
        self.failures = 0
        self._shown: dict[str, tuple[int, int]] = {}  # job id: (documents done, refusals)
        self._chunks: dict[str, int] = {}
        self._started = time.perf_counter()

    def refused(self, refusal: Refusal) -> None:
        named = f"document {refusal.document_id!r}: " if refusal.document_id else ""
        self.view.report(f"{refusal.origin}: {named}{refusal.reason}")
        self.failures += 1
        self.view.advance(1)

    def not_written(self, documents: int) -> None:
        """Documents of a job that stopped before it wrote them (its refusals were counted)."""
        self.failures += documents

    def job_read(self, job_id: str, *, done: int, refusals: Sequence[Refusal], chunks: int) -> None:
        """A job as it was just read: what it did since it was last read is shown, and the
        chunks of every job so far."""
        done_before, refused_before = self._shown.get(job_id, (0, 0))
        self.view.advance(done - done_before)
        for refusal in refusals[refused_before:]:
            self.refused(refusal)
        self._shown[job_id] = (done, len(refusals))
        self._chunks[job_id] = chunks
        written = sum(self._chunks.values())
        elapsed = max(time.perf_counter() - self._started, 1e-9)
        self.view.rate(written, written / elapsed)


def read_documents(path: Path, tally: IngestTally) -> list[tuple[str, dict[str, Any]]]:
    """Every readable document of the source as (origin, document); each file or line that
    cannot be read is refused with its reason."""
    items = list(read_source(path))
    tally.view.begin(len(items))
    documents = []
    for item in items:
        if item.error is not None or item.document is None:
            tally.refused(Refusal(item.origin, None, str(item.error)))
        else:
            documents.append((item.origin, item.document))
    return documents
