"""Readiness: whether this server can serve reads and take writes, and if not, why."""

from __future__ import annotations

from service.errors import Busy, StorageUnavailable
from service.usecases.runtime import Runtime


def readiness(runtime: Runtime) -> str | None:
    """None when ready; otherwise one sentence saying what is wrong.

    The store must be the one this server started with (its id, and for SQLite its file), and a
    SQLite store's disk must have room. After a storage failure (a full disk, a read-only store,
    failing I/O) the server stays unready until a write succeeds again; the probe tries one, a
    single-row update. Then every collection's index must be loaded: read back from its saved
    copy, or built from the store when that copy is missing, corrupt or foreign.
    """
    if runtime.embedder.dimensions <= 0:
        return "The embedder is not loaded."
    store = runtime.store
    try:
        with runtime.transaction() as session:
            store.check(session)
        full = store.disk_full()
        if full is not None:
            store.failed(full.message)
            return full.message
        if store.failure is not None:
            with runtime.write_transaction() as session:
                store.probe(session)
    except StorageUnavailable as exc:
        return exc.message
    except Busy:
        return store.failure
    return runtime.indexes.not_ready()
