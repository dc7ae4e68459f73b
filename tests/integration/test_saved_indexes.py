"""Restart without rebuilding, on a SQLite store: a saved index is read back and caught up
from the change log; a corrupt or foreign one is rebuilt from the store.

Each start is a fresh registry over the same store and index directory. Its source counts the
full loads (every chunk and vector read from the store), which a start from a usable saved
index never does. Search results after each start are held to those of an index built afresh
from the store, the reference a saved index must reproduce.
"""

from __future__ import annotations

import contextlib
import logging
import threading
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path

import pytest

from service.index.saved import IndexDirectory
from service.store import repository
from service.usecases import answering, collections, documents
from service.usecases.callers import LOCAL_ADMIN
from service.usecases.indexes import (
    CollectionHeader,
    CollectionUpdate,
    IndexRegistry,
    LoadedCollection,
    SavedIndexes,
    StoreIndexSource,
)
from service.usecases.runtime import Runtime
from service.usecases.search import SearchOptions

WORDS = ["brake", "chain", "saddle", "tyre", "gear", "frame", "light", "pedal", "hub", "spoke"]
MODELS = ["Ridge", "Delta", "Comet"]
SPEC = collections.CollectionSpec(
    attributes={"model": {"type": "keyword"}, "year": {"type": "integer"}},
    vectors={"index": "graph", "graph": {"links": 8, "build_breadth": 32, "search_breadth": 32}},
)
QUERIES = [
    ("brake chain", None, "hybrid"),
    ("saddle light", "model = 'Ridge'", "semantic"),
    ("hub spoke gear", "year >= 2022", "lexical"),
    ("tyre frame", None, "semantic"),
]


class CountingSource:
    """The store's source, counting full loads; a load may be held until ``release`` is set."""

    def __init__(self, inner: StoreIndexSource, release: threading.Event | None = None) -> None:
        self.inner = inner
        self.loads = 0
        self.loading = threading.Event()
        self.release = release

    def load(self, name: str) -> contextlib.AbstractContextManager[LoadedCollection]:
        self.loads += 1
        self.loading.set()
        if self.release is not None:
            assert self.release.wait(30), "the held load was never released"
        return self.inner.load(name)

    def describe(self, name: str) -> CollectionHeader:
        return self.inner.describe(name)

    def names(self) -> list[str]:
        return self.inner.names()

    def update(self, collection_id: int, **options: object) -> CollectionUpdate | None:
        return self.inner.update(collection_id, **options)  # type: ignore[arg-type]


@dataclass
class Start:
    registry: IndexRegistry
    source: CountingSource


@pytest.fixture
def store(make_runtime: object, tmp_path: Path) -> Iterator[Runtime]:
    runtime: Runtime = make_runtime()  # type: ignore[operator]
    collections.put_collection(runtime, LOCAL_ADMIN, "notes", SPEC)
    write(runtime, range(30))
    yield runtime


def note(number: int, version: int = 0) -> dict[str, object]:
    words = [WORDS[(number * 3 + k * (version + 1)) % len(WORDS)] for k in range(8)]
    return {
        "id": f"note-{number}",
        "title": f"Workshop note {number}",
        "text": f"{' '.join(words)}. Then {' '.join(reversed(words))}.",
        "attributes": {"model": MODELS[number % 3], "year": 2019 + number % 6},
    }


def write(runtime: Runtime, numbers: range | list[int], version: int = 0) -> None:
    documents.upsert_documents(runtime, LOCAL_ADMIN, "notes", [note(n, version) for n in numbers])


def start(
    runtime: Runtime,
    folder: Path | None,
    *,
    store_id: str | None = None,
    embedder: str | None = None,
    release: threading.Event | None = None,
) -> Start:
    source = CountingSource(StoreIndexSource(runtime.transactions), release)
    saved = None
    if folder is not None:
        saved = SavedIndexes(
            directory=IndexDirectory(folder),
            store_id=store_id or str(runtime.store.store_id),
            embedder=embedder or runtime.embedder.name,
            every_seconds=300.0,
        )
    registry = IndexRegistry(
        source,
        dimensions=runtime.embedder.dimensions,
        poll_seconds=0.0,
        compact_after=1024,
        saved=saved,
    )
    return Start(registry, source)


