"""A client of a running excerpta server, for the commands that work through one (``eval --url``
and ``ingest --url``): one connection carrying the key, and every failure reported as
``ServerRefused`` with the server's own message."""

from __future__ import annotations

from typing import Any

import httpx

TIMEOUT_SECONDS = 60.0


class ServerRefused(Exception):
    """The server could not be reached or refused a request; the message says which and why."""


class ServerClient:
    def __init__(
        self, url: str, key: str | None, *, transport: httpx.BaseTransport | None = None
    ) -> None:
        headers = {"Authorization": f"Bearer {key}"} if key else {}
        self._client = httpx.Client(
            base_url=url.rstrip("/"), headers=headers, timeout=TIMEOUT_SECONDS, transport=transport
        )

    @property
    def base_url(self) -> str:
        return str(self._client.base_url)

    def close(self) -> None:
        self._client.close()

    def request(self, method: str, path: str, **options: Any) -> httpx.Response:
        """The server's response, whatever its status; an unreachable server is refused."""
        try:
            return self._client.request(method, path, **options)
        except httpx.TransportError as exc:
            raise ServerRefused(f"cannot reach {self._client.base_url}: {exc}") from exc

    def send(self, method: str, path: str, **options: Any) -> dict[str, Any]:
        """The JSON body of a successful response; any error status is refused."""
        response = self.request(method, path, **options)
        if response.is_error:
            raise ServerRefused(refusal(response))
        body: dict[str, Any] = response.json()
        return body


def refusal(response: httpx.Response) -> str:
    """The server's own error message where it sent one in the service's error shape."""
    request = response.request
    where = f"{request.method} {request.url.path}"
    try:
        error = response.json()["error"]
        detail = f"{error['code']}: {error['message']}"
    except (ValueError, KeyError, TypeError):
        detail = response.reason_phrase or "no reason given"
    return f"the server answered {response.status_code} to {where} ({detail})"
