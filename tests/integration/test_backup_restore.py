"""``excerpta backup`` and ``excerpta restore`` on each backend, through the command line.

A backup taken while a writer keeps writing restores to a consistent store (every document with
its chunks, every chunk with its vector, the change log up to the collection's revision). A
backup taken at rest restores to the same rows in every table, the same search results, keys
that still authenticate (and one still revoked), and never holds a key itself.
"""

from __future__ import annotations

import contextlib
import gzip
import io
import threading
import time
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any

import pytest
from sqlalchemy import Engine, func, select

from service.cli import main
from service.errors import Unauthenticated
from service.store.backup import TABLES
from service.store.db import make_engine
from service.store.tables import ChangeRow, ChunkRow, CollectionRow, DocumentRow, EmbeddingRow
from service.usecases import answering, collections, documents, keys
from service.usecases.callers import LOCAL_ADMIN
from service.usecases.runtime import Runtime
from service.usecases.search import SearchOptions
from tests.api_helpers import BIKE_SCHEMA
from tests.conftest import postgres_schema, postgres_url_for_schema

MANUALS = [
    {
        "id": f"manual-{n}",
        "title": f"Manual {n}",
        "text": f"# Brakes\n\nSet the pads {n} mm from the rim.\n\n# Tyres\n\nRun {n}.5 bar.",
        "media_type": "text/markdown",
        "source_url": f"https://docs.example.invalid/manual-{n}",
        "attributes": {"model": "Ridge", "model_year": 2020 + n, "tags": ["brakes"]},
        "access": ["staff"] if n % 2 else [],
    }
    for n in range(6)
]


@pytest.fixture(params=["sqlite", "postgresql"])
def store_urls(request: pytest.FixtureRequest, tmp_path: Path) -> Iterator[Callable[[], str]]:
    """Makes new, empty stores on one backend."""
    with contextlib.ExitStack() as stack:
        if request.param == "sqlite":
            count = iter(range(100))
            yield lambda: f"sqlite:///{tmp_path / f'store-{next(count)}.db'}"
        else:
            url = request.getfixturevalue("postgres_url")
            yield lambda: postgres_url_for_schema(url, stack.enter_context(postgres_schema(url)))


def cli(*argv: str) -> tuple[int, str, str]:
    out, err = io.StringIO(), io.StringIO()
    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
        code = main(list(argv))
    return code, out.getvalue(), err.getvalue()


def table_rows(engine: Engine) -> dict[str, list[tuple[Any, ...]]]:
    with engine.connect() as connection:
        return {
            table.name: [
                tuple(row)
                for row in connection.execute(select(table).order_by(*table.primary_key.columns))
            ]
            for table in TABLES
        }


def backup_text(path: Path) -> bytes:
    raw = path.read_bytes()
    return gzip.decompress(raw) if raw[:2] == b"\x1f\x8b" else raw


def hits(runtime: Runtime, query: str) -> list[tuple[str, float]]:
    options = SearchOptions(query=query, top_k=20)
    result = answering.search(runtime, LOCAL_ADMIN, "bikes", options, keep_trace=False)
    return [(h.chunk_id, round(h.score, 6)) for h in result.hits]


