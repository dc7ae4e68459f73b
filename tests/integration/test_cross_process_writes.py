"""A write made by ``excerpta ingest`` reaches a running server's index through the change log.

The CLI builds its own runtime (its own engine and index registry) over the server's data dir,
as a second process would; the server learns of the write only from the store's revision,
checked at most every ``SERVER_POLL_MS`` before a query. The write goes to a collection of its
own so the shared Cranfield collection stays as ingested.
"""

from __future__ import annotations

import json
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

import pytest

from tests.api_helpers import Api
from tests.integration.conftest import SERVER_POLL_MS, CliRun

pytestmark = [pytest.mark.model, pytest.mark.cranfield]

NOTES = "notes"


def search(api: Api, query: str, mode: str) -> list[dict[str, Any]]:
    response = api.post(
        f"/v1/collections/{NOTES}/search", json={"query": query, "mode": mode, "top_k": 10}
    )
    assert response.status_code == 200, response.text
    hits: list[dict[str, Any]] = response.json()["hits"]
    return hits


def test_a_cli_ingest_is_visible_to_the_servers_next_query_after_the_poll_interval(
    cranfield_api: Api,
    cranfield_data_dir: Path,
    run_cli: Callable[[list[str]], CliRun],
    tmp_path: Path,
) -> None:
    assert cranfield_api.put(f"/v1/collections/{NOTES}", json={}).status_code == 201
    first = {"id": "note-1", "title": "Wind tunnel log", "text": "The balance was recalibrated."}
    response = cranfield_api.post(f"/v1/collections/{NOTES}/documents", json={"documents": [first]})
    assert response.status_code == 200, response.text
    assert [h["document_id"] for h in search(cranfield_api, "balance", "lexical")] == ["note-1"]
    assert search(cranfield_api, "zeppelin mooring mast", "lexical") == []

    batch = tmp_path / "notes.jsonl"
    documents = [
        {**first, "text": "The balance was recalibrated after the zeppelin tests."},
        {"id": "note-2", "title": "Airship notes", "text": "A zeppelin mooring mast was built."},
    ]
    batch.write_text("".join(json.dumps(d) + "\n" for d in documents), encoding="utf-8")
    cli = run_cli(["ingest", NOTES, str(batch), "--data-dir", str(cranfield_data_dir)])
    assert cli.code == 0, cli.stderr
    assert "2 documents written, 0 failed" in cli.stdout

    time.sleep(2 * SERVER_POLL_MS / 1000)
    lexical = search(cranfield_api, "zeppelin mooring mast", "lexical")
    assert [h["document_id"] for h in lexical] == ["note-2", "note-1"]
    assert lexical[1]["text"] == documents[0]["text"]
    semantic = search(cranfield_api, "zeppelin mooring mast", "semantic")
    assert [h["chunk_id"] for h in semantic] == ["note-2#0000", "note-1#0000"]
    listing = cranfield_api.get(f"/v1/collections/{NOTES}").json()
    assert (listing["documents"], listing["chunks"]) == (2, 2)
