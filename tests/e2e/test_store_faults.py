"""A store that vanishes, is replaced, fills up or cannot be written, under real servers.

Each fault gets the exact status, code and message the contract promises (503
``storage_unavailable`` in the JSON error shape, never a plain-text 500), ``/readyz`` says the
same while the fault lasts and ``ready`` once it is over, and no write that was acknowledged is
missing afterwards. The small filesystem is a tmpfs the test mounts (the machine's tests run as
root); where mounting is not allowed the test is skipped with the reason, except under CI=true.
"""

from __future__ import annotations

import contextlib
import io
import os
import subprocess
import sys
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any

import httpx
import pytest
from sqlalchemy import insert, select, text

from service.config import Settings
from service.store.db import make_engine, migrate
from service.store.tables import ApiKeyRow
from service.usecases.runtime import Runtime
from tests.api_helpers import make_key
from tests.conftest import REPO, need, postgres_schema, postgres_url_for_schema
from tests.hashing_embedder import HashingTestEmbedder
from tests.served import server_in_thread

KEYS = ApiKeyRow.__table__
COLLECTION = "notes"
DOCUMENTS = f"/v1/collections/{COLLECTION}/documents"


def unavailable(reason: str) -> dict[str, Any]:
    return {
        "error": {"code": "storage_unavailable", "message": f"The store is unavailable: {reason}."}
    }


def not_ready(reason: str) -> dict[str, Any]:
    return {"status": "unavailable", "reason": f"The store is unavailable: {reason}."}


def note(doc_id: str, words: int = 12) -> dict[str, Any]:
    body = " ".join(f"{doc_id}-w{n}" for n in range(words))
    return {"documents": [{"id": doc_id, "text": f"Workshop note {doc_id}: {body}."}]}


def stored_ids(runtime: Runtime, client: httpx.Client | None = None) -> set[str]:
    from service.usecases import documents
    from service.usecases.callers import LOCAL_ADMIN

    page = documents.list_documents(
        runtime, LOCAL_ADMIN, COLLECTION, filter_value=None, after=None, limit=1000
    )
    return {d["id"] for d in page["documents"]}


@contextmanager
def served(runtime: Runtime) -> Iterator[httpx.Client]:
    key = make_key(runtime, "admin", name="admin")
    with (
        server_in_thread(runtime) as base_url,
        httpx.Client(
            base_url=base_url, headers={"Authorization": f"Bearer {key}"}, timeout=60
        ) as client,
    ):
        assert client.put(f"/v1/collections/{COLLECTION}", json={}).status_code == 201
        yield client


@contextmanager
def mounted_tmpfs(path: Path, size: str) -> Iterator[Path]:
    path.mkdir(parents=True)
    mounted = subprocess.run(
        ["mount", "-t", "tmpfs", "-o", f"size={size}", "tmpfs", str(path)],
        capture_output=True,
        text=True,
    )
    need(mounted.returncode == 0, f"a tmpfs cannot be mounted here: {mounted.stderr.strip()}")
    try:
        yield path
    finally:
        subprocess.run(["umount", str(path)], check=True)


def fill(path: Path, leave: int) -> None:
    """Write ``path`` until the filesystem has about ``leave`` bytes free (none if 0)."""
    with open(path, "wb") as filler:
        try:
            while True:
                free = os.statvfs(path).f_bavail * os.statvfs(path).f_frsize
                if free <= leave:
                    return
                filler.write(b"\0" * min(free - leave, 1 << 20) if leave else b"\0" * 65536)
                filler.flush()
        except OSError:
            return


def test_a_store_file_removed_under_a_running_server_refuses_writes_until_it_is_back(
    make_runtime: Callable[..., Runtime],
) -> None:
    runtime = make_runtime()
    store = runtime.store.path
    assert store is not None
    aside = store.with_name("moved-away.db")
    unused_reader = make_key(runtime, "reader", name="reader")
    with served(runtime) as client:
        assert client.post(DOCUMENTS, json=note("before")).status_code == 200
        os.rename(store, aside)
        for attempt in range(3):
            refused = client.post(DOCUMENTS, json=note(f"during-{attempt}"))
            assert (refused.status_code, refused.json()) == (
                503,
                unavailable("its file was removed"),
            )
        gone = client.delete(f"{DOCUMENTS}/before")
        assert (gone.status_code, gone.json()) == (503, unavailable("its file was removed"))
        readiness = client.get("/readyz")
        assert (readiness.status_code, readiness.json()) == (503, not_ready("its file was removed"))
        assert not store.exists(), "a fresh, empty store file was made in its place"
        # Queries keep answering from memory, even for a key whose first use cannot be noted.
        search = client.post(
            f"/v1/collections/{COLLECTION}/search",
            json={"query": "workshop"},
            headers={"Authorization": f"Bearer {unused_reader}"},
        )
        assert search.status_code == 200
        assert [hit["document_id"] for hit in search.json()["hits"]] == ["before"]

        os.rename(aside, store)
        assert client.get("/readyz").json() == {"status": "ready"}
        assert client.post(DOCUMENTS, json=note("after")).status_code == 200
    restarted = make_runtime()
    assert stored_ids(restarted) == {"before", "after"}


