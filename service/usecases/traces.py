"""Traces: what each request decided and why, written in batches a moment after the response.

A trace written inside its request cost that request a transaction of its own, about 0.9 ms on
the 2-core development machine (some fifteen page writes to the write-ahead log per commit),
close to a third of what the service may add to a query over HTTP. ``TraceWriter`` holds each
trace until its batch is written, at most ``BATCH_SECONDS`` later, and a read in the same
process is answered from what it holds, so a trace is readable as soon as its response has been
sent. Another replica on a shared store sees it once the batch is written; its reads wait out one
batch before answering that a trace does not exist.
"""

from __future__ import annotations

import datetime as dt
import json
import logging
import threading
import time
import uuid
from dataclasses import dataclass, field
from typing import Any

from service.errors import TraceNotFound
from service.json_text import json_text
from service.retrieval.query import StageTrace
from service.store import repository
from service.usecases.callers import Caller
from service.usecases.runtime import Runtime

log = logging.getLogger("excerpta.traces")

BATCH_SECONDS = 0.05
PRUNE_EVERY = 200
# Traces held while the store refuses writes; beyond this the oldest are dropped, with a warning.
MAX_HELD = 10_000


@dataclass
class TraceRecorder:
    route: str
    collection: str
    request: dict[str, Any]
    trace_id: str = field(default_factory=lambda: str(uuid.uuid4()))
    stages: list[dict[str, Any]] = field(default_factory=list)
    started: float = field(default_factory=time.perf_counter)

    def stage(self, name: str, milliseconds: float, **details: Any) -> None:
        self.stages.append({"stage": name, "milliseconds": round(milliseconds, 3), **details})

    def retrieval_stage(self, stage: StageTrace, **details: Any) -> None:
        """A stage of the retrieval core, with its counts and its top entries."""
        self.stage(
            stage.name,
            stage.milliseconds,
            counts=dict(stage.counts),
            top=[
                {
                    "chunk_id": entry.chunk_id,
                    "score": entry.score,
                    "rank": entry.rank,
                    "ranks": None if entry.ranks is None else dict(entry.ranks),
                }
                for entry in stage.top
            ],
            **details,
        )

    def save(self, writer: TraceWriter, caller: Caller, **summary: Any) -> None:
        body = {
            "request": self.request,
            "stages": self.stages,
            "total_milliseconds": round((time.perf_counter() - self.started) * 1000, 3),
            **summary,
        }
        writer.submit(
            {
                "id": self.trace_id,
                "key_id": caller.key_id,
                "collection": self.collection,
                "route": self.route,
                "created_at": repository.utcnow(),
                "body": body,
            }
        )


class TraceWriter:
    """One thread that writes the traces submitted to it, a batch per transaction."""

    def __init__(self, runtime: Runtime, batch_seconds: float = BATCH_SECONDS) -> None:
        self._runtime = runtime
        self._batch_seconds = batch_seconds
        self._held: dict[str, dict[str, Any]] = {}
        self._condition = threading.Condition()
        self._thread: threading.Thread | None = None
        self._stopping = False
        self._written = 0

    def submit(self, row: dict[str, Any]) -> None:
        with self._condition:
            self._held[row["id"]] = row
            if len(self._held) > MAX_HELD:
                dropped = next(iter(self._held))
                del self._held[dropped]
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

    def held(self, trace_id: str) -> dict[str, Any] | None:
        with self._condition:
            return self._held.get(trace_id)

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
                deadline = time.monotonic() + self._batch_seconds
                while not self._stopping and (left := deadline - time.monotonic()) > 0:
                    self._condition.wait(left)
                if self._stopping:
                    return
            self._write_held()

    def _write_held(self) -> None:
        with self._condition:
            batch = list(self._held.values())
        if not batch:
            return
        try:
            with self._runtime.connection() as connection:
                repository.insert_traces(connection, batch)
        except Exception:
            # Kept: the writer's loop tries again after its next batch wait.
            log.exception(
                "%d traces could not be written; they are kept for the next try", len(batch)
            )
            return
        with self._condition:
            for row in batch:
                self._held.pop(row["id"], None)
        before = self._written
        self._written += len(batch)
        if before // PRUNE_EVERY != self._written // PRUNE_EVERY:
            prune_traces(self._runtime)


def prune_traces(runtime: Runtime) -> None:
    settings = runtime.settings
    with runtime.transaction() as session:
        repository.prune_traces(
            session,
            older_than=repository.utcnow() - dt.timedelta(days=settings.trace_retention_days),
            keep=settings.trace_retention_count,
        )


def get_trace(runtime: Runtime, caller: Caller, trace_id: str) -> dict[str, Any]:
    trace = _find(runtime, trace_id)
    if not _visible(trace, caller):
        # It may be in a batch another replica has not written yet; a hidden trace waits too,
        # so that it is answered exactly like a missing one.
        time.sleep(2 * BATCH_SECONDS)
        trace = _find(runtime, trace_id)
    if trace is None or not _visible(trace, caller):
        raise TraceNotFound(f"Trace {trace_id!r} does not exist.")
    return {
        "trace_id": trace["id"],
        "route": trace["route"],
        "collection": trace["collection"],
        "created_at": trace["created_at"],
        **trace["body"],
    }


def _visible(trace: dict[str, Any] | None, caller: Caller) -> bool:
    return trace is not None and (caller.is_admin or trace["key_id"] == caller.key_id)


def _find(runtime: Runtime, trace_id: str) -> dict[str, Any] | None:
    held = runtime.traces.held(trace_id)
    if held is not None:
        # As the store would give it back: the body goes through JSON on its way in.
        return {**held, "body": json.loads(json_text(held["body"]))}
    with runtime.transaction() as session:
        row = repository.trace_by_id(session, trace_id)
        if row is None:
            return None
        return {
            "id": row.id,
            "key_id": row.key_id,
            "route": row.route,
            "collection": row.collection,
            "created_at": row.created_at,
            "body": row.body,
        }
