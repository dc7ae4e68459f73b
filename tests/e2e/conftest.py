"""An API client over a scratch SQLite store, the test-only embedder and an admin key."""

from __future__ import annotations

from collections.abc import Callable, Iterator

import pytest
from fastapi.testclient import TestClient

from service.api.app import create_app
from service.usecases.runtime import Runtime
from tests.api_helpers import BIKE_SCHEMA, Api, make_key


@pytest.fixture
def api_runtime(make_runtime: Callable[..., Runtime]) -> Runtime:
    return make_runtime()


@pytest.fixture
def api(api_runtime: Runtime) -> Iterator[Api]:
    with TestClient(create_app(api_runtime)) as client:
        yield Api(client, make_key(api_runtime, "admin", name="admin"))


@pytest.fixture
def bikes(api: Api) -> Api:
    response = api.put("/v1/collections/bikes", json=BIKE_SCHEMA)
    assert response.status_code == 201, response.text
    return api
