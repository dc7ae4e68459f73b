"""Traces: what each request decided and why, recorded during the request and read back later.

A recorded trace goes to the runtime's ``TraceWriter`` (``service.usecases.trace_writer``),
which writes it in a batch a moment after the response. A read is answered from what that
writer still holds, else from the store; another replica's trace may still be in its writer, so
a read that finds nothing waits out one batch before answering that a trace does not exist.
A listing merges what the writer holds with the store, so a trace is listed as soon as its
response has gone.

A query that fails with a caller's error keeps its trace too (outcome ``failed``), and the
trace a request saved is noted in ``RequestTrace``, so the HTTP edge can name it in the error
response and the access log.
"""

from __future__ import annotations

import base64
import binascii
import datetime as dt
import json
import time
import uuid
from collections.abc import Iterator, Sequence
from contextlib import contextmanager
from contextvars import ContextVar, Token
from dataclasses import asdict, dataclass, field
from typing import Any, Literal, get_args

from service.errors import InvalidRequest, ServiceError, TraceNotFound
from service.json_text import json_text
from service.request_context import note_trace
from service.retrieval.query import StageTrace
from service.store import repository
from service.store.transactions import Transactions
from service.usecases.callers import Caller
from service.usecases.collections import COLLECTION_NAME
from service.usecases.runtime import Runtime
from service.usecases.trace_writer import BATCH_SECONDS, TraceWriter
from service.usecases.trace_writer import TraceRow as TraceRowValues

TraceRoute = Literal["search", "context", "answer"]
TRACE_ROUTES: tuple[TraceRoute, ...] = get_args(TraceRoute)
TraceOutcome = Literal["returned", "answered", "declined", "failed"]
"""``returned`` for a search or context that gave its results, ``answered`` or ``declined``
for an answer, ``failed`` for a request that ended in an error (``reason`` holds its code)."""

DEFAULT_LIST_LIMIT = 50
MAX_LIST_LIMIT = 500


@dataclass
class RequestTrace:
    """The trace the current request saved, if any; set by ``TraceRecorder.save``."""

    trace_id: str | None = None


_REQUEST_TRACE: ContextVar[RequestTrace | None] = ContextVar("excerpta_request_trace", default=None)


@contextmanager
def request_trace() -> Iterator[RequestTrace]:
    """Note the trace saved while the block runs (the HTTP edge wraps each request in it).

    The note is an object the context holds, so a use case running on a worker thread with a
    copy of this context still fills the request's own note.
    """
    note = RequestTrace()
    token: Token[RequestTrace | None] = _REQUEST_TRACE.set(note)
    try:
        yield note
    finally:
        _REQUEST_TRACE.reset(token)


def current_trace_id() -> str | None:
    note = _REQUEST_TRACE.get()
    return None if note is None else note.trace_id


@dataclass
class TraceRecorder:
    route: TraceRoute
    collection: str
    request: dict[str, Any]
    trace_id: str = field(default_factory=lambda: str(uuid.uuid4()))
    stages: list[dict[str, Any]] = field(default_factory=list)
    started: float = field(default_factory=time.perf_counter)
    candidates: int | None = None
    saved: bool = False

    def stage(self, name: str, milliseconds: float, **details: Any) -> None:
        self.stages.append({"stage": name, "milliseconds": round(milliseconds, 3), **details})

    def retrieval_stage(self, stage: StageTrace, **details: Any) -> None:
        """A stage of the retrieval core, with its counts and its top entries."""
        if stage.name == "filter":
            self.candidates = stage.counts["candidates"]
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
            **({"notes": dict(stage.notes)} if stage.notes else {}),
            **details,
        )

    def save(
        self,
        writer: TraceWriter,
        caller: Caller,
        *,
        outcome: TraceOutcome,
        hit_count: int | None,
        reason: str | None = None,
        **details: Any,
    ) -> None:
        """Hand the trace to the writer, once; ``hit_count`` counts the chunks the response
        gives (search hits, or the chunks of its passages)."""
        if self.saved:
            raise RuntimeError(f"trace {self.trace_id} was already saved")
        self.saved = True
        note_trace(self.trace_id)
        milliseconds = round((time.perf_counter() - self.started) * 1000, 3)
        body = {
            "request": self.request,
            "stages": self.stages,
            "total_milliseconds": milliseconds,
            **details,
        }
        if reason is not None and outcome != "failed":
            body["reason"] = reason
        writer.submit(
            {
                "id": self.trace_id,
                "key_id": caller.key_id,
                "collection": self.collection,
                "route": self.route,
                "created_at": repository.utcnow(),
                "body": body,
                "query": self.request.get("query"),
                "candidates": self.candidates,
                "hits": hit_count,
                "outcome": outcome,
                "reason": reason,
                "milliseconds": milliseconds,
            }
        )
        note = _REQUEST_TRACE.get()
        if note is not None:
            note.trace_id = self.trace_id

    @contextmanager
    def failures_kept(self, writer: TraceWriter, caller: Caller) -> Iterator[None]:
        """A caller's error inside the block saves the trace as ``failed`` (unless the block
        saved it already) before it propagates, so the error response can name the trace."""
        try:
            yield
        except ServiceError as exc:
            if not self.saved:
                self.save(
                    writer,
                    caller,
                    outcome="failed",
                    hit_count=None,
                    reason=exc.code,
                    error={"code": exc.code, "message": exc.message},
                )
            raise


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
        **(trace["body"] if caller.is_admin else _without_hidden_counts(trace["body"])),
    }


# Counts that include chunks the caller may not see: only an admin reads them.
_HIDDEN_COUNTS = frozenset({"chunks"})


