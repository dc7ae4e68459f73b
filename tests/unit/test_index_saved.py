"""A collection index saved to a directory and read back: the same index, or a clear refusal.

The check is against the index itself: every array, list and statistic of the snapshot read
back equals the saved one, and searches (BM25, exact vectors, the graph under a mask, filters
on attribute columns) return the same rows and scores, bit for bit.
"""

from __future__ import annotations

import dataclasses
import datetime as dt
import json
from pathlib import Path

import numpy as np
import pytest

from service.attributes import AttributeType
from service.index.collection_index import ChunkRecord, CollectionIndex, IndexSnapshot
from service.index.graph import GraphSettings, VectorIndexSettings
from service.index.saved import IndexDirectory, SavedIdentity, SavedIndexRejected

DIMENSION = 8
SCHEMA = {
    "model": AttributeType.KEYWORD,
    "tags": AttributeType.KEYWORD_LIST,
    "year": AttributeType.INTEGER,
    "effective": AttributeType.DATE,
    "published": AttributeType.DATETIME,
}
GRAPH = VectorIndexSettings(
    index="graph", graph=GraphSettings(links=8, build_breadth=32, search_breadth=32)
)
IDENTITY = SavedIdentity(
    store_id="store-a",
    collection_id=3,
    generation=0,
    embedder="hashing-test-only",
    dimension=DIMENSION,
    metric="cosine",
    rows_made_by="schema-and-analysis",
    collection_created="2026-03-01T09:30:00+00:00",
)
WORDS = ["brake", "chain", "saddle", "tyre", "gear", "frame", "light", "pedal", "hub", "spoke"]


def records(document: int, version: int = 0) -> list[ChunkRecord]:
    rng = np.random.default_rng(document * 31 + version)
    attributes = {
        "model": f"Model {document % 3}",
        "tags": [WORDS[document % 10], WORDS[(document + version) % 10]],
        "year": 2000 + document % 7,
        "effective": dt.date(2024, 1 + document % 12, 1),
        "published": dt.datetime(2024, 5, 1, 12, document % 60, tzinfo=dt.UTC),
    }
    access = ("staff",) if document % 4 == 0 else ()
    made = []
    for ordinal in range(3):
        words = [WORDS[int(w)] for w in rng.integers(0, len(WORDS), 6)]
        made.append(
            ChunkRecord(
                chunk_id=f"d{document:03d}#{ordinal:04d}",
                document_id=f"d{document:03d}",
                ordinal=ordinal,
                title=f"Note {document} v{version}",
                section=f"Part {ordinal % 2}",
                text=" ".join(words),
                char_start=ordinal * 40,
                char_end=ordinal * 40 + 38,
                tokens=6,
                lexical_tokens=words,
                vector=rng.standard_normal(DIMENSION).astype(np.float32),
                attributes=attributes,
                access=access,
                source_url=f"https://docs.example/{document}",
                gap_after="\n\n" if ordinal < 2 else "",
            )
        )
    return made


def built_index() -> CollectionIndex:
    index = CollectionIndex.build(
        [r for d in range(40) for r in records(d)],
        metric="cosine",
        dimension=DIMENSION,
        schema=SCHEMA,
        revision=5,
    )
    index.build_graph(GRAPH, compact=False)
    # Replaced and deleted documents leave tombstones; new rows form the graph's tail.
    index.replace_documents({"d003": records(3, 1), "d007": [], "d041": records(41)}, revision=7)
    return index


def load(directory: IndexDirectory, identity: SavedIdentity = IDENTITY) -> CollectionIndex:
    return directory.load(
        "notes", identity, schema=SCHEMA, vectors=GRAPH, bm25_k1=1.2, bm25_b=0.75
    ).index


