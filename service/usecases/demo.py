"""``excerpta demo`` (``make run``): the demo collection and an admin key, each made once, so a
second run re-uses the store as it is."""

from __future__ import annotations

import os
from dataclasses import dataclass
from pathlib import Path

from service.ingest.progress import IngestCounts, ProgressView
from service.store.repository import collection_by_name
from service.usecases import keys
from service.usecases.ingest_files import ingest_path
from service.usecases.runtime import Runtime

# Documents per transaction for the demo corpus: its documents are short.
DEMO_BATCH = 64
KEY_FILE = "demo-key"


@dataclass(frozen=True)
class DemoSetup:
    """What a run made: ``ingested`` is None where the collection was in the store already,
    ``secret`` None where the key file was there already."""

    ingested: IngestCounts | None
    key_file: Path
    secret: str | None


def ingest_demo(
    runtime: Runtime, collection: str, corpus: Path, view: ProgressView
) -> IngestCounts:
    """A demo corpus as ``excerpta demo`` ingests it: its ``documents`` folder, with its
    ``schema.json``."""
    return ingest_path(
        runtime,
        collection,
        corpus / "documents",
        schema_file=corpus / "schema.json",
        batch_size=DEMO_BATCH,
        view=view,
    )


def set_up_demo(runtime: Runtime, collection: str, corpus: Path, view: ProgressView) -> DemoSetup:
    """The collection ingested from ``corpus`` unless the store has it, and an admin key written
    to the data directory (readable by its owner only) unless one is there."""
    with runtime.transaction() as session:
        exists = collection_by_name(session, collection) is not None
    ingested = None if exists else ingest_demo(runtime, collection, corpus, view)
    key_file = runtime.settings.data_dir / KEY_FILE
    if key_file.exists():
        return DemoSetup(ingested, key_file, None)
    with runtime.write_transaction() as session:
        secret, _ = keys.create_key(
            session, role="admin", groups=[], collections=None, name=f"demo-{os.getpid()}"
        )
    key_file.write_text(secret + "\n", encoding="utf-8")
    key_file.chmod(0o600)
    return DemoSetup(ingested, key_file, secret)
