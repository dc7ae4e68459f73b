"""Traces: what each request decided and why, stored before its response is sent."""

from __future__ import annotations

import datetime as dt
import itertools
import time
import uuid
from dataclasses import dataclass, field
from typing import Any

from service.errors import TraceNotFound
from service.store import repository
from service.usecases.callers import Caller
from service.usecases.runtime import Runtime

PRUNE_EVERY = 200
_saves = itertools.count(1)


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

    def save(self, runtime: Runtime, caller: Caller, **summary: Any) -> None:
        body = {
            "request": self.request,
            "stages": self.stages,
            "total_milliseconds": round((time.perf_counter() - self.started) * 1000, 3),
            **summary,
        }
        with runtime.connection() as connection:
            repository.insert_trace(
                connection,
                trace_id=self.trace_id,
                key_id=caller.key_id,
                collection=self.collection,
                route=self.route,
                body=body,
            )
        if next(_saves) % PRUNE_EVERY == 0:
            prune_traces(runtime)


def prune_traces(runtime: Runtime) -> None:
    settings = runtime.settings
    with runtime.transaction() as session:
        repository.prune_traces(
            session,
            older_than=repository.utcnow() - dt.timedelta(days=settings.trace_retention_days),
            keep=settings.trace_retention_count,
        )


def get_trace(runtime: Runtime, caller: Caller, trace_id: str) -> dict[str, Any]:
    with runtime.transaction() as session:
        row = repository.trace_by_id(session, trace_id)
        if row is None or not (caller.is_admin or row.key_id == caller.key_id):
            raise TraceNotFound(f"Trace {trace_id!r} does not exist.")
        return {
            "trace_id": row.id,
            "route": row.route,
            "collection": row.collection,
            "created_at": row.created_at,
            **row.body,
        }
