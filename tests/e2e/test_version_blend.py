"""A document replaced over and over never shows two of its versions in one response.

A writer replaces one multi-paragraph document in a loop, each version marked in its title, in
every heading and paragraph, in its source URL and in the attribute the collection cites. Readers
ask for context and answers meanwhile, 2,000 calls in all: through one server on each backend,
and through two server processes on one PostgreSQL database while the writer writes through one
of them. Every mark in one response (context, passages, answer, citations) must be the same; so
must every mark in the document as read back from the store meanwhile.
"""

from __future__ import annotations

import itertools
import re
import threading
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any

import httpx
import pytest

from service.store.db import make_engine
from service.usecases.runtime import Runtime
from tests.api_helpers import make_key
from tests.conftest import postgres_schema, postgres_url_for_schema
from tests.served import server_in_thread, server_processes

CALLS = 2000
READERS = 4
COLLECTION = "manuals"
SCHEMA = {
    "attributes": {"edition": {"type": "keyword"}},
    "chunking": {"max_tokens": 24, "overlap_tokens": 4},
    "cite_attributes": ["edition"],
}
MARK = re.compile(r"edition(\d+)x")
QUERY = {"query": "brake pads torque lever", "top_k": 12, "depth": 12, "token_budget": 2000}


def version(number: int) -> dict[str, Any]:
    mark = f"edition{number}x"
    sections = []
    for part in range(3):
        paragraphs = "\n\n".join(
            f"Paragraph {n} of {mark}: set the brake pads, torque the lever bolt, check again."
            for n in range(3)
        )
        sections.append(f"# Part {part} {mark}\n\n{paragraphs}")
    return {
        "id": "manual",
        "title": f"Service manual {mark}",
        "text": "\n\n".join(sections),
        "media_type": "text/markdown",
        "source_url": f"https://docs.example.invalid/manual/{mark}",
        "attributes": {"edition": mark},
    }


def marks(body: Any) -> set[str]:
    """Every version mark anywhere in a response body."""
    found: set[str] = set()
    if isinstance(body, dict):
        for value in body.values():
            found |= marks(value)
    elif isinstance(body, list):
        for value in body:
            found |= marks(value)
    elif isinstance(body, str):
        found.update(MARK.findall(body))
    return found


def hammer(write_url: str, read_urls: list[str], key: str) -> tuple[int, list[str], int]:
    """Replace the document in a loop while readers make CALLS calls; (calls, blends, writes)."""
    headers = {"Authorization": f"Bearer {key}"}
    documents = f"/v1/collections/{COLLECTION}/documents"
    with httpx.Client(base_url=write_url, headers=headers, timeout=60) as writer:
        assert writer.put(f"/v1/collections/{COLLECTION}", json=SCHEMA).status_code == 201
        assert writer.post(documents, json={"documents": [version(0)]}).status_code == 200
    counter = itertools.count()
    done = threading.Event()
    blends: list[str] = []
    failures: list[str] = []
    writes = 0

    def write() -> None:
        nonlocal writes
        with httpx.Client(base_url=write_url, headers=headers, timeout=60) as client:
            for number in itertools.count(1):
                if done.is_set():
                    return
                response = client.post(documents, json={"documents": [version(number)]})
                if response.status_code != 200:
                    failures.append(f"write {number}: {response.status_code} {response.text}")
                    return
                writes += 1

    def observed(what: str, response: httpx.Response) -> bool:
        """Note a failed call or a blended response; False when the reader should stop."""
        if response.status_code != 200:
            failures.append(f"{what}: {response.status_code} {response.text}")
            return False
        seen = marks(response.json())
        if len(seen) != 1:
            blends.append(f"{what} saw versions {sorted(seen)}")
        return True

    def read(reader: int) -> None:
        clients = [httpx.Client(base_url=u, headers=headers, timeout=60) for u in read_urls]
        try:
            while (call := next(counter)) < CALLS:
                route = "context" if call % 2 else "answer"
                client = clients[call % len(clients)]
                response = client.post(f"/v1/collections/{COLLECTION}/{route}", json=QUERY)
                if not observed(route, response):
                    return
        finally:
            for client in clients:
                client.close()

    def read_back() -> None:
        with httpx.Client(base_url=read_urls[-1], headers=headers, timeout=60) as client:
            while not done.is_set() and observed("read back", client.get(f"{documents}/manual")):
                pass

    writer_thread = threading.Thread(target=write)
    readers = [threading.Thread(target=read, args=(r,)) for r in range(READERS)]
    reader_of_store = threading.Thread(target=read_back)
    reader_of_store.start()
    writer_thread.start()
    for thread in readers:
        thread.start()
    for thread in readers:
        thread.join(timeout=600)
    done.set()
    writer_thread.join(timeout=60)
    reader_of_store.join(timeout=60)
    assert failures == []
    return min(next(counter), CALLS), blends, writes


@pytest.fixture
def one_server(store_url: str, make_runtime: Callable[..., Runtime]) -> Iterator[tuple[str, str]]:
    runtime = make_runtime(engine=make_engine(store_url))
    key = make_key(runtime, "admin", name="admin")
    with server_in_thread(runtime) as base_url:
        yield base_url, key


def test_one_server_never_answers_with_two_versions_of_a_document(
    one_server: tuple[str, str],
) -> None:
    base_url, key = one_server
    calls, blends, writes = hammer(base_url, [base_url], key)
    assert calls == CALLS and writes > 10
    assert blends == [], f"{len(blends)} of {calls} responses blended versions: {blends[:3]}"


@pytest.mark.postgres
def test_two_replicas_never_answer_with_two_versions_of_a_document(
    postgres_url: str, tmp_path: Path, make_runtime: Callable[..., Runtime]
) -> None:
    with postgres_schema(postgres_url) as schema:
        url = postgres_url_for_schema(postgres_url, schema)
        key = make_key(make_runtime(engine=make_engine(url)), "admin", name="admin")
        with server_processes(2, tmp_path / "replicas", url, index_poll_ms="20") as servers:
            calls, blends, writes = hammer(servers[0].base_url, [s.base_url for s in servers], key)
    assert calls == CALLS and writes > 10
    assert blends == [], f"{len(blends)} of {calls} responses blended versions: {blends[:3]}"