def results(runtime: Runtime, registry: IndexRegistry) -> list[list[tuple[str, float]]]:
    runtime.indexes = registry
    found = []
    for query, filter_text, mode in QUERIES:
        options = SearchOptions(query=query, filter=filter_text, mode=mode, top_k=20)
        hits = answering.search(runtime, LOCAL_ADMIN, "notes", options).hits
        found.append([(hit.chunk_id, hit.score) for hit in hits])
    return found


def collection_id(runtime: Runtime) -> int:
    with runtime.transaction() as session:
        row = repository.collection_by_name(session, "notes")
        assert row is not None
        return row.id


def made_again(runtime: Runtime) -> None:
    """The collection deleted and made again under its name with other documents, through the
    runtime's own registry (another process, to a registry under test)."""
    collections.delete_collection(runtime, LOCAL_ADMIN, "notes")
    collections.put_collection(runtime, LOCAL_ADMIN, "notes", SPEC)
    write(runtime, range(5), version=1)


def saved_once(runtime: Runtime, folder: Path) -> Start:
    """A first start: built from the store (nothing saved yet), its graph built and saved."""
    first = start(runtime, folder)
    first.registry.view("notes")
    first.registry.maintain()
    assert first.registry.view("notes").snapshot.graph is not None
    assert first.registry.save_counts() == {"saved": 1}
    return first


def rebuilt(
    runtime: Runtime,
    folder: Path,
    caplog: pytest.LogCaptureFixture,
    kind: str,
    said: str,
    **other: str,
) -> tuple[Start, list[list[tuple[str, float]]]]:
    """A start that finds the saved index unusable (``kind``, its log saying ``said``), builds
    from the store and answers as an index built afresh does."""
    caplog.set_level(logging.INFO, logger="excerpta.index")
    restarted = start(runtime, folder, **other)  # type: ignore[arg-type]
    found = results(runtime, restarted.registry)
    assert restarted.source.loads == 1
    assert restarted.registry.start_counts() == {("rebuilt", kind): 1}
    assert said in caplog.text
    assert found == results(runtime, start(runtime, None).registry)
    return restarted, found


def test_a_start_from_a_valid_saved_index_reads_no_chunk_from_the_store(
    store: Runtime, tmp_path: Path, caplog: pytest.LogCaptureFixture
) -> None:
    folder = tmp_path / "saved"
    first = saved_once(store, folder)
    assert first.source.loads == 1
    assert first.registry.start_counts() == {("rebuilt", "missing"): 1}
    expected = results(store, first.registry)

    caplog.set_level(logging.INFO, logger="excerpta.index")
    second = start(store, folder)
    assert results(store, second.registry) == expected
    assert second.source.loads == 0
    assert second.registry.start_counts() == {("loaded", ""): 1}
    assert "saved index read at revision" in caplog.text
    snapshot = second.registry.view("notes").snapshot
    assert snapshot.graph is not None and snapshot.graph.views_rows
    # Nothing changed, so the background round has nothing to save.
    second.registry.maintain()
    assert second.registry.save_counts() == {}


def test_a_corrupt_saved_index_is_rebuilt_and_answers_as_a_fresh_build(
    store: Runtime, tmp_path: Path, caplog: pytest.LogCaptureFixture
) -> None:
    folder = tmp_path / "saved"
    saved_once(store, folder)
    version = next(p for p in (folder / "notes").iterdir() if p.is_dir())
    vectors = version / "vectors.npy"
    data = bytearray(vectors.read_bytes())
    data[-9] ^= 0xFF
    vectors.write_bytes(bytes(data))

    restarted, found = rebuilt(
        store, folder, caplog, "corrupt", "vectors.npy does not match its checksum"
    )
    # The rebuilt index is saved again, and the next start reads it back.
    restarted.registry.maintain()
    again = start(store, folder)
    assert results(store, again.registry) == found
    assert again.source.loads == 0