def assert_same(saved: IndexSnapshot, read: IndexSnapshot) -> None:
    assert (read.revision, read.n_rows, read.live_rows) == (
        saved.revision,
        saved.n_rows,
        saved.live_rows,
    )
    for name in (
        "chunk_ids",
        "document_ids",
        "titles",
        "sections",
        "texts",
        "attributes",
        "access_lists",
        "gaps",
    ):
        assert list(getattr(read, name)) == list(getattr(saved, name)), name
    for name in ("ordinals", "char_starts", "char_ends", "token_counts", "sort_keys", "live"):
        assert np.array_equal(getattr(read, name), getattr(saved, name)), name
    assert read.sorted_chunk_ids == saved.sorted_chunk_ids
    assert np.array_equal(read.vectors.rows, saved.vectors.rows)
    assert {d: (e.rows.tolist(), e.source_url) for d, e in read.documents.items()} == {
        d: (e.rows.tolist(), e.source_url) for d, e in saved.documents.items()
    }
    for groups in (frozenset(), frozenset({"staff"}), frozenset({"other"})):
        assert np.array_equal(read.access.visible(groups), saved.access.visible(groups))
    assert read.lexical.average_length == saved.lexical.average_length
    for query in (["brake"], ["chain", "hub", "hub"], ["nothing"]):
        a, b = saved.lexical.match(query), read.lexical.match(query)
        assert np.array_equal(a.present, b.present)
        assert np.array_equal(a.scores[a.present], b.scores[b.present])
    assert read.graph is not None and saved.graph is not None
    assert read.graph.rows == saved.graph.rows
    assert read.graph.views_rows
    rng = np.random.default_rng(9)
    for _ in range(5):
        query = saved.vectors.prepare_query(rng.standard_normal(DIMENSION))
        mask = saved.live.copy()
        mask[rng.random(len(mask)) < 0.5] = False
        rows_a, scores_a = saved.vectors.score(query, mask)
        rows_b, scores_b = read.vectors.score(query, mask)
        assert np.array_equal(rows_a, rows_b) and np.array_equal(scores_a, scores_b)
        covered = mask[: saved.graph.rows]
        found_a = saved.graph.search(query, covered, 10, 64).rows
        found_b = read.graph.search(query, covered, 10, 64).rows
        assert np.array_equal(found_a, found_b)
    assert read.columns is not None and saved.columns is not None
    for name in SCHEMA:
        a_column, b_column = saved.columns.columns[name], read.columns.columns[name]
        for field in dataclasses.fields(a_column):
            a_value, b_value = getattr(a_column, field.name), getattr(b_column, field.name)
            if isinstance(a_value, dict):
                assert a_value.keys() == b_value.keys()
                assert all(np.array_equal(a_value[k], b_value[k]) for k in a_value)
            else:
                assert np.array_equal(a_value, b_value), (name, field.name)


def test_an_index_read_back_is_the_index_saved(tmp_path: Path) -> None:
    index = built_index()
    directory = IndexDirectory(tmp_path)
    info = directory.save("notes", index.snapshot(), IDENTITY)
    assert (info.revision, info.rows, info.graph_rows) == (7, index.snapshot().n_rows, 120)
    assert_same(index.snapshot(), load(directory).snapshot())


def test_an_index_read_back_takes_writes_and_compacts_like_any_other(tmp_path: Path) -> None:
    original = built_index()
    directory = IndexDirectory(tmp_path)
    directory.save("notes", original.snapshot(), IDENTITY)
    read = load(directory)
    for index in (original, read):
        index.replace_documents(
            {"d010": records(10, 2), "d011": [], "d050": records(50)}, revision=8
        )
        index.build_graph(GRAPH, compact=True)
    assert_same(original.snapshot(), read.snapshot())


@pytest.mark.parametrize(
    ("changed", "kind"),
    [
        ({"store_id": "store-b"}, "foreign"),
        ({"embedder": "minilm", "dimension": 384}, "foreign"),
        ({"collection_id": 4}, "foreign"),
        ({"collection_created": "2026-03-02T10:00:00+00:00"}, "foreign"),
        ({"generation": 1}, "outdated"),
        ({"rows_made_by": "other"}, "outdated"),
    ],
)
def test_an_index_of_another_store_embedder_or_collection_is_refused(
    tmp_path: Path, changed: dict[str, object], kind: str
) -> None:
    directory = IndexDirectory(tmp_path)
    directory.save("notes", built_index().snapshot(), IDENTITY)
    with pytest.raises(SavedIndexRejected) as refused:
        load(directory, dataclasses.replace(IDENTITY, **changed))  # type: ignore[arg-type]
    assert refused.value.kind == kind


