"""The figures ``GET /metrics`` reports, in the Prometheus text format.

Each runtime keeps its own registry, so several runtimes in one process (tests, the bench)
never mix their counts. What happens during requests is counted as it happens; what the
process holds (index rows and bytes, traces waiting to be written, store errors) is read from
its owners when a scrape asks, so nothing is counted twice and nothing goes stale.
"""

from __future__ import annotations

from collections.abc import Callable, Iterable, Iterator, Mapping
from dataclasses import dataclass
from typing import Generic, TypeVar

from prometheus_client import CollectorRegistry, Counter, Histogram, generate_latest
from prometheus_client.core import CounterMetricFamily, GaugeMetricFamily
from prometheus_client.metrics import MetricWrapperBase
from prometheus_client.registry import Collector

from service.index.collection_index import IndexSnapshot

# Seconds, from a tenth of a millisecond: most stages of a query take well under one.
STAGE_BUCKETS = (
    0.0001,
    0.00025,
    0.0005,
    0.001,
    0.0025,
    0.005,
    0.01,
    0.025,
    0.05,
    0.1,
    0.25,
    0.5,
    1.0,
    2.5,
    5.0,
    10.0,
)
REQUEST_BUCKETS = (*STAGE_BUCKETS[2:], 30.0)
CANDIDATE_BUCKETS = (0, 1, 10, 100, 1_000, 10_000, 100_000, 1_000_000, 10_000_000)
HIT_BUCKETS = (0, 1, 2, 5, 10, 20, 50, 100, 1_000)
EMBEDDING_BUCKETS = (0.001, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5, 5.0, 10.0, 30.0)


M = TypeVar("M", bound=MetricWrapperBase)


class _Children(Generic[M]):
    """The labelled children of one metric, kept once made: finding one through ``labels``
    costs about as much as the observation itself, and a query makes a dozen."""

    def __init__(self, metric: M) -> None:
        self._metric = metric
        self._made: dict[tuple[str, ...], M] = {}

    def __call__(self, *labels: str) -> M:
        child = self._made.get(labels)
        if child is None:
            child = self._made.setdefault(labels, self._metric.labels(*labels))
        return child


@dataclass(frozen=True)
class HeldState:
    """Readers of what the process holds, asked at every scrape."""

    indexes: Callable[[], Mapping[str, IndexSnapshot]]
    traces_waiting: Callable[[], int]
    traces_dropped: Callable[[], int]
    store_errors: Callable[[], Mapping[str, int]]
    index_starts: Callable[[], Mapping[tuple[str, str], int]]
    index_saves: Callable[[], Mapping[str, int]]


class ServiceMetrics:
    def __init__(self) -> None:
        self.registry = CollectorRegistry()
        registry = self.registry
        self._requests = _Children(
            Counter(
                "excerpta_http_requests",
                "HTTP requests answered, by route template, method and status.",
                ["route", "method", "status"],
                registry=registry,
            )
        )
        self._request_seconds = _Children(
            Histogram(
                "excerpta_http_request_duration_seconds",
                "Time from a request's arrival to its response's last byte, by route template.",
                ["route", "method"],
                buckets=REQUEST_BUCKETS,
                registry=registry,
            )
        )
        self._stage_seconds = _Children(
            Histogram(
                "excerpta_query_stage_duration_seconds",
                "Time of each stage of a query, as its trace records it.",
                ["route", "stage"],
                buckets=STAGE_BUCKETS,
                registry=registry,
            )
        )
        self._candidates = _Children(
            Histogram(
                "excerpta_query_candidates",
                "Chunks that passed a query's filter, time window and access check.",
                ["route"],
                buckets=CANDIDATE_BUCKETS,
                registry=registry,
            )
        )
        self._hits = _Children(
            Histogram(
                "excerpta_query_hits",
                "Chunks a query ranked: a search's hits, or the ranking handed to the packer.",
                ["route"],
                buckets=HIT_BUCKETS,
                registry=registry,
            )
        )
        self._answers = _Children(
            Counter(
                "excerpta_answers",
                "Answers given or declined; a declined one says why.",
                ["outcome", "reason"],
                registry=registry,
            )
        )
        self._documents = _Children(
            Counter(
                "excerpta_ingested_documents",
                "Documents sent for writing, by what the write did with each.",
                ["status"],
                registry=registry,
            )
        )
        self._chunks = Counter(
            "excerpta_ingested_chunks",
            "Chunks written for created or updated documents.",
            registry=registry,
        )
        self._embedding_seconds = _Children(
            Histogram(
                "excerpta_embedding_duration_seconds",
                "Time the model took per call: a batch of document chunks or one question.",
                ["purpose"],
                buckets=EMBEDDING_BUCKETS,
                registry=registry,
            )
        )
        self._embedded_texts = _Children(
            Counter(
                "excerpta_embedded_texts",
                "Texts the model embedded (cached embeddings are not counted).",
                ["purpose"],
                registry=registry,
            )
        )

    # counted as it happens ---------------------------------------------------------------

    def observe_request(self, route: str, method: str, status: int, seconds: float) -> None:
        self._requests(route, method, str(status)).inc()
        self._request_seconds(route, method).observe(seconds)

    def observe_query(
        self,
        route: str,
        stage_milliseconds: Iterable[tuple[str, float]],
        *,
        candidates: int,
        hits: int,
    ) -> None:
        for stage, milliseconds in stage_milliseconds:
            self._stage_seconds(route, stage).observe(milliseconds / 1000.0)
        self._candidates(route).observe(candidates)
        self._hits(route).observe(hits)

    def observe_answer(self, declined_because: str | None) -> None:
        if declined_because is None:
            self._answers("answered", "").inc()
        else:
            self._answers("declined", declined_because).inc()

    def observe_written(self, statuses: Iterable[str], chunks_written: int) -> None:
        for status in statuses:
            self._documents(status).inc()
        self._chunks.inc(chunks_written)

    def observe_embedding(self, purpose: str, texts: int, seconds: float) -> None:
        self._embedding_seconds(purpose).observe(seconds)
        self._embedded_texts(purpose).inc(texts)

    # read at scrape time -------------------------------------------------------------------

    def watch(self, held: HeldState) -> None:
        self.registry.register(_HeldStateCollector(held))

    def exposition(self) -> bytes:
        return generate_latest(self.registry)


