"""``excerpta tune``'s use case on synthetic collections: one where a setting is truly better
(it must find it, call it significant and apply it) and one where no setting changes anything
(it must not apply).

The better setting is built in: the embedder here maps every text to a random unit vector
(seeded by the text), so the semantic ranking knows nothing, while BM25 ranks each query's one
relevant document first (it holds the query's made-up word twice; its partial matches hold it
once). Fusion that leaves the semantic ranking out is truly better.
"""

from __future__ import annotations

import hashlib
import random
from collections.abc import Callable, Sequence
from pathlib import Path

import numpy as np
import pytest
from fastapi.testclient import TestClient

from service.api.app import create_app
from service.evaluation.inputs import LabeledQuery
from service.evaluation.tuning import candidates_from_grid
from service.evaluation.tuning_report import write_tuning_report
from service.usecases.callers import LOCAL_ADMIN
from service.usecases.collections import get_collection
from service.usecases.runtime import Runtime
from service.usecases.tune import tune_collection
from tests.api_helpers import Api, make_key
from tests.hashing_embedder import HashingTestEmbedder

QUERIES = 30
PARTIAL_MATCHES = 8
FILLER = ["alpha", "beta", "gamma", "delta", "omega", "sigma", "kappa", "theta"]


class NoiseEmbedder(HashingTestEmbedder):
    """A random unit vector per text, the same every time: an embedding without meaning."""

    name = "noise-test-only"

    def embed_documents(self, texts: Sequence[str]) -> np.ndarray:
        self.calls += 1
        rows = []
        for text in texts:
            seed = int.from_bytes(hashlib.blake2b(text.encode(), digest_size=8).digest(), "little")
            vector = np.random.default_rng(seed).standard_normal(self.dimensions)
            rows.append(vector / np.linalg.norm(vector))
        return np.asarray(rows, dtype=np.float32)


def made_up_words(count: int, seed: int) -> list[str]:
    rng = random.Random(seed)
    letters = "bcdfghjklmnprstvz"
    words: set[str] = set()
    while len(words) < count:
        words.add("".join(rng.choice(letters) + rng.choice("aeiou") for _ in range(3)) + "rt")
    return sorted(words)


def collection(runtime: Runtime) -> tuple[list[LabeledQuery], dict[str, dict[str, int]]]:
    documents = []
    queries = []
    qrels: dict[str, dict[str, int]] = {}
    for n, word in enumerate(made_up_words(QUERIES, seed=7)):
        filler = " ".join(FILLER[n % 3 : n % 3 + 4])
        documents.append({"id": f"rel-{n:02d}", "title": "", "text": f"{word} {word} {filler}"})
        for d in range(PARTIAL_MATCHES):
            text = f"{word} {FILLER[d]} {filler}"
            documents.append({"id": f"part-{n:02d}-{d}", "title": "", "text": text})
        queries.append(LabeledQuery(f"q{n}", word))
        qrels[f"q{n}"] = {f"rel-{n:02d}": 1}
    with TestClient(create_app(runtime)) as client:
        api = Api(client, make_key(runtime, "admin", name="admin"))
        assert api.put("/v1/collections/made-up", json={"attributes": {}}).status_code == 201
        response = api.post("/v1/collections/made-up/documents", json={"documents": documents})
        assert response.status_code == 200, response.text
    return queries, qrels


@pytest.fixture
def labelled(make_runtime: Callable[..., Runtime]) -> tuple[Runtime, list[LabeledQuery], dict]:
    runtime = make_runtime(embedder=NoiseEmbedder(), max_top_k=20_000, max_depth=20_000)
    queries, qrels = collection(runtime)
    return runtime, queries, qrels


def test_a_truly_better_setting_is_found_called_significant_and_applied(
    labelled: tuple[Runtime, list[LabeledQuery], dict], tmp_path: Path
) -> None:
    runtime, queries, qrels = labelled
    candidates = candidates_from_grid({"semantic_weight": ["0.5", "0.0"]})
    outcome = tune_collection(
        runtime, "made-up", queries, qrels, candidates, folds=5, apply=True, progress=False
    )
    result = outcome.result
    assert result.chosen.label == "semantic_weight=0.0"
    assert result.significant and result.p_value < 0.05
    assert result.difference_interval.low > 0
    assert outcome.applied
    assert get_collection(runtime, LOCAL_ADMIN, "made-up")["retrieval"]["semantic_weight"] == 0.0
    files = write_tuning_report(
        result,
        tmp_path,
        collection="made-up",
        settings_before=outcome.settings_before,
        applied=outcome.applied,
    )
    assert "is significant" in files.report.read_text(encoding="utf-8")
    assert files.picture.stat().st_size > 0


def test_where_no_setting_changes_anything_nothing_is_applied(
    labelled: tuple[Runtime, list[LabeledQuery], dict],
) -> None:
    runtime, queries, qrels = labelled
    # Every document is one chunk, so a second chunk's weight cannot move any of them.
    candidates = candidates_from_grid({"second_chunk_weight": ["0.25", "0.5"]})
    outcome = tune_collection(
        runtime, "made-up", queries, qrels, candidates, folds=5, apply=True, progress=False
    )
    assert not outcome.result.significant
    assert outcome.result.p_value == 1.0
    assert not outcome.applied
    assert get_collection(runtime, LOCAL_ADMIN, "made-up")["retrieval"]["second_chunk_weight"] == 0
