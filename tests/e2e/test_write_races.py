"""Writers racing each other through the HTTP API of real servers, on SQLite and PostgreSQL.

Four kinds of race, a hundred pairs each, the two requests of a pair released together: the same
new text under two ids (the embedding cache sees one text twice), the same document twice, the
same id with two texts, and a delete against an upsert of one document. No request may fail with
a 5xx; every acknowledged write must be in the store afterwards, in the order the responses
imply; and the index a server holds must equal the one a fresh server builds from the store.
The same runs across two server processes on one PostgreSQL database, each pair's requests going
to different servers.
"""

from __future__ import annotations

import threading
from collections.abc import Callable, Iterator, Sequence
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import httpx
import pytest
from fastapi.testclient import TestClient

from service.api.app import create_app
from service.config import Settings
from service.store.db import make_engine
from service.usecases.runtime import Runtime
from tests.api_helpers import make_key
from tests.conftest import postgres_schema, postgres_url_for_schema
from tests.hashing_embedder import HashingTestEmbedder
from tests.served import server_in_thread, server_processes

PAIRS = 100
PARALLEL_PAIRS = 4
COLLECTION = "ledger"
SCHEMA = {"attributes": {"kind": {"type": "keyword"}}, "chunking": {"max_tokens": 64}}
QUERY_VECTOR = [float((i * 7) % 5 - 2) for i in range(64)]
SETTLE_SECONDS = 0.3


@dataclass(frozen=True)
class Request:
    method: str
    path: str
    body: dict[str, Any] | None = None


@dataclass(frozen=True)
class Outcome:
    status: int
    body: Any


def doc(doc_id: str, title: str, text: str, kind: str) -> dict[str, Any]:
    return {"id": doc_id, "title": title, "text": text, "attributes": {"kind": kind}}


def upsert(document: dict[str, Any]) -> Request:
    return Request("POST", f"/v1/collections/{COLLECTION}/documents", {"documents": [document]})


def pairs() -> dict[str, list[tuple[Request, Request]]]:
    made: dict[str, list[tuple[Request, Request]]] = {}
    made["same_text"] = [
        (
            upsert(doc(f"text-a-{i}", "shared", f"ledger line {i} under two ids", "same_text")),
            upsert(doc(f"text-b-{i}", "shared", f"ledger line {i} under two ids", "same_text")),
        )
        for i in range(PAIRS)
    ]
    made["same_document"] = [
        (upsert(same), upsert(same))
        for i in range(PAIRS)
        for same in [doc(f"same-{i}", "same", f"ledger entry {i} sent twice", "same_document")]
    ]
    made["two_texts"] = [
        (
            upsert(doc(f"two-{i}", "first", f"ledger entry {i} first wording", "two_texts")),
            upsert(doc(f"two-{i}", "second", f"ledger entry {i} second wording", "two_texts")),
        )
        for i in range(PAIRS)
    ]
    made["delete"] = [
        (
            Request("DELETE", f"/v1/collections/{COLLECTION}/documents/gone-{i}"),
            upsert(doc(f"gone-{i}", "after", f"ledger entry {i} written again", "delete")),
        )
        for i in range(PAIRS)
    ]
    return made


def existing_for_deletes() -> list[dict[str, Any]]:
    return [
        doc(f"gone-{i}", "before", f"ledger entry {i} before the race", "delete")
        for i in range(PAIRS)
    ]


class Clients:
    """One keep-alive client per thread and server."""

    def __init__(self, base_urls: Sequence[str], key: str) -> None:
        self.base_urls = list(base_urls)
        self.key = key
        self._local = threading.local()
        self._all: list[httpx.Client] = []
        self._lock = threading.Lock()

    def send(self, server: int, request: Request) -> Outcome:
        clients: dict[int, httpx.Client] | None = getattr(self._local, "clients", None)
        if clients is None:
            clients = self._local.clients = {}
        if server not in clients:
            client = httpx.Client(
                base_url=self.base_urls[server],
                headers={"Authorization": f"Bearer {self.key}"},
                timeout=120,
            )
            clients[server] = client
            with self._lock:
                self._all.append(client)
        try:
            response = clients[server].request(request.method, request.path, json=request.body)
        except httpx.TransportError as exc:
            # A connection the server dropped mid-request counts as a server error.
            return Outcome(599, repr(exc))
        try:
            body = response.json()
        except ValueError:
            body = response.text
        return Outcome(response.status_code, body)

    def close(self) -> None:
        for client in self._all:
            client.close()


def race(
    clients: Clients, pairs_of_kind: list[tuple[Request, Request]]
) -> list[tuple[Outcome, Outcome]]:
    """Send each pair's two requests at once (the second to the second server, if any)."""
    second = 1 % len(clients.base_urls)
    barriers = [threading.Barrier(2, timeout=60) for _ in pairs_of_kind]

    def send(index: int, side: int) -> Outcome:
        barriers[index].wait()
        return clients.send(second if side else 0, pairs_of_kind[index][side])

    with ThreadPoolExecutor(2 * PARALLEL_PAIRS) as pool:
        futures = [
            (pool.submit(send, index, 0), pool.submit(send, index, 1))
            for index in range(len(pairs_of_kind))
        ]
        return [(a.result(), b.result()) for a, b in futures]


def listing(clients: Clients) -> dict[str, str]:
    response = clients.send(0, Request("GET", f"/v1/collections/{COLLECTION}/documents?limit=1000"))
    assert response.status == 200, response.body
    return {d["id"]: d["title"] for d in response.body["documents"]}


