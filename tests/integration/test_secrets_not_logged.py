"""No API key, authorization header or generator secret reaches any logger.

The service runs under a real uvicorn server on a loopback port with the real logging setup, so
the access log, uvicorn's error logger, httpx/httpcore and the service's own loggers all see the
traffic; every record of every logger is captured at DEBUG and searched for the secrets.
"""

from __future__ import annotations

import logging
from collections.abc import Callable, Iterator
from dataclasses import dataclass

import httpx
import pytest

from service.logging_setup import configure_logging
from service.usecases.runtime import Runtime
from tests.api_helpers import BIKE_SCHEMA, make_key
from tests.served import free_port, server_in_thread

CHAT_SECRET = "sk-chat-secret-7f3a9c2e51d84b60a1"
UNKNOWN_KEY = "xk_0123456789abcdef_" + "Q" * 43
GARBAGE_KEY = "garbage-key-5d1e8b7c"
CAPTURED_LOGGERS = ("", "uvicorn", "uvicorn.error", "excerpta.access", "httpx", "httpcore")


@dataclass
class Served:
    base_url: str
    runtime: Runtime
    admin_key: str
    reader_key: str


@pytest.fixture
def served(
    make_runtime: Callable[..., Runtime], caplog: pytest.LogCaptureFixture
) -> Iterator[Served]:
    configure_logging(logging.DEBUG)
    for name in CAPTURED_LOGGERS:
        caplog.set_level(logging.DEBUG, logger=name)
    dead_port = free_port()
    runtime = make_runtime(
        chat_url=f"http://127.0.0.1:{dead_port}/v1/chat/completions",
        chat_api_key=CHAT_SECRET,
        chat_model="test-model",
        chat_max_retries=1,
        chat_timeout_seconds=2.0,
    )
    with server_in_thread(runtime) as base_url:
        yield Served(
            base_url,
            runtime,
            make_key(runtime, "admin", name="admin"),
            make_key(runtime, "reader", name="reader"),
        )


def everything_logged(caplog: pytest.LogCaptureFixture) -> str:
    """Every record as a handler would write it, with its arguments and any traceback."""
    formatter = logging.Formatter("%(name)s %(levelname)s %(message)s")
    parts = [caplog.text]
    for record in caplog.records:
        parts.append(formatter.format(record))
        parts.append(repr(record.args))
        parts.append(repr(getattr(record, "scope", "")))
    return "\n".join(parts)


def test_no_key_or_generator_secret_reaches_any_logger(
    served: Served, caplog: pytest.LogCaptureFixture, capfd: pytest.CaptureFixture[str]
) -> None:
    admin = {"Authorization": f"Bearer {served.admin_key}"}
    reader = {"Authorization": f"Bearer {served.reader_key}"}
    with httpx.Client(base_url=served.base_url, timeout=30) as client:
        assert client.put("/v1/collections/bikes", json=BIKE_SCHEMA, headers=admin).is_success
        document = {"id": "manual", "text": "Brakes: squeeze both levers before every ride."}
        posted = client.post(
            "/v1/collections/bikes/documents", json={"documents": [document]}, headers=admin
        )
        assert posted.status_code == 200
        assert client.get("/v1/collections", headers=reader).status_code == 200
        search = {"query": "brakes levers"}
        assert client.post("/v1/collections/bikes/search", json=search, headers=reader).is_success
        for bad in (UNKNOWN_KEY, GARBAGE_KEY):
            response = client.get("/v1/collections", headers={"Authorization": f"Bearer {bad}"})
            assert response.status_code == 401
        forbidden = client.delete("/v1/collections/bikes", headers=reader)
        assert forbidden.status_code == 403
        answer = client.post(
            "/v1/collections/bikes/answer",
            json={"query": "how do I check the brakes", "generator": "chat-http"},
            headers=reader,
        )
        assert answer.status_code == 502
        assert answer.json()["error"]["code"] == "generator_unavailable"
        assert CHAT_SECRET not in answer.text
        trace_id = answer.json()["error"]["context"]["trace_id"]
        trace = client.get(f"/v1/traces/{trace_id}", headers=reader)
        assert trace.status_code == 200 and CHAT_SECRET not in trace.text

    logged = everything_logged(caplog)
    names = {record.name for record in caplog.records}
    # The capture really saw the server, the client library and the generator's retry.
    assert "excerpta.access" in names and "httpx" in names
    assert any("retrying" in record.getMessage() for record in caplog.records)
    printed = capfd.readouterr()
    for secret in (served.admin_key, served.reader_key, UNKNOWN_KEY, GARBAGE_KEY, CHAT_SECRET):
        assert secret not in logged
        assert secret not in printed.out and secret not in printed.err
    for key in (served.admin_key, served.reader_key):
        assert key.split("_", 2)[2] not in logged


def test_a_careless_log_line_anywhere_is_still_scrubbed(
    served: Served, caplog: pytest.LogCaptureFixture
) -> None:
    # Building the chat generator registers its key for scrubbing.
    served.runtime.generators.get("chat-http")
    headers = {"Authorization": f"Bearer {GARBAGE_KEY}"}
    for name in ("excerpta.api", "some.library", "uvicorn.error", "httpx"):
        logger = logging.getLogger(name)
        logger.warning("request headers: %s", headers)
        logger.info("authorization=Bearer %s", GARBAGE_KEY)
        logger.error("called with key %s and %s", served.admin_key, CHAT_SECRET)
        try:
            raise ValueError(f"refused header Authorization: Bearer {GARBAGE_KEY}")
        except ValueError:
            logger.exception("request failed")
    logged = everything_logged(caplog)
    for secret in (served.admin_key, GARBAGE_KEY, CHAT_SECRET):
        assert secret not in logged
    assert logged.count("[redacted]") >= 16
    assert "refused header" in logged
