"""Shared fixtures: scratch stores on SQLite and PostgreSQL, runtimes, and the real model.

Under CI=true a test that needs PostgreSQL, the real model or the Cranfield data fails instead
of skipping when it cannot have it.
"""

from __future__ import annotations

import os
import uuid
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any

import pytest
from sqlalchemy import Engine, text

from service.config import Settings
from service.store.db import make_engine
from service.usecases.runtime import Runtime
from tests.hashing_embedder import HashingTestEmbedder

REPO = Path(__file__).resolve().parents[1]
CRANFIELD_DIR = REPO.parent / "shared" / "data" / "cranfield"
MED_DIR = REPO.parent / "shared" / "data" / "med"
IN_CI = os.environ.get("CI") == "true"


def need(condition: bool, reason: str) -> None:
    """Skip when a resource is missing, except in CI, where a missing resource is a failure."""
    if condition:
        return
    if IN_CI:
        pytest.fail(f"{reason} (required under CI=true)")
    pytest.skip(reason)


@pytest.fixture(scope="session")
def postgres_url() -> str:
    url = os.environ.get("EXCERPTA_TEST_POSTGRES_URL", "")
    need(bool(url), "EXCERPTA_TEST_POSTGRES_URL is not set")
    return url


def postgres_url_for_schema(url: str, schema: str) -> str:
    """The URL of one schema of a PostgreSQL database, as another process can be handed it."""
    separator = "&" if "?" in url else "?"
    return f"{url}{separator}options=-csearch_path%3D{schema}"


@contextmanager
def postgres_schema(url: str) -> Iterator[str]:
    """A schema of its own in the test database, dropped with everything in it afterwards."""
    schema = f"excerpta_test_{uuid.uuid4().hex[:12]}"
    admin = make_engine(url)
    with admin.begin() as connection:
        connection.execute(text(f'CREATE SCHEMA "{schema}"'))
    try:
        yield schema
    finally:
        with admin.begin() as connection:
            connection.execute(text(f'DROP SCHEMA "{schema}" CASCADE'))
        admin.dispose()


@pytest.fixture(params=["sqlite", "postgresql"])
def store_engine(request: pytest.FixtureRequest, tmp_path: Path) -> Iterator[Engine]:
    """An empty store on each backend; tables come from running the migrations."""
    if request.param == "sqlite":
        engine = make_engine(f"sqlite:///{tmp_path / 'store.db'}")
        yield engine
        engine.dispose()
    else:
        url = request.getfixturevalue("postgres_url")
        with postgres_schema(url) as schema:
            engine = make_engine(url, schema=schema)
            yield engine
            engine.dispose()


@pytest.fixture(params=["sqlite", "postgresql"])
def store_url(request: pytest.FixtureRequest, tmp_path: Path) -> Iterator[str]:
    """An empty store on each backend, as a URL another process can open too."""
    if request.param == "sqlite":
        yield f"sqlite:///{tmp_path / 'store.db'}"
        return
    url = request.getfixturevalue("postgres_url")
    with postgres_schema(url) as schema:
        yield postgres_url_for_schema(url, schema)


@pytest.fixture
def make_runtime(tmp_path: Path) -> Iterator[Callable[..., Runtime]]:
    """Build runtimes over a scratch data dir with the test-only hashing embedder by default."""
    built: list[Runtime] = []

    def build(
        engine: Engine | None = None, embedder: Any = None, jobs: Any = None, **settings: Any
    ) -> Runtime:
        options: dict[str, Any] = {"data_dir": tmp_path / "data", "index_poll_ms": 0, **settings}
        runtime = Runtime(
            Settings(**options), embedder or HashingTestEmbedder(), engine=engine, jobs=jobs
        )
        built.append(runtime)
        return runtime

    yield build
    for runtime in built:
        runtime.close()


@pytest.fixture
def runtime(make_runtime: Callable[..., Runtime], store_engine: Engine) -> Runtime:
    return make_runtime(engine=store_engine)


@pytest.fixture(scope="session")
def minilm() -> Any:
    try:
        from service.embedding.minilm import MiniLmEmbedder

        return MiniLmEmbedder()
    except Exception as exc:
        need(False, f"the bundled model cannot be loaded: {exc}")


@pytest.fixture(scope="session")
def cranfield_dir() -> Path:
    need(CRANFIELD_DIR.is_dir(), f"no Cranfield data at {CRANFIELD_DIR}")
    return CRANFIELD_DIR


@pytest.fixture(scope="session")
def med_dir() -> Path:
    need(MED_DIR.is_dir(), f"no MED data at {MED_DIR}")
    return MED_DIR
