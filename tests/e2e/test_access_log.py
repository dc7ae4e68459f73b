"""The access log: one line per request, written after the response's last byte has gone."""

from __future__ import annotations

import json
import logging
import re
from collections.abc import Callable, Iterator
from typing import Any

import anyio
import pytest

from service.api.app import create_app
from service.usecases.runtime import Runtime
from tests.api_helpers import BIKE_SCHEMA, make_key


class EventsHandler(logging.Handler):
    def __init__(self, events: list[str]) -> None:
        super().__init__()
        self.events = events

    def emit(self, record: logging.LogRecord) -> None:
        self.events.append(f"log {record.getMessage()}")


async def _call(
    app: Any,
    method: str,
    path: str,
    key: str,
    body: bytes,
    events: list[str],
    extra_headers: tuple[tuple[bytes, bytes], ...] = (),
) -> None:
    pending = [{"type": "http.request", "body": body, "more_body": False}]

    async def receive() -> dict[str, Any]:
        return pending.pop(0) if pending else {"type": "http.disconnect"}

    async def send(message: dict[str, Any]) -> None:
        if message["type"] == "http.response.start":
            events.append(f"start {message['status']}")
        elif not message.get("more_body", False):
            events.append(f"last body {message.get('body', b'').decode()[:40]}")

    scope = {
        "type": "http",
        "asgi": {"version": "3.0"},
        "http_version": "1.1",
        "method": method,
        "scheme": "http",
        "path": path,
        "raw_path": path.encode(),
        "query_string": b"limit=5" if method == "GET" else b"",
        "root_path": "",
        "headers": [
            (b"content-type", b"application/json"),
            (b"authorization", f"Bearer {key}".encode()),
            (b"host", b"testserver"),
            *extra_headers,
        ],
        "client": ("127.0.0.1", 50123),
        "server": ("testserver", 80),
    }
    await app(scope, receive, send)


@pytest.fixture
def bikes_app(make_runtime: Callable[..., Runtime]) -> tuple[Any, str]:
    """An app with the bikes collection, and an admin key."""
    runtime = make_runtime()
    key = make_key(runtime, "admin", name="admin")
    app = create_app(runtime)
    anyio.run(_call, app, "PUT", "/v1/collections/bikes", key, json.dumps(BIKE_SCHEMA).encode(), [])
    return app, key


@pytest.fixture
def access_events(bikes_app: tuple[Any, str]) -> Iterator[list[str]]:
    """What the access log writes from here on, in one list with what a test's send records."""
    events: list[str] = []
    handler = EventsHandler(events)
    access = logging.getLogger("excerpta.access")
    level = access.level
    access.addHandler(handler)
    access.setLevel(logging.INFO)
    yield events
    access.removeHandler(handler)
    access.setLevel(level)


@pytest.mark.parametrize(
    ("method", "path", "body", "status", "target"),
    [
        # A query, a query the framework refuses, another route, no route at all.
        ("POST", "/v1/collections/bikes/search", b'{"query": "brakes"}', 200, None),
        ("POST", "/v1/collections/bikes/search", b'{"query": NaN}', 400, None),
        ("GET", "/v1/collections/bikes/documents", b"", 200, "?limit=5"),
        ("GET", "/v1/no-such-route", b"", 404, "?limit=5"),
    ],
)
def test_each_request_is_logged_once_after_its_response(
    bikes_app: tuple[Any, str],
    access_events: list[str],
    method: str,
    path: str,
    body: bytes,
    status: int,
    target: str | None,
) -> None:
    app, key = bikes_app
    anyio.run(_call, app, method, path, key, body, access_events)
    events = access_events
    assert events[0] == f"start {status}" and events[1].startswith("last body")
    assert len(events) == 3 and events[2].startswith("log ")
    line = events[2].removeprefix("log ")
    expected = f'127.0.0.1:50123 - "{method} {path}{target or ""} HTTP/1.1" {status} '
    assert line.startswith(expected), line
    # The line ends with the trace the request saved: only the search that ran saved one.
    if path.endswith("/search") and status == 200:
        assert re.search(r" ms trace [0-9a-f-]{36}$", line), line
    else:
        assert line.endswith(" ms trace -"), line
    assert key not in line


@pytest.mark.parametrize("origin", [(), ((b"origin", b"https://app.example.invalid"),)])
def test_an_unexpected_failure_is_a_plain_500_raised_to_the_server_and_logged(
    bikes_app: tuple[Any, str],
    access_events: list[str],
    monkeypatch: pytest.MonkeyPatch,
    origin: tuple[tuple[bytes, bytes], ...],
) -> None:
    """Alike with and without CORS in the stack (an Origin header).

    The failure passes the access log on its way to the server's error layer, so its line is
    written just before that layer's plain 500 goes out; it still records the 500.
    """
    app, key = bikes_app

    def broken_search(*_: Any, **__: Any) -> Any:
        raise RuntimeError("the index is broken")

    monkeypatch.setattr("service.usecases.answering.search", broken_search)
    path = "/v1/collections/bikes/search"
    with pytest.raises(RuntimeError, match="the index is broken"):
        anyio.run(_call, app, "POST", path, key, b'{"query": "brakes"}', access_events, origin)
    assert access_events[1:] == ["start 500", "last body Internal Server Error"]
    assert '"POST /v1/collections/bikes/search HTTP/1.1" 500 ' in access_events[0]
