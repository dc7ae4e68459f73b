"""The store guard counts the failures it explains, by kind, for ``/metrics``: real SQLite
failures (a write lock held elsewhere, a read-only connection) and one it cannot explain."""

from __future__ import annotations

import sqlite3
from pathlib import Path

import pytest

from service.errors import Busy, StorageUnavailable
from service.store.db import make_engine, migrate
from service.store.identity import StoreGuard


def test_each_explained_failure_is_counted_under_its_kind(tmp_path: Path) -> None:
    path = tmp_path / "store.db"
    engine = make_engine(f"sqlite:///{path}")
    migrate(engine)
    guard = StoreGuard(engine)
    guard.remember()
    assert guard.errors() == {}

    holder = sqlite3.connect(path, timeout=0, isolation_level=None)
    holder.execute("BEGIN IMMEDIATE")
    other = sqlite3.connect(path, timeout=0, isolation_level=None)
    with pytest.raises(sqlite3.OperationalError) as locked:
        other.execute("BEGIN IMMEDIATE")
    holder.execute("ROLLBACK")
    assert isinstance(guard.explain(locked.value), Busy)

    reader = sqlite3.connect(f"file:{path}?mode=ro", uri=True, isolation_level=None)
    with pytest.raises(sqlite3.OperationalError) as read_only:
        reader.execute("CREATE TABLE scratch (id INTEGER)")
    assert isinstance(guard.explain(read_only.value), StorageUnavailable)

    assert guard.explain(ValueError("not a store failure")) is None
    assert guard.errors() == {"lost_race": 1, "unavailable": 1, "unexplained": 1}
    for connection in (holder, other, reader):
        connection.close()
    engine.dispose()
