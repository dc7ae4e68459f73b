"""Append-only arrays shared between index snapshots.

A snapshot holds a buffer and the number of rows it may read. A writer only ever writes past the
newest snapshot's row count, so rows a published snapshot can read never change; when the
buffer is full the writer moves to a new buffer of twice the capacity, and older snapshots keep
the old one. Each write therefore costs its own rows, plus an occasional doubling copy.
"""

from __future__ import annotations

import numpy as np


def round_up(count: int, multiple: int) -> int:
    return -(-count // multiple) * multiple


def write_rows(
    buffer: np.ndarray, used: int, values: np.ndarray, *, capacity_multiple: int = 1
) -> np.ndarray:
    """Write ``values`` at ``buffer[used:]`` and return the buffer that now holds them.

    The result is ``buffer`` itself when it has room, otherwise a new zero-filled buffer of at
    least twice the capacity (rounded up to ``capacity_multiple`` rows) holding
    ``buffer[:used]`` followed by ``values``.
    """
    needed = used + len(values)
    if needed > len(buffer):
        capacity = round_up(max(needed, 2 * len(buffer), 16), capacity_multiple)
        grown = np.zeros((capacity, *buffer.shape[1:]), dtype=buffer.dtype)
        grown[:used] = buffer[:used]
        buffer = grown
    buffer[used:needed] = values
    return buffer


def concatenated_ranges(starts: np.ndarray, ends: np.ndarray) -> np.ndarray:
    """Positions ``starts[i]..ends[i]-1`` for every ``i``, concatenated, without a Python loop."""
    counts = (ends - starts).astype(np.int64)
    total = int(counts.sum())
    if total == 0:
        return np.zeros(0, dtype=np.int64)
    before = np.cumsum(counts) - counts
    return np.repeat(starts.astype(np.int64) - before, counts) + np.arange(total, dtype=np.int64)
