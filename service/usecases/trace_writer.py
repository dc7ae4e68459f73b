"""Writing traces in batches a moment after their responses, off the request's path.

A trace written inside its request cost that request a transaction of its own (a commit with
its page writes to the write-ahead log), a large share of what the service may add to a query
over HTTP. ``TraceWriter`` holds each trace until its batch is written, at most
``BATCH_SECONDS`` later, and a read in the same process is answered from what it holds
(``service.usecases.traces``), so a trace is readable as soon as its response has been sent.
Another replica on a shared store sees it once the batch is written.

The writer knows nothing of the store: it is handed the two store operations it runs
(``write_traces`` and ``prune_traces`` below, bound by the runtime), so it can be tested alone.
"""

from __future__ import annotations

import datetime as dt
import logging
import threading
import time
from collections.abc import Callable
from typing import Any

from sqlalchemy import Engine

from service.store import repository
from service.store.identity import StoreGuard
from service.store.transactions import Transactions

log = logging.getLogger("excerpta.traces")

BATCH_SECONDS = 0.05
PRUNE_EVERY = 200
# Traces held while the store refuses writes; beyond this the oldest are dropped, with a warning.
MAX_HELD = 10_000
# A refused batch is tried again after a wait that doubles with each refusal, up to this.
MAX_RETRY_SECONDS = 5.0
# After a refused batch each trace is tried alone; this many refusals before the first write
# says the store itself refuses, and the rest are not tried this round.
REFUSALS_BEFORE_ANY_WRITE = 3

TraceRow = dict[str, Any]
"""``id``, ``key_id``, ``collection``, ``route``, ``created_at``, ``body`` and the summary
columns (``query``, ``candidates``, ``hits``, ``outcome``, ``reason``, ``milliseconds``), as
stored."""


class TraceWriter:
    """One thread that writes the traces submitted to it, a batch per call of ``write``.

    ``write`` stores a batch (raising leaves the batch held for the next try); ``prune`` drops
    traces past their retention and is called after every ``prune_every`` written traces.
    A refused batch is tried trace by trace, so that one trace the store cannot take does not
    keep every later one from being written.
    """

    def __init__(
        self,
        write: Callable[[list[TraceRow]], None],
        prune: Callable[[], None],
        *,
        batch_seconds: float = BATCH_SECONDS,
        prune_every: int = PRUNE_EVERY,
        max_held: int = MAX_HELD,
    ) -> None:
        self._write = write
        self._prune = prune
        self._batch_seconds = batch_seconds
        self._prune_every = prune_every
        self._max_held = max_held
        self._held: dict[str, TraceRow] = {}
        self._condition = threading.Condition()
        self._thread: threading.Thread | None = None
        self._stopping = False
        self._written = 0
        self._dropped = 0
        self._refused_rounds = 0
        # Traces refused alone once while others were written: a second such refusal drops
        # them, or they would be retried, holding later ones back, as long as the process runs.
        self._refused_once: set[str] = set()

    def submit(self, row: TraceRow) -> None:
        with self._condition:
            self._held[row["id"]] = row
            if len(self._held) > self._max_held:
                dropped = next(iter(self._held))
                del self._held[dropped]
                self._dropped += 1
                log.warning(
                    "trace %s dropped: the store has refused trace writes for a while", dropped
                )
            if self._thread is None and not self._stopping:
                self._thread = threading.Thread(
                    target=self._run, name="excerpta-traces", daemon=True
                )
                self._thread.start()
            if len(self._held) == 1:
                # The first of a batch starts its wait; waking the writer for every later one
                # would cost each request a thread switch while the batch gathers.
                self._condition.notify_all()
        if self._stopping:
            self._write_held()

    def held(self, trace_id: str) -> TraceRow | None:
        with self._condition:
            return self._held.get(trace_id)

    def held_rows(self) -> list[TraceRow]:
        """Every trace not yet written, for listings that must show them at once."""
        with self._condition:
            return list(self._held.values())

    def waiting(self) -> int:
        """Traces submitted and not yet written."""
        with self._condition:
            return len(self._held)

    def dropped(self) -> int:
        """Traces dropped unwritten since the start (see ``max_held``)."""
        with self._condition:
            return self._dropped

    def stop(self) -> None:
        """Write every held trace, then end the thread."""
        with self._condition:
            self._stopping = True
            self._condition.notify_all()
            thread = self._thread
        if thread is not None:
            thread.join()
        self._write_held()

    def _run(self) -> None:
        while True:
            with self._condition:
                while not self._held and not self._stopping:
                    self._condition.wait()
                # The batch gathers what arrives until its deadline; only stop() cuts it short.
                deadline = time.monotonic() + self._next_wait()
                while not self._stopping and (left := deadline - time.monotonic()) > 0:
                    self._condition.wait(left)
                if self._stopping:
                    return
            self._write_held()

    def _next_wait(self) -> float:
        if not self._refused_rounds:
            return self._batch_seconds
        return min(self._batch_seconds * 2**self._refused_rounds, MAX_RETRY_SECONDS)

    def _write_held(self) -> None:
        with self._condition:
            batch = list(self._held.values())
        if not batch:
            return
        try:
            self._write(batch)
        except Exception:
            written = self._write_each(batch) if len(batch) > 1 else []
            if not written:
                self._refused_rounds += 1
                log.exception(
                    "%d traces could not be written; they are kept for the next try", len(batch)
                )
                return
        else:
            written = batch
        self._refused_rounds = 0
        with self._condition:
            for row in written:
                self._held.pop(row["id"], None)
        before = self._written
        self._written += len(written)
        if before // self._prune_every != self._written // self._prune_every:
            try:
                self._prune()
            except Exception:
                log.exception("old traces could not be pruned; the next prune tries again")

    def _write_each(self, batch: list[TraceRow]) -> list[TraceRow]:
        """The traces of a refused batch, each written alone; those written are returned.

        When the store takes none, it is the store that fails: every trace is kept. When it takes
        some, the ones it refuses are kept for one more round and then dropped."""
        written: list[TraceRow] = []
        refused: list[TraceRow] = []
        for row in batch:
            if not written and len(refused) >= REFUSALS_BEFORE_ANY_WRITE:
                break
            try:
                self._write([row])
            except Exception:
                refused.append(row)
            else:
                written.append(row)
        if not written:
            return []
        for row in refused:
            trace_id = row["id"]
            if trace_id not in self._refused_once:
                self._refused_once.add(trace_id)
                log.warning(
                    "trace %s was refused while others were written; it is tried once more",
                    trace_id,
                )
                continue
            with self._condition:
                if self._held.pop(trace_id, None) is not None:
                    self._dropped += 1
            log.error("trace %s dropped: the store takes other traces but refuses it", trace_id)
        with self._condition:
            self._refused_once.intersection_update(self._held)
        return written


def write_traces(engine: Engine, guard: StoreGuard, rows: list[TraceRow]) -> None:
    """One batch in one transaction, on a connection rather than a session: it is the cheaper.
    Like every write, it first checks that the store is the one this process started with."""
    with engine.begin() as connection:
        guard.check(connection)
        repository.insert_traces(connection, rows)


def prune_traces(transactions: Transactions, *, retention_days: int, retention_count: int) -> None:
    with transactions.write() as session:
        repository.prune_traces(
            session,
            older_than=repository.utcnow() - dt.timedelta(days=retention_days),
            keep=retention_count,
        )
