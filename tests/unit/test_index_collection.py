import threading

import numpy as np
import pytest

from service.index.collection_index import ChunkRecord, CollectionIndex, RowPrefix
from service.retrieval.query import candidate_mask
from service.retrieval.ranking import lexical_ranking

DIMENSION = 8


def chunk(
    document_id: str, ordinal: int, words: str, *, access: tuple[str, ...] = (), seed: int = 0
) -> ChunkRecord:
    vector = np.random.default_rng(hash((document_id, ordinal, seed)) % 2**32).standard_normal(
        DIMENSION
    )
    return ChunkRecord(
        chunk_id=f"{document_id}#{ordinal:04d}",
        document_id=document_id,
        ordinal=ordinal,
        title=document_id,
        section="",
        text=words,
        char_start=0,
        char_end=len(words),
        tokens=len(words.split()),
        lexical_tokens=words.split(),
        vector=vector.astype(np.float32),
        access=access,
    )


def live_chunk_ids(index: CollectionIndex) -> set[str]:
    snapshot = index.snapshot()
    return {snapshot.chunk_ids[row] for row in np.flatnonzero(snapshot.live)}


def test_replacing_a_document_swaps_its_chunks_and_deleting_removes_them() -> None:
    index = CollectionIndex.build(
        [chunk("a", 0, "x y"), chunk("a", 1, "y z"), chunk("b", 0, "z")],
        metric="cosine",
        dimension=DIMENSION,
    )
    index.replace_documents({"a": [chunk("a", 0, "new words")]}, revision=7)
    assert live_chunk_ids(index) == {"a#0000", "b#0000"}
    assert index.revision == 7
    snapshot = index.snapshot()
    assert [snapshot.record(row).text for row in snapshot.rows_of("a")] == ["new words"]
    assert index.tombstoned_rows() == 2
    assert snapshot.lexical.document_frequency("y") == 0
    index.replace_documents({"b": []})
    assert live_chunk_ids(index) == {"a#0000"}
    assert snapshot.rows_of("b").tolist() == [2]


def test_an_index_built_a_few_rows_at_a_time_equals_one_built_at_once() -> None:
    words = ["wing", "flutter", "lift", "drag", "panel", "rivet"]
    records = [
        chunk(f"d{d}", ordinal, " ".join(words[(d + ordinal) % 6 :][:3]))
        for d in range(7)
        for ordinal in range(d % 3 + 1)
    ]
    whole = CollectionIndex.build(records, metric="cosine", dimension=DIMENSION, revision=4)
    parts = CollectionIndex.build(
        iter(records), metric="cosine", dimension=DIMENSION, revision=4, rows_per_write=2
    )
    assert parts.snapshot().lexical.segment_count > 1
    one, other = whole.snapshot(), parts.snapshot()
    assert other.revision == 4
    assert list(other.chunk_ids) == list(one.chunk_ids)
    assert other.sort_keys.tolist() == one.sort_keys.tolist()
    assert np.array_equal(other.vectors.rows, one.vectors.rows)
    mask = np.ones(one.n_rows, dtype=bool)
    for query in (["wing"], ["rivet", "lift"]):
        a = lexical_ranking(one, query, mask, 10)
        b = lexical_ranking(other, query, mask, 10)
        assert b.rows.tolist() == a.rows.tolist()
        np.testing.assert_allclose(b.scores, a.scores, rtol=1e-6)


def test_a_build_refuses_a_documents_chunks_apart() -> None:
    records = [chunk("a", 0, "x"), chunk("b", 0, "y"), chunk("a", 1, "z")]
    with pytest.raises(ValueError, match="'a' are not together"):
        CollectionIndex.build(records, metric="cosine", dimension=DIMENSION)


