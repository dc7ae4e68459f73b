"""A write that keeps losing to another writer is answered 503 ``busy`` with ``Retry-After``.

Another connection holds SQLite's write lock while the API writes, and the store's wait for the
lock is cut to a tenth of a second, so every attempt loses: after ``write_attempts`` tries the
caller gets the contract's ``busy``, never a 500, and nothing is written. Once the lock is let
go, the same request succeeds.
"""

from __future__ import annotations

import sqlite3
from collections.abc import Callable

import pytest
from fastapi.testclient import TestClient

from service.api.app import create_app
from service.store import db
from service.usecases.runtime import Runtime
from tests.api_helpers import Api, make_key

ATTEMPTS = 3


def test_a_write_that_loses_every_race_is_answered_busy_and_writes_nothing(
    make_runtime: Callable[..., Runtime], monkeypatch: pytest.MonkeyPatch
) -> None:
    monkeypatch.setattr(db, "SQLITE_LOCK_WAIT_SECONDS", 0.1)
    runtime = make_runtime(write_attempts=ATTEMPTS, write_retry_pause_seconds=0.01)
    assert runtime.store.path is not None
    with TestClient(create_app(runtime)) as client:
        api = Api(client, make_key(runtime, "admin", name="admin"))
        assert api.put("/v1/collections/notes", json={}).status_code == 201
        batch = {"documents": [{"id": "n1", "text": "Grease the headset bearings."}]}

        holder = sqlite3.connect(runtime.store.path, isolation_level=None)
        holder.execute("BEGIN IMMEDIATE")
        try:
            refused = api.post("/v1/collections/notes/documents", json=batch)
        finally:
            holder.execute("ROLLBACK")
            holder.close()
        assert refused.status_code == 503
        assert refused.headers["Retry-After"] == "1"
        assert refused.json() == {
            "error": {
                "code": "busy",
                "message": "The store is busy with other writes; try again shortly.",
            }
        }
        assert api.get("/v1/collections/notes").json()["documents"] == 0

        accepted = api.post("/v1/collections/notes/documents", json=batch)
        assert accepted.status_code == 200
        assert accepted.json()["results"][0]["status"] == "created"
