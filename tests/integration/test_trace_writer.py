"""Traces are written in batches after their responses, and are never lost on the way.

Each test runs on SQLite and PostgreSQL (the ``store_engine`` fixture); two runtimes over one
store stand for two replicas, each with its own trace writer.
"""

from __future__ import annotations

import time
from collections.abc import Callable
from functools import partial
from typing import Any

import pytest
from sqlalchemy import Engine, func, select

from service.errors import TraceNotFound
from service.store import repository
from service.store.tables import TraceRow
from service.usecases import answering, documents, trace_writer, traces
from service.usecases.callers import LOCAL_ADMIN, Caller, Role
from service.usecases.runtime import Runtime
from service.usecases.search import SearchOptions
from tests.integration.test_store_backends import DOCUMENTS, create_collection

READER = Caller(key_id=7, name="reader", role=Role.READER, groups=frozenset(), collections=None)


def stored_traces(runtime: Runtime) -> int:
    with runtime.transaction() as session:
        return int(session.scalar(select(func.count()).select_from(TraceRow)) or 0)


def search(runtime: Runtime, caller: Caller = LOCAL_ADMIN) -> str:
    result = answering.search(runtime, caller, "bikes", SearchOptions(query="tyres pressure"))
    return result.trace_id


@pytest.fixture
def replica(runtime: Runtime) -> Runtime:
    create_collection(runtime)
    documents.upsert_documents(runtime, LOCAL_ADMIN, "bikes", DOCUMENTS)
    return runtime


def test_a_trace_is_readable_at_once_and_stored_within_a_batch(replica: Runtime) -> None:
    trace_id = search(replica)
    assert traces.get_trace(replica, LOCAL_ADMIN, trace_id)["trace_id"] == trace_id
    deadline = time.monotonic() + 5
    while stored_traces(replica) == 0 and time.monotonic() < deadline:
        time.sleep(trace_writer.BATCH_SECONDS / 5)
    assert stored_traces(replica) == 1


def test_a_held_trace_reads_exactly_as_the_stored_one(
    replica: Runtime, make_runtime: Callable[..., Runtime], store_engine: Engine
) -> None:
    trace_id = search(replica)
    held = traces.get_trace(replica, LOCAL_ADMIN, trace_id)
    replica.traces.stop()
    assert replica.traces.held(trace_id) is None
    other = make_runtime(engine=store_engine)
    assert traces.get_trace(other, LOCAL_ADMIN, trace_id) == held


def test_another_replica_reads_a_trace_made_just_before(
    replica: Runtime, make_runtime: Callable[..., Runtime], store_engine: Engine
) -> None:
    other = make_runtime(engine=store_engine)
    trace_id = search(replica)
    assert traces.get_trace(other, LOCAL_ADMIN, trace_id)["trace_id"] == trace_id


def test_stopping_writes_every_held_trace_in_one_batch(
    replica: Runtime, monkeypatch: pytest.MonkeyPatch
) -> None:
    written: list[int] = []
    insert = repository.insert_traces

    def counting(connection: Any, rows: list[dict[str, Any]]) -> None:
        written.append(len(rows))
        insert(connection, rows)

    monkeypatch.setattr(repository, "insert_traces", counting)
    replica.traces = trace_writer.TraceWriter(  # nothing until stopped
        partial(trace_writer.write_traces, replica.engine, replica.store),
        lambda: None,
        batch_seconds=60.0,
    )
    ids = [search(replica) for _ in range(5)]
    assert stored_traces(replica) == 0
    replica.traces.stop()
    assert written == [5]
    assert stored_traces(replica) == 5
    assert {traces.get_trace(replica, LOCAL_ADMIN, i)["trace_id"] for i in ids} == set(ids)


def test_a_trace_the_store_refused_is_kept_and_written_on_the_next_try(
    replica: Runtime, monkeypatch: pytest.MonkeyPatch
) -> None:
    insert = repository.insert_traces
    attempts: list[int] = []

    def refuse_once(connection: Any, rows: list[dict[str, Any]]) -> None:
        attempts.append(len(rows))
        if len(attempts) == 1:
            raise OSError("disk full")
        insert(connection, rows)

    monkeypatch.setattr(repository, "insert_traces", refuse_once)
    trace_id = search(replica)
    deadline = time.monotonic() + 5
    while len(attempts) < 2 and time.monotonic() < deadline:
        assert traces.get_trace(replica, LOCAL_ADMIN, trace_id)["trace_id"] == trace_id
        time.sleep(trace_writer.BATCH_SECONDS / 5)
    replica.traces.stop()
    assert len(attempts) >= 2
    assert stored_traces(replica) == 1


def test_another_keys_trace_is_refused_like_a_missing_one(replica: Runtime) -> None:
    trace_id = search(replica)
    for unknown in (trace_id, "00000000-0000-0000-0000-000000000000"):
        with pytest.raises(TraceNotFound) as refused:
            traces.get_trace(replica, READER, unknown)
        assert refused.value.message == f"Trace {unknown!r} does not exist."