def test_a_saved_index_older_than_the_store_is_caught_up_from_the_change_log(
    store: Runtime, tmp_path: Path
) -> None:
    folder = tmp_path / "saved"
    saved_once(store, folder)
    write(store, [30])
    write(store, [4], version=1)
    documents.delete_document(store, LOCAL_ADMIN, "notes", "note-7")

    restarted = start(store, folder)
    found = results(store, restarted.registry)
    assert restarted.source.loads == 0
    assert restarted.registry.start_counts() == {("caught_up", ""): 1}
    snapshot = restarted.registry.view("notes").snapshot
    live = {snapshot.chunk_ids[row] for row in snapshot.live.nonzero()[0]}
    assert any(chunk.startswith("note-30#") for chunk in live)
    assert not any(chunk.startswith("note-7#") for chunk in live)
    fresh = start(store, None)
    assert found == results(store, fresh.registry)
    assert snapshot.revision == fresh.registry.view("notes").snapshot.revision


@pytest.mark.parametrize(
    ("other", "said"),
    [
        ({"store_id": "another-store"}, "saved from store"),
        ({"embedder": "another-embedder"}, "saved with the embedder hashing-test-only"),
    ],
)
def test_a_saved_index_of_another_store_or_embedder_is_rebuilt(
    store: Runtime,
    tmp_path: Path,
    caplog: pytest.LogCaptureFixture,
    other: dict[str, str],
    said: str,
) -> None:
    folder = tmp_path / "saved"
    saved_once(store, folder)
    rebuilt(store, folder, caplog, "foreign", said, **other)


def test_a_query_during_a_rebuild_waits_for_it_instead_of_building_a_second_index(
    store: Runtime, tmp_path: Path
) -> None:
    release = threading.Event()
    held = start(store, tmp_path / "saved", release=release)
    held.registry.start_background()
    assert held.source.loading.wait(10)
    assert held.registry.not_ready() == (
        "The index of collection 'notes' is being built from the store because no index of it"
        " was saved."
    )
    query = threading.Thread(target=held.registry.view, args=("notes",))
    query.start()
    release.set()
    query.join(10)
    held.registry.stop()
    assert held.source.loads == 1
    assert held.registry.not_ready() is None


def test_deleting_a_collection_removes_its_saved_index(store: Runtime) -> None:
    store.indexes.view("notes")
    store.indexes.maintain()
    folder = store.settings.resolved_index_dir() / "notes"
    assert (folder / "manifest.json").is_file()

    collections.delete_collection(store, LOCAL_ADMIN, "notes")

    assert not folder.exists()


def test_a_collection_made_again_under_a_deleted_ones_name_never_reads_its_saved_index(
    store: Runtime, tmp_path: Path, caplog: pytest.LogCaptureFixture
) -> None:
    """A replica's folder outlives the collection when another process deletes it. SQLite
    gives the new row the deleted one's id ("one larger than the largest ROWID in the table",
    sqlite.org/autoinc.html), so the id alone cannot tell the two collections apart."""
    folder = tmp_path / "replica"
    saved_once(store, folder)
    old_id = collection_id(store)
    made_again(store)
    assert collection_id(store) == old_id

    rebuilt(store, folder, caplog, "foreign", "saved from an earlier collection of the name")


def test_an_index_in_memory_follows_a_collection_made_again_under_the_same_id(
    store: Runtime,
) -> None:
    """Another process deleted the collection and made it again, and SQLite gave the new one
    the old id: the replica's index of the old one is dropped, not caught up."""
    own = store.indexes
    replica = start(store, None)
    results(store, replica.registry)
    store.indexes = own
    made_again(store)

    found = results(store, replica.registry)
    assert replica.source.loads == 2
    assert found == results(store, start(store, None).registry)
