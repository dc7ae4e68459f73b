"""A server's start through the HTTP API: /readyz answers 503 with its reason while an index is
rebuilt from the store, 200 once it is; a server started over a saved index is ready without
reading the chunks, and answers as the one that saved it. The CLI's index-status says which."""

from __future__ import annotations

import contextlib
import json
import threading
import time
from collections.abc import Callable
from typing import Any

import pytest
from fastapi.testclient import TestClient

from service.api.app import create_app
from service.cli import main
from service.usecases import collections, documents
from service.usecases.callers import LOCAL_ADMIN
from service.usecases.indexes import LoadedCollection, StoreIndexSource
from service.usecases.runtime import Runtime
from tests.api_helpers import Api, make_key

WORDS = ["brake", "chain", "saddle", "tyre", "gear", "frame", "light", "pedal"]


def _notes(count: int) -> list[dict[str, Any]]:
    return [
        {
            "id": f"note-{n}",
            "title": f"Workshop note {n}",
            "text": " ".join(WORDS[(n + k) % len(WORDS)] for k in range(7)) + ".",
        }
        for n in range(count)
    ]


class HeldLoads:
    """Stands between the store and every full load of a collection, holding it until
    released."""

    def __init__(self, monkeypatch: pytest.MonkeyPatch) -> None:
        self.loads = 0
        self.loading = threading.Event()
        self.release = threading.Event()
        original = StoreIndexSource.load

        def held(
            source: StoreIndexSource, name: str
        ) -> contextlib.AbstractContextManager[LoadedCollection]:
            self.loads += 1
            self.loading.set()
            assert self.release.wait(30), "the held load was never released"
            return original(source, name)

        monkeypatch.setattr(StoreIndexSource, "load", held)


def _ready_within(client: TestClient, seconds: float) -> bool:
    deadline = time.monotonic() + seconds
    while time.monotonic() < deadline:
        if client.get("/readyz").status_code == 200:
            return True
        time.sleep(0.05)
    return False


def _search(api: Api) -> list[tuple[str, float]]:
    found = api.post(
        "/v1/collections/notes/search", json={"query": "brake saddle", "mode": "hybrid"}
    )
    assert found.status_code == 200, found.text
    return [(hit["chunk_id"], hit["score"]) for hit in found.json()["hits"]]


def test_readyz_waits_for_a_rebuild_and_a_saved_index_makes_the_next_start_ready_at_once(
    make_runtime: Callable[..., Runtime],
    monkeypatch: pytest.MonkeyPatch,
    capsys: pytest.CaptureFixture[str],
) -> None:
    runtime = make_runtime()
    collections.put_collection(runtime, LOCAL_ADMIN, "notes", collections.CollectionSpec())
    documents.upsert_documents(runtime, LOCAL_ADMIN, "notes", _notes(20))
    held = HeldLoads(monkeypatch)

    with TestClient(create_app(runtime)) as client:
        api = Api(client, make_key(runtime, "admin", name="admin"))
        assert held.loading.wait(10)
        waiting = client.get("/readyz")
        assert waiting.status_code == 503
        assert waiting.json() == {
            "status": "unavailable",
            "reason": "The index of collection 'notes' is being built from the store because"
            " no index of it was saved.",
        }
        held.release.set()
        assert _ready_within(client, 10)
        metrics = client.get("/metrics").text
        assert 'excerpta_index_starts_total{outcome="rebuilt",reason="missing"} 1.0' in metrics
        before = _search(api)
        runtime.indexes.maintain()
        assert 'excerpta_index_saves_total{outcome="saved"} 1.0' in client.get("/metrics").text
    assert held.loads == 1

    data_dir = runtime.settings.data_dir
    assert main(["index-status", "--data-dir", str(data_dir), "--json", "--verify"]) == 0
    shown = json.loads(capsys.readouterr().out)
    assert shown["index_dir"] == str(data_dir / "indexes")
    [notes] = shown["collections"]
    assert notes["saved_revision"] == notes["store_revision"]
    assert notes["rows"] == 20
    # The command runs with the configured embedder (the bundled model), not the test's.
    assert notes["at_start"] == "rebuilt"
    assert notes["reason"].startswith("it was saved with the embedder hashing-test-only")

    # A second server over the same store and index directory: ready with no load at all
    # (a load would wait forever on the unreleased event).
    held = HeldLoads(monkeypatch)
    restarted = make_runtime()
    with TestClient(create_app(restarted)) as client:
        api = Api(client, make_key(restarted, "admin", name="admin-2"))
        assert _ready_within(client, 10)
        assert _search(api) == before
        assert 'excerpta_index_starts_total{outcome="loaded",reason=""} 1.0' in (
            client.get("/metrics").text
        )
    assert held.loads == 0