def test_sort_keys_follow_code_point_order_of_chunk_ids_across_writes_and_compaction() -> None:
    rng = np.random.default_rng(5)
    names = ["Z", "a", "é", "b-2", "b_1", "B", "ä", "a.b", "0"]
    index = CollectionIndex(metric="dot", dimension=DIMENSION)
    for _ in range(30):
        document = str(rng.choice(names))
        count = int(rng.integers(0, 4))
        index.replace_documents({document: [chunk(document, i, "w") for i in range(count)]})
    for snapshot in (index.snapshot(), (index.compact(), index.snapshot())[1]):
        rows = np.flatnonzero(snapshot.live)
        by_key = [snapshot.chunk_ids[row] for row in rows[np.argsort(snapshot.sort_keys[rows])]]
        assert by_key == sorted(snapshot.chunk_ids[row] for row in rows)
    assert index.snapshot().n_rows == index.snapshot().live_rows


def test_compaction_keeps_rows_metadata_vectors_and_access_aligned() -> None:
    index = CollectionIndex.build(
        [
            chunk("a", 0, "p"),
            chunk("b", 0, "q", access=("staff",)),
            chunk("c", 0, "r", access=("ops",)),
        ],
        metric="dot",
        dimension=DIMENSION,
    )
    before = index.snapshot()
    index.replace_documents({"a": []})
    remap = index.compact()
    after = index.snapshot()
    assert remap.tolist() == [-1, 0, 1]
    assert list(after.chunk_ids) == ["b#0000", "c#0000"]
    assert np.array_equal(after.vectors.rows, before.vectors.rows[1:])
    assert candidate_mask(after, None, frozenset({"ops"}))[0].tolist() == [False, True]
    assert after.rows_of("c").tolist() == [1]


def test_access_mask_shows_public_rows_and_rows_sharing_a_group() -> None:
    index = CollectionIndex.build(
        [
            chunk("open", 0, "w"),
            chunk("staff", 0, "w", access=("staff",)),
            chunk("both", 0, "w", access=("staff", "ops")),
            chunk("ops", 0, "w", access=("ops",)),
        ],
        metric="dot",
        dimension=DIMENSION,
    )
    snapshot = index.snapshot()
    assert candidate_mask(snapshot, None, frozenset())[0].tolist() == [True, False, False, False]
    assert candidate_mask(snapshot, None, frozenset({"ops", "unknown"}))[0].tolist() == [
        True,
        False,
        True,
        True,
    ]
    assert candidate_mask(snapshot, None, None)[0].tolist() == [True] * 4


def test_a_query_during_a_replace_sees_exactly_the_old_or_the_new_chunks() -> None:
    old = [chunk("doc", i, "old text", seed=1) for i in range(3)]
    new = [chunk("doc", i, "new text", seed=2) for i in range(5)]
    filler = [chunk(f"f{i}", 0, "filler words") for i in range(50)]
    index = CollectionIndex.build([*old, *filler], metric="cosine", dimension=DIMENSION)
    stop = threading.Event()
    seen: list[tuple[str, ...]] = []
    inconsistent: list[str] = []

    def read() -> None:
        while not stop.is_set():
            snapshot = index.snapshot()
            rows = snapshot.rows_of("doc")
            texts = tuple(snapshot.texts[row] for row in rows)
            ranking = lexical_ranking(snapshot, ["old", "new"], snapshot.live.copy(), 100)
            matched = tuple(snapshot.texts[row] for row in ranking.rows)
            if sorted(matched) != sorted(texts) or not snapshot.live[rows].all():
                inconsistent.append(f"{texts} vs {matched}")
            seen.append(texts)

    readers = [threading.Thread(target=read) for _ in range(3)]
    for reader in readers:
        reader.start()
    for round_ in range(40):
        index.replace_documents({"doc": new if round_ % 2 == 0 else old})
    stop.set()
    for reader in readers:
        reader.join(timeout=10)
    assert seen and not inconsistent
    assert set(seen) <= {("old text",) * 3, ("new text",) * 5}


def test_a_row_prefix_takes_rows_inside_it_and_refuses_rows_a_later_snapshot_added():
    items = ["a", "b", "c", "d"]
    prefix = RowPrefix(items, 3)
    assert prefix.take([2, 0, 2]) == ["c", "a", "c"]
    assert prefix.take([]) == []
    with pytest.raises(IndexError):
        prefix.take([1, 3])
    with pytest.raises(IndexError):
        prefix.take([-1])
