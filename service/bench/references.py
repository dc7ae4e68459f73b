"""What a user would otherwise reach for, run on the same tokens and vectors as the index.

- ``rank_bm25.BM25Okapi``: ``get_scores`` then the top k by ``argpartition``. Its idf is the
  Robertson-Spärck Jones form with negative values replaced by ``epsilon`` times the mean idf,
  which is the index's ``okapi`` variant.
- ``bm25s.BM25(method="lucene")``: ``retrieve``. Its idf is ln(1 + (N - df + 0.5) / (df + 0.5)),
  the index's ``smoothed`` variant; its term weight leaves out BM25's constant factor
  ``k1 + 1``, so its scores are the index's divided by ``k1 + 1`` (same ranking).
- A numpy float32 full scan: the matrix-vector product and ``argpartition``, the memory
  bandwidth floor for exact search.
"""

from __future__ import annotations

import importlib
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

REFERENCE_LIBRARIES = ("rank_bm25", "bm25s")


def require_reference_libraries() -> None:
    """Refuse to start without the libraries the in-process run compares with."""
    missing = []
    for module in REFERENCE_LIBRARIES:
        try:
            importlib.import_module(module)
        except ImportError:
            missing.append(module)
    if missing:
        raise RuntimeError(
            f"the bench compares with {' and '.join(missing)}, which "
            f"{'is' if len(missing) == 1 else 'are'} not installed; install the bench extra: "
            "pip install -e '.[bench]' (in a checkout) or pip install 'excerpta[bench]'"
        )


def top_k(scores: np.ndarray, k: int) -> np.ndarray:
    """Positions of k best scores, best first, ties by ascending position among those chosen.

    Plain ``argpartition``: which of several scores tied at the cut are chosen is left to it,
    as a user's own full scan would; ``agreement`` accepts any choice among ties.
    """
    count = len(scores)
    chosen = np.argpartition(scores, count - k)[count - k :] if count > k else np.arange(count)
    return chosen[np.lexsort((chosen, -scores[chosen]))]


@dataclass(frozen=True, eq=False)
class TopK:
    rows: np.ndarray
    scores: np.ndarray


class RankBm25Okapi:
    def __init__(self, token_lists: Sequence[Sequence[str]], *, k1: float, b: float) -> None:
        from rank_bm25 import BM25Okapi

        self._model = BM25Okapi([list(tokens) for tokens in token_lists], k1=k1, b=b)

    def scores(self, query_tokens: Sequence[str]) -> np.ndarray:
        return np.asarray(self._model.get_scores(list(query_tokens)))

    def search(self, query_tokens: Sequence[str], k: int) -> TopK:
        scores = self.scores(query_tokens)
        rows = top_k(scores, k)
        return TopK(rows, scores[rows])


class Bm25sLucene:
    def __init__(self, token_lists: Sequence[list[str]], *, k1: float, b: float) -> None:
        import bm25s

        self._retriever = bm25s.BM25(k1=k1, b=b, method="lucene")
        self._retriever.index(list(token_lists), show_progress=False)

    def scores(self, query_tokens: Sequence[str]) -> np.ndarray:
        return np.asarray(self._retriever.get_scores(list(query_tokens)))

    def search(self, query_tokens: Sequence[str], k: int) -> TopK:
        rows, scores = self._retriever.retrieve([list(query_tokens)], k=k, show_progress=False)
        return TopK(np.asarray(rows[0]), np.asarray(scores[0]))


class NumpyFullScan:
    def __init__(self, vectors: np.ndarray) -> None:
        self._matrix = np.ascontiguousarray(vectors, dtype=np.float32)

    def scores(self, query: np.ndarray) -> np.ndarray:
        return np.asarray(self._matrix @ query)

    def search(self, query: np.ndarray, k: int) -> TopK:
        scores = self._matrix @ query
        rows = top_k(scores, k)
        return TopK(rows, scores[rows])


@dataclass(frozen=True)
class RankingAgreement:
    """How many queries' top k agree: in the very same order, and up to the order of ties.

    Up to ties means: both lists are as long (counting only positive reference scores), the
    scores agree position by position, and the reference gives our rows those same scores;
    so our list is a correct top k under the reference's scoring.
    """

    queries: int
    identical: int
    equal_up_to_ties: int

    @property
    def all_equal(self) -> bool:
        return self.equal_up_to_ties == self.queries

    def as_dict(self) -> dict[str, int | bool]:
        return {
            "queries": self.queries,
            "identical": self.identical,
            "equal_up_to_ties": self.equal_up_to_ties,
            "all_equal": self.all_equal,
        }


def agreement(
    ours: Sequence[TopK],
    references: Sequence[TopK],
    full_reference_scores: Sequence[np.ndarray],
    *,
    scale: float,
    positive_only: bool,
) -> RankingAgreement:
    """Compare rankings; ``scale`` maps our scores onto the reference's."""
    identical = 0
    equal = 0
    for mine, theirs, full in zip(ours, references, full_reference_scores, strict=True):
        keep = theirs.scores > 0 if positive_only else np.ones(len(theirs.rows), dtype=bool)
        ref_rows, ref_scores = theirs.rows[keep], theirs.scores[keep].astype(np.float64)
        if len(mine.rows) == len(ref_rows) and np.array_equal(mine.rows, ref_rows):
            identical += 1
        if len(mine.rows) != len(ref_rows):
            continue
        ours_scaled = mine.scores.astype(np.float64) * scale
        ours_by_reference = full[mine.rows].astype(np.float64)
        if np.allclose(ours_scaled, ref_scores, rtol=1e-4, atol=1e-6) and np.allclose(
            ours_by_reference, ref_scores, rtol=1e-4, atol=1e-6
        ):
            equal += 1
    return RankingAgreement(len(ours), identical, equal)