class _HeldStateCollector(Collector):
    def __init__(self, held: HeldState) -> None:
        self._held = held

    def collect(self) -> Iterator[GaugeMetricFamily | CounterMetricFamily]:
        rows = GaugeMetricFamily(
            "excerpta_index_rows",
            "Chunk rows in this process's index of a collection; tombstoned rows wait for "
            "compaction.",
            labels=["collection", "state"],
        )
        documents = GaugeMetricFamily(
            "excerpta_index_documents",
            "Documents in this process's index of a collection.",
            labels=["collection"],
        )
        array_bytes = GaugeMetricFamily(
            "excerpta_index_array_bytes",
            "Bytes of the arrays of a collection's index (Python objects not counted).",
            labels=["collection", "part"],
        )
        for name, snapshot in sorted(self._held.indexes().items()):
            rows.add_metric([name, "live"], snapshot.live_rows)
            rows.add_metric([name, "tombstoned"], snapshot.tombstoned_rows)
            documents.add_metric([name], len(snapshot.documents))
            array_bytes.add_metric([name, "lexical"], snapshot.lexical.nbytes)
            array_bytes.add_metric([name, "vectors"], snapshot.vectors.nbytes)
            array_bytes.add_metric(
                [name, "rows"], sum(a.nbytes for a in snapshot.numeric_buffers.values())
            )
        yield rows
        yield documents
        yield array_bytes
        yield GaugeMetricFamily(
            "excerpta_trace_writer_waiting",
            "Traces recorded and not yet written to the store.",
            value=self._held.traces_waiting(),
        )
        yield CounterMetricFamily(
            "excerpta_trace_writer_dropped",
            "Traces dropped because the store refused their writes for too long.",
            value=self._held.traces_dropped(),
        )
        errors = CounterMetricFamily(
            "excerpta_store_errors",
            "Store failures met, by kind: a write that lost a race (retried), a store that "
            "cannot serve, or a failure the service cannot explain.",
            labels=["kind"],
        )
        for kind, count in sorted(self._held.store_errors().items()):
            errors.add_metric([kind], count)
        yield errors
        starts = CounterMetricFamily(
            "excerpta_index_starts",
            "Collection indexes made ready since the start: read back from a saved index "
            "(loaded, or caught_up with the change log) or rebuilt from the store, with the "
            "kind of reason the saved one was not used (missing, corrupt, format, foreign, "
            "outdated).",
            labels=["outcome", "reason"],
        )
        for (outcome, reason), count in sorted(self._held.index_starts().items()):
            starts.add_metric([outcome, reason], count)
        yield starts
        saves = CounterMetricFamily(
            "excerpta_index_saves",
            "Collection indexes written to the index directory, by outcome (saved, failed).",
            labels=["outcome"],
        )
        for outcome, count in sorted(self._held.index_saves().items()):
            saves.add_metric([outcome], count)
        yield saves
