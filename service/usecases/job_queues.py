"""Where a submitted job goes: run at once by the process that sent it, left in the store for a
worker process to take, or sent to a broker as a task.

The runtime holds one of these; it knows nothing of the runtime, so each is built by whoever
decides how a process runs its jobs (``excerpta serve``, ``excerpta ingest``, the tests).
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Protocol


class JobQueue(Protocol):
    @property
    def runs_here(self) -> bool:
        """True when the process that submits a job runs it itself, before it answers."""
        ...

    def submitted(self, job_id: str) -> None:
        """A job was just recorded in the store as queued."""
        ...

    def start(self) -> None: ...

    def stop(self) -> None: ...


class RunHere:
    """The submitting process runs each job at once: the command line working on the store
    directly, where nothing else would."""

    runs_here = True

    def submitted(self, job_id: str) -> None:
        return None

    def start(self) -> None:
        return None

    def stop(self) -> None:
        return None


class StoreQueue:
    """Jobs wait in the store until a worker that polls it takes them; ``wake`` tells a local
    worker at once instead of at its next poll."""

    runs_here = False

    def __init__(self, wake: Callable[[], None] | None = None) -> None:
        self._wake = wake

    def submitted(self, job_id: str) -> None:
        if self._wake is not None:
            self._wake()

    def start(self) -> None:
        return None

    def stop(self) -> None:
        return None


class BrokerQueue:
    """Each job is sent as a task through the broker; ``excerpta worker`` processes run them."""

    runs_here = False

    def __init__(self, send: Callable[[str], None]) -> None:
        self._send = send

    def submitted(self, job_id: str) -> None:
        self._send(job_id)

    def start(self) -> None:
        return None

    def stop(self) -> None:
        return None
