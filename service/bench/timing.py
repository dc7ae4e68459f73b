"""Wall-clock timing of repeated calls and their percentiles, and resident memory."""

from __future__ import annotations

import os
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Any, TypeVar

import numpy as np

T = TypeVar("T")

WARMUP_CALLS = 3


@dataclass(frozen=True)
class Summary:
    """Milliseconds per call: the median, the 95th and 99th percentiles (linear interpolation)."""

    median_ms: float
    p95_ms: float
    p99_ms: float
    runs: int

    @classmethod
    def of(cls, milliseconds: Sequence[float]) -> Summary:
        values = np.asarray(milliseconds, dtype=np.float64)
        if len(values) == 0:
            raise ValueError("no timings to summarise")
        median, p95, p99 = np.percentile(values, [50, 95, 99])
        return cls(float(median), float(p95), float(p99), len(values))

    def as_dict(self) -> dict[str, Any]:
        return {
            "median_ms": self.median_ms,
            "p95_ms": self.p95_ms,
            "p99_ms": self.p99_ms,
            "runs": self.runs,
        }


def time_each(inputs: Sequence[T], call: Callable[[T], object]) -> tuple[Summary, list[Any]]:
    """Time ``call`` once per input, after a few untimed warm-up calls; returns the results too.

    Warm-up calls run on the first inputs so caches, lazily built weights and allocator pools are
    in the state a long-running server keeps them in.
    """
    for item in inputs[:WARMUP_CALLS]:
        call(item)
    timings: list[float] = []
    results: list[Any] = []
    for item in inputs:
        started = time.perf_counter_ns()
        result = call(item)
        timings.append((time.perf_counter_ns() - started) / 1e6)
        results.append(result)
    return Summary.of(timings), results


def resident_bytes() -> int:
    """This process's resident set size, from /proc/self/statm (Linux)."""
    with open("/proc/self/statm", encoding="ascii") as statm:
        resident_pages = int(statm.read().split()[1])
    return resident_pages * os.sysconf("SC_PAGE_SIZE")