def _without_hidden_counts(body: dict[str, Any]) -> dict[str, Any]:
    stages = [
        {**stage, "counts": {k: v for k, v in stage["counts"].items() if k not in _HIDDEN_COUNTS}}
        if isinstance(stage.get("counts"), dict)
        else stage
        for stage in body.get("stages", [])
    ]
    return {**body, "stages": stages}


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


# Listing ---------------------------------------------------------------------------------------


@dataclass(frozen=True)
class TraceSummary:
    trace_id: str
    created_at: dt.datetime
    route: str
    collection: str
    query: str | None
    candidates: int | None
    hits: int | None
    outcome: str | None
    reason: str | None
    milliseconds: float | None


@dataclass(frozen=True)
class TracePage:
    """Summaries newest first; ``next_cursor`` continues after the last one (None at the end)."""

    traces: tuple[TraceSummary, ...]
    next_cursor: str | None


@dataclass(frozen=True, kw_only=True)
class TraceListing:
    """What a listing asks for, as the caller sent it (text times, an opaque cursor)."""

    collection: str | None = None
    since: str | None = None
    until: str | None = None
    route: str | None = None
    limit: int = DEFAULT_LIST_LIMIT
    cursor: str | None = None


def list_traces(runtime: Runtime, caller: Caller, listing: TraceListing) -> TracePage:
    """The caller's own traces (an admin's: everyone's) matching ``listing``, newest first,
    those this process has not written yet included.

    ``since`` is inclusive and ``until`` exclusive, so consecutive windows never share a trace.
    """
    return trace_page(runtime.transactions, caller, listing, held=runtime.traces.held_rows())


def trace_page(
    transactions: Transactions,
    caller: Caller,
    listing: TraceListing,
    *,
    held: Sequence[TraceRowValues] = (),
) -> TracePage:
    """``list_traces`` over a store alone (the CLI's, with no writer) plus ``held`` traces."""
    criteria = _criteria(caller, listing)
    with transactions.read() as session:
        stored = repository.trace_summaries(session, criteria, limit=listing.limit + 1)
    found = {row["id"]: row for row in stored}
    for row in held:
        if _matches(row, criteria):
            found.setdefault(row["id"], row)
    ordered = sorted(found.values(), key=lambda row: (row["created_at"], row["id"]), reverse=True)
    page = ordered[: listing.limit]
    more = len(ordered) > listing.limit
    return TracePage(
        traces=tuple(_summary(row) for row in page),
        next_cursor=_cursor(page[-1]) if more else None,
    )


def _criteria(caller: Caller, listing: TraceListing) -> repository.TraceCriteria:
    if not 1 <= listing.limit <= MAX_LIST_LIMIT:
        raise InvalidRequest(f"limit must be between 1 and {MAX_LIST_LIMIT}.", field="limit")
    if listing.route is not None and listing.route not in TRACE_ROUTES:
        raise InvalidRequest(f"route must be one of {', '.join(TRACE_ROUTES)}.", field="route")
    if listing.collection and not COLLECTION_NAME.fullmatch(listing.collection):
        raise InvalidRequest(
            f"collection {listing.collection!r} is not a collection name.", field="collection"
        )
    since = _instant(listing.since, "since")
    until = _instant(listing.until, "until")
    return repository.TraceCriteria(
        owner=None if caller.is_admin else caller.key_id,
        collection=listing.collection or None,
        route=listing.route,
        since=since,
        until=until,
        before=None if listing.cursor is None else _after_cursor(listing.cursor),
    )


def _instant(value: str | None, name: str) -> dt.datetime | None:
    if value is None or value == "":
        return None
    try:
        parsed = dt.datetime.fromisoformat(value.replace("Z", "+00:00"))
    except ValueError:
        raise InvalidRequest(
            f"{name} must be an ISO 8601 timestamp with an offset.", field=name
        ) from None
    if parsed.tzinfo is None:
        raise InvalidRequest(f"{name} needs an offset, such as 2026-05-01T00:00:00Z.", field=name)
    return parsed.astimezone(dt.UTC)


def _cursor(row: dict[str, Any]) -> str:
    text = json.dumps([row["created_at"].isoformat(), row["id"]])
    return base64.urlsafe_b64encode(text.encode()).decode().rstrip("=")


def _after_cursor(cursor: str) -> tuple[dt.datetime, str]:
    try:
        raw = base64.urlsafe_b64decode(cursor + "=" * (-len(cursor) % 4))
        created, trace_id = json.loads(raw)
        instant = dt.datetime.fromisoformat(created)
        if instant.tzinfo is None or not isinstance(trace_id, str):
            raise ValueError("not a cursor")
    except (ValueError, TypeError, binascii.Error, UnicodeDecodeError):
        raise InvalidRequest(
            "cursor is not one this listing gave; pass next_cursor as it came.", field="cursor"
        ) from None
    return instant.astimezone(dt.UTC), trace_id


def _matches(row: dict[str, Any], criteria: repository.TraceCriteria) -> bool:
    created: dt.datetime = row["created_at"]
    return (
        (criteria.owner is None or row["key_id"] == criteria.owner)
        and (criteria.collection is None or row["collection"] == criteria.collection)
        and (criteria.route is None or row["route"] == criteria.route)
        and (criteria.since is None or created >= criteria.since)
        and (criteria.until is None or created < criteria.until)
        and (criteria.before is None or (created, row["id"]) < criteria.before)
    )


def _summary(row: dict[str, Any]) -> TraceSummary:
    return TraceSummary(
        trace_id=row["id"],
        created_at=row["created_at"],
        route=row["route"],
        collection=row["collection"],
        query=row.get("query"),
        candidates=row.get("candidates"),
        hits=row.get("hits"),
        outcome=row.get("outcome"),
        reason=row.get("reason"),
        milliseconds=row.get("milliseconds"),
    )
