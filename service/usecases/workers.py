"""The processes that run jobs: the one ``excerpta serve`` starts beside itself, which takes
jobs from the store, and ``excerpta worker``, which takes them from the broker when one is
configured (else from the store too).

The serving process never embeds a document: it records jobs, and a worker process with a
bounded number of torch threads runs them, so a query keeps at least one core to itself.
"""

from __future__ import annotations

import contextlib
import logging
import multiprocessing
import os
import signal
import threading
from collections.abc import Callable
from functools import partial
from multiprocessing.connection import Connection

from service.config import Settings
from service.embedding.base import Embedder
from service.embedding.threads import limit_torch_threads, worker_threads
from service.taskqueue.celery_app import celery_app, run_worker, sender
from service.usecases.job_queues import BrokerQueue, JobQueue, StoreQueue
from service.usecases.jobs import run_job, run_next_job, worker_name
from service.usecases.runtime import Runtime

log = logging.getLogger("excerpta.worker")
STOP_SECONDS = 30.0


def work_from_store(
    runtime: Runtime,
    *,
    stop: Callable[[], bool],
    idle: Callable[[float], object],
) -> None:
    """Run jobs from the store, oldest first, until ``stop()``; ``idle`` waits between looks
    at an empty queue (and may be cut short when a job is submitted)."""
    name = worker_name()
    poll = runtime.settings.job_poll_ms / 1000.0
    log.info("worker %s takes jobs from the store", name)
    while not stop():
        try:
            found = run_next_job(runtime, worker=name, should_stop=stop)
        except Exception:
            # Kept on the job where the store allows; the worker pauses, then goes on.
            log.exception("a job stopped")
            found = False
        if not found:
            idle(poll)


def _local_worker_main(
    settings: Settings,
    make_embedder: Callable[[], Embedder],
    signals: Connection,
    parent: int,
) -> None:
    """The worker process's body: its share of the CPU, its own embedder, the store's jobs.

    ``signals`` is the read end of a pipe from the server: a message cuts an idle wait short,
    and the server closing its end (or dying) stops the worker."""
    from service.logging_setup import configure_logging

    configure_logging(log_format=settings.log_format)
    # Ctrl-C reaches the whole process group; the server stops this worker itself.
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    if settings.worker_nice:
        os.nice(settings.worker_nice)
    runtime = Runtime(settings, make_embedder())
    limit_torch_threads(worker_threads(settings.worker_torch_threads))
    closed = threading.Event()

    def idle(seconds: float) -> None:
        if not signals.poll(seconds):
            return
        try:
            while signals.poll(0):
                signals.recv_bytes()
        except (EOFError, OSError):
            closed.set()

    try:
        work_from_store(runtime, stop=lambda: closed.is_set() or os.getppid() != parent, idle=idle)
    finally:
        runtime.close()


class LocalWorker(StoreQueue):
    """One worker process beside the server, started with it and stopped with it.

    ``make_embedder`` is called in the worker process (it must be picklable: a class, or a
    function of the settings), so the model is loaded there with the worker's thread limit.
    The server reaches the worker through a one-way pipe whose writes never block: a process
    that died leaves a broken pipe, which is ignored, where a shared event would hang
    whoever set it next.
    """

    def __init__(self, settings: Settings, make_embedder: Callable[[], Embedder]) -> None:
        context = multiprocessing.get_context("spawn")
        self._reader, self._writer = context.Pipe(duplex=False)
        os.set_blocking(self._writer.fileno(), False)
        super().__init__(wake=self._wake)
        self._process = context.Process(
            target=_local_worker_main,
            args=(settings, make_embedder, self._reader, os.getpid()),
            name="excerpta-worker",
            daemon=True,
        )
        self._lock = threading.Lock()
        self._started = False

    def _wake(self) -> None:
        # A full pipe already holds a wake-up, and a closed or broken one has no reader.
        with contextlib.suppress(OSError):
            self._writer.send_bytes(b"w")

    def start(self) -> None:
        with self._lock:
            if not self._started:
                self._process.start()
                # The worker holds the read end now; without this copy, its death breaks
                # the pipe instead of leaving writes to fill it.
                self._reader.close()
                self._started = True

    def stop(self) -> None:
        with self._lock:
            if not self._started:
                return
            self._writer.close()
            self._process.join(STOP_SECONDS)
            if self._process.is_alive():
                log.warning("the worker did not stop in %.0f s; ending it", STOP_SECONDS)
                self._process.terminate()
                self._process.join(STOP_SECONDS)
            self._started = False


def serving_queue(settings: Settings, make_embedder: Callable[[], Embedder]) -> JobQueue:
    """Where ``excerpta serve`` sends its jobs: the broker when one is configured (the
    ``excerpta worker`` processes run them), else a worker process of its own."""
    if settings.broker_url:
        app = celery_app(
            settings.broker_url,
            queue=settings.broker_queue,
            visibility_seconds=settings.broker_visibility_seconds,
        )
        return BrokerQueue(sender(app))
    return LocalWorker(settings, make_embedder)


def run_worker_process(runtime: Runtime) -> None:
    """``excerpta worker``: run jobs from the broker, or from the store when there is none,
    until SIGTERM or SIGINT."""
    settings = runtime.settings
    name = worker_name()
    if settings.broker_url:
        app = celery_app(
            settings.broker_url,
            queue=settings.broker_queue,
            visibility_seconds=settings.broker_visibility_seconds,
        )
        run_worker(app, partial(run_job, runtime, worker=name), hostname=f"excerpta@{name}")
        return
    stopping = threading.Event()
    for stop_signal in (signal.SIGTERM, signal.SIGINT):
        signal.signal(stop_signal, lambda *_: stopping.set())
    work_from_store(runtime, stop=stopping.is_set, idle=stopping.wait)
