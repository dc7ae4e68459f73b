"""The rebuild worker's scheduling alone, with fake steps: no store, no embedder."""

from __future__ import annotations

import logging
import threading
from collections.abc import Callable

import pytest

from service.usecases.rebuild import RebuildWorker

WAIT = 5.0


class FakeSteps:
    """A step per collection that finishes after ``batches[name]`` calls, failing as told."""

    def __init__(self, batches: dict[str, int], failures: int = 0) -> None:
        self.batches = dict(batches)
        self.failures = failures
        self.calls: list[str] = []

    def __call__(self, name: str) -> bool:
        self.calls.append(name)
        if self.failures:
            self.failures -= 1
            raise OSError("store went away")
        self.batches[name] -= 1
        return self.batches[name] <= 0


def no_pending() -> list[str]:
    return []


def test_a_rebuild_runs_its_batches_until_the_collection_switches_over() -> None:
    steps = FakeSteps({"bikes": 3})
    worker = RebuildWorker(steps, no_pending)
    worker.start("bikes")
    assert worker.wait(WAIT)
    assert steps.calls == ["bikes"] * 3


def test_rebuilds_of_several_collections_each_run_to_the_end() -> None:
    steps = FakeSteps({"bikes": 2, "archive": 1, "parts": 2})
    release = threading.Event()

    def held_step(name: str) -> bool:
        assert release.wait(WAIT)
        return steps(name)

    worker = RebuildWorker(held_step, no_pending)
    for name in ("parts", "bikes", "archive"):
        worker.start(name)
    release.set()
    assert worker.wait(WAIT)
    assert sorted(steps.calls) == ["archive", "bikes", "bikes", "parts", "parts"]
    assert steps.batches == {"bikes": 0, "archive": 0, "parts": 0}


def test_a_failing_step_is_logged_and_retried(caplog: pytest.LogCaptureFixture) -> None:
    steps = FakeSteps({"bikes": 1}, failures=2)
    worker = RebuildWorker(steps, no_pending, retry_seconds=0.001)
    with caplog.at_level(logging.ERROR, logger="excerpta.rebuild"):
        worker.start("bikes")
        assert worker.wait(WAIT)
    assert steps.calls == ["bikes"] * 3
    assert caplog.text.count("rebuild of collection 'bikes' failed; it will be retried") == 2


def test_resume_picks_up_the_rebuilds_left_unfinished() -> None:
    steps = FakeSteps({"bikes": 1, "parts": 1})
    worker = RebuildWorker(steps, lambda: ["bikes", "parts"])
    worker.resume()
    assert worker.wait(WAIT)
    assert sorted(steps.calls) == ["bikes", "parts"]


def test_stop_ends_a_rebuild_that_would_never_finish() -> None:
    calls: list[str] = []
    step: Callable[[str], bool] = lambda name: calls.append(name) is not None  # noqa: E731
    worker = RebuildWorker(step, no_pending)
    worker.start("bikes")
    worker.stop()
    assert worker.wait(WAIT)
    assert calls and set(calls) == {"bikes"}


def test_a_worker_with_nothing_to_do_waits_for_nothing() -> None:
    worker = RebuildWorker(FakeSteps({}), no_pending)
    worker.resume()
    assert worker.wait(0)
    worker.stop()
