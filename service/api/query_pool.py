"""The worker threads the retrieval routes run their use cases on.

A query is CPU work that must not hold up the event loop, so it runs on a worker thread. The
framework's own hand-off for synchronous routes costs measurably more per request than
``run_in_executor`` on a plain thread pool (one client, timed against each other), a sizeable
share of what the service adds to a query over HTTP, so the hot routes are asynchronous and hand
their work to this pool.
"""

from __future__ import annotations

import asyncio
import contextvars
from collections.abc import Callable
from concurrent.futures import ThreadPoolExecutor
from typing import TypeVar

T = TypeVar("T")

# As many threads as the framework's default pool allows at once, so concurrency is unchanged.
QUERY_THREADS = 40


class QueryPool:
    def __init__(self, threads: int = QUERY_THREADS) -> None:
        self._executor = ThreadPoolExecutor(threads, thread_name_prefix="excerpta-query")

    async def run(self, call: Callable[[], T]) -> T:
        """Run ``call`` on a pool thread in a copy of the caller's context, so it sees the
        request's context variables (the note of the trace it saves)."""
        context = contextvars.copy_context()
        return await asyncio.get_running_loop().run_in_executor(self._executor, context.run, call)

    def close(self) -> None:
        self._executor.shutdown(wait=True, cancel_futures=True)
