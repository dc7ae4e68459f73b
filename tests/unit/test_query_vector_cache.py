"""Query vectors are kept by embedder and text, so a repeated question costs no model call."""

from __future__ import annotations

import numpy as np
import pytest

from service.embedding.query_cache import CachedQueryEmbedder
from tests.hashing_embedder import HashingTestEmbedder


def test_a_repeated_question_is_answered_from_memory_with_the_same_vector() -> None:
    model = HashingTestEmbedder()
    cached = CachedQueryEmbedder(model, entries=8)
    first = cached.embed_query("how tight are the stem bolts")
    again = cached.embed_query("how tight are the stem bolts")
    assert model.calls == 1
    assert again is first
    np.testing.assert_array_equal(first, model.embed_query("how tight are the stem bolts"))
    with pytest.raises(ValueError):
        first[0] = 1.0


def test_the_least_recently_used_question_leaves_first_and_costs_a_call_again() -> None:
    model = HashingTestEmbedder()
    cached = CachedQueryEmbedder(model, entries=2)
    for text in ("chain", "brake", "chain", "tyre"):
        cached.embed_query(text)
    assert model.calls == 3 and len(cached) == 2
    cached.embed_query("chain")
    assert model.calls == 3
    cached.embed_query("brake")
    assert model.calls == 4


def test_no_entries_caches_nothing() -> None:
    model = HashingTestEmbedder()
    cached = CachedQueryEmbedder(model, entries=0)
    cached.embed_query("gear")
    cached.embed_query("gear")
    assert model.calls == 2 and len(cached) == 0
