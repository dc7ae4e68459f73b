"""``python -m tests.worker_process``: ``excerpta worker`` with the test-only hashing embedder.

``EXCERPTA_TEST_EMBED_PAUSE_SECONDS`` makes each embedding call pause that long, so a test can
stop a worker while it is in the middle of a job.
"""

from __future__ import annotations

import os
import sys
import time
from collections.abc import Sequence

import numpy as np

from service.config import Settings
from service.logging_setup import configure_logging
from service.usecases.runtime import Runtime
from service.usecases.workers import run_worker_process
from tests.hashing_embedder import HashingTestEmbedder


class PausingHashingEmbedder(HashingTestEmbedder):
    def __init__(self, pause_seconds: float) -> None:
        super().__init__()
        self.pause_seconds = pause_seconds

    def embed_documents(self, texts: Sequence[str]) -> np.ndarray:
        time.sleep(self.pause_seconds)
        return super().embed_documents(texts)


def main() -> int:
    configure_logging()
    pause = float(os.environ.get("EXCERPTA_TEST_EMBED_PAUSE_SECONDS", "0"))
    runtime = Runtime(Settings(), PausingHashingEmbedder(pause))
    try:
        run_worker_process(runtime)
    finally:
        runtime.close()
    return 0


if __name__ == "__main__":
    sys.exit(main())
