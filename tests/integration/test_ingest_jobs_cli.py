"""``excerpta ingest`` as a job followed document by document, and ``excerpta jobs``."""

from __future__ import annotations

import io
import json
import re
import subprocess
import sys
from collections.abc import Callable
from pathlib import Path

import pytest

from service.cli import ProgressBar, main
from service.store import repository
from service.usecases import jobs
from service.usecases.callers import LOCAL_ADMIN
from service.usecases.ingest_files import ingest_path
from service.usecases.job_queues import StoreQueue
from service.usecases.runtime import Runtime
from tests.conftest import REPO
from tests.hashing_embedder import HashingTestEmbedder
from tests.progress_lines import ReportedLines

SCHEMA = {
    "attributes": {"shop": {"type": "keyword"}},
    "chunking": {"max_tokens": 40, "overlap_tokens": 8},
}


def write_source(folder: Path) -> tuple[Path, Path]:
    folder.mkdir(parents=True, exist_ok=True)
    lines = [
        {"id": f"note-{n}", "text": f"wheel truing note {n} for the workshop", "attributes": {}}
        for n in range(4)
    ]
    lines.insert(2, {"id": "bad-note", "text": "x y", "attributes": {"colour": "red"}})
    source = folder / "notes.jsonl"
    source.write_text("\n".join(json.dumps(line) for line in lines) + "\n", encoding="utf-8")
    schema = folder / "schema.json"
    schema.write_text(json.dumps(SCHEMA), encoding="utf-8")
    return source, schema


def test_ingest_moves_its_bar_once_per_document_and_names_each_rejected_one(
    tmp_path: Path, make_runtime: Callable[..., Runtime]
) -> None:
    embedder = HashingTestEmbedder()
    runtime = make_runtime(embedder=embedder, jobs=StoreQueue())
    source, schema = write_source(tmp_path / "source")
    bar = io.StringIO()
    shown = ProgressBar(bar)

    try:
        written, failed = ingest_path(
            runtime, "notes", source, schema_file=schema, batch_size=1, view=shown
        )
    finally:
        shown.close()

    assert (written, failed) == (4, 1)
    drawn = bar.getvalue()
    positions = [int(n) for n in re.findall(r"\| *(\d+)/5 \[", drawn)]
    assert positions[0] == 0 and positions[-1] == 5
    assert sorted(set(positions)) == [0, 1, 2, 3, 4, 5]
    assert positions == sorted(positions)
    assert "chunks_per_s=" in drawn
    assert re.search(r"notes\.jsonl:3: document 'bad-note': Attribute 'colour'", drawn), drawn

    [job] = jobs.list_jobs(runtime, LOCAL_ADMIN, collection="notes")
    assert job.state == "done" and job.counts.documents_done == 5
    assert [e["index"] for e in job.errors] == [2]

    embedded = embedder.embedded_texts
    again = ingest_path(
        runtime, "notes", source, schema_file=None, batch_size=2, view=ReportedLines(print)
    )
    assert again == (0, 1)
    assert embedder.embedded_texts == embedded
    latest = jobs.list_jobs(runtime, LOCAL_ADMIN, collection="notes")[0]
    assert latest.counts.embedded == 0
    assert {r["status"] for r in latest.results} == {"unchanged"}


def test_jobs_command_lists_shows_and_refuses_to_cancel_a_finished_job(
    tmp_path: Path, make_runtime: Callable[..., Runtime], capsys: pytest.CaptureFixture[str]
) -> None:
    data = tmp_path / "data"
    runtime = make_runtime(data_dir=data, jobs=StoreQueue())
    source, schema = write_source(tmp_path / "source")
    ingest_path(
        runtime, "notes", source, schema_file=schema, batch_size=2, view=ReportedLines(print)
    )
    [job] = jobs.list_jobs(runtime, LOCAL_ADMIN)
    capsys.readouterr()

    assert main(["jobs", "list", "--data-dir", str(data), "--state", "done"]) == 0
    listed = capsys.readouterr().out
    assert job.id in listed and "upsert" in listed and "5/5 documents" in listed

    assert main(["jobs", "show", job.id, "--data-dir", str(data), "--json"]) == 0
    shown = json.loads(capsys.readouterr().out)
    assert shown["state"] == "done" and shown["errors"][0]["origin"].endswith("notes.jsonl:3")

    assert main(["jobs", "cancel", job.id, "--data-dir", str(data)]) == 1
    assert "has already finished" in capsys.readouterr().err
    assert main(["jobs", "show", "no-such-job", "--data-dir", str(data)]) == 1


def test_commands_that_need_no_model_do_not_load_it(tmp_path: Path) -> None:
    data = tmp_path / "data"
    script = (
        "import sys\n"
        "from service.cli import main\n"
        f"for argv in (['migrate'], ['keys', 'list'], ['jobs', 'list']):\n"
        f"    assert main([*argv, '--data-dir', {str(data)!r}]) == 0\n"
        "print(sorted(m for m in ('torch', 'sentence_transformers') if m in sys.modules))\n"
    )
    done = subprocess.run(
        [sys.executable, "-c", script], cwd=REPO, capture_output=True, text=True, timeout=120
    )
    assert done.returncode == 0, done.stderr
    assert done.stdout.strip().splitlines()[-1] == "[]"


def test_ingest_with_a_changed_chunking_runs_the_rechunk_job_first(
    tmp_path: Path, make_runtime: Callable[..., Runtime]
) -> None:
    runtime = make_runtime(jobs=StoreQueue())
    source, schema = write_source(tmp_path / "source")
    ingest_path(
        runtime, "notes", source, schema_file=schema, batch_size=2, view=ReportedLines(print)
    )
    finer = tmp_path / "finer.json"
    finer.write_text(
        json.dumps({**SCHEMA, "chunking": {"max_tokens": 16, "overlap_tokens": 0}}),
        encoding="utf-8",
    )
    lines: list[str] = []

    again = ingest_path(
        runtime,
        "notes",
        source,
        schema_file=finer,
        batch_size=2,
        view=ReportedLines(lines.append),
    )

    assert again == (0, 1)
    assert lines[0] == "re-chunking the 4 documents of 'notes' first"
    newest = jobs.list_jobs(runtime, LOCAL_ADMIN, collection="notes")
    assert [(job.kind, job.state) for job in newest[:2]] == [
        ("upsert", "done"),
        ("rechunk", "done"),
    ]
    assert newest[1].counts.documents_done == 4
    with runtime.transaction() as session:
        row = repository.collection_by_name(session, "notes")
        assert row is not None and row.chunking["max_tokens"] == 16
        assert not row.settings.get("pending_chunking")
