"""``python -m tests.server_process``: the service as ``excerpta serve`` runs it, with the
test-only hashing embedder instead of the model, so tests can start replicas in a second or two.

Settings come from the ``EXCERPTA_`` environment, as for ``excerpta serve``.
"""

from __future__ import annotations

import sys

from service.api.server import serve
from service.config import Settings
from service.logging_setup import configure_logging
from service.usecases.runtime import Runtime
from tests.hashing_embedder import HashingTestEmbedder


def main() -> int:
    settings = Settings()
    configure_logging(log_format=settings.log_format)
    serve(Runtime(settings, HashingTestEmbedder()))
    return 0


if __name__ == "__main__":
    sys.exit(main())
