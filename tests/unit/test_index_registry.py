"""The index registry alone, over a fake source of collections: no store, no embedder.

What is under test is the registry's own work: building an index on first use, answering from
it between checks, catching up with what the source reports, applying this process's writes,
forgetting deleted collections and compacting in the background.
"""

from __future__ import annotations

import contextlib
import datetime as dt
import time
from collections.abc import Iterator
from dataclasses import replace
from pathlib import Path
from typing import Any

import numpy as np
import pytest

from service.attributes import AttributeType
from service.errors import CollectionNotFound
from service.index.analyzer import Analyzer
from service.index.collection_index import ChunkRecord
from service.index.graph import GraphSettings, VectorIndexSettings
from service.index.lexical import LexicalScoring
from service.index.saved import IndexDirectory
from service.index.view import CollectionFacts, IndexView
from service.usecases.drafts import ChunkDraft, MaterialisedDocument, PreparedDocument
from service.usecases.indexes import (
    CollectionHeader,
    CollectionUpdate,
    IndexRegistry,
    LoadedCollection,
    SavedIndexes,
)
from tests.unit.test_index_collection import DIMENSION, chunk

SCHEMA = {"model": AttributeType.KEYWORD}
CREATED = dt.datetime(2026, 3, 1, 9, 30, tzinfo=dt.UTC)


class FakeSource:
    """Collections as plain values; counts how often the registry reads them."""

    def __init__(self) -> None:
        self.collections: dict[str, LoadedCollection] = {}
        self.updates: dict[int, CollectionUpdate | None] = {}
        self.loads = 0
        self.checks: list[int] = []

    def add(self, name: str, collection_id: int, records: list[ChunkRecord]) -> None:
        self.collections[name] = LoadedCollection(
            facts=CollectionFacts(
                collection_id=collection_id,
                created_at=CREATED,
                schema=SCHEMA,
                cite_attributes=(),
                answer_caution=None,
            ),
            generation=0,
            revision=1,
            scoring=LexicalScoring(k1=1.2, b=0.75, variant="smoothed"),
            metric="cosine",
            analyzer=Analyzer(None, None),
            records=records,
        )

    @contextlib.contextmanager
    def load(self, name: str) -> Iterator[LoadedCollection]:
        self.loads += 1
        if name not in self.collections:
            raise CollectionNotFound(f"Collection {name!r} does not exist.")
        yield self.collections[name]

    def describe(self, name: str) -> CollectionHeader:
        if name not in self.collections:
            raise CollectionNotFound(f"Collection {name!r} does not exist.")
        return self.collections[name].header

    def names(self) -> list[str]:
        return sorted(self.collections)

    def update(
        self,
        collection_id: int,
        *,
        created_at: dt.datetime,
        revision: int,
        generation: int,
        analyzer: Analyzer,
        schema: dict[str, AttributeType],
    ) -> CollectionUpdate | None:
        self.checks.append(revision)
        default = CollectionUpdate(cite_attributes=(), answer_caution=None, revision=revision)
        return self.updates.get(collection_id, default)


def live_chunks(view: IndexView) -> list[str]:
    snapshot = view.snapshot
    return sorted(snapshot.record(int(row)).chunk_id for row in np.flatnonzero(snapshot.live))


@pytest.fixture
def source() -> FakeSource:
    source = FakeSource()
    source.add("bikes", 7, [chunk("ridge", 0, "brake pads"), chunk("ridge", 1, "tyre")])
    return source


def registry(source: FakeSource, poll_seconds: float = 0.0, **options: Any) -> IndexRegistry:
    return IndexRegistry(
        source,
        dimensions=DIMENSION,
        poll_seconds=poll_seconds,
        compact_after=int(options.pop("compact_after", 1024)),
        **options,
    )


def test_an_index_is_built_once_and_served_between_checks(source: FakeSource) -> None:
    indexes = registry(source, poll_seconds=3600)
    first = indexes.view("bikes")
    second = indexes.view("bikes")
    assert live_chunks(first) == ["ridge#0000", "ridge#0001"]
    assert second.snapshot is first.snapshot
    assert (source.loads, source.checks) == (1, [])
    assert first.scoring == LexicalScoring(k1=1.2, b=0.75, variant="smoothed")


def test_a_missing_collection_is_reported_as_missing() -> None:
    with pytest.raises(CollectionNotFound):
        registry(FakeSource()).view("nowhere")


