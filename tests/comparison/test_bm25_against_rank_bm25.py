"""Okapi BM25 against ``rank_bm25.BM25Okapi`` (PyPI rank-bm25, github.com/dorianbrown/rank_bm25).

BM25Okapi uses idf = ln((N - df + 0.5) / (df + 0.5)), replaces a negative idf by epsilon times
the mean idf over the vocabulary, and counts a repeated query term once per occurrence, as our
``okapi`` variant does. Both sides score the same token lists; the reference works in float64.
"""

import numpy as np
import pytest

rank_bm25 = pytest.importorskip("rank_bm25")

from service.index.lexical import LexicalIndex  # noqa: E402


def corpus_and_queries(seed: int) -> tuple[list[list[str]], list[list[str]]]:
    rng = np.random.default_rng(seed)
    vocabulary = [f"w{i}" for i in range(200)]
    weights = 1 / np.arange(1, 201) ** 0.8
    weights /= weights.sum()
    corpus = [list(rng.choice(vocabulary, size=rng.integers(3, 50), p=weights)) for _ in range(300)]
    queries = [list(rng.choice(vocabulary, size=rng.integers(1, 6), p=weights)) for _ in range(30)]
    return corpus, queries


@pytest.mark.parametrize(("k1", "b", "epsilon"), [(1.2, 0.75, 0.25), (1.5, 0.5, 0.1)])
def test_okapi_scores_equal_rank_bm25(k1: float, b: float, epsilon: float) -> None:
    corpus, queries = corpus_and_queries(seed=int(k1 * 10))
    index = LexicalIndex.build(corpus)
    reference = rank_bm25.BM25Okapi(corpus, k1=k1, b=b, epsilon=epsilon)
    common_terms = 0
    for query in queries:
        ours = index.match(query, k1=k1, b=b, variant="okapi", epsilon=epsilon)
        want = np.asarray(reference.get_scores(query), dtype=np.float64)
        contains = np.array([any(t in doc for t in query) for doc in corpus])
        np.testing.assert_allclose(ours.scores[contains], want[contains], rtol=1e-5, atol=1e-9)
        assert np.array_equal(ours.present, contains)
        common_terms += sum(
            index.idf(t, variant="okapi") != index.idf(t, variant="okapi", epsilon=0) for t in query
        )
    assert common_terms > 0, "the queries must exercise the epsilon floor"


def test_okapi_scores_after_deletions_equal_rank_bm25_on_the_remaining_rows() -> None:
    corpus, queries = corpus_and_queries(seed=5)
    index = LexicalIndex.build(corpus).tombstone(np.arange(1, 300, 2))
    remaining = corpus[::2]
    reference = rank_bm25.BM25Okapi(remaining, k1=1.2, b=0.75, epsilon=0.25)
    for query in queries:
        ours = index.match(query, k1=1.2, b=0.75, variant="okapi", epsilon=0.25).scores[::2]
        want = np.asarray(reference.get_scores(query), dtype=np.float64)
        contains = np.array([any(t in doc for t in query) for doc in remaining])
        np.testing.assert_allclose(ours[contains], want[contains], rtol=1e-5, atol=1e-9)