def test_an_index_saved_without_its_collections_creation_time_is_outdated(
    tmp_path: Path,
) -> None:
    directory = IndexDirectory(tmp_path)
    directory.save(
        "notes", built_index().snapshot(), dataclasses.replace(IDENTITY, collection_created="")
    )
    with pytest.raises(SavedIndexRejected) as refused:
        load(directory)
    assert refused.value.kind == "outdated"
    assert "recorded when their collection was made" in refused.value.reason


def test_a_removed_index_is_missing_and_removing_none_is_no_error(tmp_path: Path) -> None:
    directory = IndexDirectory(tmp_path)
    directory.save("notes", built_index().snapshot(), IDENTITY)
    directory.remove("notes")
    directory.remove("notes")
    assert not directory.folder("notes").exists()
    with pytest.raises(SavedIndexRejected) as refused:
        load(directory)
    assert refused.value.kind == "missing"


def test_a_flipped_byte_in_any_file_is_found_before_the_file_is_parsed(tmp_path: Path) -> None:
    directory = IndexDirectory(tmp_path)
    info = directory.save("notes", built_index().snapshot(), IDENTITY)
    version = tmp_path / "notes" / info.version
    for path in sorted(version.iterdir()):
        data = bytearray(path.read_bytes())
        data[len(data) // 2] ^= 0x40
        path.write_bytes(bytes(data))
        with pytest.raises(SavedIndexRejected) as refused:
            load(directory)
        assert refused.value.kind == "corrupt"
        assert path.name in refused.value.reason
        data[len(data) // 2] ^= 0x40
        path.write_bytes(bytes(data))
    load(directory)


def test_a_damaged_or_missing_manifest_is_refused(tmp_path: Path) -> None:
    directory = IndexDirectory(tmp_path)
    with pytest.raises(SavedIndexRejected) as refused:
        load(directory)
    assert refused.value.kind == "missing"
    directory.save("notes", built_index().snapshot(), IDENTITY)
    manifest = tmp_path / "notes" / "manifest.json"
    stored = json.loads(manifest.read_text())
    stored["body"]["revision"] = 99
    manifest.write_text(json.dumps(stored))
    with pytest.raises(SavedIndexRejected) as refused:
        load(directory)
    assert refused.value.kind == "corrupt"
    stored["body"]["revision"] = 7
    stored["body"]["format"] = 0
    from service.index.saved import _body_checksum

    stored["sha256"] = _body_checksum(stored["body"])
    manifest.write_text(json.dumps(stored))
    with pytest.raises(SavedIndexRejected) as refused:
        load(directory)
    assert refused.value.kind == "format"


def test_a_save_that_dies_before_its_manifest_leaves_the_last_index_in_place(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    directory = IndexDirectory(tmp_path)
    index = built_index()
    directory.save("notes", index.snapshot(), IDENTITY)
    index.replace_documents({"d020": []}, revision=9)

    def crash(*_: object) -> None:
        raise OSError("disk gone")

    monkeypatch.setattr("service.index.saved.os.replace", crash)
    with pytest.raises(OSError):
        directory.save("notes", index.snapshot(), IDENTITY)
    monkeypatch.undo()
    assert load(directory).snapshot().revision == 7


def test_an_empty_index_is_read_back_and_takes_its_first_rows(tmp_path: Path) -> None:
    directory = IndexDirectory(tmp_path)
    empty = CollectionIndex.build([], metric="cosine", dimension=DIMENSION, schema=SCHEMA)
    directory.save("notes", empty.snapshot(), IDENTITY)
    read = load(directory)
    assert read.snapshot().n_rows == 0
    read.replace_documents({"d001": records(1)}, revision=1)
    empty.replace_documents({"d001": records(1)}, revision=1)
    assert list(read.snapshot().chunk_ids) == list(empty.snapshot().chunk_ids)
    assert np.array_equal(read.snapshot().vectors.rows, empty.snapshot().vectors.rows)
