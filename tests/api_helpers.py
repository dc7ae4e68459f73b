"""Shared pieces of the API tests: a schema, key creation and a client bound to one key."""

from __future__ import annotations

from typing import Any

from fastapi.testclient import TestClient

from service.usecases import keys
from service.usecases.runtime import Runtime

BIKE_SCHEMA: dict[str, Any] = {
    "description": "Test manuals",
    "attributes": {
        "model": {"type": "keyword"},
        "model_year": {"type": "integer"},
        "price": {"type": "number"},
        "discontinued": {"type": "boolean"},
        "effective": {"type": "date"},
        "published": {"type": "datetime"},
        "tags": {"type": "keyword[]"},
    },
    "chunking": {"max_tokens": 40, "overlap_tokens": 8},
    "cite_attributes": ["model_year", "effective"],
    "answer_caution": "Check repair steps against the current service manual.",
}


def make_key(runtime: Runtime, role: str, **options: Any) -> str:
    # A write transaction takes the write lock first, so a worker writing beside it makes it
    # wait instead of failing (a read turned write mid-transaction gets SQLite's "locked").
    with runtime.write_transaction() as session:
        secret, _ = keys.create_key(
            session,
            role=role,
            groups=options.get("groups", []),
            collections=options.get("collections"),
            name=options.get("name"),
        )
    return secret


class Api:
    """A TestClient that sends one key's bearer header."""

    def __init__(self, client: TestClient, key: str) -> None:
        self.client = client
        self.key = key

    def _headers(self, extra: dict[str, str] | None = None) -> dict[str, str]:
        return {"Authorization": f"Bearer {self.key}", **(extra or {})}

    def get(self, path: str, **kwargs: Any) -> Any:
        headers = self._headers(kwargs.pop("headers", None))
        return self.client.get(path, headers=headers, **kwargs)

    def post(self, path: str, **kwargs: Any) -> Any:
        headers = self._headers(kwargs.pop("headers", None))
        return self.client.post(path, headers=headers, **kwargs)

    def put(self, path: str, **kwargs: Any) -> Any:
        headers = self._headers(kwargs.pop("headers", None))
        return self.client.put(path, headers=headers, **kwargs)

    def delete(self, path: str, **kwargs: Any) -> Any:
        headers = self._headers(kwargs.pop("headers", None))
        return self.client.delete(path, headers=headers, **kwargs)

    def as_key(self, key: str) -> Api:
        return Api(self.client, key)
