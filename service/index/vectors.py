"""Exact similarity search over a float32 embedding matrix aligned with the index rows.

Metrics: ``cosine`` (rows are normalised when inserted and the query when it arrives, so the
score is a dot product), ``dot``, and ``euclidean`` (score = minus the distance, computed from
precomputed squared row norms as sqrt(|x|^2 - 2 x.q + |q|^2), so larger is closer).

Two ways to score a candidate set: multiply the whole matrix and keep the candidates' scores,
or gather the candidate rows and multiply only those. Gathering copies rows scattered over
memory, so it only wins when few rows are wanted; ``GATHER_BELOW_FRACTION`` is the cut-over,
timed against a full scan at 100,000 x 384: gathering wins clearly at a tenth of the rows,
barely at a fifth, and loses at a quarter, slowing sharply once the gathered rows outgrow the
cache.

Both ways must give a row the same score, bit for bit, so that filtering never changes a score
or breaks a tie differently. The BLAS matrix-vector kernel computes rows in blocks and treats a
trailing partial block (and a thread's share that is not a whole number of blocks) with
different code, whose rounding differs in the last bit. Every product here therefore runs on a
row count that is a multiple of ``ROW_BLOCK``: the matrix keeps that many rows of capacity
(the padding is read and its scores dropped), and a gathered set is padded with copies of its
first row.

A full scan can be begun ahead of its use (``begin_full_scan``): it runs on a scan thread, and
the matrix product releases the interpreter lock, so the scan proceeds beside the Python work of
its query. The products are computed by the same expression either way, so they are equal bit
for bit. A gather can be begun the same way (``gather`` on a scan thread: copying rows releases
the lock too), and its copy kept to score a second query over the same candidates
(``GatheredRows``), as a query refined from its own first results is: the copy, not the
product, is most of a gather's cost.

The matrix only grows by appending, into a buffer whose capacity doubles; see ``buffers``.
"""

from __future__ import annotations

import os
from collections.abc import Callable
from concurrent.futures import Future, ThreadPoolExecutor
from dataclasses import dataclass
from typing import Literal, TypeVar

import numpy as np

from service.index.buffers import round_up, write_rows

T = TypeVar("T")
Metric = Literal["cosine", "dot", "euclidean"]
METRICS: tuple[Metric, ...] = ("cosine", "dot", "euclidean")
ROW_BLOCK = 64
GATHER_BELOW_FRACTION = 0.15
# Scans begun ahead run on these threads, started as needed; more would only share two cores.
SCAN_THREADS = 8


def _scan_pool() -> ThreadPoolExecutor:
    return ThreadPoolExecutor(SCAN_THREADS, thread_name_prefix="excerpta-scan")


_scans = _scan_pool()


def _fresh_scan_pool_after_fork() -> None:
    # A forked child has none of its parent's threads, so the inherited pool would never run.
    global _scans
    _scans = _scan_pool()


os.register_at_fork(after_in_child=_fresh_scan_pool_after_fork)


def on_scan_thread(call: Callable[[], T]) -> Future[T]:
    """Run ``call`` on a scan thread (for work that releases the interpreter lock)."""
    return _scans.submit(call)


@dataclass(frozen=True, eq=False)
class GatheredRows:
    """Candidate rows (ascending) and a copy of them, padded to whole blocks with copies of the
    first, that any number of queries can be scored over (``VectorMatrix.score_gathered``)."""

    rows: np.ndarray
    block: np.ndarray


