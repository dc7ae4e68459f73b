"""``EXCERPTA_LOG_FORMAT=json``: one JSON object per line, carrying the request's trace, key name,
route template, status and milliseconds, and scrubbed of secrets like the text format."""

from __future__ import annotations

import datetime as dt
import io
import json
import logging
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any

import httpx
import pytest

from service.logging_setup import JsonLineFormatter, RedactingFilter
from service.usecases.runtime import Runtime
from tests.api_helpers import BIKE_SCHEMA, make_key
from tests.served import ServerProcess, server_in_thread

FIELDS = {
    "time",
    "level",
    "logger",
    "message",
    "trace_id",
    "key_name",
    "route",
    "status",
    "milliseconds",
}
UNKNOWN_KEY = "xk_0123456789abcdef_" + "Q" * 43


@pytest.fixture
def json_lines() -> Iterator[Callable[[], list[dict[str, Any]]]]:
    """Every record from here on as the JSON format writes it, parsed line by line."""
    stream = io.StringIO()
    handler = logging.StreamHandler(stream)
    handler.setFormatter(JsonLineFormatter())
    handler.addFilter(RedactingFilter())
    root = logging.getLogger()
    access = logging.getLogger("excerpta.access")
    level = access.level
    root.addHandler(handler)
    access.setLevel(logging.INFO)

    def lines() -> list[dict[str, Any]]:
        return [json.loads(line) for line in stream.getvalue().splitlines()]

    yield lines
    root.removeHandler(handler)
    access.setLevel(level)


def test_each_access_line_carries_its_trace_key_name_route_status_and_time(
    make_runtime: Callable[..., Runtime], json_lines: Callable[[], list[dict[str, Any]]]
) -> None:
    runtime = make_runtime()
    admin = {"Authorization": f"Bearer {make_key(runtime, 'admin', name='ops-admin')}"}
    reader = {"Authorization": f"Bearer {make_key(runtime, 'reader', name='help-desk')}"}
    with server_in_thread(runtime) as base_url, httpx.Client(base_url=base_url) as client:
        assert client.put("/v1/collections/bikes", json=BIKE_SCHEMA, headers=admin).is_success
        document = {"id": "manual", "text": "Brakes: squeeze both levers before every ride."}
        posted = client.post(
            "/v1/collections/bikes/documents", json={"documents": [document]}, headers=admin
        )
        assert posted.status_code == 200, posted.text
        search = client.post(
            "/v1/collections/bikes/search", json={"query": "brake levers"}, headers=reader
        )
        assert search.status_code == 200, search.text
        refused = client.get("/v1/collections", headers={"Authorization": f"Bearer {UNKNOWN_KEY}"})
        assert refused.status_code == 401
    lines = json_lines()
    assert all(line.keys() >= FIELDS for line in lines)
    access = [line for line in lines if line["logger"] == "excerpta.access"]
    by_route = {(line["route"], line["status"]): line for line in access}
    searched = by_route[("/v1/collections/{name}/search", 200)]
    assert searched["trace_id"] == search.json()["trace_id"]
    assert searched["key_name"] == "help-desk"
    assert searched["level"] == "INFO"
    assert isinstance(searched["milliseconds"], float) and searched["milliseconds"] > 0
    assert "POST /v1/collections/bikes/search" in searched["message"]
    written = dt.datetime.fromisoformat(searched["time"])
    assert written.utcoffset() == dt.timedelta(0)
    assert abs(dt.datetime.now(dt.UTC) - written) < dt.timedelta(minutes=5)
    stored = by_route[("/v1/collections/{name}/documents", 200)]
    assert stored["key_name"] == "ops-admin" and stored["trace_id"] is None
    unknown = by_route[("/v1/collections", 401)]
    assert unknown["key_name"] is None and unknown["trace_id"] is None
    assert UNKNOWN_KEY not in json.dumps(lines)


def test_secrets_are_scrubbed_from_the_message_and_the_traceback(
    json_lines: Callable[[], list[dict[str, Any]]],
) -> None:
    log = logging.getLogger("excerpta.careless")
    log.warning("retrying with Authorization: Bearer %s\nand a second line", UNKNOWN_KEY)
    try:
        raise RuntimeError(f"the header was Bearer {UNKNOWN_KEY}")
    except RuntimeError:
        log.exception("a request failed")
    warning, failure = json_lines()
    # Outside a request there is no trace, key or route.
    assert warning["trace_id"] is None and warning["key_name"] is None
    assert warning["route"] is None and warning["status"] is None
    assert warning["message"] == "retrying with Authorization: [redacted]\nand a second line"
    assert failure["level"] == "ERROR" and failure["message"] == "a request failed"
    assert "RuntimeError: the header was Bearer [redacted]" in failure["exception"]
    assert UNKNOWN_KEY not in json.dumps([warning, failure])


def test_the_setting_makes_a_served_process_write_only_json_lines(tmp_path: Path) -> None:
    data_dir = tmp_path / "data"
    server = ServerProcess(
        data_dir, f"sqlite:///{data_dir / 'excerpta.db'}", log_format="json"
    ).start()
    try:
        assert httpx.get(f"{server.base_url}/healthz", timeout=10).status_code == 200
        assert httpx.get(f"{server.base_url}/readyz", timeout=10).status_code == 200
    finally:
        assert server.terminate() == 0
    lines = [json.loads(line) for line in server.log().splitlines() if line.strip()]
    loggers = {line["logger"] for line in lines}
    assert {"excerpta.access", "uvicorn.error"} <= loggers
    routes = {(line["route"], line["status"]) for line in lines if line["route"]}
    assert {("/healthz", 200), ("/readyz", 200)} <= routes
