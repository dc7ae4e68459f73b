"""How many threads the embedding model may use in this process.

A worker leaves the query path a core: on a small machine a query embedded with one thread
while the other cores are busy takes milliseconds, and with more threads it waits for cores the
worker holds.
"""

from __future__ import annotations

import os
import sys


def worker_threads(configured: int) -> int:
    """``configured`` threads, or with 0 every core but one (at least one)."""
    if configured > 0:
        return configured
    return max(1, (os.cpu_count() or 1) - 1)


def limit_torch_threads(threads: int) -> None:
    """Set torch's intra-op threads for this process (0 leaves the library's default); called
    once the embedder is loaded, and nothing to do where no model brought torch in."""
    torch = sys.modules.get("torch")
    if threads <= 0 or torch is None:
        return
    torch.set_num_threads(threads)
