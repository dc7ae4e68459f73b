"""The trace writer alone: its batches, retries, pruning and stop, with fake store operations."""

from __future__ import annotations

import logging
import threading
import time
from typing import Any

import pytest

from service.usecases.trace_writer import TraceWriter

WAIT = 5.0  # the longest any test waits for the writer's thread


class FakeStore:
    """Records each batch written; refuses the first ``refusals`` writes, and holds every
    other write at ``gate`` until the test opens it."""

    def __init__(self, refusals: int = 0, *, gate_open: bool = True) -> None:
        self.batches: list[list[str]] = []
        self.attempts = 0
        self.prunes = 0
        self.refusals = refusals
        self.writing = threading.Event()
        self.gate = threading.Event()
        if gate_open:
            self.gate.set()

    def write(self, rows: list[dict[str, Any]]) -> None:
        self.attempts += 1
        if self.attempts <= self.refusals:
            raise OSError("disk full")
        self.writing.set()
        assert self.gate.wait(WAIT)
        self.batches.append([row["id"] for row in rows])

    def prune(self) -> None:
        self.prunes += 1


def trace(trace_id: str) -> dict[str, Any]:
    return {"id": trace_id, "key_id": None, "collection": "bikes", "route": "search", "body": {}}


def wait_for(condition: Any) -> None:
    deadline = time.monotonic() + WAIT
    while not condition():
        assert time.monotonic() < deadline, "the writer did not get there in time"
        time.sleep(0.002)


def test_a_trace_is_held_until_its_batch_is_written_then_released() -> None:
    store = FakeStore(gate_open=False)
    writer = TraceWriter(store.write, store.prune, batch_seconds=0.01)
    writer.submit(trace("a"))
    assert store.writing.wait(WAIT)
    assert writer.held("a") == trace("a")
    store.gate.set()
    wait_for(lambda: writer.held("a") is None)
    assert store.batches == [["a"]]
    writer.stop()


def test_traces_submitted_within_one_batch_wait_are_written_together() -> None:
    store = FakeStore()
    writer = TraceWriter(store.write, store.prune, batch_seconds=60.0)
    for name in "abc":
        writer.submit(trace(name))
    assert store.batches == []
    assert [writer.held(name) is not None for name in "abc"] == [True, True, True]
    writer.stop()
    assert store.batches == [["a", "b", "c"]]


def test_a_refused_batch_is_kept_and_written_on_the_next_try(
    caplog: pytest.LogCaptureFixture,
) -> None:
    store = FakeStore(refusals=1, gate_open=False)
    writer = TraceWriter(store.write, store.prune, batch_seconds=0.01)
    with caplog.at_level(logging.ERROR, logger="excerpta.traces"):
        writer.submit(trace("a"))
        assert store.writing.wait(WAIT)  # the second try, after one batch wait
    assert store.attempts == 2
    assert writer.held("a") == trace("a")
    assert "1 traces could not be written" in caplog.text
    store.gate.set()
    wait_for(lambda: writer.held("a") is None)
    writer.stop()
    assert store.batches == [["a"]]


def test_a_trace_submitted_after_stop_is_written_at_once() -> None:
    store = FakeStore()
    writer = TraceWriter(store.write, store.prune, batch_seconds=60.0)
    writer.stop()
    writer.submit(trace("late"))
    assert store.batches == [["late"]]


def test_old_traces_are_pruned_once_per_so_many_written() -> None:
    store = FakeStore()
    writer = TraceWriter(store.write, store.prune, batch_seconds=60.0, prune_every=3)
    for number in range(2):
        writer.submit(trace(f"t{number}"))
    writer.stop()
    assert store.prunes == 0
    writer.submit(trace("t2"))
    assert store.prunes == 1
    for number in range(3, 6):
        writer.submit(trace(f"t{number}"))
    assert store.prunes == 2


