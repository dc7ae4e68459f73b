"""A backup downloaded over the API, on each backend: an admin's copy of the store that
restores to the same documents and search results, refused to every other key."""

from __future__ import annotations

from collections.abc import Callable
from pathlib import Path

from fastapi.testclient import TestClient
from sqlalchemy import Engine

from service.api.app import create_app
from service.store.backup import restore_backup
from service.store.db import make_engine, migrate
from service.usecases import answering
from service.usecases.callers import LOCAL_ADMIN
from service.usecases.runtime import Runtime
from service.usecases.search import SearchOptions
from tests.api_helpers import BIKE_SCHEMA, Api, make_key

MANUALS = [
    {"id": f"manual-{n}", "text": f"Set the brake pads {n} mm from the rim.", "access": ["staff"]}
    for n in range(4)
]


def hits(runtime: Runtime) -> list[tuple[str, float]]:
    options = SearchOptions(query="brake pads rim", top_k=10)
    result = answering.search(runtime, LOCAL_ADMIN, "bikes", options, keep_trace=False)
    return [(hit.chunk_id, hit.score) for hit in result.hits]


def test_an_admin_downloads_a_backup_that_restores_to_the_same_store(
    make_runtime: Callable[..., Runtime], store_engine: Engine, tmp_path: Path
) -> None:
    runtime = make_runtime(engine=store_engine)
    with TestClient(create_app(runtime)) as client:
        admin = Api(client, make_key(runtime, "admin", name="admin"))
        assert admin.put("/v1/collections/bikes", json=BIKE_SCHEMA).status_code == 201
        response = admin.post("/v1/collections/bikes/documents", json={"documents": MANUALS})
        assert response.status_code == 200, response.text
        reader = admin.as_key(make_key(runtime, "reader", name="reader"))
        refused = reader.get("/v1/backup")
        assert refused.status_code == 403
        assert refused.json()["error"]["code"] == "forbidden"
        downloaded = admin.get("/v1/backup")
    assert downloaded.status_code == 200, downloaded.text
    assert "attachment" in downloaded.headers["content-disposition"]
    assert int(downloaded.headers["x-excerpta-rows"]) > len(MANUALS)
    backup = tmp_path / "downloaded-backup"
    backup.write_bytes(downloaded.content)
    # Nothing of the backup is left behind in the data directory once it has been sent.
    assert not list(runtime.settings.data_dir.glob(".backup-*"))

    restored_engine = make_engine(f"sqlite:///{tmp_path / 'restored.db'}")
    migrate(restored_engine)
    restore_backup(restored_engine, backup)
    restored = make_runtime(engine=restored_engine, data_dir=tmp_path / "restored")
    assert hits(restored) == hits(runtime)
    assert len(hits(restored)) == len(MANUALS)
