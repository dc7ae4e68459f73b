"""Serving the API until told to stop, and stopping without dropping what is in flight.

On SIGTERM (or SIGINT) the server stops accepting connections, lets the requests in flight
finish for up to ``shutdown_grace_seconds``, then shuts the application down, which writes the
traces it still holds, and the process exits 0: a stop that was asked for is a clean exit.
"""

from __future__ import annotations

import signal
from collections.abc import Iterator
from contextlib import contextmanager

import uvicorn

from service.api.app import create_app
from service.usecases.runtime import Runtime

STOP_SIGNALS = (signal.SIGTERM, signal.SIGINT)


def serve(runtime: Runtime) -> None:
    settings = runtime.settings
    config = uvicorn.Config(
        create_app(runtime),
        host=settings.host,
        port=settings.port,
        log_config=None,
        access_log=False,
        timeout_graceful_shutdown=settings.shutdown_grace_seconds,
    )
    with _stop_signals_end_cleanly():
        uvicorn.Server(config).run()


@contextmanager
def _stop_signals_end_cleanly() -> Iterator[None]:
    """The server handles a stop signal itself, then raises it again once it has shut down, so
    that the process ends as the signal's default would (killed by it, not exit status 0).
    Here the signal has been handled in full by then, so the raised one is ignored."""
    previous = {sig: signal.signal(sig, _already_handled) for sig in STOP_SIGNALS}
    try:
        yield
    finally:
        for sig, handler in previous.items():
            signal.signal(sig, handler)


def _already_handled(_signal: int, _frame: object) -> None:
    return None