def test_a_failing_prune_is_logged_and_writing_goes_on(caplog: pytest.LogCaptureFixture) -> None:
    store = FakeStore()

    def broken_prune() -> None:
        raise OSError("locked")

    writer = TraceWriter(store.write, broken_prune, batch_seconds=60.0, prune_every=1)
    writer.stop()
    with caplog.at_level(logging.ERROR, logger="excerpta.traces"):
        writer.submit(trace("a"))
        writer.submit(trace("b"))
    assert store.batches == [["a"], ["b"]]
    assert "old traces could not be pruned" in caplog.text


def test_past_the_held_limit_the_oldest_trace_is_dropped_with_a_warning(
    caplog: pytest.LogCaptureFixture,
) -> None:
    store = FakeStore()
    writer = TraceWriter(store.write, store.prune, batch_seconds=60.0, max_held=2)
    with caplog.at_level(logging.WARNING, logger="excerpta.traces"):
        for name in "abc":
            writer.submit(trace(name))
    assert writer.held("a") is None
    assert "trace a dropped" in caplog.text
    assert (writer.waiting(), writer.dropped()) == (2, 1)
    writer.stop()
    assert store.batches == [["b", "c"]]
    assert (writer.waiting(), writer.dropped()) == (0, 1)


class PickyStore:
    """Takes every trace except those named in ``refused``, and refuses every write at all while
    ``down`` is set; records each write it was asked for."""

    def __init__(self, refused: frozenset[str] = frozenset(), *, down: bool = False) -> None:
        self.refused = set(refused)
        self.down = threading.Event()
        if down:
            self.down.set()
        self.attempts: list[list[str]] = []
        self.stored: list[str] = []

    def write(self, rows: list[dict[str, Any]]) -> None:
        ids = [row["id"] for row in rows]
        self.attempts.append(ids)
        if self.down.is_set() or self.refused.intersection(ids):
            raise OSError("refused")
        self.stored += ids

    def prune(self) -> None:
        pass


def test_a_trace_the_store_refuses_is_dropped_and_holds_no_other_back(
    caplog: pytest.LogCaptureFixture,
) -> None:
    store = PickyStore(refused=frozenset({"bad"}))
    writer = TraceWriter(store.write, store.prune, batch_seconds=60.0)
    writer.stop()  # each submit now writes at once, so the rounds are the test's own
    with caplog.at_level(logging.WARNING, logger="excerpta.traces"):
        for name in ("a", "bad", "b"):
            writer.submit(trace(name))
        # The first round wrote "a" alone; "bad" and "b" went together, were refused, then
        # each alone: "b" was written and "bad" is kept for one more round.
        assert store.stored == ["a", "b"]
        assert writer.held("bad") is not None
        assert "trace bad was refused while others were written" in caplog.text
        writer.submit(trace("c"))
    assert store.stored == ["a", "b", "c"]
    assert writer.held("bad") is None
    assert (writer.waiting(), writer.dropped()) == (0, 1)
    assert "trace bad dropped: the store takes other traces but refuses it" in caplog.text


def test_while_the_store_refuses_every_write_all_traces_are_kept_and_retries_slow_down(
    caplog: pytest.LogCaptureFixture,
) -> None:
    store = PickyStore(down=True)
    writer = TraceWriter(store.write, store.prune, batch_seconds=0.01, max_held=100)
    with caplog.at_level(logging.ERROR, logger="excerpta.traces"):
        for number in range(10):
            writer.submit(trace(f"t{number}"))
        time.sleep(0.6)
        store.down.clear()
        wait_for(lambda: writer.waiting() == 0)
    writer.stop()
    assert sorted(store.stored) == sorted(f"t{n}" for n in range(10))
    assert writer.dropped() == 0
    # A refused batch is tried alone for at most three traces before the round gives up.
    batches = [ids for ids in store.attempts if len(ids) > 1]
    assert len(store.attempts) <= 4 * len(batches) + 1  # + 1: a first round of one trace
    # Waits double from 0.01 s (0.02, 0.04, ... 0.32 s): a handful of rounds in 0.6 s, where a
    # fixed 0.01 s wait would have made dozens.
    assert len(batches) <= 8
    assert "traces could not be written; they are kept for the next try" in caplog.text