class VectorMatrix:
    """Immutable view of the first ``n_rows`` rows of a shared, append-only buffer."""

    def __init__(
        self,
        *,
        metric: Metric,
        dimension: int,
        buffer: np.ndarray,
        squared_norms: np.ndarray,
        n_rows: int,
    ) -> None:
        self.metric: Metric = metric
        self.dimension = dimension
        self._buffer = buffer
        self._squared_norms = squared_norms
        self._n_rows = n_rows

    @classmethod
    def empty(cls, *, metric: Metric, dimension: int) -> VectorMatrix:
        if metric not in METRICS:
            raise ValueError(f"unknown metric {metric!r}")
        if dimension < 1:
            raise ValueError("the vector dimension must be positive")
        return cls(
            metric=metric,
            dimension=dimension,
            buffer=np.zeros((0, dimension), dtype=np.float32),
            squared_norms=np.zeros(0, dtype=np.float32),
            n_rows=0,
        )

    @classmethod
    def build(cls, vectors: np.ndarray, *, metric: Metric, dimension: int) -> VectorMatrix:
        return cls.empty(metric=metric, dimension=dimension).append(vectors)

    @property
    def n_rows(self) -> int:
        return self._n_rows

    @property
    def rows(self) -> np.ndarray:
        """The stored rows (normalised for cosine), read-only."""
        view = self._buffer[: self._n_rows].view()
        view.flags.writeable = False
        return view

    @property
    def nbytes(self) -> int:
        return int(self._buffer.nbytes + self._squared_norms.nbytes)

    @property
    def padded_rows(self) -> np.ndarray:
        """The rows with the padding every product reads (to a multiple of ``ROW_BLOCK``)."""
        view = self._buffer[: round_up(self._n_rows, ROW_BLOCK)].view()
        view.flags.writeable = False
        return view

    @property
    def squared_norms(self) -> np.ndarray:
        return self._squared_norms[: self._n_rows]

    @classmethod
    def restored(
        cls, padded_rows: np.ndarray, squared_norms: np.ndarray, *, metric: Metric, dimension: int
    ) -> VectorMatrix:
        """A matrix over rows saved from ``padded_rows`` and ``squared_norms`` (taken as they
        are, so rows mapped from a file stay there); raises ``ValueError`` when they do not fit.
        """
        n_rows = len(squared_norms)
        if metric not in METRICS:
            raise ValueError(f"unknown metric {metric!r}")
        if padded_rows.shape != (round_up(n_rows, ROW_BLOCK), dimension):
            raise ValueError("the saved vectors do not have the index's shape")
        if padded_rows.dtype != np.float32 or squared_norms.dtype != np.float32:
            raise ValueError("the saved vectors are not float32")
        return cls(
            metric=metric,
            dimension=dimension,
            buffer=padded_rows,
            squared_norms=squared_norms,
            n_rows=n_rows,
        )

    def append(self, vectors: np.ndarray) -> VectorMatrix:
        """A new version with ``vectors`` (one per row) after the existing rows."""
        vectors = np.asarray(vectors, dtype=np.float32).reshape(-1, self.dimension)
        if len(vectors) == 0:
            return self
        if not np.isfinite(vectors).all():
            raise ValueError("vectors must be finite")
        wide = vectors.astype(np.float64)
        if self.metric == "cosine":
            norms = np.linalg.norm(wide, axis=1, keepdims=True)
            wide = wide / np.where(norms == 0, 1.0, norms)
            vectors = wide.astype(np.float32)
        squared = np.einsum("ij,ij->i", wide, wide).astype(np.float32)
        buffer = write_rows(self._buffer, self._n_rows, vectors, capacity_multiple=ROW_BLOCK)
        squared_norms = write_rows(self._squared_norms, self._n_rows, squared)
        return VectorMatrix(
            metric=self.metric,
            dimension=self.dimension,
            buffer=buffer,
            squared_norms=squared_norms,
            n_rows=self._n_rows + len(vectors),
        )

    def take(self, rows: np.ndarray) -> VectorMatrix:
        """A new matrix of the given rows in that order (for compaction)."""
        count = len(rows)
        buffer = np.zeros((round_up(count, ROW_BLOCK), self.dimension), dtype=np.float32)
        buffer[:count] = self._buffer[rows]
        return VectorMatrix(
            metric=self.metric,
            dimension=self.dimension,
            buffer=buffer,
            squared_norms=self._squared_norms[rows],
            n_rows=count,
        )

    def prepare_query(self, vector: np.ndarray | list[float]) -> np.ndarray:
        """The query as float32 of the right dimension, normalised for cosine."""
        query = np.asarray(vector, dtype=np.float64).reshape(-1)
        if query.shape[0] != self.dimension:
            raise ValueError(f"a query vector needs {self.dimension} numbers, not {query.shape[0]}")
        if not np.isfinite(query).all():
            raise ValueError("a query vector must hold finite numbers")
        if self.metric == "cosine":
            norm = float(np.linalg.norm(query))
            if norm == 0:
                raise ValueError("a query vector must not be all zeros for cosine similarity")
            query = query / norm
        return query.astype(np.float32)

    def scans_every_row(self, candidates: int) -> bool:
        """Whether ``score`` multiplies the whole matrix for this many candidates."""
        return candidates >= GATHER_BELOW_FRACTION * self._n_rows

    def begin_full_scan(self, query: np.ndarray) -> Future[np.ndarray]:
        """Every row's product with ``query`` (from ``prepare_query``), on a scan thread."""
        return _scans.submit(self._full_products, query)

    def score(
        self,
        query: np.ndarray,
        candidate_mask: np.ndarray,
        full_scan: Future[np.ndarray] | None = None,
    ) -> tuple[np.ndarray, np.ndarray]:
        """Rows where ``candidate_mask`` is true (ascending) and their scores (float32).

        ``query`` is what ``prepare_query`` returned; ``full_scan``, when given, is
        ``begin_full_scan(query)`` and is used where every row is scanned.
        """
        rows = self._candidate_rows(candidate_mask)
        count = len(rows)
        if count == 0:
            return rows, np.zeros(0, dtype=np.float32)
        if not self.scans_every_row(count):
            return self.score_gathered(query, self._gather(rows))
        products = self._full_products(query) if full_scan is None else full_scan.result()
        if count < self._n_rows:
            products = products[rows]
        return rows, self._finish(products, rows, query)

    def scans_from(self, first: int, candidates: int) -> bool:
        """Whether ``score_from(first, ...)`` multiplies every row from ``first`` on for this
        many candidates among them."""
        return candidates >= GATHER_BELOW_FRACTION * (self._n_rows - first)

    def score_from(
        self, query: np.ndarray, first: int, candidate_mask: np.ndarray
    ) -> tuple[np.ndarray, np.ndarray]:
        """``score`` over the rows from ``first`` on (``candidate_mask`` has one entry for each
        of them): the rows (numbered from 0) and their scores, equal to the bit to ``score``'s.

        Those rows lie together at the end of the matrix (a graph's tail), so where the
        candidates are not few among them they are multiplied in one product over the span,
        at a scan's cost a row, instead of being gathered one by one.
        """
        n = self._n_rows
        if not 0 <= first <= n or candidate_mask.shape != (n - first,):
            raise ValueError(f"the candidate mask must cover rows {first} to {n}")
        if candidate_mask.dtype != np.bool_:
            raise ValueError("the candidate mask must be boolean")
        picked = np.flatnonzero(candidate_mask)
        rows = picked + first
        if len(picked) == 0:
            return rows, np.zeros(0, dtype=np.float32)
        if not self.scans_from(first, len(picked)):
            return self.score_gathered(query, self._gather(rows))
        # The span starts on a block boundary and ends on the padding's, so every row is
        # computed in a whole block, as in every other product here.
        start = first - first % ROW_BLOCK
        products = (self._buffer[start : round_up(n, ROW_BLOCK)] @ query)[first - start :]
        return rows, self._finish(products[picked], rows, query)

    def gather(self, candidate_mask: np.ndarray) -> GatheredRows:
        """The rows where ``candidate_mask`` is true, copied out for ``score_gathered``."""
        return self._gather(self._candidate_rows(candidate_mask))

    def score_gathered(
        self, query: np.ndarray, gathered: GatheredRows
    ) -> tuple[np.ndarray, np.ndarray]:
        """``score`` over the gathered rows, equal to it bit for bit (the same padded product)."""
        rows = gathered.rows
        if len(rows) == 0:
            return rows, np.zeros(0, dtype=np.float32)
        products = (gathered.block @ query)[: len(rows)]
        return rows, self._finish(products, rows, query)

    def _candidate_rows(self, candidate_mask: np.ndarray) -> np.ndarray:
        n = self._n_rows
        if candidate_mask.shape != (n,) or candidate_mask.dtype != np.bool_:
            raise ValueError(f"the candidate mask must be a boolean array of length {n}")
        return np.flatnonzero(candidate_mask)

    def _gather(self, rows: np.ndarray) -> GatheredRows:
        count = len(rows)
        if count == 0:
            return GatheredRows(rows, np.zeros((0, self.dimension), dtype=np.float32))
        padded = np.full(round_up(count, ROW_BLOCK), rows[0], dtype=np.int64)
        padded[:count] = rows
        return GatheredRows(rows, np.take(self._buffer, padded, axis=0))

    def _full_products(self, query: np.ndarray) -> np.ndarray:
        n = self._n_rows
        return (self._buffer[: round_up(n, ROW_BLOCK)] @ query)[:n]

    def _finish(self, products: np.ndarray, rows: np.ndarray, query: np.ndarray) -> np.ndarray:
        if self.metric != "euclidean":
            return products
        query_squared = np.float32(np.dot(query.astype(np.float64), query))
        squared = self._squared_norms[rows] - np.float32(2) * products + query_squared
        return -np.sqrt(np.maximum(squared, np.float32(0)))