def test_each_view_past_the_poll_interval_asks_the_source_what_changed(
    source: FakeSource,
) -> None:
    indexes = registry(source, poll_seconds=0.0)
    indexes.view("bikes")
    assert source.checks == [1]
    source.updates[7] = CollectionUpdate(
        cite_attributes=("model",),
        answer_caution="Check the torque table.",
        revision=3,
        documents={"ridge": [chunk("ridge", 0, "new pads")], "haul": [chunk("haul", 0, "x")]},
    )
    view = indexes.view("bikes")
    assert source.checks == [1, 1]
    assert live_chunks(view) == ["haul#0000", "ridge#0000"]
    assert view.snapshot.revision == 3
    assert view.facts.cite_attributes == ("model",)
    assert view.facts.answer_caution == "Check the torque table."
    source.updates[7] = CollectionUpdate(
        cite_attributes=("model",), answer_caution=None, revision=3
    )
    indexes.view("bikes")
    assert source.checks == [1, 1, 3]


def test_a_reset_builds_the_index_afresh(source: FakeSource) -> None:
    indexes = registry(source)
    indexes.view("bikes")
    source.collections["bikes"] = replace(
        source.collections["bikes"], revision=5, records=[chunk("parts", 0, "chain")]
    )
    source.updates[7] = CollectionUpdate(
        cite_attributes=(), answer_caution=None, revision=1, reset=True
    )
    view = indexes.view("bikes")
    assert source.loads == 2
    assert live_chunks(view) == ["parts#0000"]
    assert view.snapshot.revision == 5


def test_a_collection_gone_from_the_source_is_forgotten(source: FakeSource) -> None:
    indexes = registry(source)
    indexes.view("bikes")
    source.updates[7] = None
    del source.collections["bikes"]
    with pytest.raises(CollectionNotFound):
        indexes.view("bikes")


def test_expire_makes_the_next_view_check_even_within_the_interval(source: FakeSource) -> None:
    indexes = registry(source, poll_seconds=3600)
    indexes.view("bikes")
    indexes.expire("bikes")
    indexes.view("bikes")
    assert source.checks == [1]


def material(document_id: str, texts: list[str]) -> tuple[MaterialisedDocument, dict]:
    prepared = PreparedDocument(
        index=0,
        external_id=document_id,
        title=document_id.title(),
        media_type="text/plain",
        source_url=None,
        source_text=" ".join(texts),
        attributes={"model": "Ridge"},
        attributes_json={"model": "Ridge"},
        access=("staff",),
        content_hash="0" * 64,
    )
    drafts = tuple(
        ChunkDraft(
            ordinal=ordinal,
            text=text,
            char_start=0,
            char_end=len(text),
            tokens=len(text.split()),
            section="",
            embedded_text=text,
            embedded_text_hash=f"hash-{ordinal}",
        )
        for ordinal, text in enumerate(texts)
    )
    vectors = {d.embedded_text_hash: np.ones(DIMENSION, dtype=np.float32) for d in drafts}
    return MaterialisedDocument(prepared, prepared.source_text, [], drafts), vectors


def test_this_processs_next_write_is_applied_without_asking_the_source(
    source: FakeSource,
) -> None:
    indexes = registry(source, poll_seconds=3600)
    indexes.view("bikes")
    indexes.after_write("bikes", 2, {"haul": material("haul", ["cargo limit", "rack"])})
    indexes.after_write("bikes", 3, {"ridge": None})
    view = indexes.view("bikes")
    assert source.checks == []
    assert live_chunks(view) == ["haul#0000", "haul#0001"]
    written = view.snapshot.record(int(view.snapshot.rows_of("haul")[0]))
    assert (written.title, written.attributes, written.access) == (
        "Haul",
        {"model": "Ridge"},
        ("staff",),
    )
    assert view.snapshot.revision == 3


def test_a_write_after_someone_elses_catches_up_through_the_source(source: FakeSource) -> None:
    indexes = registry(source, poll_seconds=3600)
    indexes.view("bikes")
    source.updates[7] = CollectionUpdate(
        cite_attributes=(),
        answer_caution=None,
        revision=3,
        documents={"haul": [chunk("haul", 0, "rack")]},
    )
    indexes.after_write("bikes", 3, {"haul": material("haul", ["ignored"])})
    assert source.checks == [1]
    assert live_chunks(indexes.view("bikes")) == ["haul#0000", "ridge#0000", "ridge#0001"]


def test_a_write_to_a_collection_not_yet_indexed_is_left_for_its_first_view(
    source: FakeSource,
) -> None:
    indexes = registry(source)
    indexes.after_write("bikes", 2, {"haul": material("haul", ["rack"])})
    assert source.loads == 0


