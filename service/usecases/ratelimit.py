"""A token bucket per key: ``rate`` tokens a second up to ``burst``; off when rate is 0."""

from __future__ import annotations

import math
import threading
import time
from collections.abc import Callable

from service.errors import RateLimited
from service.usecases.callers import Caller


class RateLimiter:
    def __init__(
        self, rate: float, burst: int, clock: Callable[[], float] = time.monotonic
    ) -> None:
        self.rate = rate
        self.burst = burst
        self._clock = clock
        self._buckets: dict[str, tuple[float, float]] = {}
        self._lock = threading.Lock()

    def check(self, caller: Caller) -> None:
        if self.rate <= 0:
            return
        now = self._clock()
        with self._lock:
            tokens, stamp = self._buckets.get(caller.name, (float(self.burst), now))
            tokens = min(float(self.burst), tokens + (now - stamp) * self.rate)
            if tokens < 1.0:
                self._buckets[caller.name] = (tokens, now)
                wait = math.ceil((1.0 - tokens) / self.rate)
                raise RateLimited(
                    f"This key is over its rate limit; retry in {wait} seconds.",
                    retry_after=max(1, wait),
                )
            self._buckets[caller.name] = (tokens - 1.0, now)
