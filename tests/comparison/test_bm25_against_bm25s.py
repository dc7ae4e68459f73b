"""Smoothed BM25 against the bm25s package (PyPI ``bm25s``, github.com/xhluca/bm25s).

Its ``method="lucene"`` uses the same idf, ln(1 + (N - df + 0.5) / (df + 0.5)), and the same
length normalisation, but leaves out the constant factor (k1 + 1); our scores are compared after
dividing it out. Both sides score the same token lists; the reference is computed in float64.
"""

import numpy as np
import pytest

bm25s = pytest.importorskip("bm25s")

from service.index.lexical import LexicalIndex  # noqa: E402


def corpus_and_queries(seed: int) -> tuple[list[list[str]], list[list[str]]]:
    rng = np.random.default_rng(seed)
    vocabulary = [f"w{i}" for i in range(300)]
    weights = 1 / np.arange(1, 301)
    weights /= weights.sum()
    corpus = [list(rng.choice(vocabulary, size=rng.integers(3, 60), p=weights)) for _ in range(400)]
    queries = [list(rng.choice(vocabulary, size=rng.integers(1, 6), p=weights)) for _ in range(30)]
    return corpus, queries


def reference_scores(corpus: list[list[str]], query: list[str], k1: float, b: float) -> np.ndarray:
    vocabulary = {token: i for i, token in enumerate(sorted({t for doc in corpus for t in doc}))}
    tokenized = bm25s.tokenization.Tokenized(
        ids=[[vocabulary[t] for t in doc] for doc in corpus], vocab=vocabulary
    )
    model = bm25s.BM25(method="lucene", k1=k1, b=b, dtype="float64")
    model.index(tokenized, show_progress=False)
    known = [t for t in query if t in vocabulary]
    if not known:
        return np.zeros(len(corpus))
    return np.asarray(model.get_scores(known), dtype=np.float64)


@pytest.mark.parametrize(("k1", "b"), [(1.2, 0.75), (0.9, 0.4), (2.0, 1.0)])
def test_smoothed_scores_equal_bm25s_after_the_k1_plus_one_factor(k1: float, b: float) -> None:
    corpus, queries = corpus_and_queries(seed=int(k1 * 10 + b * 100))
    index = LexicalIndex.build(corpus)
    for query in queries:
        ours = index.match(query, k1=k1, b=b, variant="smoothed")
        want = reference_scores(corpus, query, k1, b)
        np.testing.assert_allclose(ours.scores / (k1 + 1), want, rtol=1e-5, atol=1e-9)
        assert np.array_equal(ours.present, want > 0)


def test_scores_after_deletions_equal_bm25s_on_the_remaining_rows() -> None:
    corpus, queries = corpus_and_queries(seed=11)
    deleted = np.arange(0, 400, 3)
    index = LexicalIndex.build(corpus).tombstone(deleted)
    remaining = [doc for row, doc in enumerate(corpus) if row % 3]
    kept_rows = np.flatnonzero(np.arange(400) % 3)
    for query in queries:
        ours = index.match(query)
        want = reference_scores(remaining, query, 1.2, 0.75)
        np.testing.assert_allclose(ours.scores[kept_rows] / 2.2, want, rtol=1e-5, atol=1e-9)
        assert not ours.present[deleted].any()