def statuses(outcome: Outcome) -> list[str]:
    return [r["status"] for r in outcome.body["results"]]


def check_outcomes(
    outcomes: dict[str, list[tuple[Outcome, Outcome]]], stored: dict[str, str]
) -> None:
    failures = [
        (kind, o.status, o.body)
        for kind, results in outcomes.items()
        for pair in results
        for o in pair
        if o.status >= 500
    ]
    per_kind = {kind: sum(1 for f in failures if f[0] == kind) for kind in outcomes}
    assert failures == [], f"server errors per kind {per_kind}; the first: {failures[:2]}"
    for i, (a, b) in enumerate(outcomes["same_text"]):
        assert (a.status, b.status) == (200, 200)
        assert statuses(a) == statuses(b) == ["created"]
        assert stored[f"text-a-{i}"] == stored[f"text-b-{i}"] == "shared"
    for i, (a, b) in enumerate(outcomes["same_document"]):
        assert sorted(statuses(a) + statuses(b)) == ["created", "unchanged"]
        assert stored[f"same-{i}"] == "same"
    for i, (a, b) in enumerate(outcomes["two_texts"]):
        assert sorted(statuses(a) + statuses(b)) == ["created", "updated"]
        last = "first" if statuses(a) == ["updated"] else "second"
        assert stored[f"two-{i}"] == last
    for i, (deleted, written) in enumerate(outcomes["delete"]):
        assert (deleted.status, written.status) == (204, 200), (deleted.body, written.body)
        # Created: the delete went first and the write stands; updated: the delete came after.
        if statuses(written) == ["created"]:
            assert stored[f"gone-{i}"] == "after"
        else:
            assert statuses(written) == ["updated"] and f"gone-{i}" not in stored


def index_picture(send: Callable[[Request], Outcome]) -> tuple[Any, Any]:
    """Every live chunk with its text and lexical score, and every chunk's semantic score."""
    path = f"/v1/collections/{COLLECTION}/search"
    lexical = send(Request("POST", path, {"query": "ledger", "mode": "lexical", "top_k": 1000}))
    semantic = send(
        Request(
            "POST",
            path,
            {"query": "x", "mode": "semantic", "top_k": 1000, "query_vector": QUERY_VECTOR},
        )
    )
    assert lexical.status == semantic.status == 200
    return (
        [
            (h["chunk_id"], h["text"], h["attributes"], round(h["score"], 5))
            for h in lexical.body["hits"]
        ],
        [(h["chunk_id"], round(h["score"], 5)) for h in semantic.body["hits"]],
    )


def fresh_picture(database_url: str, data_dir: Path, key: str) -> tuple[Any, Any]:
    """The same picture from a runtime that builds its index from the store alone."""
    engine = make_engine(database_url)
    runtime = Runtime(
        Settings(data_dir=data_dir, index_poll_ms=0), HashingTestEmbedder(), engine=engine
    )
    try:
        with TestClient(create_app(runtime)) as client:
            headers = {"Authorization": f"Bearer {key}"}

            def send(request: Request) -> Outcome:
                response = client.request(
                    request.method, request.path, json=request.body, headers=headers
                )
                return Outcome(response.status_code, response.json())

            return index_picture(send)
    finally:
        engine.dispose()


def run_races(clients: Clients) -> dict[str, list[tuple[Outcome, Outcome]]]:
    made = pairs()
    assert clients.send(0, Request("PUT", f"/v1/collections/{COLLECTION}", SCHEMA)).status == 201
    setup = clients.send(
        0,
        Request(
            "POST", f"/v1/collections/{COLLECTION}/documents", {"documents": existing_for_deletes()}
        ),
    )
    assert setup.status == 200, setup.body
    return {kind: race(clients, kind_pairs) for kind, kind_pairs in made.items()}


@pytest.fixture
def one_server(
    store_url: str, make_runtime: Callable[..., Runtime]
) -> Iterator[tuple[str, Clients]]:
    runtime = make_runtime(engine=make_engine(store_url))
    key = make_key(runtime, "admin", name="admin")
    with server_in_thread(runtime) as base_url:
        clients = Clients([base_url], key)
        yield key, clients
        clients.close()


def test_racing_writes_on_one_server_all_land_without_a_server_error(
    one_server: tuple[str, Clients], store_url: str, tmp_path: Path
) -> None:
    key, clients = one_server
    outcomes = run_races(clients)
    check_outcomes(outcomes, listing(clients))
    served = index_picture(lambda request: clients.send(0, request))
    assert served == fresh_picture(store_url, tmp_path / "fresh", key)
    assert len(served[0]) == len(listing(clients))


@pytest.mark.postgres
def test_racing_writes_across_two_server_processes_all_land_without_a_server_error(
    postgres_url: str, tmp_path: Path, make_runtime: Callable[..., Runtime]
) -> None:
    with postgres_schema(postgres_url) as schema:
        url = postgres_url_for_schema(postgres_url, schema)
        setup = make_runtime(engine=make_engine(url))
        key = make_key(setup, "admin", name="admin")
        with server_processes(2, tmp_path / "replicas", url, index_poll_ms="50") as servers:
            clients = Clients([s.base_url for s in servers], key)
            try:
                outcomes = run_races(clients)
                threading.Event().wait(SETTLE_SECONDS)
                check_outcomes(outcomes, listing(clients))
                expected = fresh_picture(url, tmp_path / "fresh", key)
                for server in range(2):
                    assert index_picture(lambda r, s=server: clients.send(s, r)) == expected
            finally:
                clients.close()
