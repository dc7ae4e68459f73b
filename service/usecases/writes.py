"""Writes that lose a race against another writer are tried again, a bounded number of times.

Locks taken in one order (the collection, then its rows) leave little to lose; what is left (a
deadlock the database still detects, a serialization failure, SQLite's wait for its write lock
running out) is retried after a random pause, so writers that collided once do not collide
again in step. Only when every attempt lost is the caller told ``busy``.
"""

from __future__ import annotations

import logging
import random
import time
from collections.abc import Callable
from dataclasses import dataclass
from typing import TypeVar

from service.errors import Busy

T = TypeVar("T")
log = logging.getLogger("excerpta.writes")


@dataclass(frozen=True)
class WriteRetries:
    """``attempts`` tries in all, after random pauses of up to ``pause_seconds``, doubling."""

    attempts: int
    pause_seconds: float

    def run(self, attempt: Callable[[], T]) -> T:
        """Run ``attempt`` (one whole write transaction) until it does not lose a race."""
        for number in range(1, self.attempts + 1):
            try:
                return attempt()
            except Busy:
                if number == self.attempts:
                    log.warning("a write lost %d races against other writers; refused", number)
                    raise
                # Full jitter: a pause anywhere up to an exponentially growing bound.
                pause = random.uniform(0, self.pause_seconds * 2 ** (number - 1))
                log.info("a write lost a race against another writer; retrying in %.3f s", pause)
                time.sleep(pause)
        raise AssertionError("attempts is at least 1")
