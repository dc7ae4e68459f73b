"""``open_runtime``: the runtime every long-lived command runs on (serve, worker, the rest)."""

from __future__ import annotations

from pathlib import Path

import pytest

from service.config import Settings
from service.embedding.base import Embedder
from service.errors import StorageUnavailable
from service.usecases.runtime import open_runtime
from tests.hashing_embedder import HashingTestEmbedder


def test_an_unusable_store_is_told_before_the_embedder_is_made(tmp_path: Path) -> None:
    taken = tmp_path / "taken"
    taken.write_text("a file where the data directory should be", encoding="utf-8")
    made: list[Settings] = []

    def make_embedder(settings: Settings) -> Embedder:
        made.append(settings)
        return HashingTestEmbedder()

    with pytest.raises(StorageUnavailable, match="is not a directory"):
        open_runtime(Settings(data_dir=taken), make_embedder)
    assert made == []


def test_the_runtime_knows_its_store_and_is_given_the_embedder_made_from_its_settings(
    tmp_path: Path,
) -> None:
    settings = Settings(data_dir=tmp_path / "data")
    embedder = HashingTestEmbedder()

    def make_embedder(given: Settings) -> Embedder:
        assert given is settings
        return embedder

    runtime = open_runtime(settings, make_embedder)
    try:
        assert runtime.embedder is embedder
        assert runtime.store.store_id is not None
        assert (tmp_path / "data" / "excerpta.db").is_file()
    finally:
        runtime.close()
