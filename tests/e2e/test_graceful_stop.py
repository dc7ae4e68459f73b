"""SIGTERM under load: the server stops accepting, finishes what is in flight, writes the traces it
holds, and exits 0.

The server is a process of its own (``serve``, as ``excerpta serve`` runs it, with the test-only
embedder). Two large batches are in flight when the signal arrives and queries have run right
up to it; new connections are refused while the batches are still being written, both batches
are answered and stored, and every query's trace is in the store once the process has ended.
"""

from __future__ import annotations

import signal
import threading
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

import httpx

from service.usecases import documents, traces
from service.usecases.callers import LOCAL_ADMIN
from service.usecases.runtime import Runtime
from tests.api_helpers import make_key
from tests.served import ServerProcess

COLLECTION = "manuals"
BATCH_DOCUMENTS = 40
WORDS = 2000


def batch(number: int) -> list[dict[str, Any]]:
    return [
        {
            "id": f"batch-{number}-{i}",
            "text": " ".join(f"torque{j % 613} spec{number}x{i}" for j in range(WORDS)),
        }
        for i in range(BATCH_DOCUMENTS)
    ]


def test_sigterm_under_load_finishes_in_flight_requests_flushes_traces_and_exits_0(
    tmp_path: Path, make_runtime: Callable[..., Runtime]
) -> None:
    data = tmp_path / "data"
    key = make_key(make_runtime(data_dir=data), "admin", name="admin")
    server = ServerProcess(data, f"sqlite:///{data / 'excerpta.db'}", shutdown_grace_seconds="60")
    server.start()
    headers = {"Authorization": f"Bearer {key}"}
    path = f"/v1/collections/{COLLECTION}"
    with httpx.Client(base_url=server.base_url, headers=headers, timeout=120) as client:
        assert client.put(path, json={}).status_code == 201
        guide = {"id": "guide", "text": "Torque the stem bolts to 5 Nm in turn."}
        assert client.post(f"{path}/documents", json={"documents": [guide]}).status_code == 200

    answered: dict[int, tuple[int, float, Any]] = {}

    def send_batch(number: int) -> None:
        with httpx.Client(base_url=server.base_url, headers=headers, timeout=120) as client:
            response = client.post(f"{path}/documents", json={"documents": batch(number)})
            answered[number] = (response.status_code, time.monotonic(), response.json())

    senders = [threading.Thread(target=send_batch, args=(n,)) for n in range(2)]
    for sender in senders:
        sender.start()
    time.sleep(0.5)
    trace_ids = []
    with httpx.Client(base_url=server.base_url, headers=headers, timeout=120) as client:
        for _ in range(20):
            response = client.post(f"{path}/context", json={"query": "stem bolts torque"})
            assert response.status_code == 200, response.text
            trace_ids.append(response.json()["trace_id"])
    assert server.process is not None
    signalled = time.monotonic()
    server.process.send_signal(signal.SIGTERM)

    refused_at = None
    while refused_at is None and time.monotonic() - signalled < 30:
        try:
            httpx.get(f"{server.base_url}/healthz", timeout=5)
            time.sleep(0.05)
        except (httpx.ConnectError, httpx.ReadError, httpx.RemoteProtocolError):
            # A connection still queued when the server closes its socket is reset or closed
            # unanswered rather than refused; either way the server no longer takes it.
            refused_at = time.monotonic()
    exit_status = server.process.wait(timeout=120)
    for sender in senders:
        sender.join(timeout=120)

    assert exit_status == 0, server.log()
    assert refused_at is not None, "the server kept accepting connections"
    for number in range(2):
        status, finished_at, body = answered[number]
        assert status == 200
        assert [r["status"] for r in body["results"]] == ["created"] * BATCH_DOCUMENTS
        # In flight at the signal, and still running when new connections were refused.
        assert finished_at > refused_at > signalled

    after = make_runtime(data_dir=data)
    page = documents.list_documents(
        after, LOCAL_ADMIN, COLLECTION, filter_value=None, after=None, limit=1000
    )
    assert page["total"] == 1 + 2 * BATCH_DOCUMENTS
    for trace_id in trace_ids:
        assert traces.get_trace(after, LOCAL_ADMIN, trace_id)["trace_id"] == trace_id
