"""Session-wide runtimes over the real model: the demo corpus and Cranfield, each embedded once.

Embedding is what costs time here (Cranfield's 2,000 chunks take minutes on two cores), so the
model is loaded once (the ``minilm`` fixture), each corpus is ingested once into a scratch data
dir, and every test of the session reads the same collections. Tests that write use collections
of their own beside the shared ones (the embedding cache makes a copy of a corpus free of model
calls), so the shared collections stay exactly as ingested.
"""

from __future__ import annotations

import contextlib
import io
import json
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from fastapi.testclient import TestClient
from sqlalchemy import select

from service.api.app import create_app
from service.cli import main
from service.config import Settings
from service.store.tables import ChunkRow, CollectionRow, DocumentRow, EmbeddingRow
from service.usecases.demo import ingest_demo
from service.usecases.runtime import Runtime
from tests.api_helpers import Api, make_key
from tests.chat_endpoint import FakeEndpoint
from tests.progress_lines import ReportedLines

DEMO_CORPUS = Path(__file__).resolve().parents[2] / "corpus_example"
DEMO_COLLECTION = "bikes"
CRANFIELD_COLLECTION = "cranfield"
MED_COLLECTION = "med"
SERVER_POLL_MS = 50
"""The Cranfield server's index poll interval: small, so a write made elsewhere shows soon."""
RANKING_LIMIT = 20_000
"""top_k and depth limit of the Cranfield server, above its chunk count, for full rankings."""


class CountingEmbedder:
    """The real model behind a record of what was embedded, to prove when nothing was."""

    def __init__(self, inner: Any) -> None:
        self.inner = inner
        self.document_calls = 0
        self.embedded: list[str] = []

    @property
    def name(self) -> str:
        return str(self.inner.name)

    @property
    def dimensions(self) -> int:
        return int(self.inner.dimensions)

    @property
    def window(self) -> int:
        return int(self.inner.window)

    @property
    def special_tokens(self) -> int:
        return int(self.inner.special_tokens)

    @property
    def tokenizer_name(self) -> str:
        return str(self.inner.tokenizer_name)

    @property
    def tokens(self) -> Any:
        return self.inner.tokens

    def embed_documents(self, texts: Sequence[str]) -> np.ndarray:
        self.document_calls += 1
        self.embedded.extend(texts)
        vectors: np.ndarray = self.inner.embed_documents(texts)
        return vectors

    def embed_query(self, text: str) -> np.ndarray:
        vector: np.ndarray = self.inner.embed_query(text)
        return vector


@dataclass
class IngestedCollection:
    runtime: Runtime
    name: str
    embedder: CountingEmbedder
    report: list[str] = field(default_factory=list)
    written: int = 0
    failures: int = 0


@dataclass(frozen=True)
class CliRun:
    code: int
    stdout: str
    stderr: str


@pytest.fixture(scope="session")
def reference_model(minilm: Any) -> Any:
    """The sentence-transformers model itself, called directly by reference checks.

    It is the object the embedder loaded (so the model is in memory once per session); the
    checks call its own ``encode`` and tokenizer, not the service's wrapper around them.
    """
    return minilm._model


@pytest.fixture(scope="session")
def run_cli(minilm: Any) -> Callable[[list[str]], CliRun]:
    """``excerpta ...`` in this process, as its own runtime, with the already loaded model."""

    def run(argv: list[str]) -> CliRun:
        out, err = io.StringIO(), io.StringIO()
        with (
            pytest.MonkeyPatch.context() as patch,
            contextlib.redirect_stdout(out),
            contextlib.redirect_stderr(err),
        ):
            patch.setattr("service.usecases.runtime.load_embedder", lambda _settings: minilm)
            code = main(argv)
        return CliRun(code, out.getvalue(), err.getvalue())

    return run


# The demo corpus -----------------------------------------------------------------------------


@pytest.fixture(scope="session")
def demo(minilm: Any, tmp_path_factory: pytest.TempPathFactory) -> Iterator[IngestedCollection]:
    """corpus_example ingested as ``excerpta demo`` does: its folder with its schema.json."""
    embedder = CountingEmbedder(minilm)
    settings = Settings(data_dir=tmp_path_factory.mktemp("demo-data"), index_poll_ms=0)
    runtime = Runtime(settings, embedder)
    collection = IngestedCollection(runtime, DEMO_COLLECTION, embedder)
    collection.written, collection.failures = ingest_demo(
        runtime, DEMO_COLLECTION, DEMO_CORPUS, ReportedLines(collection.report.append)
    )
    yield collection
    runtime.close()


@pytest.fixture(scope="session")
def demo_api(demo: IngestedCollection) -> Iterator[Api]:
    with TestClient(create_app(demo.runtime)) as client:
        yield Api(client, make_key(demo.runtime, "admin", name="demo-admin"))


# Cranfield -----------------------------------------------------------------------------------


@pytest.fixture(scope="session")
def cranfield_data_dir(tmp_path_factory: pytest.TempPathFactory) -> Path:
    return tmp_path_factory.mktemp("cranfield-data")


