"""``python -m tests.server_process``: the service as ``excerpta serve`` runs it, with the
test-only hashing embedder instead of the model, so tests can start replicas in a second or two.

Settings come from the ``EXCERPTA_`` environment, as for ``excerpta serve``. Its jobs run in
the request's own thread unless ``EXCERPTA_TEST_JOB_WORKERS=1``: then, as ``excerpta serve``
does, in a worker process of its own, or through the broker when one is configured.
"""

from __future__ import annotations

import os
import sys

from service.api.server import serve
from service.config import Settings
from service.logging_setup import configure_logging
from service.usecases.runtime import Runtime
from service.usecases.workers import serving_queue
from tests.hashing_embedder import HashingTestEmbedder


def main() -> int:
    settings = Settings()
    configure_logging(log_format=settings.log_format)
    jobs = None
    if os.environ.get("EXCERPTA_TEST_JOB_WORKERS") == "1":
        jobs = serving_queue(settings, HashingTestEmbedder)
    serve(Runtime(settings, HashingTestEmbedder(), jobs=jobs))
    return 0


if __name__ == "__main__":
    sys.exit(main())