def test_a_backup_restores_to_the_same_store_and_one_taken_under_writes_to_a_consistent_one(
    store_urls: Callable[[], str], make_runtime: Callable[..., Runtime], tmp_path: Path
) -> None:
    source_url = store_urls()
    source = make_runtime(engine=make_engine(source_url))
    spec = collections.CollectionSpec(**{k: v for k, v in BIKE_SCHEMA.items()})
    collections.put_collection(source, LOCAL_ADMIN, "bikes", spec)
    collections.put_collection(source, LOCAL_ADMIN, "notes", collections.CollectionSpec())
    documents.upsert_documents(source, LOCAL_ADMIN, "bikes", MANUALS)
    with source.transaction() as session:
        reader_secret, _ = keys.create_key(
            session, role="reader", groups=["staff"], collections=None, name="reader"
        )
        gone_secret, _ = keys.create_key(
            session, role="writer", groups=[], collections=["bikes"], name="gone"
        )
        keys.revoke_key(session, "gone")
    traced = answering.search(source, LOCAL_ADMIN, "bikes", SearchOptions(query="brake pads"))
    while source.traces.held(traced.trace_id) is not None:
        time.sleep(0.01)

    writing = threading.Event()
    stop = threading.Event()

    def write_notes() -> None:
        for n in range(10_000):
            note = {"id": f"note-{n % 7}", "text": f"Workshop note {n}: check the spokes."}
            documents.upsert_documents(source, LOCAL_ADMIN, "notes", [note])
            writing.set()
            if stop.is_set():
                return

    writer = threading.Thread(target=write_notes)
    writer.start()
    writing.wait(30)
    online = tmp_path / "online.backup"
    try:
        code, out, err = cli(
            "backup", str(online), "--database-url", source_url, "--data-dir", str(tmp_path)
        )
    finally:
        stop.set()
        writer.join(60)
    assert (code, err) == (0, ""), err
    assert out.startswith("backed up ")

    online_url = store_urls()
    code, out, err = cli(
        "restore", str(online), "--database-url", online_url, "--data-dir", str(tmp_path)
    )
    assert (code, err) == (0, ""), err
    with make_runtime(engine=make_engine(online_url)).engine.connect() as connection:
        documents_without_chunks = connection.scalar(
            select(func.count())
            .select_from(DocumentRow)
            .where(~select(ChunkRow.id).where(ChunkRow.document_id == DocumentRow.id).exists())
        )
        chunks_without_vectors = connection.scalar(
            select(func.count())
            .select_from(ChunkRow)
            .where(
                ~select(EmbeddingRow.text_hash)
                .where(EmbeddingRow.text_hash == ChunkRow.embedded_text_hash)
                .exists()
            )
        )
        revisions = connection.execute(
            select(CollectionRow.revision, func.max(ChangeRow.revision))
            .join(ChangeRow, ChangeRow.collection_id == CollectionRow.id)
            .group_by(CollectionRow.id)
        ).all()
    assert documents_without_chunks == chunks_without_vectors == 0
    assert all(revision == logged for revision, logged in revisions)

    at_rest = tmp_path / "at-rest.backup"
    assert (
        cli("backup", str(at_rest), "--database-url", source_url, "--data-dir", str(tmp_path))[0]
        == 0
    )
    target_url = store_urls()
    code, out, err = cli(
        "restore", str(at_rest), "--database-url", target_url, "--data-dir", str(tmp_path)
    )
    assert (code, err) == (0, ""), err
    assert out.startswith("restored ")
    target = make_runtime(engine=make_engine(target_url))
    assert table_rows(target.engine) == table_rows(source.engine)
    fresh_source = make_runtime(engine=make_engine(source_url))
    for query in ("brake pads rim", "tyre pressure bar"):
        assert hits(target, query) == hits(fresh_source, query) != []
    assert keys.authenticate(target.key_reader, reader_secret).groups == {"staff"}
    with pytest.raises(Unauthenticated):
        keys.authenticate(target.key_reader, gone_secret)
    for secret in (reader_secret, gone_secret):
        assert secret.encode() not in backup_text(at_rest)
        assert secret.encode() not in backup_text(online)

    documents.upsert_documents(target, LOCAL_ADMIN, "notes", [{"id": "after", "text": "New."}])
    code, _, err = cli(
        "restore", str(at_rest), "--database-url", target_url, "--data-dir", str(tmp_path)
    )
    assert code == 1 and err.startswith("error: The store is not empty (") and err.count("\n") == 1
    code, _, err = cli(
        "backup", str(at_rest), "--database-url", source_url, "--data-dir", str(tmp_path)
    )
    assert code == 1 and "already exists" in err


def test_restoring_a_file_that_is_not_a_backup_says_so_in_one_sentence(tmp_path: Path) -> None:
    junk = tmp_path / "notes.txt"
    junk.write_text("not a backup\n", encoding="utf-8")
    code, out, err = cli("restore", str(junk), "--data-dir", str(tmp_path / "data"))
    assert (code, out) == (1, "")
    assert err == f"error: {junk} is not an excerpta backup.\n"


@pytest.mark.postgres
def test_a_backup_of_either_backend_restores_into_the_other(
    postgres_url: str, make_runtime: Callable[..., Runtime], tmp_path: Path
) -> None:
    """SQLite's own copy into PostgreSQL, then PostgreSQL's logical export back into SQLite."""
    data = str(tmp_path)
    sqlite_url = f"sqlite:///{tmp_path / 'source.db'}"
    source = make_runtime(engine=make_engine(sqlite_url))
    spec = collections.CollectionSpec(**{k: v for k, v in BIKE_SCHEMA.items()})
    collections.put_collection(source, LOCAL_ADMIN, "bikes", spec)
    documents.upsert_documents(source, LOCAL_ADMIN, "bikes", MANUALS)
    expected = table_rows(source.engine)
    with postgres_schema(postgres_url) as schema:
        postgres = postgres_url_for_schema(postgres_url, schema)
        back = f"sqlite:///{tmp_path / 'back.db'}"
        for origin, target, name in ((sqlite_url, postgres, "one"), (postgres, back, "two")):
            backup = str(tmp_path / f"{name}.backup")
            assert cli("backup", backup, "--database-url", origin, "--data-dir", data)[0] == 0
            code, _, err = cli("restore", backup, "--database-url", target, "--data-dir", data)
            assert (code, err) == (0, "")
            assert table_rows(make_runtime(engine=make_engine(target)).engine) == expected