@pytest.fixture(scope="session")
def cranfield_ingest(
    cranfield_dir: Path, cranfield_data_dir: Path, run_cli: Callable[[list[str]], CliRun]
) -> CliRun:
    """``excerpta ingest cranfield documents.jsonl --schema schema.json`` into a scratch dir."""
    return run_cli(
        [
            "ingest",
            CRANFIELD_COLLECTION,
            str(cranfield_dir / "documents.jsonl"),
            "--schema",
            str(cranfield_dir / "schema.json"),
            "--data-dir",
            str(cranfield_data_dir),
        ]
    )


@pytest.fixture(scope="session")
def cranfield_runtime(
    cranfield_ingest: CliRun, cranfield_data_dir: Path, minilm: Any
) -> Iterator[Runtime]:
    """The server's runtime over the data dir the CLI wrote, as ``excerpta serve`` builds it."""
    settings = Settings(
        data_dir=cranfield_data_dir,
        index_poll_ms=SERVER_POLL_MS,
        max_top_k=RANKING_LIMIT,
        max_depth=RANKING_LIMIT,
    )
    runtime = Runtime(settings, minilm)
    yield runtime
    runtime.close()


@pytest.fixture(scope="session")
def cranfield_api(cranfield_runtime: Runtime) -> Iterator[Api]:
    with TestClient(create_app(cranfield_runtime)) as client:
        yield Api(client, make_key(cranfield_runtime, "admin", name="cranfield-admin"))


# MED ------------------------------------------------------------------------------------------


@pytest.fixture(scope="session")
def med_data_dir(tmp_path_factory: pytest.TempPathFactory) -> Path:
    return tmp_path_factory.mktemp("med-data")


@pytest.fixture(scope="session")
def med_ingest(med_dir: Path, med_data_dir: Path, run_cli: Callable[[list[str]], CliRun]) -> CliRun:
    """``excerpta ingest med documents.jsonl --schema schema.json`` into a scratch dir."""
    return run_cli(
        [
            "ingest",
            MED_COLLECTION,
            str(med_dir / "documents.jsonl"),
            "--schema",
            str(med_dir / "schema.json"),
            "--data-dir",
            str(med_data_dir),
        ]
    )


@pytest.fixture(scope="session")
def med_runtime(med_ingest: CliRun, med_data_dir: Path, minilm: Any) -> Iterator[Runtime]:
    settings = Settings(data_dir=med_data_dir, max_top_k=RANKING_LIMIT, max_depth=RANKING_LIMIT)
    runtime = Runtime(settings, minilm)
    yield runtime
    runtime.close()


@dataclass(frozen=True)
class StoredChunk:
    chunk_id: str
    document_id: str
    title: str
    section: str
    text: str
    embedded_text_hash: str


@pytest.fixture(scope="session")
def cranfield_chunks(cranfield_runtime: Runtime) -> list[StoredChunk]:
    """Every chunk of the ingested collection as the store holds it, in chunk_id order."""
    with cranfield_runtime.transaction() as session:
        collection = session.scalars(
            select(CollectionRow).where(CollectionRow.name == CRANFIELD_COLLECTION)
        ).one()
        rows = session.execute(
            select(DocumentRow.external_id, DocumentRow.title, ChunkRow)
            .join(ChunkRow, ChunkRow.document_id == DocumentRow.id)
            .where(
                DocumentRow.collection_id == collection.id,
                ChunkRow.generation == collection.chunk_generation,
            )
        ).all()
    chunks = [
        StoredChunk(
            chunk_id=f"{external_id}#{chunk.ordinal:04d}",
            document_id=external_id,
            title=title,
            section=chunk.section,
            text=chunk.text,
            embedded_text_hash=chunk.embedded_text_hash,
        )
        for external_id, title, chunk in rows
    ]
    return sorted(chunks, key=lambda c: c.chunk_id)


@pytest.fixture(scope="session")
def cranfield_vectors(
    cranfield_runtime: Runtime, cranfield_chunks: list[StoredChunk]
) -> np.ndarray:
    """The stored embedding of every chunk, row-aligned with ``cranfield_chunks``."""
    with cranfield_runtime.transaction() as session:
        rows = session.execute(
            select(EmbeddingRow.text_hash, EmbeddingRow.vector).where(
                EmbeddingRow.embedder == cranfield_runtime.embedder.name
            )
        ).all()
    by_hash = {text_hash: np.frombuffer(blob, dtype=np.float32) for text_hash, blob in rows}
    return np.stack([by_hash[c.embedded_text_hash] for c in cranfield_chunks])


@pytest.fixture(scope="session")
def cranfield_corpus(cranfield_dir: Path) -> dict[str, dict[str, Any]]:
    """corpus.jsonl by id: the converted source, independent of the ingest path."""
    records: dict[str, dict[str, Any]] = {}
    with (cranfield_dir / "corpus.jsonl").open(encoding="utf-8") as lines:
        for line in lines:
            record = json.loads(line)
            records[record["id"]] = record
    return records


@pytest.fixture
def endpoint() -> Iterator[FakeEndpoint]:
    """A scripted chat-completions endpoint on 127.0.0.1."""
    with FakeEndpoint() as running:
        yield running
