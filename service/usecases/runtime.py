"""The long-lived pieces one process shares: settings, store, embedder, indexes, workers.

The API and the CLI each build one ``Runtime`` and hand it to every use case, so tests can build
one with a scratch store and a test embedder. The runtime only assembles: each worker is given
the few things it uses (the session factory, the embedder, settings values, store operations
bound to this store) and none of them knows the runtime.
"""

from __future__ import annotations

from collections.abc import Callable, Iterator
from contextlib import contextmanager
from functools import partial

from sqlalchemy import Engine
from sqlalchemy.orm import Session, sessionmaker

from service.config import Settings
from service.embedding.base import Embedder
from service.embedding.query_cache import CachedQueryEmbedder
from service.index.saved import IndexDirectory
from service.store.db import make_engine, migrate, session_factory
from service.store.identity import StoreGuard
from service.store.opening import open_store
from service.store.repository import KeyReader
from service.store.transactions import Transactions
from service.usecases.generators import GeneratorRegistry
from service.usecases.indexes import IndexRegistry, SavedIndexes, StoreIndexSource
from service.usecases.job_queues import JobQueue, RunHere
from service.usecases.metrics import HeldState, ServiceMetrics
from service.usecases.rebuild import RebuildWorker, pending_rebuilds, rebuild_batch
from service.usecases.trace_writer import TraceWriter, prune_traces, write_traces
from service.usecases.writes import WriteRetries


class Runtime:
    def __init__(
        self,
        settings: Settings,
        embedder: Embedder,
        *,
        engine: Engine | None = None,
        run_migrations: bool = True,
        jobs: JobQueue | None = None,
    ) -> None:
        self.settings = settings
        self.embedder = embedder
        # What queries embed with: the same model, with repeated questions answered from memory.
        self.query_embedder = CachedQueryEmbedder(embedder, settings.query_cache_entries)
        # Where submitted jobs go; by default this process runs them as they come.
        self.jobs: JobQueue = jobs or RunHere()
        self.engine = engine or make_engine(settings.resolved_database_url())
        self.store = StoreGuard(self.engine)
        if run_migrations:
            migrate(self.engine)
            self.store.remember()
        self.sessions: sessionmaker[Session] = session_factory(self.engine)
        self.transactions = Transactions(self.sessions, self.store)
        self.retries = WriteRetries(settings.write_attempts, settings.write_retry_pause_seconds)
        self.key_reader = KeyReader(self.engine, self.store)
        self.indexes = IndexRegistry(
            StoreIndexSource(self.transactions),
            dimensions=embedder.dimensions,
            poll_seconds=settings.index_poll_ms / 1000.0,
            compact_after=settings.compact_after_deleted_rows,
            saved=None
            if self.store.store_id is None
            else SavedIndexes(
                directory=IndexDirectory(settings.resolved_index_dir()),
                store_id=self.store.store_id,
                embedder=embedder.name,
                every_seconds=settings.index_save_seconds,
            ),
        )
        self.rebuilds = RebuildWorker(
            step=partial(rebuild_batch, self.transactions, self.retries, embedder),
            pending=partial(pending_rebuilds, self.transactions),
        )
        self.generators = GeneratorRegistry(settings, embedder)
        self.traces = TraceWriter(
            write=partial(write_traces, self.engine, self.store),
            prune=partial(
                prune_traces,
                self.transactions,
                retention_days=settings.trace_retention_days,
                retention_count=settings.trace_retention_count,
            ),
        )
        self.metrics = ServiceMetrics()
        self.metrics.watch(
            HeldState(
                indexes=self.indexes.snapshots,
                traces_waiting=self.traces.waiting,
                traces_dropped=self.traces.dropped,
                store_errors=self.store.errors,
                index_starts=self.indexes.start_counts,
                index_saves=self.indexes.save_counts,
            )
        )

    @contextmanager
    def transaction(self) -> Iterator[Session]:
        """A transaction that reads, from one snapshot of the store."""
        with self.transactions.read() as session:
            yield session

    @contextmanager
    def write_transaction(self) -> Iterator[Session]:
        """A transaction that writes: the write lock first, then the store's identity checked."""
        with self.transactions.write() as session:
            yield session

    def close(self) -> None:
        self.jobs.stop()
        self.rebuilds.stop()
        self.indexes.stop()
        self.traces.stop()
        self.engine.dispose()


def open_runtime(
    settings: Settings,
    make_embedder: Callable[[Settings], Embedder],
    *,
    jobs: JobQueue | None = None,
) -> Runtime:
    """The runtime a command runs on. The store is opened first (``store/opening.py``), so an
    unusable one is told in one sentence before a model takes seconds to load; then the
    embedder is made. Migrating the store again in ``Runtime`` finds nothing to do."""
    engine = open_store(settings.resolved_database_url(), settings.data_dir)
    try:
        return Runtime(settings, make_embedder(settings), engine=engine, jobs=jobs)
    except BaseException:
        engine.dispose()
        raise


def load_embedder(settings: Settings) -> Embedder:
    """The embedder the settings name; only real models are reachable from here."""
    if settings.embedder == "minilm":
        from service.embedding.minilm import MiniLmEmbedder

        return MiniLmEmbedder()
    raise ValueError(f"unknown embedder {settings.embedder!r}")


def embedder_on_first_use(settings: Settings) -> Embedder:
    """The embedder the settings name, loaded only when something first embeds or counts."""
    from service.embedding.lazy import LazyEmbedder

    if settings.embedder == "minilm":
        from service.embedding.minilm import MiniLmEmbedder

        return LazyEmbedder(MiniLmEmbedder, partial(load_embedder, settings))
    raise ValueError(f"unknown embedder {settings.embedder!r}")