def test_the_background_thread_compacts_an_index_past_its_tombstone_limit(
    source: FakeSource,
) -> None:
    indexes = registry(source, poll_seconds=3600, compact_after=2, compact_every_seconds=0.001)
    indexes.view("bikes")
    indexes.after_write("bikes", 2, {"ridge": None})
    assert indexes.view("bikes").snapshot.n_rows == 2
    indexes.start_background()
    try:
        deadline = time.monotonic() + 5
        while indexes.view("bikes").snapshot.n_rows and time.monotonic() < deadline:
            time.sleep(0.002)
    finally:
        indexes.stop()
    assert indexes.view("bikes").snapshot.n_rows == 0


def test_maintenance_builds_a_wanted_graph_and_compacts_with_it(source: FakeSource) -> None:
    wanted = VectorIndexSettings(index="graph", graph=GraphSettings(links=4, build_breadth=16))
    records = [chunk(f"doc{n}", 0, "word") for n in range(30)]
    source.add("graphs", 8, records)
    source.collections["graphs"] = replace(source.collections["graphs"], vectors=wanted)
    indexes = registry(source, poll_seconds=3600, compact_after=3)
    indexes.view("graphs")
    indexes.maintain()
    graph = indexes.view("graphs").snapshot.graph
    assert graph is not None and graph.rows == 30
    indexes.maintain()
    assert indexes.view("graphs").snapshot.graph is graph, "a fresh graph is kept"

    indexes.after_write("graphs", 2, {f"doc{n}": None for n in range(3)})
    indexes.maintain()
    snapshot = indexes.view("graphs").snapshot
    assert snapshot.n_rows == snapshot.live_rows == 27
    assert snapshot.graph is not None and snapshot.graph.rows == 27


def test_maintenance_drops_the_graph_of_a_collection_that_no_longer_wants_one(
    source: FakeSource,
) -> None:
    indexes = registry(source, poll_seconds=3600)
    view = indexes.view("bikes")
    index_settings = VectorIndexSettings(index="graph")
    assert indexes.view("bikes").snapshot.graph is None
    # The default (auto) wants no graph at this size: one built by hand is dropped.
    entry_index = indexes._entry("bikes").index
    assert entry_index.build_graph(index_settings, compact=False)
    assert indexes.view("bikes").snapshot.graph is not None
    indexes.maintain()
    assert indexes.view("bikes").snapshot.graph is None
    assert live_chunks(view) == ["ridge#0000", "ridge#0001"]


def saving(folder: Path, every_seconds: float = 300.0) -> SavedIndexes:
    return SavedIndexes(
        directory=IndexDirectory(folder),
        store_id="store-a",
        embedder="test",
        every_seconds=every_seconds,
    )


def test_a_built_index_is_saved_once_and_again_when_writes_are_due(
    source: FakeSource, tmp_path: Path
) -> None:
    indexes = registry(source, poll_seconds=3600, saved=saving(tmp_path, every_seconds=3600))
    indexes.view("bikes")
    assert indexes.start_counts() == {("rebuilt", "missing"): 1}
    indexes.maintain()
    indexes.maintain()
    assert indexes.save_counts() == {"saved": 1}
    indexes.after_write("bikes", 2, {"haul": material("haul", ["rack"])})
    indexes.maintain()
    # A write alone waits for every_seconds; a compaction is saved at once.
    assert indexes.save_counts() == {"saved": 1}
    compacting = registry(source, poll_seconds=3600, compact_after=1, saved=saving(tmp_path))
    compacting.view("bikes")
    assert compacting.start_counts() == {("loaded", ""): 1}
    compacting.after_write("bikes", 2, {"ridge": None})
    compacting.maintain()
    assert compacting.view("bikes").snapshot.tombstoned_rows == 0
    assert compacting.save_counts() == {"saved": 1}
    assert IndexDirectory(tmp_path).describe("bikes").revision == 2


def test_a_save_that_fails_is_counted_and_the_index_keeps_serving(
    source: FakeSource, tmp_path: Path, caplog: pytest.LogCaptureFixture
) -> None:
    blocked = tmp_path / "not-a-directory"
    blocked.write_text("a file where the index directory should be")
    indexes = registry(source, poll_seconds=3600, saved=saving(blocked))
    indexes.view("bikes")
    indexes.maintain()
    assert indexes.save_counts() == {"failed": 1}
    assert "saving it failed" in caplog.text
    assert live_chunks(indexes.view("bikes")) == ["ridge#0000", "ridge#0001"]
