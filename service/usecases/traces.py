"""Traces: what each request decided and why, recorded during the request and read back later.

A recorded trace goes to the runtime's ``TraceWriter`` (``service.usecases.trace_writer``),
which writes it in a batch a moment after the response. A read is answered from what that
writer still holds, else from the store; another replica's trace may still be in its writer, so
a read that finds nothing waits out one batch before answering that a trace does not exist.
"""

from __future__ import annotations

import json
import time
import uuid
from dataclasses import asdict, dataclass, field
from typing import Any

from service.errors import TraceNotFound
from service.json_text import json_text
from service.retrieval.query import StageTrace
from service.store import repository
from service.usecases.callers import Caller
from service.usecases.runtime import Runtime
from service.usecases.trace_writer import BATCH_SECONDS, TraceWriter


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
            **({} if stage.plan is None else {"plan": asdict(stage.plan)}),
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
