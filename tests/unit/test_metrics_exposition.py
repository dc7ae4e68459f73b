"""The scrape-time half of the metrics: what the process holds, read when a scrape asks, in the
Prometheus text format as prometheus_client's own parser reads it."""

from __future__ import annotations

import numpy as np
from prometheus_client.parser import text_string_to_metric_families

from service.index.collection_index import ChunkRecord, CollectionIndex
from service.usecases.metrics import HeldState, ServiceMetrics

DIMENSION = 4


def samples(metrics: ServiceMetrics) -> dict[tuple[str, tuple[tuple[str, str], ...]], float]:
    text = metrics.exposition().decode("utf-8")
    return {
        (sample.name, tuple(sorted(sample.labels.items()))): sample.value
        for family in text_string_to_metric_families(text)
        for sample in family.samples
    }


def record(chunk: int, document: str) -> ChunkRecord:
    return ChunkRecord(
        chunk_id=f"{document}#{chunk:04d}",
        document_id=document,
        ordinal=chunk,
        title=document,
        section="",
        text=f"chain wear check {chunk}",
        char_start=0,
        char_end=10,
        tokens=4,
        lexical_tokens=["chain", "wear", "check"],
        vector=np.array([1.0, 0.0, 0.0, 0.0], dtype=np.float32),
    )


def test_held_state_is_read_at_each_scrape_and_never_cached() -> None:
    waiting = [3]
    errors = {"lost_race": 2}
    starts = {("loaded", ""): 1}
    metrics = ServiceMetrics()
    metrics.watch(
        HeldState(
            indexes=dict,
            traces_waiting=lambda: waiting[0],
            traces_dropped=lambda: 1,
            store_errors=lambda: errors,
            index_starts=lambda: starts,
            index_saves=lambda: {"saved": 2},
        )
    )
    first = samples(metrics)
    assert first[("excerpta_trace_writer_waiting", ())] == 3
    assert first[("excerpta_trace_writer_dropped_total", ())] == 1
    assert first[("excerpta_store_errors_total", (("kind", "lost_race"),))] == 2
    assert first[("excerpta_index_starts_total", (("outcome", "loaded"), ("reason", "")))] == 1
    assert first[("excerpta_index_saves_total", (("outcome", "saved"),))] == 2
    waiting[0] = 0
    errors["unavailable"] = 1
    starts[("rebuilt", "corrupt")] = 1
    second = samples(metrics)
    assert second[("excerpta_trace_writer_waiting", ())] == 0
    assert second[("excerpta_store_errors_total", (("kind", "unavailable"),))] == 1
    rebuilt = (("outcome", "rebuilt"), ("reason", "corrupt"))
    assert second[("excerpta_index_starts_total", rebuilt)] == 1


def test_index_rows_documents_and_bytes_are_those_of_each_collections_snapshot() -> None:
    index = CollectionIndex.build(
        [record(0, "chain-guide"), record(1, "chain-guide"), record(0, "tyre-guide")],
        metric="cosine",
        dimension=DIMENSION,
    )
    index.replace_documents({"tyre-guide": []})
    snapshot = index.snapshot()
    metrics = ServiceMetrics()
    metrics.watch(
        HeldState(
            indexes=lambda: {"bikes": snapshot},
            traces_waiting=lambda: 0,
            traces_dropped=lambda: 0,
            store_errors=dict,
            index_starts=dict,
            index_saves=dict,
        )
    )
    found = samples(metrics)
    assert found[("excerpta_index_rows", (("collection", "bikes"), ("state", "live")))] == 2
    assert found[("excerpta_index_rows", (("collection", "bikes"), ("state", "tombstoned")))] == 1
    assert found[("excerpta_index_documents", (("collection", "bikes"),))] == 1
    vectors = found[("excerpta_index_array_bytes", (("collection", "bikes"), ("part", "vectors")))]
    # float32 rows of the dimension, and one squared norm per row, at least for the rows held.
    assert vectors == snapshot.vectors.nbytes >= 3 * DIMENSION * 4
    lexical = found[("excerpta_index_array_bytes", (("collection", "bikes"), ("part", "lexical")))]
    assert lexical == snapshot.lexical.nbytes > 0


def test_two_metrics_objects_share_no_registry() -> None:
    first, second = ServiceMetrics(), ServiceMetrics()
    first.observe_request("/healthz", "GET", 200, 0.001)
    labels = (("method", "GET"), ("route", "/healthz"), ("status", "200"))
    key = ("excerpta_http_requests_total", labels)
    assert samples(first)[key] == 1
    assert key not in samples(second)
