"""``excerpta ingest --url``: documents sent to a running server as jobs, followed document by
document, each refused file or document printed with its reason."""

from __future__ import annotations

import io
import json
import re
import threading
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from pathlib import Path

import httpx
import pytest

from service.cli import ProgressBar, main
from service.ingest.remote_jobs import RemoteJobs
from service.ingest.to_server import ingest_to_server
from service.server_client import ServerRefused
from service.usecases.job_queues import StoreQueue
from service.usecases.runtime import Runtime
from service.usecases.workers import work_from_store
from tests.api_helpers import make_key
from tests.progress_lines import ReportedLines
from tests.served import server_in_thread

SCHEMA = {"attributes": {"shop": {"type": "keyword"}}}


@contextmanager
def serving(runtime: Runtime) -> Iterator[str]:
    """The runtime served, its jobs taken from the store by a worker thread, as a worker
    process would take them."""
    stop = threading.Event()
    worker = threading.Thread(
        target=work_from_store,
        args=(runtime,),
        kwargs={"stop": stop.is_set, "idle": stop.wait},
        daemon=True,
    )
    worker.start()
    try:
        with server_in_thread(runtime) as url:
            yield url
    finally:
        stop.set()
        worker.join(30)


@pytest.fixture
def served(make_runtime: Callable[..., Runtime]) -> Iterator[tuple[str, Runtime]]:
    """A server whose worker writes one document per batch."""
    runtime = make_runtime(jobs=StoreQueue(), job_batch_documents=1, job_poll_ms=20)
    with serving(runtime) as url:
        yield url, runtime


def write_source(folder: Path) -> tuple[Path, Path]:
    folder.mkdir(parents=True, exist_ok=True)
    lines = [
        json.dumps({"id": f"note-{n}", "text": f"spoke tension note {n} for the wheel bench"})
        for n in range(5)
    ]
    lines.insert(1, json.dumps({"id": "bad-note", "text": "x y", "attributes": {"colour": "red"}}))
    lines.insert(4, '{"id": "torn-note", "text": ')
    source = folder / "notes.jsonl"
    source.write_text("\n".join(lines) + "\n", encoding="utf-8")
    schema = folder / "schema.json"
    schema.write_text(json.dumps(SCHEMA), encoding="utf-8")
    return source, schema


def test_ingest_to_a_server_sends_jobs_moves_per_document_and_names_each_rejected_file(
    tmp_path: Path, served: tuple[str, Runtime]
) -> None:
    url, runtime = served
    key = make_key(runtime, "admin", name="admin")
    source, schema = write_source(tmp_path / "source")
    remote = RemoteJobs(url, key)
    bar = io.StringIO()
    shown = ProgressBar(bar)
    try:
        written, failed = ingest_to_server(
            remote, "notes", source, schema_file=schema, job_documents=3, view=shown, pause=0.01
        )
    finally:
        shown.close()
        remote.close()

    assert (written, failed) == (5, 2)
    drawn = bar.getvalue()
    positions = [int(n) for n in re.findall(r"\| *(\d+)/7 \[", drawn)]
    assert positions[0] == 0 and positions[-1] == 7
    assert positions == sorted(positions)
    assert set(range(8)) <= set(positions), positions
    assert "chunks_per_s=" in drawn
    # Each update shows the time spent and the time left (tqdm's "elapsed<remaining").
    assert re.search(r"\| *3/7 \[\d\d:\d\d<\d\d:\d\d", drawn), drawn
    assert re.search(r"notes\.jsonl:2: document 'bad-note': Attribute 'colour'", drawn), drawn
    assert re.search(r"notes\.jsonl:5: The line is not valid JSON", drawn), drawn

    with httpx.Client(base_url=url, headers={"Authorization": f"Bearer {key}"}) as client:
        listed = client.get("/v1/jobs", params={"collection": "notes"}).json()["jobs"]
        assert sorted(job["counts"]["documents"] for job in listed) == [2, 3]
        assert {job["state"] for job in listed} == {"done"}
        stored = client.get("/v1/collections/notes").json()
        assert stored["documents"] == 5


def test_ingest_command_with_url_stores_nothing_twice_and_exits_1_for_rejected_files(
    tmp_path: Path, served: tuple[str, Runtime], capsys: pytest.CaptureFixture[str]
) -> None:
    url, runtime = served
    key = make_key(runtime, "admin", name="admin")
    source, schema = write_source(tmp_path / "source")
    argv = ["ingest", "notes", str(source), "--url", url, "--key", key]

    assert main([*argv, "--schema", str(schema)]) == 1
    first = capsys.readouterr()
    assert first.out.strip().splitlines()[-1] == "5 documents written, 2 failed"
    assert "notes.jsonl:2: document 'bad-note'" in first.err

    assert main(argv) == 1
    again = capsys.readouterr()
    assert again.out.strip().splitlines()[-1] == "0 documents written, 2 failed"

    assert main([*argv, "--batch-size", "2"]) == 2
    assert main(["ingest", "notes", str(source), "--url", url, "--key", "not-a-key"]) == 1
    assert "401" in capsys.readouterr().err


def test_a_batch_past_a_server_limit_is_sent_in_halves_until_only_the_large_document_is_refused(
    tmp_path: Path, make_runtime: Callable[..., Runtime]
) -> None:
    runtime = make_runtime(jobs=StoreQueue(), job_poll_ms=20, max_document_text_bytes=400)
    key = make_key(runtime, "admin", name="admin")
    notes = [{"id": f"note-{n}", "text": f"brake bleed note {n}"} for n in range(4)]
    notes.insert(2, {"id": "long-note", "text": "bleed the brake " * 40})
    source = tmp_path / "notes.jsonl"
    source.write_text("\n".join(json.dumps(note) for note in notes) + "\n", encoding="utf-8")
    shown: list[str] = []
    with serving(runtime) as url:
        remote = RemoteJobs(url, key)
        try:
            remote.put_collection("notes", {})
            written, failed = ingest_to_server(
                remote, "notes", source, schema_file=None, view=ReportedLines(shown.append)
            )
        finally:
            remote.close()
    assert (written, failed) == (4, 1)
    [refusal] = shown
    assert refusal.startswith("notes.jsonl:3: document 'long-note': ")
    assert refusal.endswith("A document's text may hold at most 400 bytes.")


def test_a_refusal_of_the_server_is_reported_in_one_sentence(tmp_path: Path) -> None:
    remote = RemoteJobs("http://127.0.0.1:9", "key")
    try:
        with pytest.raises(ServerRefused, match="cannot reach"):
            remote.job("any")
    finally:
        remote.close()