@pytest.mark.postgres
def test_a_postgresql_store_dropped_or_replaced_under_a_running_server_refuses_writes(
    postgres_url: str, make_runtime: Callable[..., Runtime]
) -> None:
    with postgres_schema(postgres_url) as schema:
        runtime = make_runtime(engine=make_engine(postgres_url_for_schema(postgres_url, schema)))
        with served(runtime) as client:
            assert client.post(DOCUMENTS, json=note("before")).status_code == 200
            with runtime.engine.connect() as connection:
                stored_keys = [dict(row) for row in connection.execute(select(KEYS)).mappings()]
            admin = make_engine(postgres_url)
            try:
                with admin.begin() as connection:
                    connection.execute(text(f'DROP SCHEMA "{schema}" CASCADE'))
                    connection.execute(text(f'CREATE SCHEMA "{schema}"'))
                refused = client.post(DOCUMENTS, json=note("vanished"))
                assert (refused.status_code, refused.json()) == (
                    503,
                    unavailable("its tables are gone"),
                )
                readiness = client.get("/readyz")
                assert (readiness.status_code, readiness.json()) == (
                    503,
                    not_ready("its tables are gone"),
                )

                # Replaced by another store holding the same keys, as a restored backup would.
                replacement = make_engine(postgres_url, schema=schema)
                migrate(replacement)
                with replacement.begin() as connection:
                    connection.execute(insert(KEYS), stored_keys)
                replacement.dispose()
                refused = client.post(DOCUMENTS, json=note("replaced"))
                assert (refused.status_code, refused.json()) == (
                    503,
                    unavailable("it was replaced"),
                )
                readiness = client.get("/readyz")
                assert (readiness.status_code, readiness.json()) == (
                    503,
                    not_ready("it was replaced"),
                )
            finally:
                admin.dispose()


def test_a_full_disk_refuses_writes_in_the_contracts_shape_and_loses_nothing_acknowledged(
    tmp_path: Path,
) -> None:
    with mounted_tmpfs(tmp_path / "small", "8m") as small:
        settings = Settings(data_dir=small / "data", index_poll_ms=0)
        runtime = Runtime(settings, HashingTestEmbedder())
        acknowledged: list[str] = []
        try:
            with served(runtime) as client:
                fill(small / "filler", leave=192 * 1024)
                for n in range(1000):
                    response = client.post(DOCUMENTS, json=note(f"note-{n}", words=300))
                    if response.status_code != 200:
                        break
                    acknowledged.append(f"note-{n}")
                assert (response.status_code, response.json()) == (
                    503,
                    unavailable("its disk is full"),
                )
                fill(small / "the-rest", leave=0)
                readiness = client.get("/readyz")
                assert (readiness.status_code, readiness.json()) == (
                    503,
                    not_ready("its disk is full"),
                )

                (small / "filler").unlink()
                (small / "the-rest").unlink()
                assert client.get("/readyz").json() == {"status": "ready"}
                assert client.post(DOCUMENTS, json=note("after")).status_code == 200
                acknowledged.append("after")
        finally:
            runtime.close()
        restarted = Runtime(settings, HashingTestEmbedder())
        try:
            assert stored_ids(restarted) == set(acknowledged)
        finally:
            restarted.close()


def test_serve_migrate_and_ingest_on_a_read_only_data_directory_say_so_in_one_sentence(
    tmp_path: Path,
) -> None:
    from service.cli import main

    with mounted_tmpfs(tmp_path / "readonly", "4m") as mount:
        data = mount / "data"
        assert main(["migrate", "--data-dir", str(data)]) == 0
        subprocess.run(["mount", "-o", "remount,ro", str(mount)], check=True)
        expected = f"error: The data directory {data} is not writable: Read-only file system.\n"
        serve = subprocess.run(
            [sys.executable, "-m", "service.cli", "serve", "--data-dir", str(data), "--port", "9"],
            cwd=REPO,
            capture_output=True,
            text=True,
            timeout=120,
        )
        assert (serve.returncode, serve.stdout, serve.stderr) == (1, "", expected)
        for argv in (["migrate"], ["ingest", COLLECTION, str(tmp_path)]):
            err = io.StringIO()
            with contextlib.redirect_stderr(err):
                code = main([*argv, "--data-dir", str(data)])
            assert (code, err.getvalue()) == (1, expected), argv
