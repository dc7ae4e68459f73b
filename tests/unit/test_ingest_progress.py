"""An ingest's progress and its sending to a server, over a recording view and a scripted
server: no store, no model, no network."""

from __future__ import annotations

import json
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

import pytest

from service.ingest.progress import IngestCounts, IngestTally, Refusal, read_documents
from service.ingest.remote_jobs import BatchTooLarge, DocumentsRefused, RefusedDocument, RemoteJob
from service.ingest.to_server import ingest_to_server


class RecordedView:
    def __init__(self) -> None:
        self.total: int | None = None
        self.position = 0
        self.lines: list[str] = []
        self.chunks: list[int] = []

    def begin(self, documents: int) -> None:
        self.total = documents

    def advance(self, documents: int) -> None:
        self.position += documents

    def report(self, line: str) -> None:
        self.lines.append(line)

    def rate(self, chunks: int, per_second: float) -> None:
        assert per_second >= 0
        self.chunks.append(chunks)


def test_a_job_read_again_moves_the_view_only_by_what_it_did_since() -> None:
    view = RecordedView()
    tally = IngestTally(view)
    first = [Refusal("notes.jsonl:2", "bad", "Attribute 'colour' is not in the schema.")]

    tally.job_read("job-a", done=2, refusals=first, chunks=5)
    tally.job_read("job-a", done=3, refusals=first, chunks=7)
    tally.job_read("job-b", done=1, refusals=[], chunks=2)

    assert view.position == 3 + 1 + 1
    assert view.lines == ["notes.jsonl:2: document 'bad': Attribute 'colour' is not in the schema."]
    assert view.chunks == [5, 7, 9]
    assert tally.failures == 1


def test_an_unreadable_line_is_refused_and_counted_in_the_total(tmp_path: Path) -> None:
    source = tmp_path / "notes.jsonl"
    source.write_text(
        json.dumps({"id": "note-1", "text": "true the wheel"}) + '\n{"id": "torn", \n',
        encoding="utf-8",
    )
    view = RecordedView()
    tally = IngestTally(view)

    documents = read_documents(source, tally)

    assert [origin for origin, _ in documents] == ["notes.jsonl:1"]
    assert view.total == 2 and view.position == 1 and tally.failures == 1
    assert view.lines[0].startswith("notes.jsonl:2: ")


class ScriptedServer:
    """Refuses a batch holding a document longer than ``longest`` characters as too large, and
    one holding a document without text as invalid; every job it takes is done at once."""

    def __init__(self, longest: int) -> None:
        self.longest = longest
        self.submitted: list[list[str]] = []
        self.jobs: dict[str, list[str]] = {}
        self.cancelled: list[str] = []
        self.interrupt_reads = False

    def put_collection(self, name: str, schema: Mapping[str, Any]) -> None:
        raise AssertionError("no schema was given")

    def submit(self, collection: str, documents: Sequence[Mapping[str, Any]]) -> str:
        self.submitted.append([str(document["id"]) for document in documents])
        empty = [
            RefusedDocument(place, str(document["id"]), "A document needs text.")
            for place, document in enumerate(documents)
            if not document["text"]
        ]
        if empty:
            raise DocumentsRefused(empty)
        if any(len(document["text"]) > self.longest for document in documents):
            raise BatchTooLarge("The request body is too large.")
        job_id = f"job-{len(self.jobs)}"
        self.jobs[job_id] = [str(document["id"]) for document in documents]
        return job_id

    def job(self, job_id: str) -> RemoteJob:
        if self.interrupt_reads:
            raise KeyboardInterrupt
        written = self.jobs[job_id]
        return RemoteJob(
            id=job_id,
            state="done",
            documents=len(written),
            documents_done=len(written),
            chunks=len(written),
            statuses=tuple("created" for _ in written),
            refused=(),
            failure=None,
        )

    def cancel(self, job_id: str) -> None:
        self.cancelled.append(job_id)


def send_notes(
    server: ScriptedServer, folder: Path, view: RecordedView, *, job_documents: int
) -> IngestCounts:
    """Six notes, the second too long for one limit of the server and the fifth without text."""
    notes = [{"id": f"note-{n}", "text": f"brake note {n}"} for n in range(6)]
    notes[1]["text"] = "bleed the brake " * 10
    notes[4]["text"] = ""
    source = folder / "notes.jsonl"
    source.write_text("\n".join(json.dumps(note) for note in notes) + "\n", encoding="utf-8")
    return ingest_to_server(
        server,  # type: ignore[arg-type]
        "notes",
        source,
        schema_file=None,
        view=view,
        job_documents=job_documents,
        pause=0,
    )


def test_refused_documents_are_left_out_and_a_batch_too_large_is_sent_in_halves(
    tmp_path: Path,
) -> None:
    server = ScriptedServer(longest=40)
    view = RecordedView()

    counts = send_notes(server, tmp_path, view, job_documents=6)

    assert counts == (4, 2)
    assert server.submitted == [
        [f"note-{n}" for n in range(6)],
        ["note-0", "note-1", "note-2", "note-3", "note-5"],
        ["note-0", "note-1"],
        ["note-0"],
        ["note-1"],
        ["note-2", "note-3", "note-5"],
    ]
    assert view.lines == [
        "notes.jsonl:5: document 'note-4': A document needs text.",
        "notes.jsonl:2: document 'note-1': The request body is too large.",
    ]
    assert view.total == 6 and view.position == 6


def test_an_interrupted_ingest_cancels_every_job_it_sent(tmp_path: Path) -> None:
    server = ScriptedServer(longest=1000)
    server.interrupt_reads = True
    view = RecordedView()

    with pytest.raises(KeyboardInterrupt):
        send_notes(server, tmp_path, view, job_documents=2)

    assert server.cancelled == ["job-0", "job-1", "job-2"]
    assert view.lines[-1].startswith("interrupted: the jobs stop")
